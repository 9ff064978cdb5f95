//! `visviva check`: the evidence a user needs before deploying — the model
//! against the plain baseline on held-out trajectories — as a terminal
//! table, a JSON report and SVG plots. Damped or driven models (blobs with
//! R or G) get their own table: damping per mode at rest and driven
//! rollouts of the held-out trajectories with their logged inputs.

use std::path::PathBuf;

use crate::evidence::structure_fit::underfit;
use anyhow::{anyhow, Context, Result};
use visviva_runtime::Hamiltonian;

use crate::atomic::write_atomic;
use crate::cli::tables::{print_horizons, print_table, sci};
use crate::data::log::LoadOptions;
use crate::deploy::blob::HostModel;
use crate::deploy::model_log;
use crate::evidence::charts::{charts, HistoryFile};
use crate::evidence::check::driven_horizons;
use crate::evidence::check::{check, CheckSettings};
use crate::evidence::horizons::{summarize, HorizonError, HorizonSummary};
use crate::reference::{build_system, parse_param};

/// Arguments of `visviva check`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// The model blob.
    #[arg(long, value_name = "MODEL.vvb")]
    pub model: PathBuf,
    /// Held-out trajectories (CSV, same columns as for `visviva fit`).
    #[arg(long = "validation", visible_alias = "data", value_name = "FILE.csv")]
    pub data: PathBuf,
    /// The baseline written by `visviva fit --baseline` (default: next to the
    /// model as MODEL.baseline.json, when present).
    #[arg(long, value_name = "FILE.json")]
    pub baseline: Option<PathBuf>,
    /// The built-in system the data came from, to measure true-energy drift
    /// (names: see `visviva simulate --help`).
    #[arg(long, value_name = "NAME")]
    pub system: Option<String>,
    /// Override a parameter of that system, e.g. `--param l=9.2`; repeatable
    /// (keys as for `visviva simulate`).
    #[arg(long = "param", value_name = "KEY=VALUE", value_parser = parse_param)]
    pub params: Vec<(String, f64)>,
    /// Masses m1,..,mn for logs with velocity columns (kg, or the unit of
    /// the log's p = m v).
    #[arg(
        long = "masses",
        visible_alias = "mass",
        value_delimiter = ',',
        value_name = "M1,.."
    )]
    pub mass: Option<Vec<f64>>,
    /// Long-horizon steps (default: 100 periods of a built-in system, else
    /// 10000).
    #[arg(long = "horizon-steps", visible_alias = "horizon", value_name = "N")]
    pub horizon: Option<usize>,
    /// Horizons (s after each held-out trajectory's first sample) at which
    /// the model's and the baseline's state errors are reported; a horizon
    /// longer than a trajectory is reported as not reached for it.
    #[arg(
        long,
        value_delimiter = ',',
        value_name = "S1,..",
        default_value = "1,5,20"
    )]
    pub horizons: Vec<f64>,
    /// Fit history (JSON from `visviva fit --history`) for the loss plot.
    #[arg(long, value_name = "FILE.json")]
    pub history: Option<PathBuf>,
    /// Write the numbers as JSON here.
    #[arg(long, value_name = "FILE.json")]
    pub report: Option<PathBuf>,
    /// Write SVG plots into this folder.
    #[arg(long, value_name = "DIR")]
    pub plots: Option<PathBuf>,
}

/// Refuse outputs that would overwrite an input or cannot be written, and
/// masses out of range, before any work.
fn check_paths(args: &Args) -> Result<()> {
    if let Some(m) = &args.mass {
        crate::learn::stage::check_masses(m, "--masses")?;
    }
    crate::evidence::horizons::check_horizons(&args.horizons, "--horizons")?;
    let mut inputs = vec![
        ("--model", args.model.as_path()),
        ("--validation", args.data.as_path()),
    ];
    inputs.extend(args.baseline.as_deref().map(|p| ("--baseline", p)));
    inputs.extend(args.history.as_deref().map(|p| ("--history", p)));
    let outputs: Vec<_> = args
        .report
        .as_deref()
        .map(|p| ("--report", p))
        .into_iter()
        .collect();
    crate::outputs::check_outputs(&inputs, &outputs)?;
    if let Some(dir) = &args.plots {
        crate::outputs::check_output_dir("--plots", dir)?;
    }
    Ok(())
}

