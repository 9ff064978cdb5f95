//! The stages of `visviva run DIR`, each a function with typed input and
//! output: [`prepare`] (every refusal before any write) -> [`fit`] (cached
//! by input hash) -> [`check`] -> [`export`] per target (cached) ->
//! [`report`]. The stages call the same stage code as the single-stage
//! commands (`learn::stage` for fitting, `deploy::export` for export,
//! `evidence::check` for the checks), so defaults, refusals and wording
//! exist once. Conservative models are the special case without port terms;
//! a damped or driven project keeps the golden rollouts' input sequence
//! beside them (`golden/<blob>-inputs.csv`).

use std::path::{Path, PathBuf};

use anyhow::{anyhow, bail, Context, Result};
use visviva_runtime::Method;

use crate::atomic::{write_atomic, write_atomic_with};
use crate::capacity::{check_disk, check_memory};
use crate::data::dataset::{Dataset, DerivativeSource};
use crate::data::log::{split_owned, LoadOptions};
use crate::deploy::blob::{BlobModel, HostModel};
use crate::deploy::budget::{budget_verdict, Choices};
use crate::deploy::convergence::TrainingRange;
use crate::deploy::export::{export as export_blob, export_from, ExportCheck, ExportReport};
use crate::deploy::inspect::inspect;
use crate::deploy::rollout::{csv_row_bytes, sample_states, stream_csv};
use crate::evidence::charts::{charts, driven_charts, loss_chart, model_label, HistoryFile};
use crate::evidence::check::{
    check_port, driven_baseline, driven_horizons, median, reference_modes, CheckSettings,
};
use crate::evidence::horizons::{summarize as summarize_horizons, HorizonError};
use crate::evidence::provenance::{InputFile, Provenance};
use crate::evidence::report::{
    CoordinateSummary, DataSummary, DeviceBlob, DrivenComparison, Evidence, FitSummary, PortReport,
    RunReport,
};
use crate::evidence::units::Units;
use crate::interrupt::Watch;
use crate::learn::fit::{FitSettings, TrainReport};
use crate::learn::hnn::BaselineModel;
use crate::learn::qat;
use crate::learn::stage::{
    check_method, fit_stage_mode, interrupt_flag, plan_model, stop_text, ModelPlan, SettingNames,
};
use crate::learn::structure::{arch_choice, energy_activation, Arch};
use crate::project::cache::{read_json, sha, write_json};
use crate::project::file::Project;
use crate::reference::{build_system, ParamValues, ReferenceSystem, CATALOG};

/// The training and validation logs; `val_bytes` is empty when validation
/// trajectories were held out of the training log.
pub struct Logs {
    /// Training trajectories.
    pub train: Dataset,
    /// Validation trajectories.
    pub val: Dataset,
    /// The training log's bytes (hashed for the cache).
    pub train_bytes: Vec<u8>,
    /// The validation log's bytes, if it is a file of its own.
    pub val_bytes: Vec<u8>,
    /// What a mapped or positions-only training log told (gaps, noise
    /// model, units); `None` for a log in the canonical layout.
    pub rig: Option<crate::data::columns::RigSummary>,
    /// For joint rates without masses: how the momenta were formed.
    pub inertia: Option<crate::learn::inertia::InertiaSummary>,
    /// Whether `[data] masses` formed the training log's momenta (p = m v).
    pub masses_form_momenta: bool,
}

/// A project checked and loaded: nothing has been written yet.
pub struct Prepared {
    /// The project folder.
    pub dir: PathBuf,
    /// `DIR/out`.
    pub out: PathBuf,
    /// Project name (from the file, else the folder's).
    pub name: String,
    /// The project file.
    pub project: Project,
    /// The logs.
    pub logs: Logs,
    /// The model to fit.
    pub plan: ModelPlan,
    /// What the data hold.
    pub data: DataSummary,
    /// The fit mode in words (which and why).
    pub mode: String,
    /// Trajectory matching's plan, in fit mode trajectory.
    pub trajectory: Option<crate::learn::mode::TrajectoryPlan>,
    /// The command that reproduces the run (the report's provenance).
    pub command: String,
    /// With `arch = "auto"`: every candidate's figure and the choice.
    pub selection: Option<crate::learn::auto::Selection>,
}

impl Prepared {
    /// Whether the model has port terms (damping or inputs).
    pub fn port(&self) -> bool {
        self.plan.has_port_terms()
    }
}

/// Load and check everything `run` needs before it writes anything: the
/// project file, the logs, the model plan and every export target's
/// integrator.
pub fn prepare(dir: &Path) -> Result<Prepared> {
    let file = dir.join("visviva.toml").display().to_string();
    prepare_project(dir, Project::load(dir)?, &file)
}

