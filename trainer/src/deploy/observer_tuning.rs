//! Observer settings tuned from the training and validation logs (q and p
//! columns), in four named steps:
//! 1. measurement noise per coordinate from the logs' noise estimate, by
//!    fourth differences: for white noise of standard deviation s,
//!    x[k+2] - 4x[k+1] + 6x[k] - 4x[k-1] + x[k-2] has variance 70 s^2
//!    (binomial coefficients; common practice), while smooth motion sampled
//!    finely adds almost nothing (fourth power of omega dt);
//! 2. the process-noise shape from one-step prediction residuals
//!    r = x[k+1] - step(x[k]) of the model itself: their variance minus the
//!    part the logged noise explains (R + F R F^T, F the step's exact
//!    Jacobian), floored at a small fraction of the residual variance;
//! 3. how the process noise grows with the energy (a model's error grows
//!    with the amplitude of the motion, so one constant level is too
//!    generous on small swings, where the NIS test then flags low and a
//!    fault is absorbed): each tuning trajectory's own level on that shape
//!    (the least at which its mean NIS per measurement is at most 1), then
//!    the line level(e) = a + b e over the energy e above the lowest learned
//!    energy on the logs that covers every trajectory's level with the
//!    least excess (`fit_level_line`); Q(x) = shape (a + b e(x)), in the
//!    settings as `process_variance` (constant part) and
//!    `process_variance_per_energy` with `energy_reference`;
//! 4. one scale on that (2^(k/4)) so the NIS window test, run on the same
//!    logs fed with positions only, flags its upper bound on no more
//!    windows than the upper tail's share (half) of the chosen false-alarm
//!    rate. The scale accounts for model error that is correlated over time
//!    (which a white-noise model underrates); held-out logs are the check.

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
    /// The energy line (a, b) of step 3: level a + b e on the shape.
    pub level_line: (f64, f64),
    /// The scale applied on top of it (step 4).
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
        process_variance_per_energy: None,
        energy_reference: None,
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

/// The lowest learned energy over the logged states of `logs` (where the
/// energy-scaled process noise starts).
fn lowest_energy(model: &HostModel<'_>, logs: &[&Dataset]) -> Result<f64> {
    let mut low = f64::INFINITY;
    for t in logs.iter().flat_map(|d| &d.trajectories) {
        for j in 0..t.t.len() {
            low = low.min(energy_at(model, t, j)?);
        }
    }
    if !low.is_finite() {
        bail!("the tuning logs have no states with a finite learned energy");
    }
    Ok(low)
}

/// The learned energy at sample `j` of `t`.
fn energy_at(model: &HostModel<'_>, t: &Trajectory, j: usize) -> Result<f64> {
    let row: Vec<f32> = t.x.row(j).iter().map(|v| *v as f32).collect();
    let x = state_of(&row)?;
    let e = visviva_runtime::Hamiltonian::energy(model, &x)
        .map_err(|e| anyhow!("trajectory '{}', sample {j}: energy: {e}", t.id))?;
    Ok(e as f64)
}

/// The mean NIS per measurement of `t` fed with positions only, over the
/// updates after the settling ones.
fn mean_nis(model: &HostModel<'_>, settings: &ObserverSettings, t: &Trajectory) -> Result<f64> {
    let mut run = ObserverRun::new(model, settings.clone())?;
    let (mut sum, mut count) = (0.0f64, 0u64);
    for (j, row) in position_rows(t, model.dof()).enumerate() {
        let e = run.push(&row)?;
        if j >= settings.settle_updates {
            sum += e.nis as f64;
            count += u64::from(e.count);
        }
    }
    Ok(if count == 0 { 1.0 } else { sum / count as f64 })
}

/// Half-power-of-two exponents searched for a trajectory's own level.
const LEVEL_RANGE: (i32, i32) = (-40, 80);

