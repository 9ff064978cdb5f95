//! Observer settings tuned from the training and validation logs (q and p
//! columns), in three named steps:
//! 1. measurement noise per coordinate from the logs' noise estimate, by
//!    fourth differences: for white noise of standard deviation s,
//!    x[k+2] - 4x[k+1] + 6x[k] - 4x[k-1] + x[k-2] has variance 70 s^2
//!    (binomial coefficients; common practice), while smooth motion sampled
//!    finely adds almost nothing (fourth power of omega dt);
//! 2. the process-noise shape from one-step prediction residuals
//!    r = x[k+1] - step(x[k]) of the model itself: their variance minus the
//!    part the logged noise explains (R + F R F^T, F the step's exact
//!    Jacobian), floored at a small fraction of the residual variance;
//! 3. one scale on that shape so the NIS window test, run on the same logs
//!    fed with positions only, flags its upper bound on no more windows than
//!    the upper tail's share (half) of the chosen false-alarm rate. The
//!    scale accounts for model error that is correlated over time (which a
//!    white-noise model underrates); held-out logs are the check.

use anyhow::{anyhow, bail, Result};
use visviva_runtime::jacobian::step_with_jacobian;
use visviva_runtime::monitor::FalseAlarm;

use crate::data::dataset::{Dataset, Trajectory};
use crate::data::measure_log::MeasurementRow;
use crate::deploy::blob::{HostModel, HOST_MAX_DOF};
use crate::deploy::envelope::widened_range;
use crate::deploy::observe::{ObserveSummary, ObserverRun, HOST_STATE};
use crate::deploy::observer_settings::{
    false_alarm_fraction, false_alarm_text, ObserverSettings, SETTINGS_VERSION,
};
use crate::deploy::rollout::state_of;

/// Updates each trajectory settles before the monitor sees them (a
/// setting of ours: the initial momentum spread is the logs' RMS, and a
/// position-measured filter settles within a few swing-free samples).
pub const SETTLE_UPDATES: usize = 20;

/// What tuning found, besides the settings.
#[derive(Debug, Clone, PartialEq)]
pub struct Tuning {
    /// The settings.
    pub settings: ObserverSettings,
    /// Logged noise estimate per state coordinate (standard deviation).
    pub noise: Vec<f64>,
    /// Standard deviation of the one-step residuals per state coordinate.
    pub residual_std: Vec<f64>,
    /// The scale applied to the residual-based process noise.
    pub scale: f64,
    /// The monitor on the tuning logs at that scale.
    pub tuning_summary: ObserveSummary,
}

/// Noise standard deviation of state column `c` by fourth differences.
pub fn noise_estimate(logs: &[&Dataset], c: usize) -> f64 {
    let (mut sum, mut count) = (0.0f64, 0usize);
    for t in logs.iter().flat_map(|d| &d.trajectories) {
        let col: Vec<f64> = t.x.column(c).to_vec();
        for w in col.windows(5) {
            let d = w[4] - 4.0 * w[3] + 6.0 * w[2] - 4.0 * w[1] + w[0];
            sum += d * d;
            count += 1;
        }
    }
    (sum / count.max(1) as f64 / 70.0).sqrt()
}

/// Model steps per log sample: the logs' median sample interval over the
/// model's dt, a whole number (within 1 %).
pub fn steps_per_sample(model: &HostModel<'_>, logs: &[&Dataset]) -> Result<usize> {
    let mut gaps: Vec<f64> = logs
        .iter()
        .flat_map(|d| &d.trajectories)
        .flat_map(|t| t.t.windows(2).map(|w| w[1] - w[0]))
        .collect();
    if gaps.is_empty() {
        bail!("the tuning logs have no two consecutive samples");
    }
    gaps.sort_by(f64::total_cmp);
    let gap = gaps[gaps.len() / 2];
    let dt = model.integrator().dt as f64;
    let k = (gap / dt).round();
    if k < 1.0 || (gap - k * dt).abs() > 0.01 * dt {
        bail!(
            "the logs' sample interval {gap} s is not a whole number of model steps (dt = {dt} s)"
        );
    }
    Ok(k as usize)
}

/// Variance of the one-step residuals and of the part the noise `noise`
/// explains, per state coordinate, over `k` model steps per sample.
fn residuals(
    model: &HostModel<'_>,
    logs: &[&Dataset],
    k: usize,
    noise: &[f64],
) -> Result<(Vec<f64>, Vec<f64>)> {
    let dim = noise.len();
    let (mut sq, mut explained, mut count) = (vec![0.0f64; dim], vec![0.0f64; dim], 0usize);
    let it = model.integrator();
    for t in logs.iter().flat_map(|d| &d.trajectories) {
        for j in 0..t.t.len().saturating_sub(1) {
            let start: Vec<f32> = t.x.row(j).iter().map(|v| *v as f32).collect();
            let mut x = state_of(&start)?;
            let u: Vec<f32> = t.u.row(j).iter().map(|v| *v as f32).collect();
            let mut f = visviva_runtime::linalg::identity::<HOST_STATE>(dim);
            for _ in 0..k {
                let fs = step_with_jacobian::<HOST_MAX_DOF, HOST_STATE, _>(model, &it, &mut x, &u)
                    .map_err(|e| anyhow!("trajectory '{}', sample {j}: {e}", t.id))?;
                f = visviva_runtime::linalg::mul(&fs, &f, dim);
            }
            let next = t.x.row(j + 1);
            let flat: Vec<f32> = x.q().iter().chain(x.p()).copied().collect();
            for c in 0..dim {
                let r = next[c] - flat[c] as f64;
                sq[c] += r * r;
                let frf: f64 = (0..dim)
                    .map(|i| (f[c][i] as f64).powi(2) * noise[i] * noise[i])
                    .sum();
                explained[c] += noise[c] * noise[c] + frf;
            }
            count += 1;
        }
    }
    if count == 0 {
        bail!("the tuning logs have no two consecutive samples");
    }
    let n = count as f64;
    Ok((
        sq.iter().map(|s| s / n).collect(),
        explained.iter().map(|s| s / n).collect(),
    ))
}