/// [`prepare`] for a project already read (a fleet unit: the fleet's
/// template with the unit's overrides); `file` names it in errors.
pub fn prepare_project(dir: &Path, project: Project, file: &str) -> Result<Prepared> {
    let file = file.to_string();
    let logs = load_logs(dir, &project)?;
    let auto = project.model.arch == Arch::Auto;
    let arch = if auto {
        provisional_arch(&project, &logs)
    } else {
        project.model.arch
    };
    let plan = project_plan(&project, &logs, arch).with_context(|| file.clone())?;
    let (mode, trajectory) = fit_mode(&project, &logs, &plan).with_context(|| file.clone())?;
    check_sizes(&project, dir, logs.train.dof).with_context(|| file.clone())?;
    let units = Units::resolve(
        project.data.units.as_ref(),
        project.check.reference_system.as_deref(),
        logs.train.dof,
        logs.train.inputs,
    )
    .with_context(|| file.clone())?;
    let data = data_summary(&project.data.train.display().to_string(), &logs, units);
    let name = project.name.clone().unwrap_or_else(|| {
        dir.file_name()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_default()
    });
    let mut prep = Prepared {
        dir: dir.to_path_buf(),
        out: dir.join("out"),
        name,
        project,
        logs,
        plan,
        data,
        mode,
        trajectory,
        command: format!("visviva run {} --force", dir.display()),
        selection: None,
    };
    check_out_folder(&prep).with_context(|| file.clone())?;
    reference_system(&prep).with_context(|| file.clone())?;
    if auto {
        settle_structure(&mut prep).with_context(|| file.clone())?;
    }
    Ok(prep)
}

/// With `arch = "auto"`, the structure every check before the choice plans
/// with: the first candidate the project permits (the port terms, which the
/// checks look at, are the same for every candidate); separable when none
/// is, so that its refusal is the one named.
fn provisional_arch(project: &Project, logs: &Logs) -> Arch {
    crate::learn::auto::CANDIDATES
        .into_iter()
        .find(|&a| project_plan(project, logs, a).is_ok())
        .unwrap_or(Arch::Separable)
}

/// `arch = "auto"`, after every check: the last run's choice when its fit
/// is of the same logs and settings, else each candidate's short fit; the
/// plan and fit mode become the chosen structure's.
fn settle_structure(prep: &mut Prepared) -> Result<()> {
    let s = match last_selection(&prep.dir, &prep.project, &prep.logs) {
        Some(s) => s,
        None => select_structure(&prep.project, &prep.logs)?,
    };
    prep.plan = project_plan(&prep.project, &prep.logs, s.chosen_arch())?;
    (prep.mode, prep.trajectory) = fit_mode(&prep.project, &prep.logs, &prep.plan)?;
    prep.selection = Some(s);
    Ok(())
}

/// The model plan of `[model]` with `arch` as the structure, refused when
/// an `[[export]]` integrator cannot step it.
fn project_plan(project: &Project, logs: &Logs, arch: Arch) -> Result<ModelPlan> {
    let m = &project.model;
    let choice = arch_choice(
        arch,
        m.kinetic,
        &m.hidden,
        m.activation,
        "[model] activation",
    )?;
    let terms = m.port_terms()?;
    crate::learn::stage::check_masses_for_structure(
        choice.mechanical,
        logs.masses_form_momenta,
        "[data] masses",
    )?;
    let plan = plan_model(
        &logs.train,
        choice,
        terms,
        m.integrator,
        m.dt,
        SettingNames::ProjectKeys,
    )?;
    for t in project.export_targets() {
        if let Some(i) = t.integrator {
            let setting = format!("[[export]] {}: integrator", t.name);
            check_method(
                Method::from(i),
                plan.choice.separable,
                plan.has_port_terms(),
                &setting,
            )?;
        }
    }
    Ok(plan)
}

/// The file in `out/` that keeps `arch = "auto"`'s choice beside the fit.
const STRUCTURE_CHOICE: &str = "structure_choice.json";

/// The choice recorded with the last fit, when that fit is of the same logs
/// and settings (the choice is then the same: same seed, same data).
fn last_selection(
    dir: &Path,
    project: &Project,
    logs: &Logs,
) -> Option<crate::learn::auto::Selection> {
    let out = dir.join("out");
    let recorded = std::fs::read_to_string(out.join("fit.sha256")).ok()?;
    (recorded == fit_hash(project, logs).ok()?).then_some(())?;
    let mut s: crate::learn::auto::Selection = read_json(&out.join(STRUCTURE_CHOICE))?;
    s.reused = true;
    Some(s)
}

/// `arch = "auto"`: each structure the project permits fitted on the short
/// budget and scored on the validation logs ([`crate::learn::auto`]).
fn select_structure(project: &Project, logs: &Logs) -> Result<crate::learn::auto::Selection> {
    let settings = fit_settings(project, true);
    crate::learn::auto::select(
        &logs.val,
        crate::learn::auto::Basis::HeldOut,
        &settings,
        |arch| {
            let plan = project_plan(project, logs, arch)?;
            let tp = crate::learn::auto::short_trajectory(fit_mode(project, logs, &plan)?.1);
            Ok((plan, tp))
        },
        |(plan, tp), short| {
            fit_stage_mode(
                &logs.train,
                Some(&logs.val),
                plan,
                short,
                false,
                tp.as_ref(),
            )
        },
    )
}

/// The training settings of `[fit]`.
fn fit_settings(project: &Project, quiet: bool) -> FitSettings {
    FitSettings {
        epochs: project.fit.epochs,
        batch: project.fit.batch,
        lr: project.fit.lr,
        patience: project.fit.patience,
        seed: project.fit.seed,
        threads: project.fit.threads,
        quiet,
        interrupt: Some(interrupt_flag()),
        ..FitSettings::default()
    }
}

