//! `visviva run DIR`: the whole path from logs to device blobs in one command,
//! driven by `DIR/visviva.toml`. Produces `DIR/out/`: the fitted model and
//! baseline, one blob per export target, golden rollouts for the device
//! check, `report.json` and `report.html`. Steps whose inputs did not change
//! since the last run are reused (their inputs and settings are hashed).
//! A damped or driven project (`[model] dissipation = true`, or input
//! columns u1..um in the training log) fits the port-Hamiltonian model and
//! a baseline that takes the inputs, reports damping per mode and the
//! response to held-out input sequences, and keeps the golden rollouts'
//! input sequence beside them (`golden/<blob>-inputs.csv`).

use std::path::{Path, PathBuf};
use std::time::Instant;

use anyhow::{anyhow, bail, Context, Result};
use serde::{de::DeserializeOwned, Serialize};
use sha2::{Digest, Sha256};
use visviva_runtime::{Hamiltonian, Integrator, Method};

use crate::atomic::write_atomic;
use crate::cli::integrator_args::IntegratorArgs;
use crate::data::dataset::{Dataset, DerivativeSource, Inputs};
use crate::data::log::{load_csv_with_inputs, split_by_trajectory, split_with_inputs, LoadOptions};
use crate::deploy::blob::{BlobModel, HostModel};
use crate::deploy::export::export;
use crate::deploy::inspect::inspect;
use crate::deploy::integrator::MethodName;
use crate::deploy::rollout::to_csv;
use crate::deploy::rollout::{roll_driven, sample_states};
use crate::evidence::charts::{charts, units, HistoryFile};
use crate::evidence::check::{check, CheckSettings};
use crate::evidence::report::{
    render_html, BudgetVerdict, CoordinateSummary, DataSummary, DeviceBlob, DrivenComparison,
    FitSummary, PortReport, RunReport,
};
use crate::learn::fit::{
    fit_baseline_driven, fit_energy, fit_port, ArchChoice, FitSettings, StopReason, TrainReport,
};
use crate::project::file::{ActivationName, Arch, DeviceBudget, KineticKind, Project};

/// Arguments of `visviva run`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// Project folder holding visviva.toml.
    pub dir: PathBuf,
    /// Refit and re-export even when nothing changed.
    #[arg(long)]
    pub force: bool,
    /// No progress bars.
    #[arg(long, short)]
    pub quiet: bool,
}

fn sha(parts: &[&[u8]]) -> String {
    let mut h = Sha256::new();
    for p in parts {
        h.update((p.len() as u64).to_le_bytes());
        h.update(p);
    }
    h.finalize().iter().map(|b| format!("{b:02x}")).collect()
}

fn read_json<T: DeserializeOwned>(p: &Path) -> Option<T> {
    serde_json::from_slice(&std::fs::read(p).ok()?).ok()
}

fn write_json<T: Serialize>(p: &Path, v: &T) -> Result<()> {
    write_atomic(p, &serde_json::to_vec_pretty(v)?)
}

/// Noise estimate from second differences: for white noise of standard
/// deviation s, x[k+1] - 2x[k] + x[k-1] has variance 6 s^2 (common practice
/// for well-sampled smooth signals; the motion's own curvature adds a little,
/// so this is an upper bound).
fn data_summary(
    train_file: &str,
    train: &Dataset,
    val: Option<&Dataset>,
    inputs: usize,
) -> DataSummary {
    let n2 = 2 * train.dof;
    let names = crate::data::log::column_names(train.dof, false);
    let mut dts: Vec<f64> = train
        .trajectories
        .iter()
        .flat_map(|t| t.t.windows(2).map(|w| w[1] - w[0]))
        .collect();
    dts.sort_by(f64::total_cmp);
    let coordinates = (0..n2)
        .map(|c| {
            let (mut lo, mut hi, mut sq, mut cnt, mut d2, mut dc) =
                (f64::INFINITY, f64::NEG_INFINITY, 0.0, 0usize, 0.0, 0usize);
            for t in &train.trajectories {
                let col: Vec<f64> = t.x.column(c).to_vec();
                for v in &col {
                    lo = lo.min(*v);
                    hi = hi.max(*v);
                    sq += v * v;
                    cnt += 1;
                }
                for w in col.windows(3) {
                    let d = w[2] - 2.0 * w[1] + w[0];
                    d2 += d * d;
                    dc += 1;
                }
            }
            CoordinateSummary {
                name: names.get(c + 2).cloned().unwrap_or_default(),
                min: lo,
                max: hi,
                rms: (sq / cnt.max(1) as f64).sqrt(),
                noise: (d2 / dc.max(1) as f64 / 6.0).sqrt(),
            }
        })
        .collect();
    DataSummary {
        train_file: train_file.to_string(),
        dof: train.dof,
        train_trajectories: train.trajectories.len(),
        train_samples: train.samples(),
        validation_trajectories: val.map_or(0, |v| v.trajectories.len()),
        validation_samples: val.map_or(0, Dataset::samples),
        sample_interval_s: dts.get(dts.len() / 2).copied().unwrap_or(0.0),
        derivatives: match train.derivatives {
            DerivativeSource::Given => "given".into(),
            DerivativeSource::Estimated => "estimated (Savitzky-Golay)".into(),
        },
        coordinates,
        inputs,
    }
}

