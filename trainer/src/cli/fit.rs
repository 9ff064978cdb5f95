//! `visviva fit`: load a motion log, fit an energy model (and optionally the
//! plain vector-field baseline), and write the model blob atomically.
//! Logs with input columns `u1..um`, or `--dissipation`, give a damped
//! and/or driven model dx/dt = (J - R) dH/dx + G u (stepped by the
//! discrete-gradient method).

use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

use anyhow::{bail, Context, Result};
use clap::ValueEnum;
use visviva_runtime::{Integrator, Method};

use crate::data::dataset::{Dataset, Inputs};
use crate::data::log::{self, LoadOptions};
use crate::deploy::blob::WeightKind;
use crate::deploy::fitted_blob;
use crate::deploy::integrator::MethodName;
use crate::learn::fit::{self, ArchChoice, FitSettings, StopReason, TrainReport};
use crate::learn::hnn::{EnergyModel, HnnObjective, HnnWork, Objective, PortArch, PortObjective};
use crate::learn::net::Activation;

/// Energy structure.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum ArchArg {
    /// E = V(q) + T(p): explicit symplectic stepping on the device.
    Separable,
    /// E(q, p) over all coordinates: needs implicit midpoint on the device.
    General,
}

/// Kinetic term of a separable model.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum KineticArg {
    /// T = 1/2 p^T M^-1 p with a learned constant inverse mass matrix.
    Quadratic,
    /// T(p) as a network.
    Network,
}

/// Hidden-layer activation.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum ActivationArg {
    /// Hyperbolic tangent.
    Tanh,
    /// Softplus ln(1 + e^x).
    Softplus,
    /// Refused: see the error message.
    Relu,
}

/// Arguments of `visviva fit`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// Motion log (CSV) to fit.
    #[arg(long, value_name = "FILE.csv")]
    pub data: PathBuf,
    /// Separate validation log; without it, whole trajectories are held out
    /// from --data (see --val-fraction).
    #[arg(long, value_name = "FILE.csv")]
    pub val: Option<PathBuf>,
    /// Fraction of trajectories held out for validation when --val is absent
    /// (0 disables validation; early stopping then watches the training loss).
    #[arg(long, default_value_t = 0.2, value_name = "F")]
    pub val_fraction: f64,
    /// Energy structure.
    #[arg(long, value_enum, default_value_t = ArchArg::Separable)]
    pub arch: ArchArg,
    /// Kinetic term of a separable model.
    #[arg(long, value_enum, default_value_t = KineticArg::Quadratic)]
    pub kinetic: KineticArg,
    /// Hidden-layer widths, comma separated (at most 4 layers, each <= 128).
    #[arg(
        long,
        value_delimiter = ',',
        default_value = "64,64",
        value_name = "W,W"
    )]
    pub hidden: Vec<usize>,
    /// Hidden-layer activation.
    #[arg(long, value_enum, default_value_t = ActivationArg::Tanh)]
    pub activation: ActivationArg,
    /// Passes over the training data (ignored with --steps).
    #[arg(long, default_value_t = 300, value_name = "N")]
    pub epochs: usize,
    /// Samples per minibatch.
    #[arg(long, default_value_t = 256, value_name = "N")]
    pub batch: usize,
    /// Peak learning rate (Adam, warm-up then cosine decay).
    #[arg(long, default_value_t = 3e-3, value_name = "X")]
    pub lr: f32,
    /// Total optimizer steps, instead of --epochs.
    #[arg(long, value_name = "N")]
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
    #[arg(long, value_delimiter = ',', value_name = "M1,..")]
    pub mass: Option<Vec<f64>>,
    /// Integration method stored in the model (default: verlet for
    /// separable, midpoint for general models).
    #[arg(long, value_enum)]
    pub integrator: Option<MethodName>,
    /// Time step stored in the model, in seconds (default: the log's median
    /// sample interval).
    #[arg(long, value_name = "S")]
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
    /// Output model blob.
    #[arg(long, value_name = "MODEL.vvb")]
    pub out: PathBuf,
}

