//! An exported blob judged against the held-out logs, not only against the
//! model it was exported from: the same rollouts `check` runs for the
//! fitted model, with the blob's own weights and integrator (int8 blobs
//! included), giving its median state error, its state errors at the
//! chosen horizons and, for a conservative blob, its learned-energy drift.
//! The report sets them beside the fitted model's, so a user choosing int8
//! sees what it costs against the data.

use anyhow::{anyhow, Result};
use serde::{Deserialize, Serialize};
use visviva_runtime::Hamiltonian;

use crate::data::dataset::Dataset;
use crate::deploy::blob::{BlobModel, HostModel};
use crate::evidence::check::{check, check_port, driven_horizons, CheckSettings};
use crate::evidence::horizons::{summarize, HorizonError};
use crate::reference::ReferenceSystem;

/// One blob's figures on the held-out logs.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct HeldOut {
    /// Median over the held-out trajectories of the state relative RMSE
    /// (the driven rollout's for a damped or driven blob).
    pub state_rel_rmse: f64,
    /// Median learned-energy drift (conservative blobs).
    pub learned_energy_drift: Option<f64>,
    /// Median state error at each chosen horizon (`None`: no trajectory
    /// reached it).
    pub horizons: Vec<HeldOutHorizon>,
}

/// The blob's median state error at one horizon.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct HeldOutHorizon {
    /// The horizon (s).
    pub seconds: f64,
    /// Median error over the trajectories that reach it.
    pub state_rel_rmse: Option<f64>,
}

/// `bytes` (an exported blob) on `val` with the check's `settings`.
pub fn held_out(
    bytes: &[u8],
    val: &Dataset,
    reference: Option<&dyn ReferenceSystem>,
    settings: &CheckSettings,
) -> Result<HeldOut> {
    let model = HostModel::from_bytes(bytes).map_err(|e| anyhow!("{e}"))?;
    if model.has_port_terms() {
        let blob = BlobModel::from_bytes(bytes).map_err(|e| anyhow!("{e}"))?;
        return driven(&model, &blob, val, &settings.horizons);
    }
    let r = check(&model, None, val, reference, settings)?;
    Ok(HeldOut {
        state_rel_rmse: r.median_model.state_rel_rmse,
        learned_energy_drift: r.median_model.learned_energy_drift,
        horizons: at_horizons(&r.horizons),
    })
}

/// A damped or driven blob: its driven rollouts' errors.
fn driven(
    model: &HostModel<'_>,
    blob: &BlobModel,
    val: &Dataset,
    horizons: &[f64],
) -> Result<HeldOut> {
    let r = check_port(model, blob, val)?;
    let per: Vec<Vec<HorizonError>> = r
        .rollouts
        .iter()
        .zip(&val.trajectories)
        .map(|(m, t)| driven_horizons(t, m, None, horizons))
        .collect();
    let slices: Vec<&[HorizonError]> = per.iter().map(Vec::as_slice).collect();
    let errors: Vec<f64> = r.rollouts.iter().map(|m| m.state_rel_rmse).collect();
    Ok(HeldOut {
        state_rel_rmse: crate::evidence::check::median(errors),
        learned_energy_drift: None,
        horizons: at_horizons(&summarize(&slices, horizons, false)),
    })
}

fn at_horizons(summary: &[crate::evidence::horizons::HorizonSummary]) -> Vec<HeldOutHorizon> {
    summary
        .iter()
        .map(|h| HeldOutHorizon {
            seconds: h.seconds,
            state_rel_rmse: h.median_model,
        })
        .collect()
}
