//! The observer in `visviva run`'s report (projects with an `[observer]`
//! section): settings tuned from the training and validation logs and
//! written beside the model (`out/model.observer.toml`), then the
//! validation log fed with positions only, topped up with seeded Gaussian
//! noise to the tuned (logged) noise level (added variance: the tuned one
//! minus the validation log's own noise estimate, none if that is larger): velocity and position RMS error
//! per coordinate of the observer, of central finite differences and of the
//! constant-velocity Kalman filter (`cv_filter`, its intensity the best of a
//! grid against the training log's velocities), against the log's own dq/dt
//! (given, or estimated by Savitzky-Golay) and q; plus the monitor's flags,
//! and two charts of the first validation trajectory: the velocity error
//! of the three estimators over time, and the windowed NIS sum between its
//! chi-square bounds.

use std::path::Path;

use anyhow::Result;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};
use serde::Serialize;
use visviva_runtime::monitor::{chi_square_quantile, FalseAlarm};

use crate::data::dataset::{Dataset, DerivativeSource};
use crate::deploy::blob::HostModel;
use crate::deploy::observe::ObserverRun;
use crate::deploy::observer_settings::{companion_path, parse_false_alarm, ObserverSettings};
use crate::deploy::observer_tuning::{noise_estimate, position_rows, tune};
use crate::evidence::charts::series;
use crate::evidence::cv_filter::{central_differences, cv_velocities};
use crate::evidence::report::{esc, Html, RunReport};
use crate::evidence::svgplot::Chart;
use crate::evidence::units::Units;

/// Seed of the noise added to the validation positions.
const NOISE_SEED: u64 = 0x0b5e;

/// Samples at the start of each trajectory left out of every error (the
/// filters settle).
const SKIP: usize = 20;

/// What the report shows about the observer.
#[derive(Debug, Clone, Serialize)]
pub struct ObserverReport {
    /// The settings file written.
    pub settings_file: String,
    /// NIS window (updates).
    pub window: usize,
    /// Two-sided false-alarm rate.
    pub false_alarm: String,
    /// Tuned position noise (standard deviation) per coordinate.
    pub position_noise: Vec<f64>,
    /// Noise added to the validation positions (standard deviation).
    pub added_noise: Vec<f64>,
    /// The process noise's level on the residual shape: constant part a.
    pub process_level: f64,
    /// Its growth per unit of energy above the reference, b.
    pub process_level_per_energy: f64,
    /// Scale on the level a + b (H - H_ref).
    pub process_scale: f64,
    /// What the velocities are compared against.
    pub velocity_reference: String,
    /// Velocity RMS error per coordinate: observer.
    pub velocity_rmse_observer: Vec<f64>,
    /// Central finite differences.
    pub velocity_rmse_finite_differences: Vec<f64>,
    /// Constant-velocity Kalman filter.
    pub velocity_rmse_cv_filter: Vec<f64>,
    /// Position RMS error per coordinate against the log's q: observer
    /// (a noisy log's own noise is in this reference).
    pub position_rmse_observer: Vec<f64>,
    /// The same for the fed positions (the added noise; 0 when none was
    /// added).
    pub position_rmse_measured: Vec<f64>,
    /// Full NIS windows on the validation log.
    pub full_windows: usize,
    /// Upper flags there (false alarms on a healthy log).
    pub upper_flags: usize,
    /// Lower flags there.
    pub lower_flags: usize,
    /// What the charts show (not in `report.json`: the page draws it).
    #[serde(skip)]
    pub traces: Option<ObserverTraces>,
}

/// Per-sample series of the first validation trajectory for the charts.
#[derive(Debug, Clone, Default)]
pub struct ObserverTraces {
    /// The trajectory's id.
    pub trajectory: String,
    /// Sample times (s), from the first sample after the settling ones.
    pub t: Vec<f64>,
    /// Velocity error of v1 (estimate minus reference): observer, central
    /// finite differences, constant-velocity filter.
    pub velocity_error: [Vec<f64>; 3],
    /// (t, NIS window sum, lower bound, upper bound) at every full window.
    pub nis: Vec<(f64, f64, f64, f64)>,
}

fn rms(v: &[f64]) -> f64 {
    (v.iter().map(|e| e * e).sum::<f64>() / v.len().max(1) as f64).sqrt()
}

