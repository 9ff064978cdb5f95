//! `visviva fit`: load a motion log, fit an energy model (and optionally the
//! plain vector-field baseline), and write the model blob atomically.
//! Logs with input columns `u1..um`, or `--dissipation`, give a damped
//! and/or driven model dx/dt = (J - R) dH/dx + G u (stepped by the
//! discrete-gradient method).

use std::path::{Path, PathBuf};

use anyhow::{anyhow, bail, Context, Result};

use crate::data::columns::{self, ColumnMap, RigSummary};
use crate::data::dataset::Dataset;
use crate::data::log::{self, LoadOptions};
use crate::deploy::fitted_blob;
use crate::deploy::integrator::MethodName;
use crate::learn::auto::Basis;
use crate::learn::fit::{self, FitSettings, TrainReport};
use crate::learn::hnn::{EnergyModel, HnnObjective, HnnWork, Objective, PortArch, PortObjective};
use crate::learn::mode::{plan_mode, FitMode, ModeRequest};
use crate::learn::stage::{
    check_fit_settings, check_masses, check_time_step, fit_stage_mode, interrupt_flag, plan_model,
    stop_text, FitOutcome, ModelPlan, SettingNames,
};
use crate::learn::structure::{arch_choice, energy_activation, ActivationName, Arch, KineticKind};

/// Arguments of `visviva fit`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// Motion log (CSV) to fit.
    #[arg(long = "train", visible_alias = "data", value_name = "FILE.csv")]
    pub data: PathBuf,
    /// Separate validation log; without it, whole trajectories are held out
    /// from --data (see --val-fraction).
    #[arg(long = "validation", visible_alias = "val", value_name = "FILE.csv")]
    pub val: Option<PathBuf>,
    /// Fraction of trajectories held out for validation when --val is absent
    /// (0 disables validation; early stopping then watches the training loss).
    #[arg(long, default_value_t = 0.2, value_name = "FRACTION")]
    pub val_fraction: f64,
    /// Energy structure. The default, auto, fits each structure the log
    /// permits on a fifth of the budget and keeps the one with the smallest
    /// held-out state error (on the training trajectories, said so, when
    /// nothing is held out); name one to skip that cost.
    #[arg(long, value_enum, default_value_t = Arch::Auto)]
    pub arch: Arch,
    /// Kinetic term of a separable model.
    #[arg(long, value_enum, default_value_t = KineticKind::Quadratic)]
    pub kinetic: KineticKind,
    /// Hidden-layer widths, comma separated (at most 4 layers, each <= 128).
    #[arg(
        long,
        value_delimiter = ',',
        default_value = "64,64",
        value_name = "W1,.."
    )]
    pub hidden: Vec<usize>,
    /// Hidden-layer activation.
    #[arg(long, value_enum, default_value_t = ActivationName::Tanh)]
    pub activation: ActivationName,
    /// Passes over the training data (ignored with --steps).
    #[arg(long, default_value_t = 300, value_name = "N")]
    pub epochs: usize,
    /// Samples per minibatch.
    #[arg(long, default_value_t = 256, value_name = "N")]
    pub batch: usize,
    /// Peak learning rate (Adam, warm-up then cosine decay).
    #[arg(long, default_value_t = 3e-3, value_name = "RATE")]
    pub lr: f32,
    /// Total optimizer steps, instead of --epochs.
    #[arg(long = "optimizer-steps", value_name = "N")]
    pub steps: Option<usize>,
    /// Worker threads; results are reproducible for a given count.
    #[arg(long, default_value_t = 1, value_name = "N")]
    pub threads: usize,
    /// Epochs without validation improvement before stopping.
    #[arg(long, default_value_t = 60, value_name = "N")]
    pub patience: usize,
    /// Train for all epochs even when validation stops improving.
    #[arg(long)]
    pub no_early_stop: bool,
    /// Seed for initialization, shuffling and the validation split.
    #[arg(long, default_value_t = 0, value_name = "N")]
    pub seed: u64,
    /// Also fit the plain vector-field baseline and write it to
    /// OUT with extension `.baseline.json`. With inputs u1..um in the log
    /// the baseline takes them too (dx/dt = f(x, u), stepped by RK4 with u
    /// held over the step).
    #[arg(long)]
    pub baseline: bool,
    /// Learn a constant dissipation R = L L^T acting on the momenta
    /// (viscous damping and friction). Inputs u1..um in the log are always
    /// used (G is then learned); either makes a port-Hamiltonian model,
    /// stored with the discrete-gradient method.
    #[arg(long)]
    pub dissipation: bool,
    /// Make L (of R = L L^T) a network of the coordinates q with these
    /// hidden widths instead of a constant, for damping that depends on
    /// position (implies --dissipation).
    #[arg(long, value_delimiter = ',', value_name = "W1,..")]
    pub dissipation_net: Option<Vec<usize>>,
    /// Make the input coupling G a network of the coordinates q with these
    /// hidden widths instead of a constant, for inputs that act through the
    /// geometry (a trolley's acceleration on a swinging load acts through
    /// cos q).
    #[arg(long, value_delimiter = ',', value_name = "W1,..")]
    pub input_net: Option<Vec<usize>>,
    /// Masses m1,..,mn for logs with velocity columns (p = m v).
    #[arg(
        long = "masses",
        visible_alias = "mass",
        value_delimiter = ',',
        value_name = "M1,.."
    )]
    pub mass: Option<Vec<f64>>,
    /// For joint rates (v columns) without masses: the mean of M11,
    /// coordinate 1's own inertia, over the training log (kg or kg m^2);
    /// makes the learned momenta and energies physical (default: 1 by
    /// normalization).
    #[arg(long, value_name = "M11")]
    pub reference_inertia: Option<f64>,
    /// Integration method stored in the model (default: verlet for
    /// separable, midpoint for general models).
    #[arg(long, value_enum)]
    pub integrator: Option<MethodName>,
    /// Time step stored in the model, in seconds (default: the log's median
    /// sample interval).
    #[arg(long, value_name = "SECONDS")]
    pub dt: Option<f32>,
    /// Write the loss history (JSON) here.
    #[arg(long, value_name = "FILE.json")]
    pub history: Option<PathBuf>,
    /// Write a run summary (JSON) here: throughput, steps, batch, threads,
    /// wall time and the final losses (used by `cargo xtask bench`).
    #[arg(long, value_name = "FILE.json")]
    pub json: Option<PathBuf>,
    /// No progress bar.
    #[arg(long, short)]
    pub quiet: bool,
    /// Read the log through the `[columns]` table of this TOML file (a
    /// project's visviva.toml or a file of its own): the logger's column
    /// names, scales and units.
    #[arg(long, value_name = "FILE.toml")]
    pub columns: Option<PathBuf>,
    /// Split trajectories where a step exceeds this multiple of the median
    /// step (overrides the mapping's gap_factor; default 1.5).
    #[arg(long, value_name = "X")]
    pub gap_factor: Option<f64>,
    /// Fit mode (default: trajectory for a positions-only log, derivative
    /// otherwise).
    #[arg(long, value_enum)]
    pub fit_mode: Option<FitMode>,
    /// Log steps per trajectory-matching window (default 25).
    #[arg(long, value_name = "K")]
    pub window_steps: Option<usize>,
    /// Epochs of trajectory matching after the warm start (default 60).
    #[arg(long, value_name = "N")]
    pub trajectory_epochs: Option<usize>,
    /// Output model blob.
    #[arg(long, value_name = "MODEL.vvb")]
    pub out: PathBuf,
}

