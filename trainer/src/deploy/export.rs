//! Export: turn a fitted model into a device blob (weight storage and
//! integrator) and measure what that costs in bytes and in accuracy before
//! anything is flashed. The two rollouts of each check run side by side and
//! keep only running maxima, so memory does not grow with the check steps.

use anyhow::{bail, Result};
use serde::{Deserialize, Serialize};

use crate::deploy::blob::HOST_MAX_DOF;
use crate::deploy::blob::{BlobModel, HostModel, WeightKind};
use crate::deploy::convergence::{prove, ConvergenceProof, TrainingRange};
use crate::deploy::integrator::{method_name, IntegratorOverrides};
use crate::deploy::rollout::{sample_states, state_of};
use crate::interrupt::Watch;
use visviva_runtime::{Hamiltonian, State};

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
    /// For an implicit method: the convergence proof over the training
    /// range (the largest iteration count its steps needed).
    #[serde(default)]
    pub convergence: Option<ConvergenceProof>,
    /// For an int8 blob quantized from quantization-aware fine-tuned
    /// weights: what the fine-tuning did (`learn::qat`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub qat: Option<crate::learn::qat::QatSummary>,
}

/// What the check rollouts of an export are: `steps` steps from `states`
/// seeded states, and the convergence proof of an implicit step over
/// `range`, whose refusal names the settings to change through `key`
/// (`max_iterations` -> `--max-iterations` or `max_iterations`).
pub struct ExportCheck<'a> {
    /// Steps of each check rollout.
    pub steps: usize,
    /// Seeded starting states of the check rollouts.
    pub states: usize,
    /// The range the convergence proof spans.
    pub range: &'a TrainingRange,
    /// A setting's name as the user sets it, for the refusal.
    pub key: &'a dyn Fn(&str) -> String,
}

/// Export `model` as `kind` with `args` overrides, measuring the cost.
/// An implicit step that does not converge under the blob's iteration
/// limit from a state of the training range is an error naming the state
/// (nothing is measured further).
pub fn export(
    src: &BlobModel,
    kind: WeightKind,
    ia: &IntegratorOverrides,
    check: &ExportCheck<'_>,
) -> Result<(Vec<u8>, ExportReport)> {
    export_from(src, src, kind, ia, check)
}

/// [`export`] of `weights` (the same model with other weights, e.g.
/// fine-tuned for int8), measured against the f32 model `src`.
pub fn export_from(
    src: &BlobModel,
    weights: &BlobModel,
    kind: WeightKind,
    ia: &IntegratorOverrides,
    check: &ExportCheck<'_>,
) -> Result<(Vec<u8>, ExportReport)> {
    let (steps, states) = (check.steps, check.states);
    let mut out = weights.converted(kind);
    out.integrator = ia.apply(src.integrator);
    let bytes = out.to_bytes()?;
    let reference_bytes = BlobModel {
        integrator: out.integrator,
        ..src.clone()
    }
    .to_bytes()?;
    let exported = HostModel::from_bytes(&bytes).map_err(|e| anyhow::anyhow!("{e}"))?;
    let reference = HostModel::from_bytes(&reference_bytes).map_err(|e| anyhow::anyhow!("{e}"))?;
    let watch = Watch::new();
    let convergence = prove_convergence(&exported, check, watch)?;
    let mut dev = 0.0f64;
    let (mut drift_ref, mut drift_exp) = (0.0f64, 0.0f64);
    let mut failed = 0;
    for x0 in sample_states(&src.offset, &src.scale, 1.0, states, 0x7676_6578) {
        let p = paired(&reference, &exported, &x0, steps, &src.scale, watch)?;
        failed += p.failed;
        dev = dev.max(p.deviation);
        drift_ref = drift_ref.max(p.excursion[0] / src.energy_scale as f64);
        drift_exp = drift_exp.max(p.excursion[1] / src.energy_scale as f64);
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
        convergence,
        qat: None,
    };
    Ok((bytes, report))
}

/// The convergence proof of `model`'s implicit step over the check's range
/// (None for an explicit method); an error naming the state when it fails.
fn prove_convergence(
    model: &HostModel<'_>,
    check: &ExportCheck<'_>,
    watch: Watch,
) -> Result<Option<ConvergenceProof>> {
    let it = model.integrator();
    match prove(model, check.range, watch)? {
        None => Ok(None),
        Some(Ok(proof)) => Ok(Some(proof)),
        Some(Err(failure)) => {
            let settings = format!(
                "{} with dt = {} s x {} substeps, tolerance {:e}",
                method_name(it.method),
                it.dt,
                it.substeps,
                it.tolerance
            );
            bail!(
                "{}",
                failure.message(&settings, it.max_iterations, check.key)
            )
        }
    }
}

/// What one pair of rollouts (reference and exported blob, same start)
/// measured.
struct Paired {
    /// Largest |a - b| / scale over the steps both completed.
    deviation: f64,
    /// Largest |H(t) - H(0)| of each rollout while it ran.
    excursion: [f64; 2],
    /// Rollouts of the two that stopped with an error.
    failed: usize,
}

/// Step `a` and `b` from `x0` side by side for `steps` steps, keeping only
/// running maxima; a rollout that fails stops there, the other goes on.
fn paired(
    a: &HostModel<'_>,
    b: &HostModel<'_>,
    x0: &[f32],
    steps: usize,
    scale: &[f32],
    watch: Watch,
) -> Result<Paired> {
    let models = [a, b];
    let mut s: [State<HOST_MAX_DOF>; 2] = [state_of(x0)?, state_of(x0)?];
    let e0 = [energy(a, &s[0])?, energy(b, &s[1])?];
    let mut alive = [true, true];
    let mut out = Paired {
        deviation: 0.0,
        excursion: [0.0, 0.0],
        failed: 0,
    };
    for k in 0..steps {
        if k % 4096 == 0 {
            watch.check()?;
        }
        for i in 0..2 {
            if alive[i] && models[i].step(&mut s[i]).is_err() {
                alive[i] = false;
                out.failed += 1;
            }
            if alive[i] {
                if let Ok(e) = models[i].energy(&s[i]) {
                    out.excursion[i] = out.excursion[i].max((e as f64 - e0[i] as f64).abs());
                }
            }
        }
        if alive == [false, false] {
            break;
        }
        if alive == [true, true] {
            let [sa, sb] = &s;
            let va = sa.q().iter().chain(sa.p());
            let vb = sb.q().iter().chain(sb.p());
            for ((x, y), sc) in va.zip(vb).zip(scale) {
                out.deviation = out
                    .deviation
                    .max((*x as f64 - *y as f64).abs() / *sc as f64);
            }
        }
    }
    Ok(out)
}

/// The learned energy at `s`, as an error when it cannot be evaluated.
fn energy(m: &HostModel<'_>, s: &State<HOST_MAX_DOF>) -> Result<f32> {
    m.energy(s).map_err(|e| anyhow::anyhow!("{e}"))
}