/// Rows of a trajectory with its positions as measurements.
pub fn position_rows(t: &Trajectory, dof: usize) -> impl Iterator<Item = MeasurementRow> + '_ {
    (0..t.t.len()).map(move |j| MeasurementRow {
        line: j as u64 + 2,
        traj: t.id.clone(),
        t: t.t[j],
        q: (0..dof).map(|i| Some(t.x[[j, i]])).collect(),
        v: Vec::new(),
        u: t.u.row(j).to_vec(),
    })
}

/// The monitor's counts over `logs` fed with positions only.
pub fn monitor_counts(
    model: &HostModel<'_>,
    settings: &ObserverSettings,
    logs: &[&Dataset],
) -> Result<ObserveSummary> {
    let mut run = ObserverRun::new(model, settings.clone())?;
    let mut s = ObserveSummary::default();
    for t in logs.iter().flat_map(|d| &d.trajectories) {
        s.trajectories += 1;
        for row in position_rows(t, model.dof()) {
            let e = run.push(&row)?;
            s.rows += 1;
            s.full_windows += usize::from(e.window_full);
            s.nis_high += usize::from(e.health.nis_high);
            s.nis_low += usize::from(e.health.nis_low);
            s.out_of_envelope += usize::from(e.health.out_of_envelope);
            s.energy_flags += usize::from(e.health.energy_flag);
        }
    }
    Ok(s)
}

/// The settings before scaling: noise, residual process noise, envelope.
fn base_settings(
    logs: &[&Dataset],
    n: usize,
    noise: &[f64],
    process: Vec<f64>,
    window: usize,
    alarm: FalseAlarm,
) -> ObserverSettings {
    let mut sq = vec![0.0f64; n];
    let mut count = 0usize;
    for t in logs.iter().flat_map(|d| &d.trajectories) {
        for row in t.x.rows() {
            for i in 0..n {
                sq[i] += row[n + i] * row[n + i];
            }
            count += 1;
        }
    }
    // The envelope: the logs' range widened by a tenth of it on each side.
    let (low, high) = widened_range(logs, n);
    let floor = |v: f64| if v > 0.0 { v } else { 1e-12 };
    ObserverSettings {
        format_version: SETTINGS_VERSION,
        position_noise: noise[..n].iter().map(|v| floor(*v)).collect(),
        velocity_noise: vec![1.0; n],
        process_variance: process,
        initial_momentum_std: sq
            .iter()
            .map(|s| floor((s / count.max(1) as f64).sqrt()))
            .collect(),
        window,
        settle_updates: SETTLE_UPDATES,
        false_alarm: false_alarm_text(alarm).to_string(),
        envelope_low: low,
        envelope_high: high,
        energy_threshold: None,
    }
}

/// Tune the observer of `model` from `logs` (training and validation, with
/// q and p columns) for a NIS window of `window` updates at false-alarm
/// rate `alarm`.
pub fn tune(
    model: &HostModel<'_>,
    logs: &[&Dataset],
    alarm: FalseAlarm,
    window: usize,
) -> Result<Tuning> {
    let n = model.dof();
    if logs.iter().any(|d| d.dof != n) {
        bail!("the tuning logs' degrees of freedom differ from the model's ({n})");
    }
    let noise: Vec<f64> = (0..2 * n).map(|c| noise_estimate(logs, c)).collect();
    let k = steps_per_sample(model, logs)?;
    let (var, explained) = residuals(model, logs, k, &noise)?;
    let shape: Vec<f64> = var
        .iter()
        .zip(&explained)
        .map(|(v, e)| (v - e).max(1e-3 * v).max(1e-30) / k as f64)
        .collect();
    let base = base_settings(logs, n, &noise, shape.clone(), window, alarm);
    let target = 0.5 * false_alarm_fraction(alarm);
    let scaled = |s: f64| {
        let mut settings = base.clone();
        settings.process_variance = shape.iter().map(|v| v * s).collect();
        settings
    };
    // Smallest power-of-two scale in 2^-10 .. 2^40 meeting the target, by
    // bisection on the exponent (more process noise, fewer upper flags).
    let meets = |e: i32| -> Result<(f64, ObserverSettings, ObserveSummary, bool)> {
        let s = 2f64.powi(e);
        let settings = scaled(s);
        let counts = monitor_counts(model, &settings, logs)?;
        let ok = (counts.nis_high as f64) <= target * counts.full_windows as f64;
        Ok((s, settings, counts, ok))
    };
    let (mut lo, mut hi) = (-10i32, 40i32);
    let mut best = meets(hi)?;
    let chosen = if !best.3 {
        None
    } else {
        let low = meets(lo)?;
        if low.3 {
            best = low;
        } else {
            while hi - lo > 1 {
                let mid = (lo + hi) / 2;
                let r = meets(mid)?;
                if r.3 {
                    hi = mid;
                    best = r;
                } else {
                    lo = mid;
                }
            }
        }
        Some((best.0, best.1, best.2))
    };
    let (scale, settings, tuning_summary) = chosen.ok_or_else(|| {
        anyhow!("no process-noise scale up to 2^40 keeps the NIS test quiet on the tuning logs; the model does not match them")
    })?;
    Ok(Tuning {
        settings,
        residual_std: var.iter().map(|v| v.sqrt()).collect(),
        noise,
        scale,
        tuning_summary,
    })
}
