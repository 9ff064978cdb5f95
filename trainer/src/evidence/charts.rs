//! The report's and `visviva check`'s charts: relative energy drift on a log
//! scale, phase portraits, energy over time, driven responses and loss
//! curves, built from check results, each titled with the model it shows
//! and labelled with the data's units.

use crate::evidence::check::{CheckReport, TrajectoryCheck};
use crate::evidence::svgplot::{Chart, Series, PALETTE};
use crate::evidence::units::Units;

/// Loss history as written by `visviva fit --history`.
#[derive(Debug, Clone, Default, serde::Deserialize)]
pub struct HistoryFile {
    /// Training loss per epoch.
    pub train: Vec<f64>,
    /// Validation loss per epoch.
    pub val: Vec<f64>,
}

/// A series in palette colour `k`.
pub fn series(label: &str, points: Vec<(f64, f64)>, k: usize, dashed: bool, dots: bool) -> Series {
    Series {
        label: label.into(),
        points,
        color: PALETTE[k],
        dashed,
        dots,
    }
}

/// A model's name for chart titles: "energy model (separable V 1-32-32-1
/// tanh, T quadratic)".
pub fn model_label(m: &crate::deploy::blob::BlobModel) -> String {
    format!("energy model ({})", m.architecture())
}

/// |H(t) - H(0)| / |H(0)| of an energy series (t, H); `relative = false`
/// keeps |H(t) - H(0)|.
fn drift(series: &[(f64, f64)], relative: bool) -> Vec<(f64, f64)> {
    let Some(&(_, h0)) = series.first() else {
        return Vec::new();
    };
    let scale = if relative { h0.abs() } else { 1.0 };
    series
        .iter()
        .map(|&(t, h)| (t, (h - h0).abs() / scale))
        .collect()
}

/// The report's charts for the first trajectory: relative energy drift
/// (log scale, model and baseline), phase portrait, energy over time, state
/// error over time, and the loss curves when a history is given. `model`
/// names the model in every title.
pub fn charts(
    r: &CheckReport,
    history: Option<&HistoryFile>,
    units: &Units,
    model: &str,
) -> Vec<(String, Chart)> {
    let mut out = Vec::new();
    if let Some(t) = r.trajectories.first() {
        let truth = r.system.is_some();
        out.push(("drift".into(), drift_chart(t, truth, units, model)));
        out.push(("phase".into(), phase_chart(t, units, model)));
        out.push(("energy".into(), energy_chart(t, truth, units, model)));
        out.push(("state-error".into(), state_error_chart(t, model)));
    }
    if let Some(h) = history {
        out.push(("loss".into(), loss_chart(h, model)));
    }
    out
}

/// Which energy the charts show: the built-in system's when there is one.
fn energy_name(truth: bool) -> &'static str {
    if truth {
        "true energy"
    } else {
        "learned energy"
    }
}

/// |H(t) - H(0)| (relative to |H(0)| for the true energy), log scale.
fn drift_chart(t: &TrajectoryCheck, truth: bool, units: &Units, model: &str) -> Chart {
    let which = energy_name(truth);
    let mut s = vec![series(
        "energy model",
        drift(&t.energy[0], truth),
        1,
        false,
        false,
    )];
    if truth && !t.energy[1].is_empty() {
        s.push(series(
            "baseline",
            drift(&t.energy[1], true),
            2,
            true,
            false,
        ));
    }
    Chart {
        title: format!(
            "Energy drift of the {model}{} over {} steps, trajectory {}",
            if truth { " and the baseline" } else { "" },
            t.horizon_steps,
            t.id
        ),
        x_label: "time (s)".into(),
        y_label: if truth {
            format!("|H(t) - H(0)| / |H(0)|, {which} (-)")
        } else {
            format!("|H(t) - H(0)|, {which} ({})", units.energy)
        },
        log_y: true,
        series: s,
    }
}

/// q1 against p1: the log, the model and the baseline.
fn phase_chart(t: &TrajectoryCheck, units: &Units, model: &str) -> Chart {
    let mut s = vec![
        series("log", t.phase[0].clone(), 0, false, true),
        series("energy model", t.phase[1].clone(), 1, false, false),
    ];
    if !t.phase[2].is_empty() {
        s.push(series("baseline", t.phase[2].clone(), 2, true, false));
    }
    Chart {
        title: format!(
            "Phase portrait of trajectory {}: log, {model}, baseline",
            t.id
        ),
        x_label: format!("q1 ({})", units.state(0)),
        y_label: format!("p1 ({})", units.state(units.q.len())),
        log_y: false,
        series: s,
    }
}

