//! `keel run DIR`: the whole path from logs to device blobs in one command,
//! driven by `DIR/keel.toml`. Produces `DIR/out/`: the fitted model and
//! baseline, one blob per export target, golden rollouts for the device
//! check, `report.json` and `report.html`. Steps whose inputs did not change
//! since the last run are reused (their inputs and settings are hashed).

use std::path::{Path, PathBuf};
use std::time::Instant;

use anyhow::{anyhow, bail, Context, Result};
use keel_runtime::{Integrator, Method};
use serde::{de::DeserializeOwned, Serialize};
use sha2::{Digest, Sha256};

use crate::atomic::write_atomic;
use crate::blob::{BlobModel, HostModel};
use crate::check::{check, CheckSettings};
use crate::cmd_check::{charts, units, HistoryFile};
use crate::cmd_export::export;
use crate::cmd_inspect::inspect;
use crate::cmd_rollout::to_csv;
use crate::data::{load_csv, split_by_trajectory, LoadOptions};
use crate::dataset::{Dataset, DerivativeSource};
use crate::fit::{fit_baseline, fit_energy, ArchChoice, FitSettings, StopReason, TrainReport};
use crate::integrator_args::{IntegratorArgs, MethodArg};
use crate::project::{ActivationName, Arch, DeviceBudget, KineticKind, Project};
use crate::report::{
    render_html, BudgetVerdict, CoordinateSummary, DataSummary, DeviceBlob, FitSummary, RunReport,
};
use crate::rollout::{roll, sample_states};