/// `out/` can be written and holds none of the project's logs (`run`
/// rewrites what it holds).
fn check_out_folder(prep: &Prepared) -> Result<()> {
    let train = prep.dir.join(&prep.project.data.train);
    let val = prep
        .project
        .data
        .validation
        .as_ref()
        .map(|v| prep.dir.join(v));
    let mut inputs = vec![("[data] train", train.as_path())];
    inputs.extend(val.as_deref().map(|v| ("[data] validation", v)));
    crate::outputs::check_output_dir("out/", &prep.out)?;
    crate::outputs::check_inputs_outside(&inputs, "out/", &prep.out)
}

/// The project's logs, which the clean-up of `out/` must spare.
fn input_paths(prep: &Prepared) -> Vec<PathBuf> {
    let mut inputs = vec![prep.dir.join(&prep.project.data.train)];
    inputs.extend(
        prep.project
            .data
            .validation
            .as_ref()
            .map(|v| prep.dir.join(v)),
    );
    inputs
}

/// The fit mode from `[fit]` and the log (see [`crate::learn::mode`]).
fn fit_mode(
    project: &Project,
    logs: &Logs,
    plan: &ModelPlan,
) -> Result<(String, Option<crate::learn::mode::TrajectoryPlan>)> {
    let request = crate::learn::mode::ModeRequest {
        mode: project.fit.mode,
        window_steps: project.fit.window_steps,
        epochs: project.fit.trajectory_epochs,
        masses: project.data.masses.clone(),
    };
    let names = |key: &str| format!("[fit] {key}");
    crate::learn::mode::plan_mode(&request, logs.rig.as_ref(), &logs.train, plan, &names)
}

/// The sizes `[check]` asks for, against this machine before any work:
/// the golden initial states held at once, and the golden rollout files of
/// every export target on the disk that holds `out/` (the long horizon and
/// the rollouts themselves stream).
fn check_sizes(project: &Project, dir: &Path, dof: usize) -> Result<()> {
    let c = &project.check;
    let states = c.golden_states as u128;
    check_memory("[check] golden_states", states, 24 + 8 * dof as u128)?;
    let rows = (c.golden_steps as u128).saturating_add(1);
    let per_target = rows
        .saturating_mul(csv_row_bytes(dof, true, false))
        .saturating_mul(states);
    let targets = project.export_targets().len() as u128;
    let golden = dir.join("out").join("golden").join("x.csv");
    check_disk(
        "[check] golden_steps x golden_states",
        &golden,
        per_target.saturating_mul(targets),
    )
}

/// The logs named by `[data]`: a validation file of its own (same degrees
/// of freedom and inputs), or trajectories held out of the training log.
fn load_logs(dir: &Path, project: &Project) -> Result<Logs> {
    let opts = LoadOptions {
        masses: project.data.masses.clone(),
        step_tolerance: project.data.step_tolerance,
        ..LoadOptions::default()
    };
    let train_path = dir.join(&project.data.train);
    let train_bytes = std::fs::read(&train_path)
        .with_context(|| format!("{}: cannot read", train_path.display()))?;
    let map = project.columns.as_ref();
    let (all, rig) = crate::data::columns::load_any(&train_path, map, &opts)?;
    let masses_form_momenta =
        crate::data::columns::masses_form_momenta(&train_path, map, project.data.masses.is_some());
    let Some(v) = &project.data.validation else {
        let (frac, seed) = (project.data.val_fraction, project.fit.seed);
        let (train, val) = split_owned(all, frac, seed);
        if val.trajectories.is_empty() {
            bail!("no validation trajectories: add [data] validation or more trajectories (val_fraction {frac})");
        }
        return with_momenta(
            project,
            Logs {
                train,
                val,
                train_bytes,
                val_bytes: Vec::new(),
                rig,
                inertia: None,
                masses_form_momenta,
            },
        );
    };
    let p = dir.join(v);
    let val_bytes = std::fs::read(&p).with_context(|| format!("{}: cannot read", p.display()))?;
    let (val, _) = crate::data::columns::load_any(&p, map, &opts)?;
    if val.dof != all.dof {
        bail!(
            "{}: {} degrees of freedom, the training log {}",
            p.display(),
            val.dof,
            all.dof
        );
    }
    if val.inputs != all.inputs {
        bail!(
            "{}: line 1: {} input columns (u1..), the training log {} has {}",
            p.display(),
            val.inputs,
            train_path.display(),
            all.inputs
        );
    }
    with_momenta(
        project,
        Logs {
            train: all,
            val,
            train_bytes,
            val_bytes,
            rig,
            inertia: None,
            masses_form_momenta,
        },
    )
}

/// Joint rates without masses: the momenta from a mass matrix learned on
/// the training log ([`crate::learn::inertia`]); other logs unchanged.
fn with_momenta(project: &Project, logs: Logs) -> Result<Logs> {
    if !logs.rig.as_ref().is_some_and(|r| r.rates_without_masses) {
        return Ok(logs);
    }
    let settings = crate::learn::inertia::InertiaSettings::for_fit(
        &project.model.hidden,
        energy_activation(project.model.activation, "[model] activation")?,
        (project.fit.epochs, project.fit.lr, project.fit.seed),
        project.data.reference_inertia,
    );
    let (train, val, summary) = crate::learn::inertia::momenta_from_rates(
        &logs.train,
        Some(&logs.val),
        &settings,
        &crate::data::derivative::SavitzkyGolay::default(),
    )?;
    Ok(Logs {
        train,
        val: val.expect("validation given"),
        inertia: Some(summary),
        ..logs
    })
}

