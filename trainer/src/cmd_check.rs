//! `visviva check`: the evidence a user needs before deploying — the model
//! against the plain baseline on held-out trajectories — as a terminal
//! table, a JSON report and SVG plots. Damped or driven models (blobs with
//! R or G) get their own table: damping per mode at rest and driven
//! rollouts of the held-out trajectories with their logged inputs.

use std::path::PathBuf;

use anyhow::{anyhow, Context, Result};
use visviva_runtime::Hamiltonian;

use crate::atomic::write_atomic;
use crate::blob::HostModel;
use crate::check::{check, CheckReport, CheckSettings};
use crate::data::{load_csv, LoadOptions};
use crate::svgplot::{Chart, Series, PALETTE};
use crate::systems::{build_system, parse_param, ReferenceSystem};

/// Arguments of `visviva check`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// The model blob.
    #[arg(long)]
    pub model: PathBuf,
    /// Held-out trajectories (CSV, same columns as for `visviva fit`).
    #[arg(long)]
    pub data: PathBuf,
    /// The baseline written by `visviva fit --baseline` (default: next to the
    /// model as MODEL.baseline.json, when present).
    #[arg(long)]
    pub baseline: Option<PathBuf>,
    /// The built-in system the data came from, to measure true-energy drift.
    #[arg(long)]
    pub system: Option<String>,
    /// Parameters of that system, as for `visviva simulate`.
    #[arg(long = "param", value_parser = parse_param)]
    pub params: Vec<(String, f64)>,
    /// Masses m1,..,mn for logs with velocity columns.
    #[arg(long, value_delimiter = ',')]
    pub mass: Option<Vec<f64>>,
    /// Long-horizon steps (default: 100 periods of a built-in system, else
    /// 10000).
    #[arg(long)]
    pub horizon: Option<usize>,
    /// Fit history (JSON from `visviva fit --history`) for the loss plot.
    #[arg(long)]
    pub history: Option<PathBuf>,
    /// Write the numbers as JSON here.
    #[arg(long)]
    pub report: Option<PathBuf>,
    /// Write SVG plots into this folder.
    #[arg(long)]
    pub plots: Option<PathBuf>,
}

fn sci(v: f64) -> String {
    if v.is_finite() {
        format!("{v:.2e}")
    } else {
        "failed".into()
    }
}

fn opt(v: Option<f64>) -> String {
    v.map(sci).unwrap_or_else(|| "-".into())
}

