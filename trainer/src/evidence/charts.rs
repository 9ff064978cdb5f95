//! The report's and `visviva check`'s charts: phase portraits, energy over
//! time, driven responses and loss curves, built from check results.

use crate::evidence::check::CheckReport;
use crate::evidence::svgplot::{Chart, Series, PALETTE};
use crate::reference::ReferenceSystem;

/// Loss history as written by `visviva fit --history`.
#[derive(Debug, Clone, Default, serde::Deserialize)]
pub struct HistoryFile {
    /// Training loss per epoch.
    pub train: Vec<f64>,
    /// Validation loss per epoch.
    pub val: Vec<f64>,
}

fn series(label: &str, points: Vec<(f64, f64)>, k: usize, dashed: bool, dots: bool) -> Series {
    Series {
        label: label.into(),
        points,
        color: PALETTE[k],
        dashed,
        dots,
    }
}

/// The report's charts: phase portrait and energy of the first trajectory,
/// and the loss curves when a history is given.
pub fn charts(
    r: &CheckReport,
    history: Option<&HistoryFile>,
    units: (&str, &str, &str),
) -> Vec<(String, Chart)> {
    let mut out = Vec::new();
    if let Some(t) = r.trajectories.first() {
        let mut s = vec![
            series("log", t.phase[0].clone(), 0, false, true),
            series("energy model", t.phase[1].clone(), 1, false, false),
        ];
        if !t.phase[2].is_empty() {
            s.push(series("baseline", t.phase[2].clone(), 2, true, false));
        }
        out.push((
            "phase".into(),
            Chart {
                title: format!("Phase portrait, trajectory {}", t.id),
                x_label: format!("q1 ({})", units.0),
                y_label: format!("p1 ({})", units.1),
                log_y: false,
                series: s,
            },
        ));
        let which = if r.system.is_some() {
            "true energy"
        } else {
            "learned energy"
        };
        let mut s = vec![series("energy model", t.energy[0].clone(), 1, false, false)];
        if r.system.is_some() && !t.energy[1].is_empty() {
            s.push(series("baseline", t.energy[1].clone(), 2, true, false));
        }
        out.push((
            "energy".into(),
            Chart {
                title: format!(
                    "{which} over {} steps, trajectory {}",
                    t.horizon_steps, t.id
                ),
                x_label: "time (s)".into(),
                y_label: format!("{which} ({})", units.2),
                log_y: false,
                series: s,
            },
        ));
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
        out.push((
            "state-error".into(),
            Chart {
                title: format!("State error versus time, trajectory {}", t.id),
                x_label: "time (s)".into(),
                y_label: "state error / state RMS (-)".into(),
                log_y: true,
                series: s,
            },
        ));
    }
    if let Some(h) = history {
        out.push(("loss".into(), loss_chart(h)));
    }
    out
}

/// The loss curves of a fit.
pub fn loss_chart(h: &HistoryFile) -> Chart {
    let pts = |v: &[f64]| {
        v.iter()
            .enumerate()
            .map(|(k, l)| ((k + 1) as f64, *l))
            .collect()
    };
    Chart {
        title: "Fit history".into(),
        x_label: "epoch (-)".into(),
        y_label: "loss, normalized units (-)".into(),
        log_y: true,
        series: vec![
            series("training", pts(&h.train), 1, false, false),
            series("validation", pts(&h.val), 2, false, false),
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
                y_label: "input (log units)".into(),
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
                    "Response to the held-out inputs: p{} over time, trajectory {}",
                    i + 1,
                    traj.id
                ),
                x_label: "time (s)".into(),
                y_label: format!("p{} (SI)", i + 1),
                log_y: false,
                series: s,
            },
        ));
    }
    out
}

/// Units of q, p and energy for a built-in system, else generic ones.
pub fn units(system: Option<&dyn ReferenceSystem>) -> (&'static str, &'static str, &'static str) {
    match system.map(|s| s.name()) {
        Some("crane") => ("rad", "kg m^2/s", "J"),
        Some(_) => ("m", "kg m/s", "J"),
        None => ("SI", "SI", "model units"),
    }
}