/// What the logs hold, per coordinate: range, RMS and a noise estimate from
/// second differences (for white noise of standard deviation s,
/// x[k+1] - 2x[k] + x[k-1] has variance 6 s^2: common practice for
/// well-sampled smooth signals; the motion's own curvature adds a little, so
/// this is an upper bound).
fn data_summary(train_file: &str, logs: &Logs, units: Units) -> DataSummary {
    let (train, val) = (&logs.train, &logs.val);
    let names = crate::data::log::column_names(train.dof, false);
    let coordinates = (0..2 * train.dof)
        .map(|c| coordinate_summary(train, c, names.get(c + 2).cloned().unwrap_or_default()))
        .collect();
    DataSummary {
        train_file: train_file.to_string(),
        dof: train.dof,
        train_trajectories: train.trajectories.len(),
        train_samples: train.samples(),
        validation_trajectories: val.trajectories.len(),
        validation_samples: val.samples(),
        sample_interval_s: crate::learn::stage::median_step(train).unwrap_or(0.0),
        derivatives: match train.derivatives {
            DerivativeSource::Given => "given".into(),
            DerivativeSource::Estimated => "estimated (Savitzky-Golay)".into(),
        },
        coordinates,
        units: units.with_columns(logs.rig.as_ref(), train.dof),
        inputs: train.inputs,
        rig: logs.rig.clone(),
        momenta_from_rates: logs.inertia.clone(),
    }
}

/// Range, RMS and noise estimate of state column `c`.
fn coordinate_summary(train: &Dataset, c: usize, name: String) -> CoordinateSummary {
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
        name,
        min: lo,
        max: hi,
        rms: (sq / cnt.max(1) as f64).sqrt(),
        noise: (d2 / dc.max(1) as f64 / 6.0).sqrt(),
    }
}

/// The fit as the report shows it.
fn fit_summary(r: &TrainReport, parameters: usize) -> FitSummary {
    FitSummary {
        parameters,
        steps: r.steps,
        best_validation_loss: r.best_val,
        best_epoch: r.best_epoch.map_or(0, |e| e + 1),
        stop: stop_text(r.stop),
        seconds: r.seconds,
        samples_per_second: r.samples_per_second(),
        train_loss: r.history.train.clone(),
        validation_loss: r.history.val.clone(),
        reused: false,
    }
}

/// The fitted model's parameters in `out/` (the trainer's own JSON), the
/// start of the int8 targets' quantization-aware fine-tuning.
pub const MODEL_PARAMS: &str = "model.params.json";

/// Whether an export target fine-tunes the fit's parameters (so a cached
/// fit without [`MODEL_PARAMS`] is redone).
fn needs_parameters(project: &Project) -> bool {
    project.export_targets().iter().any(|t| t.fine_tuned())
}

/// What the fit stage leaves for the later stages.
pub struct FitResult {
    /// The energy model's fit.
    pub fit: FitSummary,
    /// The baseline's fit, when the project asks for one.
    pub baseline_fit: Option<FitSummary>,
}

/// The hash of what a fit depends on: the logs, `[data]`, `[model]`,
/// `[fit]`, the version and any column mapping.
fn fit_hash(project: &Project, logs: &Logs) -> Result<String> {
    let mut settings_json = serde_json::to_vec(&(
        &project.data,
        &project.model,
        &project.fit,
        env!("CARGO_PKG_VERSION"),
    ))?;
    // A column mapping changes what the log means; a project without one
    // hashes as before.
    if let Some(columns) = &project.columns {
        settings_json.extend(serde_json::to_vec(columns)?);
    }
    Ok(sha(&[&logs.train_bytes, &logs.val_bytes, &settings_json]))
}

/// Fit the model (and the baseline) unless the logs and settings hash to
/// what the last run recorded; writes `out/model.vvb`,
/// `out/model.baseline.json`, `out/fit.json` and `out/fit.sha256`.
pub fn fit(prep: &Prepared, force: bool, quiet: bool) -> Result<FitResult> {
    let (out, project, logs) = (&prep.out, &prep.project, &prep.logs);
    std::fs::create_dir_all(out.join("golden"))
        .with_context(|| format!("{}: cannot create", out.display()))?;
    let fit_hash = fit_hash(project, logs)?;
    let (model_path, baseline_path) = (out.join("model.vvb"), out.join("model.baseline.json"));
    let (fit_path, hash_path) = (out.join("fit.json"), out.join("fit.sha256"));
    let cached = !force
        && std::fs::read_to_string(&hash_path).ok().as_deref() == Some(fit_hash.as_str())
        && model_path.exists()
        && (!needs_parameters(project) || out.join(MODEL_PARAMS).exists())
        && (!project.fit.baseline || baseline_path.exists());
    if let Some((mut fit, mut baseline_fit)) = cached
        .then(|| read_json::<(FitSummary, Option<FitSummary>)>(&fit_path))
        .flatten()
    {
        fit.reused = true;
        if let Some(b) = baseline_fit.as_mut() {
            b.reused = true;
        }
        return Ok(FitResult { fit, baseline_fit });
    }
    let settings = fit_settings(project, quiet);
    let done = fit_stage_mode(
        &logs.train,
        Some(&logs.val),
        &prep.plan,
        &settings,
        project.fit.baseline,
        prep.trajectory.as_ref(),
    )?;
    // The new model replaces the old one: first the hash and every file
    // derived from the old model go, so that `out/` never pairs them.
    if hash_path.exists() {
        std::fs::remove_file(&hash_path)
            .with_context(|| format!("{}: cannot remove", hash_path.display()))?;
    }
    let inputs = input_paths(prep);
    let spared: Vec<&Path> = inputs.iter().map(PathBuf::as_path).collect();
    crate::project::stale::remove_derived(out, &spared)?;
    write_atomic(&model_path, &done.blob)?;
    write_json(&out.join(MODEL_PARAMS), &done.model.model)?;
    let m = &done.model.model;
    let params = m.params.len() + m.port.as_ref().map_or(0, |p| p.params.len());
    let fit = fit_summary(&done.model.report, params);
    let baseline_fit = match &done.baseline {
        Some(base) => {
            crate::deploy::fitted_blob::write_baseline(&baseline_path, &base.model)?;
            Some(fit_summary(&base.report, base.model.params.len()))
        }
        None => None,
    };
    write_json(&fit_path, &(&fit, &baseline_fit))?;
    if let Some(selection) = &prep.selection {
        write_json(&out.join(STRUCTURE_CHOICE), selection)?;
    }
    write_atomic(&hash_path, fit_hash.as_bytes())?;
    Ok(FitResult { fit, baseline_fit })
}