/// Where the baseline goes: the model path with extension `.baseline.json`.
pub fn baseline_path(out: &Path) -> PathBuf {
    out.with_extension("baseline.json")
}

fn print_report(label: &str, r: &TrainReport) {
    println!(
        "{label}: {} steps x {} samples in {:.2} s = {:.0} samples/s; best validation loss {:.4e} \
         (normalized units, epoch {}); {}",
        r.steps,
        r.batch,
        r.seconds,
        r.samples_per_second(),
        r.best_val,
        r.best_epoch.map_or("-".into(), |e| (e + 1).to_string()),
        stop_text(r.stop)
    );
}

/// The energy model's mean per-sample loss over every row of `data`.
fn full_data_loss(model: &EnergyModel, data: &Dataset) -> Result<f64> {
    let Some(port) = &model.port else {
        let (z, t) = model.norm.normalize(data);
        let obj = HnnObjective::new(model.dof, model.arch.clone(), &model.norm);
        let sum = obj.loss_sum(
            &model.params,
            z.view(),
            t.view(),
            &mut HnnWork::default(),
            None,
        );
        return Ok(sum / z.nrows().max(1) as f64);
    };
    let (z, t) = fit::stack_inputs(&model.norm, data, &port.input_scale)?;
    let obj = PortObjective::new(
        model.dof,
        model.arch.clone(),
        port.arch.clone(),
        &model.norm,
    );
    let p: Vec<f32> = model.params.iter().chain(&port.params).copied().collect();
    let sum = obj.loss_sum(&p, z.view(), t.view(), &mut Default::default(), None);
    Ok(sum / z.nrows().max(1) as f64)
}