/// `ds` with N(0, sigma_i^2) added to each position column.
fn noisy(ds: &Dataset, sigma: &[f64]) -> Dataset {
    let mut out = ds.clone();
    let mut rng = ChaCha8Rng::seed_from_u64(NOISE_SEED);
    for t in &mut out.trajectories {
        for j in 0..t.t.len() {
            for (i, s) in sigma.iter().enumerate() {
                let z: f64 = StandardNormal.sample(&mut rng);
                t.x[[j, i]] += s * z;
            }
        }
    }
    out
}

/// Errors of a per-coordinate velocity estimator over `noisy` against the
/// clean log's dq/dt, coordinate `i`.
fn velocity_errors(
    noisy: &Dataset,
    clean: &Dataset,
    i: usize,
    f: &dyn Fn(&[f64]) -> Vec<f64>,
) -> Vec<f64> {
    let mut out = Vec::new();
    for (tn, tc) in noisy.trajectories.iter().zip(&clean.trajectories) {
        let v = f(&tn.x.column(i).to_vec());
        out.extend(
            v.iter()
                .enumerate()
                .skip(SKIP)
                .map(|(j, vj)| vj - tc.dx[[j, i]]),
        );
    }
    out
}

/// The CV filter's intensity: the best of a grid (10^-6 .. 10^4) on the
/// training log with the same added noise.
fn cv_intensity(train: &Dataset, sigma: f64, i: usize, dt: f64) -> f64 {
    let mut only = vec![0.0; i + 1];
    only[i] = sigma;
    let nt = noisy(train, &only);
    let r = sigma * sigma;
    (-12..=8)
        .map(|e| 10f64.powf(e as f64 / 2.0))
        .map(|s| {
            (
                s,
                rms(&velocity_errors(&nt, train, i, &|z| {
                    cv_velocities(z, dt, r, s)
                })),
            )
        })
        .min_by(|a, b| a.1.total_cmp(&b.1))
        .map_or(1.0, |(s, _)| s)
}

/// Tune, write the settings beside `model_path`, and compare on `val`.
pub fn observer_report(
    model: &HostModel<'_>,
    model_path: &Path,
    train: &Dataset,
    val: &Dataset,
    window: usize,
    false_alarm: &str,
) -> Result<ObserverReport> {
    let alarm: FalseAlarm = parse_false_alarm(false_alarm)?;
    let t = tune(model, &[train, val], alarm, window)?;
    let path = companion_path(model_path);
    t.settings.write(&path)?;
    let n = model.dof();
    let sigma = t.settings.position_noise.clone();
    let top_up: Vec<f64> = (0..n)
        .map(|i| {
            (sigma[i] * sigma[i] - noise_estimate(&[val], i).powi(2))
                .max(0.0)
                .sqrt()
        })
        .collect();
    let nv = noisy(val, &top_up);
    let mut pass = observe_noisy(model, &t.settings, &nv, val, alarm)?;
    let dt = model.integrator().dt as f64;
    yardstick_traces(&mut pass.traces, &nv, val, train, sigma[0], dt);
    let (fd, cv) = yardsticks(&nv, val, train, &sigma, dt);
    Ok(ObserverReport {
        settings_file: path
            .file_name()
            .map_or(String::new(), |f| f.to_string_lossy().into_owned()),
        window,
        false_alarm: false_alarm.to_string(),
        position_noise: sigma,
        added_noise: top_up,
        process_level: t.level_line.0,
        process_level_per_energy: t.level_line.1,
        process_scale: t.scale,
        velocity_reference: match val.derivatives {
            DerivativeSource::Given => "the log's dq/dt columns".into(),
            DerivativeSource::Estimated => "dq/dt estimated from the log by Savitzky-Golay".into(),
        },
        velocity_rmse_observer: pass.velocity.iter().map(|e| rms(e)).collect(),
        velocity_rmse_finite_differences: fd,
        velocity_rmse_cv_filter: cv,
        position_rmse_observer: pass.position.iter().map(|e| rms(e)).collect(),
        position_rmse_measured: pass.measured.iter().map(|e| rms(e)).collect(),
        full_windows: pass.full,
        upper_flags: pass.upper,
        lower_flags: pass.lower,
        traces: Some(pass.traces),
    })
}