/// Arguments of `keel run`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// Project folder holding keel.toml.
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
fn data_summary(train_file: &str, train: &Dataset, val: Option<&Dataset>) -> DataSummary {
    let n2 = 2 * train.dof;
    let names = crate::data::column_names(train.dof, false);
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

fn method_of(m: Option<MethodArg>, separable: bool) -> Method {
    match m {
        Some(m) => m.into(),
        None if separable => Method::StormerVerlet,
        None => Method::ImplicitMidpoint,
    }
}

/// Run the command.
pub fn run(args: Args) -> Result<()> {
    let started = Instant::now();
    let dir = &args.dir;
    let project = Project::load(dir)?;
    let out = dir.join("out");
    std::fs::create_dir_all(out.join("golden"))
        .with_context(|| format!("{}: cannot create", out.display()))?;
    let name = project.name.clone().unwrap_or_else(|| {
        dir.file_name()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_default()
    });
    println!("keel run: {name} ({})", dir.join("keel.toml").display());

    // 1. Data.
    println!("[1/5] data");
    let opts = LoadOptions {
        masses: project.data.masses.clone(),
        step_tolerance: project.data.step_tolerance,
        ..LoadOptions::default()
    };
    let train_path = dir.join(&project.data.train);
    let train_bytes = std::fs::read(&train_path)
        .with_context(|| format!("{}: cannot read", train_path.display()))?;
    let all = load_csv(&train_path, &opts)?;
    let (val_bytes, train, val) = match &project.data.validation {
        Some(v) => {
            let p = dir.join(v);
            let b = std::fs::read(&p).with_context(|| format!("{}: cannot read", p.display()))?;
            let vd = load_csv(&p, &opts)?;
            if vd.dof != all.dof {
                bail!(
                    "{}: {} degrees of freedom, the training log {}",
                    p.display(),
                    vd.dof,
                    all.dof
                );
            }
            (b, all, vd)
        }
        None => {
            let (t, v) = split_by_trajectory(&all, project.data.val_fraction, project.fit.seed);
            if v.trajectories.is_empty() {
                bail!("no validation trajectories: add [data] validation or more trajectories (val_fraction {})", project.data.val_fraction);
            }
            (Vec::new(), t, v)
        }
    };
    let data = data_summary(
        &project.data.train.display().to_string(),
        &train,
        Some(&val),
    );
    println!(
        "      {} training trajectories ({} samples), {} validation, {} dof, derivatives {}",
        data.train_trajectories,
        data.train_samples,
        data.validation_trajectories,
        data.dof,
        data.derivatives
    );

    // 2. Fit (reused when data and settings are unchanged).
    let m = &project.model;
    let separable = m.arch == Arch::Separable;
    let activation = match m.activation {
        ActivationName::Tanh => crate::net::Activation::Tanh,
        ActivationName::Softplus => crate::net::Activation::Softplus,
        ActivationName::Relu => bail!("relu is refused for energy networks"),
    };
    let choice = ArchChoice {
        separable,
        quadratic_kinetic: m.kinetic == KineticKind::Quadratic,
        hidden: m.hidden.clone(),
        activation,
    };
    let arch = choice.build(train.dof)?;
    let method = method_of(m.integrator, separable);
    let dt = m.dt.unwrap_or(data.sample_interval_s as f32);
    let integrator = Integrator::new(method, dt);
    if !integrator.is_valid() {
        bail!("[model] time step {dt} s is not usable");
    }
    if method.needs_separable() && !separable {
        bail!("[model] integrator {method:?} needs arch = \"separable\"; use \"midpoint\"");
    }
    let settings_json = serde_json::to_vec(&(
        &project.data,
        &project.model,
        &project.fit,
        env!("CARGO_PKG_VERSION"),
    ))?;
    let fit_hash = sha(&[&train_bytes, &val_bytes, &settings_json]);
    let model_path = out.join("model.keel");
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
            let fitted = fit_energy(&train, Some(&val), &arch, &settings)?;
            let bytes = crate::export::energy_blob(
                &fitted.model,
                integrator,
                crate::blob::WeightKind::F32,
            )?;
            write_atomic(&model_path, &bytes)?;
            let f = fit_summary(&fitted.report, arch.param_count(train.dof));
            let b = if project.fit.baseline {
                println!("      baseline (plain vector field, same hidden sizes)");
                let base = fit_baseline(&train, Some(&val), &choice.hidden, activation, &settings)?;
                crate::export::write_baseline(&baseline_path, &base.model)?;
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
        Some(crate::export::read_baseline(&baseline_path)?)
    } else {
        None
    };
    let params: Vec<(String, f64)> = project
        .check
        .reference_params
        .iter()
        .map(|(k, v)| (k.clone(), *v))
        .collect();
    let system = project
        .check
        .reference_system
        .as_deref()
        .map(|s| crate::systems::build_system(s, &params))
        .transpose()
        .map_err(|e| anyhow!("[check] reference_system: {e}"))?;
    let check_report = check(
        &model,
        baseline.as_ref(),
        &val,
        system.as_deref(),
        &CheckSettings {
            horizon_steps: Some(project.check.horizon_steps),
            ..CheckSettings::default()
        },
    )?;
    crate::cmd_check::print_table(&check_report);

    // 4. Export targets and golden rollouts.
    let src = BlobModel::from_bytes(&model_bytes).map_err(|e| anyhow!("{e}"))?;
    let mut devices = Vec::new();
    let targets = project.export_targets();
    println!("[4/5] export: {} device blob(s)", targets.len());
    for t in &targets {
        let ia = IntegratorArgs {
            integrator: t.integrator,
            dt: t.dt,
            substeps: t.substeps,
            ..IntegratorArgs::default()
        };
        let blob_path = out.join(format!("{}.keel", t.name));
        let meta_path = out.join(format!("{}.export.json", t.name));
        let target_json =
            serde_json::to_vec(&(t, &project.check.golden_steps, &project.check.golden_states))?;
        let hash = sha(&[&model_bytes, &target_json]);
        let hash_path = out.join(format!("{}.sha256", t.name));
        let reuse = !args.force
            && std::fs::read_to_string(&hash_path).ok().as_deref() == Some(hash.as_str())
            && blob_path.exists();
        let report = match reuse
            .then(|| read_json::<crate::cmd_export::ExportReport>(&meta_path))
            .flatten()
        {
            Some(r) => {
                println!("      {}: inputs unchanged, reusing", t.name);
                r
            }
            None => {
                let (bytes, r) = export(&src, t.weights, &ia, project.check.horizon_steps, 8)?;
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
            let r = roll(&dev, x0, project.check.golden_steps)?;
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
            file: format!("{}.keel", t.name),
            ram_bytes: ins.runtime_ram_bytes,
            emulator_instructions_per_step: measured
                .as_ref()
                .and_then(|v| v.get("instructions_per_step"))
                .and_then(|v| v.as_f64()),
            golden,
            budget,
            export: report,
        });
    }

    // 5. Report.
    println!("[5/5] report");
    let budget_pass = devices.iter().all(|d| d.budget.pass);
    let report = RunReport {
        project: name.clone(),
        keel_version: env!("CARGO_PKG_VERSION").into(),
        architecture: src.architecture(),
        data,
        fit,
        baseline_fit,
        check: check_report,
        devices,
        budget: project.device.clone(),
        budget_pass,
        caution: crate::CAUTION.into(),
    };
    let history = HistoryFile {
        train: report.fit.train_loss.clone(),
        val: report.fit.validation_loss.clone(),
    };
    let figs: Vec<(String, String)> =
        charts(&report.check, Some(&history), units(system.as_deref()))
            .into_iter()
            .map(|(_, c)| (c.title.clone(), c.to_svg()))
            .collect();
    write_json(&out.join("report.json"), &report)?;
    let html_path = out.join("report.html");
    write_atomic(&html_path, render_html(&report, &figs).as_bytes())?;
    let m = &report.check.median_model;
    println!(
        "done in {:.1} s: state error {:.2e} (baseline {}), energy drift {} (baseline {}); device budget {}",
        started.elapsed().as_secs_f64(),
        m.state_rel_rmse,
        report.check.median_baseline.as_ref().map_or("-".into(), |b| format!("{:.2e}", b.state_rel_rmse)),
        m.true_energy_drift.or(m.learned_energy_drift).map_or("-".into(), |v| format!("{v:.2e}")),
        report
            .check
            .median_baseline
            .as_ref()
            .and_then(|b| b.true_energy_drift)
            .map_or("-".into(), |v| format!("{v:.2e}")),
        if budget_pass { "PASS" } else { "FAIL (see the report)" }
    );
    println!("report: {}", html_path.display());
    println!("{}", crate::CAUTION);
    Ok(())
}