/// What the check stage leaves for export and the report.
pub struct Checked {
    /// The fitted model's blob bytes.
    pub model_bytes: Vec<u8>,
    /// The model's owned mirror.
    pub src: BlobModel,
    /// The evidence.
    pub evidence: Evidence,
    /// Charts as (title, SVG).
    pub figures: Vec<(String, String)>,
    /// Held-out trajectory whose inputs the golden rollouts replay.
    pub golden_inputs: Vec<Vec<f32>>,
}

/// Check the fitted model (and the baseline) on the validation logs.
pub fn check(prep: &Prepared, fit: &FitResult) -> Result<Checked> {
    let model_path = prep.out.join("model.vvb");
    let model_bytes = std::fs::read(&model_path)?;
    let model = HostModel::from_bytes(&model_bytes)
        .map_err(|e| anyhow!("{}: {e}", model_path.display()))?;
    let src = BlobModel::from_bytes(&model_bytes).map_err(|e| anyhow!("{e}"))?;
    let baseline = if prep.project.fit.baseline {
        Some(crate::deploy::fitted_blob::read_baseline(
            &prep.out.join("model.baseline.json"),
        )?)
    } else {
        None
    };
    let history = HistoryFile {
        train: fit.fit.train_loss.clone(),
        val: fit.fit.validation_loss.clone(),
    };
    let steps = prep.project.check.golden_steps;
    let (golden_id, golden_inputs) = golden_inputs(&prep.logs.val, steps);
    let (evidence, figures) = if prep.port() {
        let reference = reference_system(prep)?;
        port_check(
            prep,
            &model,
            &src,
            baseline.as_ref(),
            reference.as_deref(),
            golden_id,
            &history,
        )?
    } else {
        let reference = reference_system(prep)?;
        let r = crate::evidence::check::check(
            &model,
            baseline.as_ref(),
            &prep.logs.val,
            reference.as_deref(),
            &CheckSettings {
                horizon_steps: Some(prep.project.check.horizon_steps),
                horizons: prep.project.check.horizons.clone(),
                ..CheckSettings::default()
            },
        )?;
        let label = model_label(&src);
        let figs = charts(&r, Some(&history), &prep.data.units, &label)
            .into_iter()
            .map(|(_, c)| (c.title.clone(), c.to_svg()))
            .collect();
        (Evidence::Check(r), figs)
    };
    Ok(Checked {
        model_bytes,
        src,
        evidence,
        figures,
        golden_inputs,
    })
}

/// `[check] reference_params` as name-value pairs.
fn reference_params(prep: &Prepared) -> Vec<(String, f64)> {
    prep.project
        .check
        .reference_params
        .iter()
        .map(|(k, v)| (k.clone(), *v))
        .collect()
}

/// The reference system named by `[check] reference_system`; its kind
/// (conservative, or damped or driven) must be the model's.
fn reference_system(prep: &Prepared) -> Result<Option<Box<dyn ReferenceSystem>>> {
    let Some(s) = prep.project.check.reference_system.as_deref() else {
        return Ok(None);
    };
    let system = build_system(s, &reference_params(prep))
        .map_err(|e| anyhow!("[check] reference_system: {e}"))?;
    if system.has_port_terms() != prep.port() {
        let kind = |port: bool| {
            if port {
                "damped or driven"
            } else {
                "conservative"
            }
        };
        let names: Vec<&str> = CATALOG
            .iter()
            .filter(|e| {
                (e.build)(ParamValues::defaults(e.params))
                    .is_ok_and(|sys| sys.has_port_terms() == prep.port())
            })
            .map(|e| e.name)
            .collect();
        bail!(
            "[check] reference_system = \"{s}\" is a {} system; a {} project needs one of {}",
            kind(system.has_port_terms()),
            kind(prep.port()),
            names.join(", ")
        );
    }
    Ok(Some(system))
}