fn fit_summary(r: &TrainReport, parameters: usize) -> FitSummary {
    FitSummary {
        parameters,
        steps: r.steps,
        best_validation_loss: r.best_val,
        best_epoch: r.best_epoch.map_or(0, |e| e + 1),
        stop: match r.stop {
            StopReason::Completed => "all epochs done".into(),
            StopReason::EarlyStopped => "validation loss stopped improving".into(),
            StopReason::Interrupted => "interrupted (best so far kept)".into(),
            StopReason::NonFinite { step } => {
                format!("non-finite loss at step {step} (last good kept)")
            }
        },
        seconds: r.seconds,
        samples_per_second: r.samples_per_second(),
        train_loss: r.history.train.clone(),
        validation_loss: r.history.val.clone(),
        reused: false,
    }
}

fn budget_verdict(b: &DeviceBudget, bytes: usize, ram: usize, macs_per_step: u32) -> BudgetVerdict {
    let flash_ok = (b.flash_bytes > 0).then_some(bytes as u64 <= b.flash_bytes);
    let ram_ok = (b.ram_bytes > 0).then_some(ram as u64 <= b.ram_bytes);
    let cpm = if b.cycles_per_mac > 0.0 {
        b.cycles_per_mac
    } else {
        4.0
    };
    let step_time_s = (b.clock_hz > 0).then(|| macs_per_step as f64 * cpm / b.clock_hz as f64);
    let time_ok = match (step_time_s, b.control_period_s > 0.0) {
        (Some(t), true) => Some(t <= b.control_period_s),
        _ => None,
    };
    let mut advice = Vec::new();
    if flash_ok == Some(false) {
        advice.push(format!(
            "blob of {bytes} bytes exceeds the flash budget of {} bytes: export with int8 weights or narrow the hidden layers",
            b.flash_bytes
        ));
    }
    if ram_ok == Some(false) {
        advice.push(format!(
            "runtime needs about {ram} bytes of RAM, budget {}: narrow the widest layer (scratch grows with width)",
            b.ram_bytes
        ));
    }
    if time_ok == Some(false) {
        advice.push(format!(
            "estimated step time {:.3e} s exceeds the control period {} s: narrow the network, use int8, a larger time step or fewer substeps, or Stormer-Verlet instead of implicit midpoint",
            step_time_s.unwrap_or(0.0),
            b.control_period_s
        ));
    }
    BudgetVerdict {
        flash_ok,
        ram_ok,
        step_time_s,
        time_ok,
        pass: advice.is_empty(),
        advice,
    }
}

fn method_of(m: Option<MethodName>, separable: bool, port: bool) -> Method {
    match m {
        Some(m) => m.into(),
        None if port => Method::DiscreteGradient,
        None if separable => Method::StormerVerlet,
        None => Method::ImplicitMidpoint,
    }
}

/// Refuse a method that cannot step a damped or driven model.
fn check_port_method(method: Method, whence: &str) -> Result<()> {
    if !method.handles_port_terms() {
        bail!(
            "{whence} integrator = \"{}\" cannot step a damped or driven model: it steps only J dH/dx \
             and would drop the dissipation R and the inputs G u; use \"discrete-gradient\" (the \
             default; exact energy balance) or \"midpoint\"",
            crate::deploy::integrator::method_name(method)
        );
    }
    Ok(())
}