/// Print the compact table.
pub fn print_table(r: &CheckReport) {
    let energy = if r.system.is_some() {
        "true-energy drift"
    } else {
        "learned-energy drift"
    };
    println!(
        "{:<10} {:>22} {:>22} {:>26}",
        "trajectory", "vector-field rel. RMSE", "state rel. RMSE", energy
    );
    println!(
        "{:<10} {:>11}{:>11} {:>11}{:>11} {:>13}{:>13}",
        "", "model", "baseline", "model", "baseline", "model", "baseline"
    );
    for t in &r.trajectories {
        let b = t.baseline.as_ref();
        let (de_m, de_b) = if r.system.is_some() {
            (
                t.model.true_energy_drift,
                b.and_then(|b| b.true_energy_drift),
            )
        } else {
            (t.model.learned_energy_drift, None)
        };
        println!(
            "{:<10} {:>11}{:>11} {:>11}{:>11} {:>13}{:>13}",
            t.id,
            sci(t.model.vector_field_rel_rmse),
            opt(b.map(|b| b.vector_field_rel_rmse)),
            sci(t.model.state_rel_rmse),
            opt(b.map(|b| b.state_rel_rmse)),
            opt(de_m),
            opt(de_b),
        );
    }
    let m = &r.median_model;
    let b = r.median_baseline.as_ref();
    println!(
        "{:<10} {:>11}{:>11} {:>11}{:>11} {:>13}{:>13}",
        "median",
        sci(m.vector_field_rel_rmse),
        opt(b.map(|b| b.vector_field_rel_rmse)),
        sci(m.state_rel_rmse),
        opt(b.map(|b| b.state_rel_rmse)),
        opt(if r.system.is_some() {
            m.true_energy_drift
        } else {
            m.learned_energy_drift
        }),
        opt(if r.system.is_some() {
            b.and_then(|b| b.true_energy_drift)
        } else {
            None
        }),
    );
    if let Some(t) = r.trajectories.first() {
        println!(
            "model stepped with {} at the log's interval ({} s); long horizon {} steps",
            r.integrator, t.dt, t.horizon_steps
        );
    }
    for t in &r.trajectories {
        for (who, m) in [("model", Some(&t.model)), ("baseline", t.baseline.as_ref())] {
            if let Some(f) = m.and_then(|m| m.failure.as_ref()) {
                println!(
                    "note: {who} rollout of trajectory {} stopped early: {f}",
                    t.id
                );
            }
        }
    }
}

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
        let err = |m: &crate::check::Metrics| -> Vec<(f64, f64)> {
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
    traj: &crate::dataset::Trajectory,
    inputs: Option<&ndarray::Array2<f64>>,
    model: &[Vec<f32>],
    baseline: Option<&[Vec<f32>]>,
    keep: usize,
) -> Vec<(String, Chart)> {
    let thin = |v: Vec<(f64, f64)>| -> Vec<(f64, f64)> {
        let stride = v.len().div_ceil(keep.max(1)).max(1);
        v.into_iter().step_by(stride).collect()
    };
    let mut out = Vec::new();
    if let Some(u) = inputs {
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

/// Run the command.
pub fn run(args: Args) -> Result<()> {
    let bytes = std::fs::read(&args.model)
        .with_context(|| format!("{}: cannot read", args.model.display()))?;
    let model =
        HostModel::from_bytes(&bytes).map_err(|e| anyhow!("{}: {e}", args.model.display()))?;
    let opts = LoadOptions {
        masses: args.mass.clone(),
        ..LoadOptions::default()
    };
    let base_path = args
        .baseline
        .clone()
        .or_else(|| Some(args.model.with_extension("baseline.json")).filter(|p| p.exists()));
    let baseline = base_path
        .as_deref()
        .map(crate::export::read_baseline)
        .transpose()?;
    if model.has_port_terms() {
        return run_port(&args, &model, &bytes, &opts, baseline.as_ref());
    }
    let data = load_csv(&args.data, &opts)?;
    let system = args
        .system
        .as_deref()
        .map(|s| build_system(s, &args.params))
        .transpose()
        .map_err(|e| anyhow!("{e}"))?;
    let history = args
        .history
        .as_deref()
        .map(|p| -> Result<HistoryFile> {
            let t = std::fs::read_to_string(p)
                .with_context(|| format!("{}: cannot read", p.display()))?;
            serde_json::from_str(&t).map_err(|e| anyhow!("{}: line {}: {e}", p.display(), e.line()))
        })
        .transpose()?;
    let settings = CheckSettings {
        horizon_steps: args.horizon,
        ..CheckSettings::default()
    };
    let r = check(
        &model,
        baseline.as_ref(),
        &data,
        system.as_deref(),
        &settings,
    )?;
    print_table(&r);
    if data.derivatives == crate::dataset::DerivativeSource::Estimated {
        println!("note: the log has no derivative columns; vector-field errors use Savitzky-Golay estimates");
    }
    if let Some(p) = &args.report {
        write_atomic(p, serde_json::to_string_pretty(&r)?.as_bytes())?;
        println!("report: {}", p.display());
    }
    if let Some(dir) = &args.plots {
        std::fs::create_dir_all(dir)
            .with_context(|| format!("{}: cannot create", dir.display()))?;
        for (name, chart) in charts(&r, history.as_ref(), units(system.as_deref())) {
            let p = dir.join(format!("{name}.svg"));
            write_atomic(&p, chart.to_svg().as_bytes())?;
        }
        println!("plots: {}", dir.display());
    }
    println!("{}", crate::CAUTION);
    Ok(())
}

/// The JSON report of a damped or driven model: the model's checks and,
/// with a baseline, its driven rollouts of the same trajectories.
#[derive(serde::Serialize)]
struct PortJson<'a> {
    #[serde(flatten)]
    model: &'a crate::check::PortCheckReport,
    baseline_rollouts: Option<Vec<crate::check::DrivenRollout>>,
}

/// `run` for a damped or driven model (`baseline`: a plain network taking
/// the state and the inputs, from `visviva fit --baseline`).
fn run_port(
    args: &Args,
    model: &HostModel<'_>,
    bytes: &[u8],
    opts: &LoadOptions,
    baseline: Option<&crate::hnn::BaselineModel>,
) -> Result<()> {
    let blob = crate::blob::BlobModel::from_bytes(bytes)
        .map_err(|e| anyhow!("{}: {e}", args.model.display()))?;
    let (data, inputs) = crate::data::load_csv_with_inputs(&args.data, opts)?;
    if data.dof != blob.dof {
        anyhow::bail!(
            "{}: {} degrees of freedom, but the model has {}",
            args.data.display(),
            data.dof,
            blob.dof
        );
    }
    let m = model.inputs();
    let got = inputs.as_ref().map_or(0, |u| u.count);
    if got != m {
        anyhow::bail!(
            "{}: {got} input columns, but the model takes {m} inputs (u1..u{m})",
            args.data.display()
        );
    }
    let r = crate::check::check_port(model, &blob, &data, inputs.as_ref())?;
    if let Some(b) = baseline {
        if b.dof != blob.dof || b.inputs() != m {
            anyhow::bail!(
                "the baseline has {} degrees of freedom and {} inputs, the model {} and {m}",
                b.dof,
                b.inputs(),
                blob.dof
            );
        }
    }
    let base = baseline.map(|b| crate::check::driven_baseline(b, &data, inputs.as_ref()));
    let rest: Vec<String> = r.rest.iter().map(|v| format!("{v:.4e}")).collect();
    println!(
        "rest state ({}), residual {} of the RMS rates",
        rest.join(", "),
        sci(r.rest_residual)
    );
    println!(
        "{:<6} {:>16} {:>14} {:>22}",
        "mode", "natural freq (Hz)", "damping ratio", "eigenvalue (1/s)"
    );
    for (k, mode) in r.modes.iter().enumerate() {
        println!(
            "{:<6} {:>16.4} {:>14.4} {:>22}",
            k + 1,
            mode.natural_hz,
            mode.damping_ratio,
            format!("{:.3} {:+.3}i", mode.real, mode.imag)
        );
    }
    println!(
        "{:<10} {:>28} {:>12}",
        "trajectory", "driven-rollout state rel. RMSE", "baseline"
    );
    let value = |t: &crate::check::DrivenRollout| match &t.failure {
        Some(f) => format!("failed ({f})"),
        None => sci(t.state_rel_rmse),
    };
    for (k, t) in r.rollouts.iter().enumerate() {
        let b = base.as_ref().map_or("-".to_string(), |b| value(&b[k]));
        println!("{:<10} {:>28} {:>12}", t.id, value(t), b);
    }
    if let Some(p) = &args.report {
        let json = PortJson {
            model: &r,
            baseline_rollouts: base,
        };
        write_atomic(p, serde_json::to_string_pretty(&json)?.as_bytes())?;
        println!("report: {}", p.display());
    }
    println!("{}", crate::CAUTION);
    Ok(())
}