/// The inputs the golden rollouts replay: validation trajectory 0's logged
/// inputs, at most `steps` rows (row k held over step k); none without
/// inputs.
fn golden_inputs(val: &Dataset, steps: usize) -> (String, Vec<Vec<f32>>) {
    match val.trajectories.first() {
        Some(t) if val.driven() => (
            t.id.clone(),
            t.u.rows()
                .into_iter()
                .take(steps)
                .map(|r| r.iter().map(|v| *v as f32).collect())
                .collect(),
        ),
        _ => (String::new(), Vec::new()),
    }
}

/// The damped or driven model's check: damping per mode, driven rollouts of
/// the held-out trajectories for model and baseline, and their charts.
fn port_check(
    prep: &Prepared,
    model: &HostModel<'_>,
    blob: &BlobModel,
    baseline: Option<&BaselineModel>,
    reference: Option<&dyn ReferenceSystem>,
    golden_input_trajectory: String,
    history: &HistoryFile,
) -> Result<(Evidence, Vec<(String, String)>)> {
    let val = &prep.logs.val;
    let r = check_port(model, blob, val)?;
    let base = baseline.map(|b| driven_baseline(b, val));
    let driven: Vec<DrivenComparison> = r
        .rollouts
        .iter()
        .enumerate()
        .map(|(k, m)| {
            let b = base.as_ref().map(|b| &b[k]);
            let traj = &val.trajectories[k];
            DrivenComparison {
                horizons: driven_horizons(traj, m, b, &prep.project.check.horizons),
                id: m.id.clone(),
                samples: val.trajectories[k].t.len(),
                model_state_rel_rmse: m.state_rel_rmse,
                baseline_state_rel_rmse: b.map(|b| b.state_rel_rmse),
                model_failure: m.failure.clone(),
                baseline_failure: b.and_then(|b| b.failure.clone()),
            }
        })
        .collect();
    let mut figs = Vec::new();
    if let (Some(t), Some(m)) = (val.trajectories.first(), r.rollouts.first()) {
        let b = base.as_ref().map(|b| b[0].states.as_slice());
        figs = driven_charts(t, &m.states, b, 1500, &prep.data.units);
    }
    figs.push(("loss".into(), loss_chart(history, &model_label(blob))));
    let per: Vec<&[HorizonError]> = driven.iter().map(|d| d.horizons.as_slice()).collect();
    let horizons = summarize_horizons(&per, &prep.project.check.horizons, base.is_some());
    let report = PortReport {
        horizons,
        inputs: val.inputs,
        dissipation: prep.project.model.damped(),
        median_model_state_rel_rmse: median(
            driven.iter().map(|d| d.model_state_rel_rmse).collect(),
        ),
        median_baseline_state_rel_rmse: base
            .as_ref()
            .map(|b| median(b.iter().map(|d| d.state_rel_rmse).collect())),
        rest: r.rest,
        rest_residual: r.rest_residual,
        modes: r.modes,
        reference_modes: reference.map(reference_modes),
        driven,
        golden_input_trajectory,
    };
    let figures = figs
        .into_iter()
        .map(|(_, c)| (c.title.clone(), c.to_svg()))
        .collect();
    Ok((Evidence::Port(report), figures))
}

/// One export target's outcome, for the command's output.
pub struct Exported {
    /// The device blob's report entry.
    pub device: DeviceBlob,
    /// Whether the blob was reused from the last run.
    pub reused: bool,
}

/// Export every `[[export]]` target (reused when the model and the target
/// hash to what the last run recorded), with its golden rollouts and budget.
pub fn export(prep: &Prepared, checked: &Checked, force: bool) -> Result<Vec<Exported>> {
    prep.project
        .export_targets()
        .iter()
        .map(|t| export_target(prep, checked, t, force))
        .collect()
}

/// The golden rollouts' length: `[check] golden_steps`, shortened to the
/// replayed input sequence for a driven model.
pub fn golden_steps(prep: &Prepared, checked: &Checked) -> usize {
    let steps = prep.project.check.golden_steps;
    if prep.logs.train.driven() {
        checked.golden_inputs.len().min(steps)
    } else {
        steps
    }
}