/// The observer over the noisy validation log: per coordinate its velocity
/// and position errors and the measurement's own position error (after
/// the first `SKIP` samples of each trajectory), the monitor's counts, and
/// the first trajectory's traces.
struct ObserverPass {
    velocity: Vec<Vec<f64>>,
    position: Vec<Vec<f64>>,
    measured: Vec<Vec<f64>>,
    full: usize,
    upper: usize,
    lower: usize,
    traces: ObserverTraces,
}

fn observe_noisy(
    model: &HostModel<'_>,
    settings: &ObserverSettings,
    nv: &Dataset,
    val: &Dataset,
    alarm: FalseAlarm,
) -> Result<ObserverPass> {
    let n = model.dof();
    let mut run = ObserverRun::new(model, settings.clone())?;
    let mut pass = ObserverPass {
        velocity: vec![Vec::new(); n],
        position: vec![Vec::new(); n],
        measured: vec![Vec::new(); n],
        full: 0,
        upper: 0,
        lower: 0,
        traces: ObserverTraces::default(),
    };
    let z = alarm.normal_quantile();
    for (k, (tn, tc)) in nv.trajectories.iter().zip(&val.trajectories).enumerate() {
        for (j, row) in position_rows(tn, n).enumerate() {
            let e = run.push(&row)?;
            pass.full += usize::from(e.window_full);
            pass.upper += usize::from(e.health.nis_high);
            pass.lower += usize::from(e.health.nis_low);
            if k == 0 && e.window_full {
                let h = &e.health;
                pass.traces.nis.push((
                    row.t,
                    h.nis_sum as f64,
                    chi_square_quantile(h.dof, -z) as f64,
                    chi_square_quantile(h.dof, z) as f64,
                ));
            }
            if k == 0 && j >= SKIP {
                pass.traces.t.push(row.t);
                pass.traces.velocity_error[0].push(e.v[0] as f64 - tc.dx[[j, 0]]);
            }
            if j >= SKIP {
                for i in 0..n {
                    pass.velocity[i].push(e.v[i] as f64 - tc.dx[[j, i]]);
                    pass.position[i].push(e.q[i] as f64 - tc.x[[j, i]]);
                    pass.measured[i].push(row.q[i].unwrap_or(f64::NAN) - tc.x[[j, i]]);
                }
            }
        }
    }
    Ok(pass)
}

/// The first trajectory's velocity errors of the two yardsticks (central
/// differences, the constant-velocity filter), beside the observer's.
fn yardstick_traces(
    traces: &mut ObserverTraces,
    nv: &Dataset,
    val: &Dataset,
    train: &Dataset,
    sigma: f64,
    dt: f64,
) {
    let (Some(tn), Some(tc)) = (nv.trajectories.first(), val.trajectories.first()) else {
        return;
    };
    traces.trajectory = tn.id.clone();
    let z = tn.x.column(0).to_vec();
    let s = cv_intensity(train, sigma, 0, dt);
    let estimates = [
        central_differences(&z, dt),
        cv_velocities(&z, dt, sigma * sigma, s),
    ];
    for (slot, v) in traces.velocity_error[1..].iter_mut().zip(estimates) {
        *slot = (SKIP..v.len()).map(|j| v[j] - tc.dx[[j, 0]]).collect();
    }
}

/// Velocity RMS errors per coordinate of central differences and of the
/// constant-velocity filter (its intensity picked on `train`).
fn yardsticks(
    nv: &Dataset,
    val: &Dataset,
    train: &Dataset,
    sigma: &[f64],
    dt: f64,
) -> (Vec<f64>, Vec<f64>) {
    let fd = (0..sigma.len())
        .map(|i| {
            rms(&velocity_errors(nv, val, i, &|z| {
                central_differences(z, dt)
            }))
        })
        .collect();
    let cv = (0..sigma.len())
        .map(|i| {
            let s = cv_intensity(train, sigma[i], i, dt);
            let r = sigma[i] * sigma[i];
            rms(&velocity_errors(nv, val, i, &|z| {
                cv_velocities(z, dt, r, s)
            }))
        })
        .collect();
    (fd, cv)
}

