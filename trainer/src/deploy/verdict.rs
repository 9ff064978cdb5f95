//! Whether an export's own measurements allow trusting the blob. The export
//! rolls the blob out from states inside the fitted range; when those
//! rollouts stop with an error, produce non-finite numbers, or move the
//! learned energy by more than the motion's own energy, the integrator
//! settings do not follow the model, and the export is refused rather than
//! written (and never judged against the device budget).

use anyhow::{bail, Result};

use crate::deploy::export::ExportReport;

/// Largest learned-energy excursion |H(t) - H(0)| accepted over the check
/// rollouts of a conservative model, in energy scales (the model's typical
/// energy over the fitted range): its energy is conserved, so an excursion
/// as large as the motion's own energy means the steps do not follow the
/// model. The demo models' f32 and int8 exports measured 3e-4 to 0.094.
pub const DRIFT_LIMIT: f64 = 1.0;

/// The same for a damped or driven model, whose energy falls (inputs are
/// zero in the check) by up to its starting energy above rest: the servo
/// demo's exports measured 8.4 energy scales over 10^4 steps.
pub const PORT_DRIFT_LIMIT: f64 = 100.0;

/// Refuse an export whose check rollouts failed, gave non-finite numbers or
/// drifted beyond [`DRIFT_LIMIT`] ([`PORT_DRIFT_LIMIT`] when `port`: the
/// model has damping or inputs).
pub fn refuse_untrusted(r: &ExportReport, port: bool) -> Result<()> {
    let limit = if port { PORT_DRIFT_LIMIT } else { DRIFT_LIMIT };
    let settings = format!(
        "{} with dt = {} s x {} substeps",
        r.integrator, r.dt, r.substeps
    );
    if r.failed_rollouts > 0 {
        bail!(
            "{} check rollouts from states inside the fitted range stopped with an error: \
             {settings} cannot step this model; choose a smaller dt or more substeps \
             (nothing was written)",
            r.failed_rollouts
        );
    }
    let figures = [
        r.energy_drift_reference,
        r.energy_drift_exported,
        r.max_state_deviation,
    ];
    if figures.iter().any(|v| !v.is_finite()) {
        bail!(
            "the check rollouts with {settings} gave non-finite states or energies \
             (nothing was written)"
        );
    }
    let drift = r.energy_drift_reference.max(r.energy_drift_exported);
    if drift > limit {
        bail!(
            "the learned energy drifts by {drift:.3e} energy scales over {} steps with \
             {settings} (at most {limit} is accepted): these settings do not follow \
             the model; choose a smaller dt or more substeps (nothing was written)",
            r.check_steps
        );
    }
    Ok(())
}