fn export_target(
    prep: &Prepared,
    checked: &Checked,
    t: &crate::project::file::ExportTarget,
    force: bool,
) -> Result<Exported> {
    let (out, check) = (&prep.out, &prep.project.check);
    let overrides = crate::project::validate::export_overrides(t);
    let blob_path = out.join(format!("{}.vvb", t.name));
    let meta_path = out.join(format!("{}.export.json", t.name));
    let mut target_json = serde_json::to_vec(&(t, &check.golden_steps, &check.golden_states))?;
    if t.fine_tuned() {
        let q = (
            qat::STEPS,
            qat::LEARNING_RATE,
            qat::BATCH,
            prep.project.fit.threads,
        );
        target_json.extend(serde_json::to_vec(&q)?);
    }
    let hash = sha(&[&checked.model_bytes, &target_json]);
    let hash_path = out.join(format!("{}.sha256", t.name));
    let reuse = !force
        && std::fs::read_to_string(&hash_path).ok().as_deref() == Some(hash.as_str())
        && blob_path.exists();
    let cached = reuse
        .then(|| read_json::<ExportReport>(&meta_path))
        .flatten();
    let reused = cached.is_some();
    let report = match cached {
        Some(r) => r,
        None => {
            let range = TrainingRange::of_dataset(&prep.logs.train);
            let export_check = ExportCheck {
                steps: check.horizon_steps,
                states: 8,
                range: &range,
                key: &|k: &str| k.to_string(),
            };
            let (bytes, r) = export_weights(prep, checked, t, &overrides, &export_check)
                .with_context(|| format!("[[export]] '{}'", t.name))?;
            crate::deploy::verdict::refuse_untrusted(&r, prep.port())
                .with_context(|| format!("[[export]] '{}'", t.name))?;
            write_atomic(&blob_path, &bytes)?;
            write_json(&meta_path, &r)?;
            write_atomic(&hash_path, hash.as_bytes())?;
            r
        }
    };
    let bytes = std::fs::read(&blob_path)?;
    let ins = inspect(&bytes)?;
    let settings = CheckSettings {
        horizon_steps: Some(check.horizon_steps),
        horizons: check.horizons.clone(),
        ..CheckSettings::default()
    };
    let held_out = crate::evidence::held_out::held_out(&bytes, &prep.logs.val, None, &settings)
        .with_context(|| format!("[[export]] '{}': on the held-out logs", t.name))?;
    let (golden, golden_inputs) = write_golden(prep, checked, &t.name, &bytes)?;
    let measured: Option<serde_json::Value> =
        read_json(&out.join(format!("device/{}.json", t.name)));
    let choices = Choices::of(&bytes, report.convergence.as_ref())?;
    let budget = budget_verdict(
        &prep.project.device,
        report.bytes,
        ins.runtime_ram_bytes,
        report.macs_per_step,
        ins.runtime.as_ref(),
        &choices,
    );
    let device = DeviceBlob {
        name: t.name.clone(),
        file: format!("{}.vvb", t.name),
        ram_bytes: ins.runtime_ram_bytes,
        runtime: ins.runtime.clone(),
        emulator_instructions_per_step: measured
            .as_ref()
            .and_then(|v| v.get("instructions_per_step"))
            .and_then(|v| v.as_f64()),
        golden,
        golden_inputs,
        budget,
        export: report,
        held_out,
    };
    Ok(Exported { device, reused })
}

/// Export `t`: an int8 target with quantization-aware fine-tuning is
/// quantized from the fit's parameters fine-tuned on the training logs
/// (`learn::qat`), every other from the fitted model as it is; measured
/// against the fitted f32 model either way.
fn export_weights(
    prep: &Prepared,
    checked: &Checked,
    t: &crate::project::file::ExportTarget,
    overrides: &crate::deploy::integrator::IntegratorOverrides,
    export_check: &ExportCheck<'_>,
) -> Result<(Vec<u8>, ExportReport)> {
    if !t.fine_tuned() {
        return export_blob(&checked.src, t.weights, overrides, export_check);
    }
    let path = prep.out.join(MODEL_PARAMS);
    let model: crate::learn::hnn::EnergyModel = read_json(&path)
        .with_context(|| format!("{}: cannot read the fitted parameters", path.display()))?;
    let mut fitted = crate::deploy::fitted_blob::blob_model(&model, checked.src.integrator);
    fitted.envelope = checked.src.envelope.clone();
    if fitted != checked.src {
        bail!(
            "{} does not hold the parameters of out/model.vvb; run with --force to refit",
            path.display()
        );
    }
    let settings = qat::QatSettings::new(prep.project.fit.seed, prep.project.fit.threads);
    let (tuned, summary) =
        qat::fine_tune(&model, &prep.logs.train, Some(&prep.logs.val), &settings)?;
    let mut weights = crate::deploy::fitted_blob::blob_model(&tuned, checked.src.integrator);
    weights.envelope = checked.src.envelope.clone();
    let (bytes, mut r) = export_from(&checked.src, &weights, t.weights, overrides, export_check)?;
    r.qat = Some(summary);
    Ok((bytes, r))
}

/// The golden rollouts of one blob from states spread over half the
/// normalization range (and, for a driven model, the input sequence they
/// replay): the files the device check compares the board against.
fn write_golden(
    prep: &Prepared,
    checked: &Checked,
    name: &str,
    bytes: &[u8],
) -> Result<(Vec<String>, Option<String>)> {
    let (out, src) = (&prep.out, &checked.src);
    let dev = HostModel::from_bytes(bytes).map_err(|e| anyhow!("{e}"))?;
    let steps = golden_steps(prep, checked);
    let inputs = &checked.golden_inputs;
    let states = sample_states(
        &src.offset,
        &src.scale,
        0.5,
        prep.project.check.golden_states,
        0x676f6c64,
    );
    let mut golden = Vec::new();
    let watch = Watch::new();
    for (k, x0) in states.iter().enumerate() {
        let file = format!("golden/{name}-{k}.csv");
        let fill = |k: usize, u: &mut [f32]| {
            if let Some(row) = inputs.get(k) {
                u.copy_from_slice(row);
            }
            Ok(())
        };
        write_atomic_with(&out.join(&file), |w| {
            stream_csv(&dev, x0, steps, fill, true, false, watch, None, w)?.complete()
        })
        .with_context(|| format!("golden rollout {k} of {name}"))?;
        golden.push(file);
    }
    let inputs_file = prep
        .logs
        .train
        .driven()
        .then(|| format!("golden/{name}-inputs.csv"));
    if let Some(file) = &inputs_file {
        let csv = inputs_csv(&inputs[..steps], dev.integrator().dt);
        write_atomic(&out.join(file), csv.as_bytes())?;
    }
    Ok((golden, inputs_file))
}