/// Run summary written by `--json`.
#[derive(Debug, serde::Serialize)]
struct RunSummary {
    /// Optimizer steps taken x batch / wall time of the training loop.
    samples_per_second: f64,
    /// Optimizer steps taken.
    steps: usize,
    /// Samples per step.
    batch: usize,
    /// Worker threads.
    threads: usize,
    /// Wall time of the training loop in seconds.
    seconds: f64,
    /// Training rows.
    train_samples: usize,
    /// Trainable parameters.
    parameters: usize,
    /// Mean loss over all training rows with the kept parameters.
    final_train_loss: f64,
    /// Mean minibatch loss of the last epoch.
    last_epoch_loss: Option<f64>,
    /// The kept parameters' validation loss (training loss without validation).
    best_val: f64,
    /// Why training ended.
    stop: String,
}

/// Write the `--json` run summary of `fitted` (trained on `train`; the
/// final training loss over all of its rows with the kept parameters).
fn write_summary(
    path: &Path,
    fitted: &fit::Fitted<EnergyModel>,
    threads: usize,
    train: &Dataset,
) -> Result<()> {
    let r = &fitted.report;
    let summary = RunSummary {
        samples_per_second: r.samples_per_second(),
        steps: r.steps,
        batch: r.batch,
        threads,
        seconds: r.seconds,
        train_samples: train.samples(),
        parameters: fitted.model.params.len()
            + fitted.model.port.as_ref().map_or(0, |p| p.params.len()),
        final_train_loss: full_data_loss(&fitted.model, train)?,
        last_epoch_loss: r.history.train.last().copied(),
        best_val: r.best_val,
        stop: stop_text(r.stop),
    };
    let json = serde_json::to_vec_pretty(&summary)?;
    crate::atomic::write_atomic(path, &json)
        .with_context(|| format!("writing run summary {}", path.display()))?;
    println!("wrote {}", path.display());
    Ok(())
}

/// Training settings from the command line.
fn fit_settings(args: &Args) -> FitSettings {
    FitSettings {
        epochs: args.epochs,
        steps: args.steps,
        batch: args.batch,
        lr: args.lr,
        threads: args.threads,
        early_stop: !args.no_early_stop,
        patience: args.patience,
        seed: args.seed,
        quiet: args.quiet,
        interrupt: Some(interrupt_flag()),
        ..FitSettings::default()
    }
}

/// The model plan from the flags, with `arch` as the structure.
fn plan(args: &Args, arch: Arch, train: &Dataset) -> Result<ModelPlan> {
    let choice = arch_choice(
        arch,
        args.kinetic,
        &args.hidden,
        args.activation,
        "--activation",
    )?;
    let none = Vec::new();
    let terms = PortArch::with_networks(
        args.dissipation,
        args.dissipation_net.as_ref().unwrap_or(&none),
        args.input_net.as_ref().unwrap_or(&none),
        |name| format!("--{name}-net"),
    )?;
    let map = column_map(args)?;
    crate::learn::stage::check_masses_for_structure(
        choice.mechanical,
        columns::masses_form_momenta(&args.data, map.as_ref(), args.mass.is_some()),
        "--masses",
    )?;
    plan_model(
        train,
        choice,
        terms,
        args.integrator,
        args.dt,
        SettingNames::Flags,
    )
}

/// The structure to fit: `--arch`, or with `--arch auto` (the default) the
/// candidate with the smallest state error after a short fit, on the
/// held-out trajectories or, without any, on the training ones (printed
/// with every candidate's figure, the skipped ones' reasons and what the
/// figures were measured on).
fn settle_arch(
    args: &Args,
    settings: &FitSettings,
    rig: Option<&RigSummary>,
    train: &Dataset,
    val: Option<&Dataset>,
) -> Result<Arch> {
    if args.arch != Arch::Auto {
        return Ok(args.arch);
    }
    let (scoring, basis) = match val {
        Some(v) => (v, Basis::HeldOut),
        None => (train, Basis::Training),
    };
    let quiet = FitSettings {
        quiet: true,
        ..settings.clone()
    };
    let selection = crate::learn::auto::select(
        scoring,
        basis,
        &quiet,
        |arch| {
            let p = plan(args, arch, train)?;
            let tp = candidate_mode(args, rig, train, &p)?;
            Ok((p, crate::learn::auto::short_trajectory(tp)))
        },
        |(p, tp), short| fit_stage_mode(train, val, p, short, false, tp.as_ref()),
    )?;
    selection.lines().iter().for_each(|l| println!("{l}"));
    Ok(selection.chosen_arch())
}