fn activation(a: ActivationArg) -> Result<Activation> {
    match a {
        ActivationArg::Tanh => Ok(Activation::Tanh),
        ActivationArg::Softplus => Ok(Activation::Softplus),
        ActivationArg::Relu => bail!(
            "--activation relu is not allowed for energy networks: ReLU's derivative is piecewise \
             constant, so the vector field dq/dt = dH/dp, dp/dt = -dH/dq would be discontinuous \
             (and its second derivative, which training needs, is zero almost everywhere); use \
             tanh or softplus"
        ),
    }
}

fn median_step(ds: &Dataset) -> Option<f64> {
    let mut steps: Vec<f64> = ds
        .trajectories
        .iter()
        .flat_map(|t| t.t.windows(2).map(|w| w[1] - w[0]))
        .collect();
    if steps.is_empty() {
        return None;
    }
    steps.sort_by(f64::total_cmp);
    Some(steps[steps.len() / 2])
}

/// Where the baseline goes: the model path with extension `.baseline.json`.
pub fn baseline_path(out: &Path) -> PathBuf {
    out.with_extension("baseline.json")
}

fn stop_text(stop: StopReason) -> String {
    match stop {
        StopReason::Completed => "all steps done".into(),
        StopReason::EarlyStopped => "early stop (validation loss stopped improving)".into(),
        StopReason::Interrupted => "interrupted; kept the best parameters so far".into(),
        StopReason::NonFinite { step } => format!(
            "loss became NaN or infinite at step {step}; kept the last good parameters \
             (try a smaller --lr)"
        ),
    }
}