/// The input sequence as CSV `t,u1..um` (t = k dt with the step's
/// precision, row k held over step k), inputs in shortest round-trip decimals: `visviva rollout --inputs` reads it back
/// bit for bit.
fn inputs_csv(rows: &[Vec<f32>], dt: f32) -> String {
    let m = rows.first().map_or(0, Vec::len);
    let mut text = String::from("t");
    for i in 1..=m {
        text.push_str(&format!(",u{i}"));
    }
    text.push('\n');
    for (k, row) in rows.iter().enumerate() {
        text.push_str(&crate::deploy::rollout::time_text(k, dt));
        for v in row {
            text.push_str(&format!(",{v}"));
        }
        text.push('\n');
    }
    text
}

/// Write `out/report.json` and `out/report.html`; returns the report. An
/// earlier `out/report.json` is compared with first (the change block).
pub fn report(
    prep: &Prepared,
    fit: FitResult,
    checked: Checked,
    devices: Vec<DeviceBlob>,
) -> Result<RunReport> {
    let budget_pass = devices.iter().all(|d| d.budget.pass);
    let observer = observer_stage(prep)?;
    let report_path = prep.out.join("report.json");
    let previous: Option<serde_json::Value> = read_json(&report_path);
    let underfit =
        crate::evidence::structure_fit::underfit_evidence(&checked.src, &checked.evidence);
    let mut report = RunReport {
        project: prep.name.clone(),
        visviva_version: env!("CARGO_PKG_VERSION").into(),
        architecture: checked.src.architecture(),
        model_description: crate::evidence::describe::plain_description(&checked.src),
        data: prep.data.clone(),
        fit_mode: prep.mode.clone(),
        fit: fit.fit,
        baseline_fit: fit.baseline_fit,
        evidence: checked.evidence,
        verdicts: crate::evidence::verdicts::verdicts(&devices, &prep.project.device),
        devices,
        budget: prep.project.device.clone(),
        cycles_per_mac_used: crate::deploy::budget::cycles_per_mac(&prep.project.device),
        budget_pass,
        underfit,
        structure_choice: prep.selection.clone(),
        observer,
        provenance: provenance(prep)?,
        change: None,
        caution: crate::CAUTION.into(),
    };
    if let Some(previous) = previous {
        let current = serde_json::to_value(&report)?;
        report.change = Some(crate::evidence::change::compare(&previous, &current));
    }
    write_json(&report_path, &report)?;
    let html = crate::evidence::report::render_html(&report, &checked.figures);
    write_atomic(&prep.out.join("report.html"), html.as_bytes())?;
    Ok(report)
}

/// With an `[observer]` section: tune the observer of `out/model.vvb`,
/// write its settings beside it and compare it on the validation log.
fn observer_stage(
    prep: &Prepared,
) -> Result<Option<crate::evidence::observer_check::ObserverReport>> {
    let Some(o) = &prep.project.observer else {
        return Ok(None);
    };
    let path = prep.out.join("model.vvb");
    let bytes = std::fs::read(&path).with_context(|| format!("reading {}", path.display()))?;
    let model = HostModel::from_bytes(&bytes).map_err(|e| anyhow!("{}: {e}", path.display()))?;
    let r = crate::evidence::observer_check::observer_report(
        &model,
        &path,
        &prep.logs.train,
        &prep.logs.val,
        o.window,
        &o.false_alarm,
    )
    .context("[observer]")?;
    Ok(Some(r))
}

/// The run's provenance: input files with their hashes, the effective
/// settings (defaults, the model's integrator and time step and every
/// export target's filled in) and the command that reproduces it.
fn provenance(prep: &Prepared) -> Result<Provenance> {
    let data = &prep.project.data;
    let mut inputs = vec![InputFile::new(
        "training log",
        &data.train.display().to_string(),
        &prep.logs.train_bytes,
    )];
    if let Some(v) = &data.validation {
        let file = v.display().to_string();
        inputs.push(InputFile::new(
            "validation log",
            &file,
            &prep.logs.val_bytes,
        ));
    }
    if let Ok(bytes) = std::fs::read(prep.dir.join("visviva.toml")) {
        inputs.push(InputFile::new("project file", "visviva.toml", &bytes));
    }
    let mut settings = prep.project.clone();
    let integrator = prep.plan.integrator;
    let method = crate::deploy::integrator::MethodName::ALL
        .into_iter()
        .find(|m| Method::from(*m) == integrator.method);
    settings.model.integrator = method;
    settings.model.dt = Some(integrator.dt);
    settings.exports = settings
        .export_targets()
        .into_iter()
        .map(|mut t| {
            t.integrator = t.integrator.or(method);
            t.dt = t.dt.or(Some(integrator.dt));
            t.substeps = t.substeps.or(Some(integrator.substeps));
            t.max_iterations = t.max_iterations.or(Some(integrator.max_iterations));
            t.tolerance = t.tolerance.or(Some(integrator.tolerance));
            t
        })
        .collect();
    settings.device.cycles_per_mac = crate::deploy::budget::cycles_per_mac(&settings.device);
    let text = toml::to_string(&settings).context("writing the effective settings")?;
    Ok(Provenance::now(prep.command.clone(), inputs, text))
}