/// [`fit_mode`] for a candidate, without printing.
fn candidate_mode(
    args: &Args,
    rig: Option<&RigSummary>,
    train: &Dataset,
    plan: &ModelPlan,
) -> Result<Option<crate::learn::mode::TrajectoryPlan>> {
    Ok(settled_mode(args, rig, train, plan)?.1)
}

/// The fit mode in words and trajectory matching's plan, from the flags.
fn settled_mode(
    args: &Args,
    rig: Option<&RigSummary>,
    train: &Dataset,
    plan: &ModelPlan,
) -> Result<(String, Option<crate::learn::mode::TrajectoryPlan>)> {
    let request = ModeRequest {
        mode: args.fit_mode,
        window_steps: args.window_steps,
        epochs: args.trajectory_epochs,
        masses: args.mass.clone(),
    };
    let names = |key: &str| match key {
        "mode" => "--fit-mode".to_string(),
        other => format!("--{}", other.replace('_', "-")),
    };
    plan_mode(&request, rig, train, plan, &names)
}

/// The training and validation data: `--validation`, or whole trajectories
/// held out of `--train` (none when the fraction is 0 or there is only one).
fn split(
    args: &Args,
    all: Dataset,
    map: Option<&ColumnMap>,
    opts: &LoadOptions,
) -> Result<(Dataset, Option<Dataset>)> {
    match &args.val {
        Some(path) => {
            let (v, _) = columns::load_any(path, map, opts)?;
            if v.dof != all.dof || v.inputs != all.inputs {
                bail!(
                    "{}: {} degrees of freedom and {} input columns, but {} has {} and {}",
                    path.display(),
                    v.dof,
                    v.inputs,
                    args.data.display(),
                    all.dof,
                    all.inputs
                );
            }
            Ok((all, Some(v)))
        }
        None if args.val_fraction > 0.0 && all.trajectories.len() >= 2 => {
            let (t, v) = log::split_owned(all, args.val_fraction, args.seed);
            Ok((t, Some(v).filter(|v| !v.trajectories.is_empty())))
        }
        None => Ok((all, None)),
    }
}

/// Joint rates without masses: the momenta from a learned mass matrix
/// ([`crate::learn::inertia`]), said so; other logs unchanged.
fn momenta_from_rates(
    args: &Args,
    rig: Option<&RigSummary>,
    train: Dataset,
    val: Option<Dataset>,
) -> Result<(Dataset, Option<Dataset>)> {
    if !rig.is_some_and(|r| r.rates_without_masses) {
        return Ok((train, val));
    }
    let settings = crate::learn::inertia::InertiaSettings::for_fit(
        &args.hidden,
        energy_activation(args.activation, "--activation")?,
        (args.epochs, args.lr, args.seed),
        args.reference_inertia,
    );
    let (train, val, summary) = crate::learn::inertia::momenta_from_rates(
        &train,
        val.as_ref(),
        &settings,
        &crate::data::derivative::SavitzkyGolay::default(),
    )?;
    for line in summary.lines() {
        println!("{line}");
    }
    Ok((train, val))
}

/// Print the run, write the blob, the loss history and the baseline.
fn write_outputs(args: &Args, out: &FitOutcome, plan: &ModelPlan) -> Result<()> {
    print_report("energy model", &out.model.report);
    crate::atomic::write_atomic(&args.out, &out.blob)?;
    println!(
        "wrote {} ({} bytes, {}, dt = {} s)",
        args.out.display(),
        out.blob.len(),
        crate::deploy::integrator::method_name(plan.integrator.method),
        plan.integrator.dt
    );
    if let Some(path) = &args.history {
        let json = serde_json::to_vec_pretty(&out.model.report.history)?;
        crate::atomic::write_atomic(path, &json)
            .with_context(|| format!("writing history {}", path.display()))?;
        println!("wrote {}", path.display());
    }
    if let Some(base) = &out.baseline {
        print_report("baseline", &base.report);
        let path = baseline_path(&args.out);
        fitted_blob::write_baseline(&path, &base.model)?;
        println!("wrote {}", path.display());
    }
    Ok(())
}

