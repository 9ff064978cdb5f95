//! A log read for a fitted model (its check or its observer's tuning): by
//! the canonical loader, or, for joint rates without masses (a
//! `t,q1..,v1..` log and no masses given), read as (q, v) and turned into
//! momenta by the model's own mass matrix p = M(q) v (the one its fit
//! learned, [`crate::data::rates`]); a model without a mass matrix is
//! refused, naming the log, the trajectory and the sample.

use std::path::Path;

use anyhow::{bail, Context, Result};
use ndarray::{Array1, Array2};

use crate::data::dataset::{Dataset, Trajectory};
use crate::data::log::{load_csv, LoadOptions};
use crate::deploy::blob::HostModel;

/// What the callers print when a log's rates were converted.
pub const CONVERTED: &str =
    "joint rates without masses: momenta p = M(q) v from the model's own mass matrix";

/// The log at `path` for `model`, and whether its rates were converted.
pub fn load(path: &Path, model: &HostModel<'_>, opts: &LoadOptions) -> Result<(Dataset, bool)> {
    if opts.masses.is_some() || crate::data::columns::rates_layout(path).is_none() {
        return Ok((load_csv(path, opts)?, false));
    }
    let (rates, _) = crate::data::columns::load_any(path, None, opts)?;
    let n = rates.dof;
    if n != model.dof() {
        bail!(
            "{}: {n} degrees of freedom, but the model has {}",
            path.display(),
            model.dof()
        );
    }
    let data = crate::data::rates::with_momenta(&rates, &opts.filter, |t| {
        model_momenta(model, t, n).with_context(|| format!("{}", path.display()))
    })?;
    Ok((data, true))
}

/// p = M(q) v at every sample of `t` by the model's mass matrix.
fn model_momenta(model: &HostModel<'_>, t: &Trajectory, n: usize) -> Result<Array2<f64>> {
    let mut out = Array2::zeros((t.x.nrows(), n));
    for (k, row) in t.x.rows().into_iter().enumerate() {
        let q: Vec<f32> = row.iter().take(n).map(|v| *v as f32).collect();
        let v: Vec<f32> = row.iter().skip(n).map(|v| *v as f32).collect();
        let mut p = vec![0.0f32; n];
        model
            .momentum_from_velocity_at(&q, &v, &mut p)
            .with_context(|| {
                format!(
                    "trajectory '{}', sample {}: the joint rates cannot be turned into momenta: \
                     the model has no mass matrix (a network kinetic term or a general energy \
                     H(q, p)), or the state is not finite; give the masses or a log with p \
                     columns",
                    t.id,
                    k + 1
                )
            })?;
        out.row_mut(k)
            .assign(&Array1::from_iter(p.iter().map(|v| *v as f64)));
    }
    Ok(out)
}
