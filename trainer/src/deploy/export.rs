//! Export: turn a fitted model into a device blob (weight storage and
//! integrator) and measure what that costs in bytes and in accuracy before
//! anything is flashed.

use anyhow::Result;
use serde::{Deserialize, Serialize};

use crate::deploy::blob::{BlobModel, HostModel, WeightKind};
use crate::deploy::integrator::{method_name, IntegratorOverrides};
use crate::deploy::rollout::{roll, sample_states};

/// What an export cost.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct ExportReport {
    /// Blob size in bytes.
    pub bytes: usize,
    /// Learned parameters.
    pub parameters: usize,
    /// Bytes per parameter.
    pub bytes_per_parameter: f64,
    /// Weight storage.
    pub weights: WeightKind,
    /// Integration method.
    pub integrator: String,
    /// Time step in seconds.
    pub dt: f32,
    /// Substeps per step.
    pub substeps: u16,
    /// Multiply-accumulates per gradient.
    pub macs_per_gradient: u32,
    /// Multiply-accumulates per step (bound for implicit midpoint).
    pub macs_per_step: u32,
    /// Rollout steps used for the accuracy measures.
    pub check_steps: usize,
    /// Largest deviation of this blob's rollout from the f32 model's, over
    /// all states and steps, per coordinate in units of its normalization
    /// scale (0 when the export is f32 with the same integrator).
    pub max_state_deviation: f64,
    /// Largest learned-energy excursion |H(t)-H(0)| / energy scale of the
    /// f32 model's rollouts.
    pub energy_drift_reference: f64,
    /// The same for the exported blob.
    pub energy_drift_exported: f64,
    /// Rollouts that stopped with an error (step too large, divergence).
    pub failed_rollouts: usize,
}

/// Export `model` as `kind` with `args` overrides, measuring the cost.
pub fn export(
    src: &BlobModel,
    kind: WeightKind,
    ia: &IntegratorOverrides,
    steps: usize,
    states: usize,
) -> Result<(Vec<u8>, ExportReport)> {
    let mut out = src.converted(kind);
    out.integrator = ia.apply(src.integrator);
    let bytes = out.to_bytes()?;
    let reference_bytes = BlobModel {
        integrator: out.integrator,
        ..src.clone()
    }
    .to_bytes()?;
    let exported = HostModel::from_bytes(&bytes).map_err(|e| anyhow::anyhow!("{e}"))?;
    let reference = HostModel::from_bytes(&reference_bytes).map_err(|e| anyhow::anyhow!("{e}"))?;
    let mut dev = 0.0f64;
    let (mut drift_ref, mut drift_exp) = (0.0f64, 0.0f64);
    let mut failed = 0;
    for x0 in sample_states(&src.offset, &src.scale, 1.0, states, 0x7676_6578) {
        let a = roll(&reference, &x0, steps)?;
        let b = roll(&exported, &x0, steps)?;
        failed += a.failure.is_some() as usize + b.failure.is_some() as usize;
        for (sa, sb) in a.states.iter().zip(&b.states) {
            for ((va, vb), s) in sa.iter().zip(sb).zip(&src.scale) {
                dev = dev.max(((*va as f64) - (*vb as f64)).abs() / *s as f64);
            }
        }
        drift_ref = drift_ref.max(a.energy_excursion() / src.energy_scale as f64);
        drift_exp = drift_exp.max(b.energy_excursion() / src.energy_scale as f64);
    }
    let cost = exported.cost();
    let params = out.parameters();
    let report = ExportReport {
        bytes: bytes.len(),
        parameters: params,
        bytes_per_parameter: bytes.len() as f64 / params.max(1) as f64,
        weights: kind,
        integrator: method_name(out.integrator.method).to_string(),
        dt: out.integrator.dt,
        substeps: out.integrator.substeps,
        macs_per_gradient: cost.macs_per_gradient,
        macs_per_step: cost.macs_per_step,
        check_steps: steps,
        max_state_deviation: dev,
        energy_drift_reference: drift_ref,
        energy_drift_exported: drift_exp,
        failed_rollouts: failed,
    };
    Ok((bytes, report))
}