/// A trajectory's own process-noise level: the smallest scale 2^(k/2) on
/// `shape` (constant noise) at which its mean NIS per measurement is at
/// most 1, the value of a consistent filter (Bar-Shalom, Li and
/// Kirubarajan 2001). `None` when no scale in the range reaches it or the
/// smallest already does (the level is not measurable there).
fn trajectory_level(
    model: &HostModel<'_>,
    base: &ObserverSettings,
    shape: &[f64],
    t: &Trajectory,
) -> Result<Option<f64>> {
    let at = |k: i32| -> Result<bool> {
        let mut s = base.clone();
        let scale = 2f64.powf(k as f64 / 2.0);
        s.process_variance = shape.iter().map(|v| v * scale).collect();
        Ok(mean_nis(model, &s, t)? <= 1.0)
    };
    let (lo, top) = LEVEL_RANGE;
    let (mut hi, reached) = highest_running(top, lo, &at)?;
    let mut lo = lo;
    if !reached || at(lo).unwrap_or(false) {
        return Ok(None);
    }
    while hi - lo > 1 {
        let mid = (lo + hi) / 2;
        if at(mid).unwrap_or(false) {
            hi = mid;
        } else {
            lo = mid;
        }
    }
    Ok(Some(2f64.powf(hi as f64 / 2.0)))
}

/// Exponents between the largest trial and the next one down when the
/// larger fails to run (a factor of 4 in process noise at the tuning's
/// quarter powers of two, 2 at the levels' half powers).
const STEP_DOWN: i32 = 8;

/// The largest exponent from `top` down to `floor` (by [`STEP_DOWN`]) whose
/// trial runs, with its result. A trial fails to run when the observer
/// stops, e.g. when the f32 covariance cannot hold that much process noise
/// beside a tiny measurement noise (noise-free logs) and loses definiteness;
/// more process noise than that is not a setting anyone can use. The last
/// error when no trial runs.
fn highest_running<T>(top: i32, floor: i32, trial: &dyn Fn(i32) -> Result<T>) -> Result<(i32, T)> {
    let mut e = top;
    loop {
        match trial(e) {
            Ok(r) => return Ok((e, r)),
            Err(err) if e - STEP_DOWN < floor => return Err(err),
            Err(_) => e -= STEP_DOWN,
        }
    }
}

/// The line level(e) = a + b e (a, b >= 0) at or above every trajectory's
/// own (energy above the reference, level) pair with the least summed
/// relative excess sum_j (a + b e_j) / s_j: each trajectory gets at least
/// the process noise it needs, none more than the line must give. A linear
/// program in (a, b), so its optimum lies on a line through two of the
/// points or through one point with a or b zero; all of them are tried.
pub fn fit_level_line(points: &[(f64, f64)]) -> (f64, f64) {
    let cost = |a: f64, b: f64| -> Option<f64> {
        let covers =
            a >= 0.0 && b >= 0.0 && points.iter().all(|&(e, s)| a + b * e >= s * (1.0 - 1e-12));
        covers.then(|| points.iter().map(|&(e, s)| (a + b * e) / s).sum())
    };
    let mut candidates = Vec::new();
    for (j, &(ej, sj)) in points.iter().enumerate() {
        candidates.push((sj, 0.0));
        if ej > 0.0 {
            candidates.push((0.0, sj / ej));
        }
        for &(ek, sk) in &points[j + 1..] {
            if ek != ej {
                let b = (sk - sj) / (ek - ej);
                candidates.push((sj - b * ej, b));
            }
        }
    }
    candidates
        .into_iter()
        .filter_map(|(a, b)| cost(a, b).map(|c| (c, a, b)))
        .min_by(|x, y| x.0.total_cmp(&y.0))
        .map_or((1.0, 0.0), |(_, a, b)| (a, b))
}