/// The energy over the horizon.
fn energy_chart(t: &TrajectoryCheck, truth: bool, units: &Units, model: &str) -> Chart {
    let mut s = vec![series("energy model", t.energy[0].clone(), 1, false, false)];
    if truth && !t.energy[1].is_empty() {
        s.push(series("baseline", t.energy[1].clone(), 2, true, false));
    }
    Chart {
        title: format!(
            "{} over {} steps, trajectory {}: {model}{}",
            if truth {
                "True energy"
            } else {
                "Learned energy"
            },
            t.horizon_steps,
            t.id,
            if truth { ", baseline" } else { "" }
        ),
        x_label: "time (s)".into(),
        y_label: format!("{} ({})", energy_name(truth), units.energy),
        log_y: false,
        series: s,
    }
}

/// State error over state RMS against time, log scale.
fn state_error_chart(t: &TrajectoryCheck, model: &str) -> Chart {
    let err = |m: &crate::evidence::check::Metrics| -> Vec<(f64, f64)> {
        m.state_error
            .iter()
            .enumerate()
            .map(|(k, e)| (k as f64 * t.dt, *e))
            .collect()
    };
    let mut s = vec![series("energy model", err(&t.model), 1, false, false)];
    if let Some(b) = &t.baseline {
        s.push(series("baseline", err(b), 2, true, false));
    }
    Chart {
        title: format!(
            "State error versus time, trajectory {}: {model}, baseline",
            t.id
        ),
        x_label: "time (s)".into(),
        y_label: "state error / state RMS (-)".into(),
        log_y: true,
        series: s,
    }
}

/// The loss curves of a fit of `model`.
pub fn loss_chart(h: &HistoryFile, model: &str) -> Chart {
    let pts = |v: &[f64]| {
        v.iter()
            .enumerate()
            .map(|(k, l)| ((k + 1) as f64, *l))
            .collect()
    };
    Chart {
        title: format!("Fit history of the {model}"),
        x_label: "epoch (-)".into(),
        y_label: "loss, normalized units (-)".into(),
        log_y: true,
        series: vec![
            series("training", pts(&h.train), 1, false, false),
            series("validation", pts(&h.val), 2, true, false),
        ],
    }
}

/// Charts of a driven rollout of one held-out trajectory: its logged inputs
/// over time, then each momentum p_i over time (log, model, baseline).
/// `model` and `baseline` hold rolled-out states, one per logged sample.
pub fn driven_charts(
    traj: &crate::data::dataset::Trajectory,
    model: &[Vec<f32>],
    baseline: Option<&[Vec<f32>]>,
    keep: usize,
    units: &Units,
) -> Vec<(String, Chart)> {
    let thin = |v: Vec<(f64, f64)>| -> Vec<(f64, f64)> {
        let stride = v.len().div_ceil(keep.max(1)).max(1);
        v.into_iter().step_by(stride).collect()
    };
    let mut out = Vec::new();
    if traj.u.ncols() > 0 {
        let u = &traj.u;
        let s = (0..u.ncols())
            .map(|k| {
                let pts = traj
                    .t
                    .iter()
                    .zip(u.column(k))
                    .map(|(t, v)| (*t, *v))
                    .collect();
                series(&format!("u{}", k + 1), thin(pts), k % 3, false, false)
            })
            .collect();
        out.push((
            "inputs".into(),
            Chart {
                title: format!("Held-out input sequence, trajectory {}", traj.id),
                x_label: "time (s)".into(),
                y_label: format!(
                    "input ({})",
                    (0..u.ncols())
                        .map(|k| format!(
                            "u{}: {}",
                            k + 1,
                            units.inputs.get(k).map_or("?", String::as_str)
                        ))
                        .collect::<Vec<_>>()
                        .join(", ")
                ),
                log_y: false,
                series: s,
            },
        ));
    }
    let n = traj.x.ncols() / 2;
    let rolled = |states: &[Vec<f32>], c: usize| -> Vec<(f64, f64)> {
        states
            .iter()
            .zip(&traj.t)
            .map(|(s, t)| (*t, s[c] as f64))
            .collect()
    };
    for i in 0..n {
        let c = n + i;
        let logged = traj.t.iter().zip(traj.x.column(c)).map(|(t, v)| (*t, *v));
        let mut s = vec![
            series("log", thin(logged.collect()), 0, false, true),
            series("energy model", thin(rolled(model, c)), 1, false, false),
        ];
        if let Some(b) = baseline {
            s.push(series("baseline", thin(rolled(b, c)), 2, true, false));
        }
        out.push((
            format!("response-p{}", i + 1),
            Chart {
                title: format!(
                    "Response to the held-out inputs: p{} over time, trajectory {}: log, energy model, baseline",
                    i + 1,
                    traj.id
                ),
                x_label: "time (s)".into(),
                y_label: format!("p{} ({})", i + 1, units.state(n + i)),
                log_y: false,
                series: s,
            },
        ));
    }
    out
}