/// The observer's charts for the model named `label` (`units`: the data's):
/// |v1 error| of the three estimators over time (log scale) and the NIS
/// window sum between its bounds.
pub fn observer_charts(
    o: &ObserverReport,
    t: &ObserverTraces,
    label: &str,
    units: &Units,
) -> Vec<Chart> {
    let names = [
        "observer",
        "central finite differences",
        "constant-velocity filter",
    ];
    let error = t
        .velocity_error
        .iter()
        .zip(names)
        .enumerate()
        .map(|(k, (e, name))| {
            let pts = t.t.iter().zip(e).map(|(t, e)| (*t, e.abs())).collect();
            series(name, pts, k + 1, k > 0, false)
        })
        .collect();
    let column =
        |k: usize| -> Vec<(f64, f64)> { t.nis.iter().map(|r| (r.0, [r.1, r.2, r.3][k])).collect() };
    let nis = vec![
        series("NIS summed over the window", column(0), 1, false, false),
        series("upper bound", column(2), 2, true, false),
        series("lower bound", column(1), 3, true, false),
    ];
    vec![
        Chart {
            title: format!(
                "Velocity error from q1 alone, validation trajectory {}: observer on the {label}, finite differences, CV filter",
                t.trajectory
            ),
            x_label: format!("time ({})", units.time),
            y_label: format!("|v1 estimate - reference| ({}/{})", units.state(0), units.time),
            log_y: true,
            series: error,
        },
        Chart {
            title: format!(
                "NIS over {} updates and its {} bounds, validation trajectory {}: observer on the {label}",
                o.window, o.false_alarm, t.trajectory
            ),
            x_label: format!("time ({})", units.time),
            y_label: "NIS window sum (-)".into(),
            log_y: false,
            series: nis,
        },
    ]
}

/// The state observer on the validation log fed with noisy positions only
/// (nothing without an `[observer]` section).
pub fn observer_section(h: &mut Html<'_>, report: &RunReport) {
    let Some(o) = &report.observer else {
        return;
    };
    h.p("<h2 id=\"observer\">State observer</h2>");
    h.p(&format!(
        "<p>Settings tuned from the training and validation logs and written to <code>out/{}</code> (window {} updates, false-alarm rate {}; process noise on the one-step residuals' shape: level a + b (H - H_ref) with a = {} and b = {} per unit of learned energy above its lowest value on the logs, times the scale {}). The validation log is fed with its positions only, topped up with Gaussian noise to the tuned noise level; velocities are compared with {}, positions with the log's q (a noisy log's own noise is in that reference); the first 20 samples of each trajectory are left out. Baselines: central finite differences and the constant-velocity Kalman filter (Bar-Shalom, Li and Kirubarajan, 2001; its intensity the best of a grid on the training log).</p>",
        esc(&o.settings_file),
        h.num("observer/window"),
        esc(&o.false_alarm),
        h.num("observer/process_level"),
        h.num("observer/process_level_per_energy"),
        h.num("observer/process_scale"),
        esc(&o.velocity_reference)
    ));
    h.p("<table><tr><th>coordinate</th><th>tuned noise (std)</th><th>added noise (std)</th><th>velocity error, observer</th><th>finite differences</th><th>constant-velocity filter</th><th>position error, observer</th><th>measured positions</th></tr>");
    for i in 0..o.velocity_rmse_observer.len() {
        let c = |k: &str| h.num(&format!("observer/{k}/{i}"));
        h.p(&format!(
            "<tr><td><span class=\"label\">q{}</span></td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
            i + 1,
            c("position_noise"),
            c("added_noise"),
            c("velocity_rmse_observer"),
            c("velocity_rmse_finite_differences"),
            c("velocity_rmse_cv_filter"),
            c("position_rmse_observer"),
            c("position_rmse_measured")
        ));
    }
    h.p(&format!(
        "</table><p>Health monitor on this healthy log: {} upper flags (false alarms) and {} lower flags in {} full windows. The flags are plain values; nothing stops stepping, and they are no safety function.</p>",
        h.num("observer/upper_flags"),
        h.num("observer/lower_flags"),
        h.num("observer/full_windows")
    ));
    if let Some(t) = &o.traces {
        let label = format!("energy model ({})", report.architecture);
        for c in observer_charts(o, t, &label, &report.data.units) {
            h.p(&format!(
                "<figure aria-label=\"{}\">{}</figure>",
                esc(&c.title),
                c.to_svg()
            ));
        }
    }
}