/// Each tuning trajectory's mean energy above `reference` and its own
/// level (trajectories whose level is not measurable are left out).
fn trajectory_levels(
    model: &HostModel<'_>,
    base: &ObserverSettings,
    shape: &[f64],
    logs: &[&Dataset],
    reference: f64,
) -> Result<Vec<(f64, f64)>> {
    let mut out = Vec::new();
    for t in logs.iter().flat_map(|d| &d.trajectories) {
        let Some(level) = trajectory_level(model, base, shape, t)? else {
            continue;
        };
        let mut e = 0.0;
        for j in 0..t.t.len() {
            e += (energy_at(model, t, j)? - reference).max(0.0);
        }
        out.push((e / t.t.len().max(1) as f64, level));
    }
    Ok(out)
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
    let reference = lowest_energy(model, logs)?;
    let levels = trajectory_levels(model, &base, &shape, logs, reference)?;
    let (a, b) = fit_level_line(&levels);
    let target = 0.5 * false_alarm_fraction(alarm);
    let scaled = |s: f64| {
        let mut settings = base.clone();
        settings.process_variance = shape.iter().map(|v| v * a * s).collect();
        if b > 0.0 {
            settings.process_variance_per_energy = Some(shape.iter().map(|v| v * b * s).collect());
            settings.energy_reference = Some(reference);
        }
        settings
    };
    // Smallest scale 2^(e/4) in 2^-10 .. 2^40 meeting the target, by
    // bisection on the exponent (more process noise, fewer upper flags),
    // below the largest scale the observer runs with; a trial that stops
    // counts as not meeting it.
    let meets = |e: i32| -> Result<(f64, ObserverSettings, ObserveSummary, bool)> {
        let s = 2f64.powf(e as f64 / 4.0);
        let settings = scaled(s);
        let counts = monitor_counts(model, &settings, logs)?;
        let ok = (counts.nis_high as f64) <= target * counts.full_windows as f64;
        Ok((s, settings, counts, ok))
    };
    let mut lo = -40i32;
    let (mut hi, mut best) = highest_running(160, lo, &meets)?;
    let top_scale = best.0;
    let runs_and_meets = |e: i32| meets(e).ok().filter(|r| r.3);
    let chosen = if !best.3 {
        None
    } else {
        if let Some(low) = runs_and_meets(lo) {
            best = low;
        } else {
            while hi - lo > 1 {
                let mid = (lo + hi) / 2;
                if let Some(r) = runs_and_meets(mid) {
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
        anyhow!("no process-noise scale up to {top_scale:.3e} (the largest the observer runs with) keeps the NIS test quiet on the tuning logs; the model does not match them")
    })?;
    Ok(Tuning {
        settings,
        residual_std: var.iter().map(|v| v.sqrt()).collect(),
        noise,
        level_line: (a, b),
        scale,
        tuning_summary,
    })
}

#[cfg(test)]
mod tests {
    use super::{fit_level_line, highest_running, STEP_DOWN};

    #[test]
    fn the_largest_trial_that_runs_is_found_stepping_down() {
        // Trials above 10 stop (as an overfull covariance does).
        let trial = |e: i32| -> anyhow::Result<i32> {
            anyhow::ensure!(e <= 10, "trial {e} stopped");
            Ok(2 * e)
        };
        assert_eq!(highest_running(40, -40, &trial).unwrap(), (8, 16));
        assert_eq!(highest_running(10, -40, &trial).unwrap(), (10, 20));
        // None runs: the last trial's error.
        let err = highest_running(40, 20, &trial).unwrap_err().to_string();
        assert_eq!(err, format!("trial {} stopped", 40 - 2 * STEP_DOWN));
    }

    #[test]
    fn level_line_covers_every_point_with_the_least_relative_excess() {
        // Points on one line: that line (a, b) = (1, 2), no excess at all.
        let (a, b) = fit_level_line(&[(0.0, 1.0), (1.0, 3.0), (2.0, 5.0)]);
        assert!(
            (a - 1.0).abs() < 1e-12 && (b - 2.0).abs() < 1e-12,
            "{a} {b}"
        );
        // Worked by hand: of the lines at or above (0, 1), (1, 1), (2, 4),
        // the one through (0, 1) and (2, 4) (a = 1, b = 1.5) costs
        // 1/1 + 2.5/1 + 4/4 = 4.5; the flat line a = 4 costs 4 + 4 + 1 = 9,
        // the others miss a point.
        let (a, b) = fit_level_line(&[(0.0, 1.0), (1.0, 1.0), (2.0, 4.0)]);
        assert!(
            (a - 1.0).abs() < 1e-12 && (b - 1.5).abs() < 1e-12,
            "{a} {b}"
        );
        // Levels falling with energy: the flat line at the largest level.
        assert_eq!(fit_level_line(&[(0.0, 3.0), (1.0, 1.0)]), (3.0, 0.0));
        // Nothing measured: the plain constant level.
        assert_eq!(fit_level_line(&[]), (1.0, 0.0));
    }
}