fn print_report(label: &str, r: &TrainReport) {
    println!(
        "{label}: {} steps x {} samples in {:.2} s = {:.0} samples/s; best validation loss {:.4e} \
         (epoch {}); {}",
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
fn full_data_loss(model: &EnergyModel, data: &Dataset) -> f64 {
    let (z, t) = model.norm.normalize(data);
    let obj = HnnObjective::new(model.dof, model.arch.clone(), &model.norm);
    let sum = obj.loss_sum(
        &model.params,
        z.view(),
        t.view(),
        &mut HnnWork::default(),
        None,
    );
    sum / z.nrows().max(1) as f64
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

/// Write the `--json` run summary of `fitted` (trained on `train_samples`
/// rows; `final_train_loss` over all of them with the kept parameters).
fn write_summary(
    path: &Path,
    fitted: &fit::Fitted<EnergyModel>,
    threads: usize,
    train_samples: usize,
    final_train_loss: f64,
) -> Result<()> {
    let r = &fitted.report;
    let summary = RunSummary {
        samples_per_second: r.samples_per_second(),
        steps: r.steps,
        batch: r.batch,
        threads,
        seconds: r.seconds,
        train_samples,
        parameters: fitted.model.params.len()
            + fitted.model.port.as_ref().map_or(0, |p| p.params.len()),
        final_train_loss,
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

/// A damped or driven model's mean per-sample loss over every row of
/// `data` (with its inputs `u`).
fn full_port_loss(model: &EnergyModel, data: &Dataset, u: Option<&Inputs>) -> Result<f64> {
    let port = model
        .port
        .as_ref()
        .context("the model has no dissipation or input terms")?;
    let (z, t) = fit::stack_inputs(&model.norm, data, u, &port.input_scale)?;
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

/// The structure asked for on the command line.
fn arch_choice(args: &Args, act: Activation) -> ArchChoice {
    ArchChoice {
        separable: args.arch == ArchArg::Separable,
        quadratic_kinetic: args.kinetic == KineticArg::Quadratic,
        hidden: args.hidden.clone(),
        activation: act,
    }
}

/// The integrator stored in the blob: `method` with `--dt` or the log's
/// median sampling interval.
fn stored_integrator(args: &Args, method: Method, train: &Dataset) -> Result<Integrator> {
    let dt = match args.dt {
        Some(dt) => dt,
        None => median_step(train)
            .map(|v| v as f32)
            .context("cannot infer --dt: the log has no two consecutive samples")?,
    };
    let integrator = Integrator::new(method, dt);
    if !integrator.is_valid() {
        bail!("time step {dt} s is not usable; pass --dt");
    }
    Ok(integrator)
}

/// A flag Ctrl-C sets; the training loop stops and keeps the best so far.
fn interrupt_flag() -> Arc<AtomicBool> {
    let interrupt = Arc::new(AtomicBool::new(false));
    let flag = interrupt.clone();
    if let Err(e) = ctrlc::set_handler(move || flag.store(true, Ordering::SeqCst)) {
        eprintln!("warning: Ctrl-C will not stop training cleanly ({e})");
    }
    interrupt
}

/// Training settings from the command line.
fn fit_settings(args: &Args, interrupt: Arc<AtomicBool>) -> FitSettings {
    FitSettings {
        epochs: args.epochs,
        steps: args.steps,
        batch: args.batch,
        lr: args.lr,
        threads: args.threads.max(1),
        early_stop: !args.no_early_stop,
        patience: args.patience,
        seed: args.seed,
        quiet: args.quiet,
        interrupt: Some(interrupt),
        ..FitSettings::default()
    }
}

/// Print the run, write the blob and, when asked, the loss history.
fn write_model(
    args: &Args,
    fitted: &fit::Fitted<EnergyModel>,
    integrator: Integrator,
) -> Result<()> {
    print_report("energy model", &fitted.report);
    let bytes =
        fitted_blob::write_energy_blob(&args.out, &fitted.model, integrator, WeightKind::F32)?;
    println!(
        "wrote {} ({bytes} bytes, {:?}, dt = {} s)",
        args.out.display(),
        integrator.method,
        integrator.dt
    );
    if let Some(path) = &args.history {
        let json = serde_json::to_vec_pretty(&fitted.report.history)?;
        crate::atomic::write_atomic(path, &json)
            .with_context(|| format!("writing history {}", path.display()))?;
        println!("wrote {}", path.display());
    }
    Ok(())
}

/// Run the command.
pub fn run(args: Args) -> Result<()> {
    let act = activation(args.activation)?;
    if !(0.0..1.0).contains(&args.val_fraction) {
        bail!(
            "--val-fraction must be in [0, 1), got {}",
            args.val_fraction
        );
    }
    if let Some(dt) = args.dt {
        if !(dt.is_finite() && dt > 0.0) {
            bail!("--dt must be a positive number of seconds, got {dt}");
        }
    }
    let opts = LoadOptions {
        masses: args.mass.clone(),
        ..LoadOptions::default()
    };
    let (all, all_inputs) = log::load_csv_with_inputs(&args.data, &opts)?;
    if all_inputs.is_some() || args.dissipation || args.dissipation_net.is_some() {
        return run_port(&args, act, all, all_inputs, &opts);
    }
    let (train, val) = match &args.val {
        Some(path) => {
            let v = log::load_csv(path, &opts)?;
            if v.dof != all.dof {
                bail!(
                    "{}: {} degrees of freedom, but {} has {}",
                    path.display(),
                    v.dof,
                    args.data.display(),
                    all.dof
                );
            }
            (all, Some(v))
        }
        None if args.val_fraction > 0.0 && all.trajectories.len() >= 2 => {
            let (t, v) = log::split_by_trajectory(&all, args.val_fraction, args.seed);
            if v.trajectories.is_empty() {
                (t, None)
            } else {
                (t, Some(v))
            }
        }
        None => (all, None),
    };
    let choice = arch_choice(&args, act);
    let arch = choice.build(train.dof)?;
    let method = match (args.integrator, choice.separable) {
        (Some(m), _) => Method::from(m),
        (None, true) => Method::StormerVerlet,
        (None, false) => Method::ImplicitMidpoint,
    };
    if method.needs_separable() && !choice.separable {
        bail!("--integrator {method:?} needs --arch separable; use --integrator midpoint");
    }
    let integrator = stored_integrator(&args, method, &train)?;

    let interrupt = interrupt_flag();
    let settings = fit_settings(&args, interrupt.clone());
    println!(
        "fitting {} samples in {} trajectories ({} validation samples), {} parameters",
        train.samples(),
        train.trajectories.len(),
        val.as_ref().map_or(0, Dataset::samples),
        arch.param_count(train.dof)
    );
    let fitted = fit::fit_energy(&train, val.as_ref(), &arch, &settings)?;
    write_model(&args, &fitted, integrator)?;
    if let Some(path) = &args.json {
        let loss = full_data_loss(&fitted.model, &train);
        write_summary(path, &fitted, settings.threads, train.samples(), loss)?;
    }
    if args.baseline && !interrupt.load(Ordering::SeqCst) {
        let base = fit::fit_baseline(&train, val.as_ref(), &choice.hidden, act, &settings)?;
        print_report("baseline", &base.report);
        let path = baseline_path(&args.out);
        fitted_blob::write_baseline(&path, &base.model)?;
        println!("wrote {}", path.display());
    }
    println!("{}", crate::CAUTION);
    Ok(())
}

/// `run` for a damped and/or driven model.
fn run_port(
    args: &Args,
    act: Activation,
    all: Dataset,
    all_inputs: Option<Inputs>,
    opts: &LoadOptions,
) -> Result<()> {
    type Split = (Dataset, Option<Inputs>);
    let ((train, train_u), val): (Split, Option<Split>) = match &args.val {
        Some(path) => {
            let (v, vu) = log::load_csv_with_inputs(path, opts)?;
            if v.dof != all.dof {
                bail!(
                    "{}: {} degrees of freedom, but {} has {}",
                    path.display(),
                    v.dof,
                    args.data.display(),
                    all.dof
                );
            }
            let (want, got) = (
                all_inputs.as_ref().map_or(0, |u| u.count),
                vu.as_ref().map_or(0, |u| u.count),
            );
            if want != got {
                bail!(
                    "{}: {got} input columns, but {} has {want}",
                    path.display(),
                    args.data.display()
                );
            }
            ((all, all_inputs), Some((v, vu)))
        }
        None if args.val_fraction > 0.0 && all.trajectories.len() >= 2 => match &all_inputs {
            Some(u) => {
                let ((t, tu), (v, vu)) =
                    log::split_with_inputs(&all, u, args.val_fraction, args.seed);
                ((t, Some(tu)), Some((v, Some(vu))))
            }
            None => {
                let (t, v) = log::split_by_trajectory(&all, args.val_fraction, args.seed);
                ((t, None), Some((v, None)))
            }
        },
        None => ((all, all_inputs), None),
    };
    let val = val.filter(|(v, _)| !v.trajectories.is_empty());
    let choice = arch_choice(args, act);
    let arch = choice.build(train.dof)?;
    let method = args
        .integrator
        .map_or(Method::DiscreteGradient, Method::from);
    if !method.handles_port_terms() {
        bail!("--integrator {method:?} cannot step damped or driven models; use the default (discrete gradient)");
    }
    let integrator = stored_integrator(args, method, &train)?;
    let interrupt = interrupt_flag();
    let settings = fit_settings(args, interrupt.clone());
    let m = train_u.as_ref().map_or(0, |u| u.count);
    if m == 0 && args.input_net.is_some() {
        bail!(
            "--input-net: {} has no input columns u1..um, so there is no G to learn",
            args.data.display()
        );
    }
    let terms = PortArch {
        inputs: m,
        ..port_terms(args)?
    };
    println!(
        "fitting {} samples in {} trajectories ({} validation samples), {} inputs, {}",
        train.samples(),
        train.trajectories.len(),
        val.as_ref().map_or(0, |(v, _)| v.samples()),
        m,
        terms.label(train.dof),
    );
    let fitted = fit::fit_port(
        &train,
        train_u.as_ref(),
        val.as_ref().map(|(v, u)| (v, u.as_ref())),
        &arch,
        &terms,
        &settings,
    )?;
    write_model(args, &fitted, integrator)?;
    if let Some(path) = &args.json {
        let loss = full_port_loss(&fitted.model, &train, train_u.as_ref())?;
        write_summary(path, &fitted, settings.threads, train.samples(), loss)?;
    }
    if args.baseline && !interrupt.load(Ordering::SeqCst) {
        let base = fit::fit_baseline_driven(
            &train,
            train_u.as_ref(),
            val.as_ref().map(|(v, u)| (v, u.as_ref())),
            &choice.hidden,
            act,
            &settings,
        )?;
        print_report("baseline", &base.report);
        let path = baseline_path(&args.out);
        fitted_blob::write_baseline(&path, &base.model)?;
        println!("wrote {}", path.display());
    }
    println!("{}", crate::CAUTION);
    Ok(())
}

/// The port terms asked for on the command line (the input count comes
/// from the data).
fn port_terms(args: &Args) -> Result<PortArch> {
    let none = Vec::new();
    PortArch::with_networks(
        args.dissipation,
        args.dissipation_net.as_ref().unwrap_or(&none),
        args.input_net.as_ref().unwrap_or(&none),
        |name| format!("--{name}-net"),
    )
}