/// The training and validation logs with their inputs (`None` for logs
/// without u columns). `val_bytes` is empty when validation trajectories
/// were held out of the training log.
struct Logs {
    train: Dataset,
    train_u: Option<Inputs>,
    val: Dataset,
    val_u: Option<Inputs>,
    train_bytes: Vec<u8>,
    val_bytes: Vec<u8>,
}

fn load_logs(dir: &Path, project: &Project, opts: &LoadOptions) -> Result<Logs> {
    let train_path = dir.join(&project.data.train);
    let train_bytes = std::fs::read(&train_path)
        .with_context(|| format!("{}: cannot read", train_path.display()))?;
    let (all, all_u) = load_csv_with_inputs(&train_path, opts)?;
    let m = all_u.as_ref().map_or(0, |u| u.count);
    match &project.data.validation {
        Some(v) => {
            let p = dir.join(v);
            let b = std::fs::read(&p).with_context(|| format!("{}: cannot read", p.display()))?;
            let (vd, vu) = load_csv_with_inputs(&p, opts)?;
            if vd.dof != all.dof {
                bail!(
                    "{}: {} degrees of freedom, the training log {}",
                    p.display(),
                    vd.dof,
                    all.dof
                );
            }
            let got = vu.as_ref().map_or(0, |u| u.count);
            if got != m {
                bail!(
                    "{}: line 1: {got} input columns (u1..), the training log {} has {m}",
                    p.display(),
                    train_path.display()
                );
            }
            Ok(Logs {
                train: all,
                train_u: all_u,
                val: vd,
                val_u: vu,
                train_bytes,
                val_bytes: b,
            })
        }
        None => {
            let (frac, seed) = (project.data.val_fraction, project.fit.seed);
            let ((t, tu), (v, vu)) = match &all_u {
                Some(u) => {
                    let ((t, tu), (v, vu)) = split_with_inputs(&all, u, frac, seed);
                    ((t, Some(tu)), (v, Some(vu)))
                }
                None => {
                    let (t, v) = split_by_trajectory(&all, frac, seed);
                    ((t, None), (v, None))
                }
            };
            if v.trajectories.is_empty() {
                bail!("no validation trajectories: add [data] validation or more trajectories (val_fraction {frac})");
            }
            Ok(Logs {
                train: t,
                train_u: tu,
                val: v,
                val_u: vu,
                train_bytes,
                val_bytes: Vec::new(),
            })
        }
    }
}

/// The inputs the golden rollouts replay: validation trajectory 0's logged
/// inputs, at most `steps` rows (row k held over step k).
fn golden_inputs(val: &Dataset, val_u: Option<&Inputs>, steps: usize) -> (String, Vec<Vec<f32>>) {
    match (val.trajectories.first(), val_u) {
        (Some(t), Some(u)) => (
            t.id.clone(),
            u.per_trajectory[0]
                .rows()
                .into_iter()
                .take(steps)
                .map(|r| r.iter().map(|v| *v as f32).collect())
                .collect(),
        ),
        _ => (String::new(), Vec::new()),
    }
}

/// The input sequence as CSV `t,u1..um` (t = k dt, row k held over step
/// k), shortest round-trip decimals: `visviva rollout --inputs` reads it back
/// bit for bit.
fn inputs_csv(rows: &[Vec<f32>], dt: f32) -> String {
    let m = rows.first().map_or(0, Vec::len);
    let mut text = String::from("t");
    for i in 1..=m {
        text.push_str(&format!(",u{i}"));
    }
    text.push('\n');
    for (k, row) in rows.iter().enumerate() {
        text.push_str(&format!("{}", k as f64 * dt as f64));
        for v in row {
            text.push_str(&format!(",{v}"));
        }
        text.push('\n');
    }
    text
}

