//! Joint rates into momenta: a log read as (q, v) (joint rates without
//! masses, [`crate::data::columns::RigSummary::rates_without_masses`])
//! turned into (q, p) by a given p(q, v) (a learned mass matrix, or a
//! fitted model's own), with dp/dt estimated from the new momenta by the
//! log's Savitzky-Golay filter (dq/dt kept).

use anyhow::{bail, Result};
use ndarray::{s, Array1};

use crate::data::dataset::{Dataset, DerivativeSource, Trajectory};
use crate::data::derivative::SavitzkyGolay;

/// `ds` with p = `momenta`(q rows, v rows) in place of v and dp/dt
/// re-estimated; `momenta` gets one trajectory's positions and rates
/// (samples x n each) and returns its momenta (samples x n).
pub fn with_momenta(
    ds: &Dataset,
    filter: &SavitzkyGolay,
    momenta: impl Fn(&Trajectory) -> Result<ndarray::Array2<f64>>,
) -> Result<Dataset> {
    let trajectories = ds
        .trajectories
        .iter()
        .map(|t| trajectory_with_momenta(t, ds.dof, filter, momenta(t)?))
        .collect::<Result<_>>()?;
    Ok(Dataset {
        trajectories,
        derivatives: DerivativeSource::Estimated,
        ..ds.clone()
    })
}

fn trajectory_with_momenta(
    t: &Trajectory,
    n: usize,
    filter: &SavitzkyGolay,
    p: ndarray::Array2<f64>,
) -> Result<Trajectory> {
    let mut x = t.x.clone();
    x.slice_mut(s![.., n..]).assign(&p);
    let dt = (t.t[t.t.len() - 1] - t.t[0]) / (t.t.len().max(2) - 1) as f64;
    let mut dx = t.dx.clone();
    for i in 0..n {
        let column: Vec<f64> = x.column(n + i).to_vec();
        let Some(dp) = filter.derivative(&column, dt) else {
            bail!(
                "trajectory '{}' has {} samples, fewer than the derivative filter's {}",
                t.id,
                column.len(),
                filter.window()
            );
        };
        dx.column_mut(n + i).assign(&Array1::from(dp));
    }
    Ok(Trajectory { x, dx, ..t.clone() })
}