/// The `[columns]` mapping of `--columns`, with `--gap-factor` applied.
fn column_map(args: &Args) -> Result<Option<ColumnMap>> {
    let Some(path) = &args.columns else {
        if args.gap_factor.is_some() {
            bail!("--gap-factor needs --columns (the canonical layout is never split at gaps)");
        }
        return Ok(None);
    };
    let text = std::fs::read_to_string(path)
        .with_context(|| format!("{}: cannot read", path.display()))?;
    let mut map = ColumnMap::from_toml(&text).map_err(|e| anyhow!("{}: {e}", path.display()))?;
    if let Some(g) = args.gap_factor {
        if !(g.is_finite() && g > 1.0) {
            bail!("--gap-factor {g} must be a finite number above 1");
        }
        map.gap_factor = g;
    }
    Ok(Some(map))
}

/// The fit mode (printed with the reason) and trajectory matching's plan
/// (the log's summary is printed before, ahead of the structure choice).
fn fit_mode(
    args: &Args,
    rig: Option<&RigSummary>,
    train: &Dataset,
    plan: &ModelPlan,
) -> Result<Option<crate::learn::mode::TrajectoryPlan>> {
    let (words, tp) = settled_mode(args, rig, train, plan)?;
    println!("{words}");
    if let Some(tp) = &tp {
        println!("{}", tp.energy_scale_note());
    }
    Ok(tp)
}

/// Refuse flags out of their range, and outputs that would overwrite an
/// input or each other or cannot be written, before any work.
fn check_flags(args: &Args, settings: &FitSettings) -> Result<()> {
    check_fit_settings(settings, SettingNames::Flags)?;
    if !(0.0..1.0).contains(&args.val_fraction) {
        bail!(
            "--val-fraction must be in [0, 1), got {}",
            args.val_fraction
        );
    }
    if let Some(dt) = args.dt {
        check_time_step(dt, "--dt")?;
    }
    if let Some(m) = &args.mass {
        check_masses(m, "--masses")?;
    }
    if let Some(m) = args.reference_inertia {
        check_masses(&[m], "--reference-inertia")?;
        if args.mass.is_some() {
            bail!("--reference-inertia is for joint rates without masses; with --masses the momenta are p = m v: give one of the two");
        }
    }
    let baseline = baseline_path(&args.out);
    let mut inputs = vec![("--train", args.data.as_path())];
    inputs.extend(args.val.as_deref().map(|v| ("--validation", v)));
    let mut outputs = vec![("--out", args.out.as_path())];
    if args.baseline {
        outputs.push(("--baseline (beside --out)", baseline.as_path()));
    }
    outputs.extend(args.history.as_deref().map(|p| ("--history", p)));
    outputs.extend(args.json.as_deref().map(|p| ("--json", p)));
    crate::outputs::check_outputs(&inputs, &outputs)
}

/// Run the command.
pub fn run(args: Args) -> Result<()> {
    let settings = fit_settings(&args);
    check_flags(&args, &settings)?;
    let opts = LoadOptions {
        masses: args.mass.clone(),
        ..LoadOptions::default()
    };
    let map = column_map(&args)?;
    let started = std::time::Instant::now();
    let (all, rig) = columns::load_any(&args.data, map.as_ref(), &opts)?;
    let seconds = started.elapsed().as_secs_f64();
    println!(
        "read {} samples from {} in {seconds:.2} s ({:.0} rows/s)",
        all.samples(),
        args.data.display(),
        all.samples() as f64 / seconds.max(1e-9)
    );
    if let Some(r) = &rig {
        r.lines().iter().for_each(|l| println!("{l}"));
    }
    let (train, val) = split(&args, all, map.as_ref(), &opts)?;
    let (train, val) = momenta_from_rates(&args, rig.as_ref(), train, val)?;
    let arch = settle_arch(&args, &settings, rig.as_ref(), &train, val.as_ref())?;
    let plan = plan(&args, arch, &train)?;
    let trajectory = fit_mode(&args, rig.as_ref(), &train, &plan)?;
    println!(
        "fitting {} samples in {} trajectories ({} validation samples), {} parameters{}",
        train.samples(),
        train.trajectories.len(),
        val.as_ref().map_or(0, Dataset::samples),
        plan.parameters(train.dof),
        if plan.has_port_terms() {
            format!(", {} inputs, {}", train.inputs, plan.terms.label(train.dof))
        } else {
            String::new()
        }
    );
    let out = fit_stage_mode(
        &train,
        val.as_ref(),
        &plan,
        &settings,
        args.baseline,
        trajectory.as_ref(),
    )?;
    write_outputs(&args, &out, &plan)?;
    if let Some(path) = &args.json {
        write_summary(path, &out.model, settings.threads, &train)?;
    }
    println!("{}", crate::CAUTION);
    Ok(())
}