fn median(mut v: Vec<f64>) -> f64 {
    if v.is_empty() {
        return f64::NAN;
    }
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

/// The damped or driven model's check: damping per mode, driven rollouts of
/// the held-out trajectories for model and baseline, and their charts.
#[allow(clippy::too_many_arguments)]
fn port_check(
    model: &HostModel<'_>,
    blob: &BlobModel,
    baseline: Option<&crate::learn::hnn::BaselineModel>,
    logs: &Logs,
    reference: Option<&dyn crate::reference::systems::PortSystem>,
    dissipation: bool,
    golden_input_trajectory: String,
    history: &HistoryFile,
) -> Result<(PortReport, Vec<(String, String)>)> {
    let r = crate::evidence::check::check_port(model, blob, &logs.val, logs.val_u.as_ref())?;
    let base = baseline
        .map(|b| crate::evidence::check::driven_baseline(b, &logs.val, logs.val_u.as_ref()));
    let driven: Vec<DrivenComparison> = r
        .rollouts
        .iter()
        .enumerate()
        .map(|(k, m)| {
            let b = base.as_ref().map(|b| &b[k]);
            DrivenComparison {
                id: m.id.clone(),
                samples: logs.val.trajectories[k].t.len(),
                model_state_rel_rmse: m.state_rel_rmse,
                baseline_state_rel_rmse: b.map(|b| b.state_rel_rmse),
                model_failure: m.failure.clone(),
                baseline_failure: b.and_then(|b| b.failure.clone()),
            }
        })
        .collect();
    let mut figs = Vec::new();
    if let (Some(t), Some(m)) = (logs.val.trajectories.first(), r.rollouts.first()) {
        let u = logs.val_u.as_ref().map(|u| &u.per_trajectory[0]);
        let b = base.as_ref().map(|b| b[0].states.as_slice());
        figs = crate::evidence::charts::driven_charts(t, u, &m.states, b, 1500);
    }
    figs.push(("loss".into(), crate::evidence::charts::loss_chart(history)));
    let report = PortReport {
        inputs: model.inputs(),
        dissipation,
        median_model_state_rel_rmse: median(
            driven.iter().map(|d| d.model_state_rel_rmse).collect(),
        ),
        median_baseline_state_rel_rmse: base
            .as_ref()
            .map(|b| median(b.iter().map(|d| d.state_rel_rmse).collect())),
        rest: r.rest,
        rest_residual: r.rest_residual,
        modes: r.modes,
        reference_modes: reference.map(crate::evidence::check::reference_modes),
        driven,
        golden_input_trajectory,
    };
    Ok((
        report,
        figs.into_iter()
            .map(|(_, c)| (c.title.clone(), c.to_svg()))
            .collect(),
    ))
}

/// Run the command.
pub fn run(args: Args) -> Result<()> {
    let started = Instant::now();
    let dir = &args.dir;
    let project = Project::load(dir)?;
    let out = dir.join("out");
    let name = project.name.clone().unwrap_or_else(|| {
        dir.file_name()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_default()
    });
    println!(
        "visviva run: {name} ({})",
        dir.join("visviva.toml").display()
    );

    // 1. Data.
    println!("[1/5] data");
    let opts = LoadOptions {
        masses: project.data.masses.clone(),
        step_tolerance: project.data.step_tolerance,
        ..LoadOptions::default()
    };
    let logs = load_logs(dir, &project, &opts)?;
    let inputs = logs.train_u.as_ref().map_or(0, |u| u.count);
    let port = inputs > 0 || project.model.damped();
    if inputs == 0 && !project.model.input_net.is_empty() {
        bail!(
            "{}: [model] input_net: the training log has no input columns u1..um, so there is no G to learn",
            dir.join("visviva.toml").display()
        );
    }
    let terms = project
        .model
        .port_terms()
        .with_context(|| dir.join("visviva.toml").display().to_string())?;
    let (train, val) = (&logs.train, &logs.val);
    let data = data_summary(
        &project.data.train.display().to_string(),
        train,
        Some(val),
        inputs,
    );
    println!(
        "      {} training trajectories ({} samples), {} validation, {} dof, derivatives {}{}",
        data.train_trajectories,
        data.train_samples,
        data.validation_trajectories,
        data.dof,
        data.derivatives,
        if port {
            format!(
                "; damped/driven model: {inputs} input(s), {}",
                crate::learn::hnn::PortArch {
                    inputs,
                    ..terms.clone()
                }
                .label(data.dof)
            )
        } else {
            String::new()
        }
    );

    // 2. Fit (reused when data and settings are unchanged).
    let m = &project.model;
    let separable = m.arch == Arch::Separable;
    let activation = match m.activation {
        ActivationName::Tanh => crate::learn::net::Activation::Tanh,
        ActivationName::Softplus => crate::learn::net::Activation::Softplus,
        ActivationName::Relu => bail!("relu is refused for energy networks"),
    };
    let choice = ArchChoice {
        separable,
        quadratic_kinetic: m.kinetic == KineticKind::Quadratic,
        hidden: m.hidden.clone(),
        activation,
    };
    let arch = choice.build(train.dof)?;
    let method = method_of(m.integrator, separable, port);
    let dt = m.dt.unwrap_or(data.sample_interval_s as f32);
    let integrator = Integrator::new(method, dt);
    if !integrator.is_valid() {
        bail!("[model] time step {dt} s is not usable");
    }
    if port {
        check_port_method(method, "[model]")?;
        for t in project.export_targets() {
            if let Some(i) = t.integrator {
                check_port_method(i.into(), &format!("[[export]] {}:", t.name))?;
            }
        }
    }
    if method.needs_separable() && !separable {
        bail!("[model] integrator {method:?} needs arch = \"separable\"; use \"midpoint\"");
    }
    // Nothing is written before the data and settings are known to be usable.
    std::fs::create_dir_all(out.join("golden"))
        .with_context(|| format!("{}: cannot create", out.display()))?;
    let settings_json = serde_json::to_vec(&(
        &project.data,
        &project.model,
        &project.fit,
        env!("CARGO_PKG_VERSION"),
    ))?;
    let fit_hash = sha(&[&logs.train_bytes, &logs.val_bytes, &settings_json]);
    let model_path = out.join("model.vvb");
    let baseline_path = out.join("model.baseline.json");
    let fit_path = out.join("fit.json");
    let hash_path = out.join("fit.sha256");
    let cached = !args.force
        && std::fs::read_to_string(&hash_path).ok().as_deref() == Some(fit_hash.as_str())
        && model_path.exists()
        && (!project.fit.baseline || baseline_path.exists());
    let (fit, baseline_fit) = match cached
        .then(|| read_json::<(FitSummary, Option<FitSummary>)>(&fit_path))
        .flatten()
    {
        Some((mut f, mut b)) => {
            println!(
                "[2/5] fit: inputs unchanged, reusing {}",
                model_path.display()
            );
            f.reused = true;
            if let Some(b) = b.as_mut() {
                b.reused = true;
            }
            (f, b)
        }
        None => {
            println!("[2/5] fit: {} parameters", arch.param_count(train.dof));
            let settings = FitSettings {
                epochs: project.fit.epochs,
                batch: project.fit.batch,
                lr: project.fit.lr,
                patience: project.fit.patience,
                seed: project.fit.seed,
                threads: project.fit.threads,
                quiet: args.quiet,
                ..FitSettings::default()
            };
            let fitted = if port {
                fit_port(
                    train,
                    logs.train_u.as_ref(),
                    Some((val, logs.val_u.as_ref())),
                    &arch,
                    &terms,
                    &settings,
                )?
            } else {
                fit_energy(train, Some(val), &arch, &settings)?
            };
            let bytes = crate::deploy::fitted_blob::energy_blob(
                &fitted.model,
                integrator,
                crate::deploy::blob::WeightKind::F32,
            )?;
            write_atomic(&model_path, &bytes)?;
            let params = arch.param_count(train.dof)
                + fitted.model.port.as_ref().map_or(0, |p| p.params.len());
            let f = fit_summary(&fitted.report, params);
            let b = if project.fit.baseline {
                println!(
                    "      baseline (plain vector field, same hidden sizes{})",
                    if inputs > 0 {
                        ", state and inputs in"
                    } else {
                        ""
                    }
                );
                let base = fit_baseline_driven(
                    train,
                    logs.train_u.as_ref(),
                    Some((val, logs.val_u.as_ref())),
                    &choice.hidden,
                    activation,
                    &settings,
                )?;
                crate::deploy::fitted_blob::write_baseline(&baseline_path, &base.model)?;
                let params = base.model.params.len();
                Some(fit_summary(&base.report, params))
            } else {
                None
            };
            write_json(&fit_path, &(&f, &b))?;
            write_atomic(&hash_path, fit_hash.as_bytes())?;
            (f, b)
        }
    };
    println!(
        "      best validation loss {:.3e} (epoch {}), {:.1} s",
        fit.best_validation_loss, fit.best_epoch, fit.seconds
    );

    // 3. Check.
    println!(
        "[3/5] check: model vs baseline on {} validation trajectories",
        val.trajectories.len()
    );
    let model_bytes = std::fs::read(&model_path)?;
    let model = HostModel::from_bytes(&model_bytes)
        .map_err(|e| anyhow!("{}: {e}", model_path.display()))?;
    let baseline = if project.fit.baseline {
        Some(crate::deploy::fitted_blob::read_baseline(&baseline_path)?)
    } else {
        None
    };
    let params: Vec<(String, f64)> = project
        .check
        .reference_params
        .iter()
        .map(|(k, v)| (k.clone(), *v))
        .collect();
    let reference = project.check.reference_system.as_deref();
    let system = match reference {
        Some(s) if !port => Some(
            crate::reference::systems::build_system(s, &params)
                .map_err(|e| anyhow!("[check] reference_system: {e}"))?,
        ),
        _ => None,
    };
    let port_system = match reference {
        Some(s) if port => Some(
            crate::reference::systems::build_port_system(s, &params)
                .ok_or_else(|| {
                    anyhow!(
                        "[check] reference_system = \"{s}\" is not a damped or driven system; a damped or driven project needs one of {}",
                        crate::reference::systems::PORT_CATALOG
                            .iter()
                            .map(|p| p.name)
                            .collect::<Vec<_>>()
                            .join(", ")
                    )
                })?
                .map_err(|e| anyhow!("[check] reference_system: {e}"))?,
        ),
        _ => None,
    };
    let history = HistoryFile {
        train: fit.train_loss.clone(),
        val: fit.validation_loss.clone(),
    };
    let src = BlobModel::from_bytes(&model_bytes).map_err(|e| anyhow!("{e}"))?;
    let (golden_id, golden_u) = golden_inputs(val, logs.val_u.as_ref(), project.check.golden_steps);
    let (check_report, port_report, figs) = if port {
        let (r, figs) = port_check(
            &model,
            &src,
            baseline.as_ref(),
            &logs,
            port_system.as_deref(),
            project.model.damped(),
            golden_id,
            &history,
        )?;
        crate::cli::tables::print_port(&r);
        (None, Some(r), figs)
    } else {
        let r = check(
            &model,
            baseline.as_ref(),
            val,
            system.as_deref(),
            &CheckSettings {
                horizon_steps: Some(project.check.horizon_steps),
                ..CheckSettings::default()
            },
        )?;
        crate::cli::tables::print_table(&r);
        let figs: Vec<(String, String)> = charts(&r, Some(&history), units(system.as_deref()))
            .into_iter()
            .map(|(_, c)| (c.title.clone(), c.to_svg()))
            .collect();
        (Some(r), None, figs)
    };

    // 4. Export targets and golden rollouts.
    let mut devices = Vec::new();
    let targets = project.export_targets();
    if inputs > 0 && golden_u.len() < project.check.golden_steps {
        println!(
            "      note: golden rollouts take {} steps, the length of held-out trajectory {}'s input sequence ([check] golden_steps = {})",
            golden_u.len(),
            val.trajectories.first().map_or("", |t| t.id.as_str()),
            project.check.golden_steps
        );
    }
    println!("[4/5] export: {} device blob(s)", targets.len());
    for t in &targets {
        let ia = IntegratorArgs {
            integrator: t.integrator,
            dt: t.dt,
            substeps: t.substeps,
            ..IntegratorArgs::default()
        };
        let blob_path = out.join(format!("{}.vvb", t.name));
        let meta_path = out.join(format!("{}.export.json", t.name));
        let target_json =
            serde_json::to_vec(&(t, &project.check.golden_steps, &project.check.golden_states))?;
        let hash = sha(&[&model_bytes, &target_json]);
        let hash_path = out.join(format!("{}.sha256", t.name));
        let reuse = !args.force
            && std::fs::read_to_string(&hash_path).ok().as_deref() == Some(hash.as_str())
            && blob_path.exists();
        let report = match reuse
            .then(|| read_json::<crate::deploy::export::ExportReport>(&meta_path))
            .flatten()
        {
            Some(r) => {
                println!("      {}: inputs unchanged, reusing", t.name);
                r
            }
            None => {
                let (bytes, r) = export(
                    &src,
                    t.weights,
                    &ia.overrides(),
                    project.check.horizon_steps,
                    8,
                )?;
                write_atomic(&blob_path, &bytes)?;
                write_json(&meta_path, &r)?;
                write_atomic(&hash_path, hash.as_bytes())?;
                r
            }
        };
        let bytes = std::fs::read(&blob_path)?;
        let ins = inspect(&bytes)?;
        let dev = HostModel::from_bytes(&bytes).map_err(|e| anyhow!("{e}"))?;
        let mut golden = Vec::new();
        let golden_steps = if inputs > 0 {
            golden_u.len().min(project.check.golden_steps)
        } else {
            project.check.golden_steps
        };
        for (k, x0) in sample_states(
            &src.offset,
            &src.scale,
            0.5,
            project.check.golden_states,
            0x676f6c64,
        )
        .iter()
        .enumerate()
        {
            let r = roll_driven(&dev, x0, golden_steps, &golden_u)?;
            if let Some((step, e)) = r.failure {
                bail!(
                    "golden rollout {k} of {} failed at step {step}: {e}",
                    t.name
                );
            }
            let file = format!("golden/{}-{k}.csv", t.name);
            write_atomic(
                &out.join(&file),
                to_csv(&r.states, src.dof, dev.integrator().dt, true).as_bytes(),
            )?;
            golden.push(file);
        }
        let golden_inputs_file = (inputs > 0).then(|| format!("golden/{}-inputs.csv", t.name));
        if let Some(file) = &golden_inputs_file {
            write_atomic(
                &out.join(file),
                inputs_csv(&golden_u[..golden_steps], dev.integrator().dt).as_bytes(),
            )?;
        }
        let measured: Option<serde_json::Value> =
            read_json(&out.join(format!("device/{}.json", t.name)));
        let budget = budget_verdict(
            &project.device,
            report.bytes,
            ins.runtime_ram_bytes,
            report.macs_per_step,
        );
        println!(
            "      {}: {} bytes ({:?}), {} MAC/step, max deviation from f32 {:.2e}, budget {}",
            t.name,
            report.bytes,
            t.weights,
            report.macs_per_step,
            report.max_state_deviation,
            if budget.pass { "pass" } else { "FAIL" }
        );
        devices.push(DeviceBlob {
            name: t.name.clone(),
            file: format!("{}.vvb", t.name),
            ram_bytes: ins.runtime_ram_bytes,
            emulator_instructions_per_step: measured
                .as_ref()
                .and_then(|v| v.get("instructions_per_step"))
                .and_then(|v| v.as_f64()),
            golden,
            golden_inputs: golden_inputs_file,
            budget,
            export: report,
        });
    }

    // 5. Report.
    println!("[5/5] report");
    let budget_pass = devices.iter().all(|d| d.budget.pass);
    let report = RunReport {
        project: name.clone(),
        visviva_version: env!("CARGO_PKG_VERSION").into(),
        architecture: src.architecture(),
        data,
        fit,
        baseline_fit,
        check: check_report,
        port: port_report,
        devices,
        budget: project.device.clone(),
        budget_pass,
        caution: crate::CAUTION.into(),
    };
    write_json(&out.join("report.json"), &report)?;
    let html_path = out.join("report.html");
    write_atomic(&html_path, render_html(&report, &figs).as_bytes())?;
    let verdict = if budget_pass {
        "PASS"
    } else {
        "FAIL (see the report)"
    };
    if let Some(c) = &report.check {
        let m = &c.median_model;
        println!(
            "done in {:.1} s: state error {:.2e} (baseline {}), energy drift {} (baseline {}); device budget {verdict}",
            started.elapsed().as_secs_f64(),
            m.state_rel_rmse,
            c.median_baseline.as_ref().map_or("-".into(), |b| format!("{:.2e}", b.state_rel_rmse)),
            m.true_energy_drift.or(m.learned_energy_drift).map_or("-".into(), |v| format!("{v:.2e}")),
            c.median_baseline
                .as_ref()
                .and_then(|b| b.true_energy_drift)
                .map_or("-".into(), |v| format!("{v:.2e}")),
        );
    }
    if let Some(p) = &report.port {
        println!(
            "done in {:.1} s: driven state error {:.2e} (baseline {}) on held-out input sequences; device budget {verdict}",
            started.elapsed().as_secs_f64(),
            p.median_model_state_rel_rmse,
            p.median_baseline_state_rel_rmse.map_or("-".into(), |v| format!("{v:.2e}")),
        );
    }
    println!("report: {}", html_path.display());
    println!("{}", crate::CAUTION);
    Ok(())
}
