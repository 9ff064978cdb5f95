//! A machine that changes mid-log (fault scenarios for the health monitor):
//! a conservative system runs with its own parameters until time `at`, then
//! with changed ones, the state (q, p) continuous across the change. The
//! initial states come from the same seeded sampler as [`simulate`], so a
//! changed log and a healthy log of the same seed start alike.
//!
//! [`simulate`]: crate::reference::simulate::simulate

use anyhow::{bail, Result};
use ndarray::{s, Array2};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use crate::data::dataset::Dataset;
use crate::reference::simulate::{autonomous_dataset, exact_trajectory, integrate, SimulationSpec};
use crate::reference::ReferenceSystem;

/// Trajectories of `before` that continue as `after` from time `at` (s).
pub fn simulate_changed(
    before: &dyn ReferenceSystem,
    after: &dyn ReferenceSystem,
    at: f64,
    spec: &SimulationSpec,
) -> Result<Dataset> {
    if before.has_port_terms() || after.has_port_terms() {
        bail!("--change-at: only conservative systems can change mid-log");
    }
    if !(at.is_finite() && at > 0.0 && at < spec.duration) {
        bail!(
            "--change-at {at}: must lie inside the trajectory (0, {})",
            spec.duration
        );
    }
    let mut rng = ChaCha8Rng::seed_from_u64(spec.seed);
    let times = spec.sample_times();
    let split = times.iter().position(|t| *t > at).unwrap_or(times.len());
    let n = before.dof();
    let mut trajectories = Vec::with_capacity(spec.trajectories);
    for index in 0..spec.trajectories {
        let x0 = before.sample_initial_state(&mut rng);
        let mut first: Vec<f64> = times[..split].to_vec();
        first.push(at);
        let a = integrate(before, &x0, &first)?;
        let x_at = a.row(split).to_vec();
        let mut second = vec![at];
        second.extend_from_slice(&times[split..]);
        let b = integrate(after, &x_at, &second)?;
        let mut x = Array2::zeros((times.len(), 2 * n));
        x.slice_mut(s![..split, ..])
            .assign(&a.slice(s![..split, ..]));
        x.slice_mut(s![split.., ..]).assign(&b.slice(s![1.., ..]));
        let system_at = |k: usize| if k < split { before } else { after };
        trajectories.push(exact_trajectory(index, &times, x, system_at));
    }
    Ok(autonomous_dataset(n, trajectories))
}