/// Run the command.
pub fn run(args: Args) -> Result<()> {
    check_paths(&args)?;
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
        .map(crate::deploy::fitted_blob::read_baseline)
        .transpose()?;
    if model.has_port_terms() {
        return run_port(&args, &model, &bytes, &opts, baseline.as_ref());
    }
    let data = load_log(&args.data, &model, &opts)?;
    if data.inputs > 0 {
        eprintln!(
            "warning: {}: input columns u1..u{} are ignored: the model {} takes no inputs, so \
             its rollouts run unforced and will not follow a driven log",
            args.data.display(),
            data.inputs,
            args.model.display()
        );
    }
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
        horizons: args.horizons.clone(),
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
    let blob = crate::deploy::blob::BlobModel::from_bytes(&bytes)
        .map_err(|e| anyhow!("{}: {e}", args.model.display()))?;
    let median_baseline = r.median_baseline.as_ref().map(|b| b.state_rel_rmse);
    if let Some(u) = underfit(&blob, r.median_model.state_rel_rmse, median_baseline) {
        println!("{}", u.message());
    }
    if data.derivatives == crate::data::dataset::DerivativeSource::Estimated {
        println!("note: the log has no derivative columns; vector-field errors use Savitzky-Golay estimates");
    }
    if let Some(p) = &args.report {
        write_atomic(p, serde_json::to_string_pretty(&r)?.as_bytes())?;
        println!("report: {}", p.display());
    }
    if let Some(dir) = &args.plots {
        std::fs::create_dir_all(dir)
            .with_context(|| format!("{}: cannot create", dir.display()))?;
        let units = crate::evidence::units::Units::resolve(
            None,
            system.as_deref().map(|s| s.name()),
            data.dof,
            data.inputs,
        )?;
        let label = format!("energy model ({})", args.model.display());
        for (name, chart) in charts(&r, history.as_ref(), &units, &label) {
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
    model: &'a crate::evidence::check::PortCheckReport,
    baseline_rollouts: Option<Vec<crate::evidence::check::DrivenRollout>>,
    /// State errors at the chosen horizons per held-out trajectory (in the
    /// order of `rollouts`).
    rollout_horizons: Vec<Vec<HorizonError>>,
    /// Medians at each horizon over the trajectories reaching it.
    horizons: Vec<HorizonSummary>,
}

/// The held-out log ([`model_log::load`]), saying when its joint rates
/// were turned into momenta by the model's own mass matrix.
fn load_log(
    path: &std::path::Path,
    model: &HostModel<'_>,
    opts: &LoadOptions,
) -> Result<crate::data::dataset::Dataset> {
    let (data, converted) = model_log::load(path, model, opts)?;
    if converted {
        println!("{}: {}", path.display(), model_log::CONVERTED);
    }
    Ok(data)
}

/// `run` for a damped or driven model (`baseline`: a plain network taking
/// the state and the inputs, from `visviva fit --baseline`).
fn run_port(
    args: &Args,
    model: &HostModel<'_>,
    bytes: &[u8],
    opts: &LoadOptions,
    baseline: Option<&crate::learn::hnn::BaselineModel>,
) -> Result<()> {
    let blob = crate::deploy::blob::BlobModel::from_bytes(bytes)
        .map_err(|e| anyhow!("{}: {e}", args.model.display()))?;
    let data = load_log(&args.data, model, opts)?;
    if data.dof != blob.dof {
        anyhow::bail!(
            "{}: {} degrees of freedom, but the model has {}",
            args.data.display(),
            data.dof,
            blob.dof
        );
    }
    let m = model.inputs();
    let got = data.inputs;
    if got != m {
        anyhow::bail!(
            "{}: {got} input columns, but the model takes {m} inputs (u1..u{m})",
            args.data.display()
        );
    }
    let r = crate::evidence::check::check_port(model, &blob, &data)?;
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
    let base = baseline.map(|b| crate::evidence::check::driven_baseline(b, &data));
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
    let value = |t: &crate::evidence::check::DrivenRollout| match &t.failure {
        Some(f) => format!("failed ({f})"),
        None => sci(t.state_rel_rmse),
    };
    for (k, t) in r.rollouts.iter().enumerate() {
        let b = base.as_ref().map_or("-".to_string(), |b| value(&b[k]));
        println!("{:<10} {:>28} {:>12}", t.id, value(t), b);
    }
    let per: Vec<Vec<HorizonError>> = r
        .rollouts
        .iter()
        .enumerate()
        .map(|(k, m)| {
            let b = base.as_ref().map(|b| &b[k]);
            driven_horizons(&data.trajectories[k], m, b, &args.horizons)
        })
        .collect();
    let slices: Vec<&[HorizonError]> = per.iter().map(Vec::as_slice).collect();
    let horizons = summarize(&slices, &args.horizons, base.is_some());
    let ids: Vec<&str> = r.rollouts.iter().map(|t| t.id.as_str()).collect();
    print_horizons(&ids, &slices, &horizons, base.is_some());
    if let Some(p) = &args.report {
        let json = PortJson {
            model: &r,
            baseline_rollouts: base,
            rollout_horizons: per,
            horizons,
        };
        write_atomic(p, serde_json::to_string_pretty(&json)?.as_bytes())?;
        println!("report: {}", p.display());
    }
    println!("{}", crate::CAUTION);
    Ok(())
}
