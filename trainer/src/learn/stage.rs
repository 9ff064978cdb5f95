//! The fit stage that `visviva fit` and `visviva run` share: the model plan
//! (every refusal before any work), Ctrl-C handling, the fit of the energy
//! model (conservative, or damped and/or driven) and of the plain baseline,
//! the refusal of settings out of range and of fits that cannot be trusted
//! (interrupted, or NaN from the start), and the one wording of how a fit
//! ended.

use std::sync::atomic::AtomicBool;
use std::sync::Arc;

use anyhow::{bail, Result};
use visviva_runtime::{Integrator, Method};

use crate::data::dataset::Dataset;
use crate::deploy::blob::WeightKind;
use crate::deploy::integrator::{default_method, method_name, MethodName};
use crate::learn::fit::{
    fit_baseline, fit_model, ArchChoice, FitSettings, Fitted, StopReason, TrainReport,
};
use crate::learn::hnn::{BaselineModel, EnergyArch, EnergyModel, PortArch};

/// How settings are named in messages: command-line flags or the keys of
/// a project file's `[model]` table.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SettingNames {
    /// `--integrator`, `--dt`, ...
    Flags,
    /// `[model] integrator`, `[model] dt`, ...
    ProjectKeys,
}

impl SettingNames {
    /// The user-facing name of setting `key` (snake case).
    pub fn name(self, key: &str) -> String {
        match self {
            SettingNames::Flags => format!("--{}", key.replace('_', "-")),
            SettingNames::ProjectKeys => format!("[model] {key}"),
        }
    }

    /// The user-facing name of setting `key` of project table `table`
    /// (flags ignore the table).
    pub fn in_table(self, table: &str, key: &str) -> String {
        match self {
            SettingNames::Flags => format!("--{}", key.replace('_', "-")),
            SettingNames::ProjectKeys => format!("[{table}] {key}"),
        }
    }
}

/// Refuse fit settings out of their range before any work, each named as
/// `names` says (`--epochs` or `[fit] epochs`).
pub fn check_fit_settings(s: &FitSettings, names: SettingNames) -> Result<()> {
    let name = |key: &str| names.in_table("fit", key);
    if s.steps.is_none() && s.epochs == 0 {
        bail!(
            "{} = 0: a fit needs at least one pass over the data",
            name("epochs")
        );
    }
    if s.steps == Some(0) {
        bail!(
            "{} = 0: a fit needs at least one step",
            name("optimizer_steps")
        );
    }
    for (key, v) in [("batch", s.batch), ("threads", s.threads)] {
        if v == 0 {
            bail!("{} = 0: must be at least 1", name(key));
        }
    }
    if !(s.lr.is_finite() && s.lr > 0.0) {
        bail!(
            "{} = {}: the learning rate must be a finite number > 0",
            name("lr"),
            s.lr
        );
    }
    Ok(())
}

/// Refuse a time step that no integrator can use: not finite, not
/// positive, or below the smallest normal f32 (the device's arithmetic).
pub fn check_time_step(dt: f32, setting: &str) -> Result<()> {
    use visviva_runtime::integrate::{MAX_DT, MIN_DT};
    if !(dt.is_finite() && dt > 0.0 && dt.is_normal()) {
        bail!("{setting} = {dt}: the time step must be a finite number of seconds > 0");
    }
    if !(MIN_DT..=MAX_DT).contains(&dt) {
        bail!(
            "{setting} = {dt} s: the time step must lie in [{MIN_DT:e}, {MAX_DT:e}] s, the range \
             a blob can hold (see the format's value ranges)"
        );
    }
    Ok(())
}

/// Refuse masses that are not finite and positive, or that the device's
/// f32 arithmetic cannot hold as normal numbers (about 1.2e-38 to 3.4e38).
pub fn check_masses(masses: &[f64], setting: &str) -> Result<()> {
    for (k, m) in masses.iter().enumerate() {
        let as_f32 = *m as f32;
        if !(m.is_finite() && *m > 0.0 && as_f32.is_normal() && as_f32.is_finite()) {
            bail!(
                "{setting}: mass {} = {m:e} is not a positive number the device's f32 arithmetic \
                 can hold (about 1.2e-38 to 3.4e38)",
                k + 1
            );
        }
    }
    Ok(())
}

/// Refuse stated masses for the mechanical structure: masses form the
/// momenta as p = m v, a constant diagonal inertia, while that structure's
/// inertia M(q) depends on the positions, so those momenta would not be
/// its momenta (the fit would learn a wrong energy). `setting` names the
/// masses.
pub fn check_masses_for_structure(
    mechanical: bool,
    masses_form_momenta: bool,
    setting: &str,
) -> Result<()> {
    if mechanical && masses_form_momenta {
        bail!(
            "{setting} form the momenta as p = m v, a constant diagonal inertia, but the \
             mechanical structure's inertia M(q) depends on the positions, so those momenta \
             would not be its momenta: leave the masses out (with joint rates the mass matrix \
             is then learned from the log; a known mean of M11 makes it physical) or log the \
             momenta p"
        );
    }
    Ok(())
}

/// Refuse a fit whose result cannot be trusted: interrupted (Ctrl-C), or
/// whose loss was NaN or infinite before any epoch finished (the weights
/// would be the untrained start). `what` names the fitted model.
pub fn check_trusted(r: &TrainReport, what: &str) -> Result<()> {
    match r.stop {
        StopReason::Interrupted => bail!(
            "{what}: the fit was interrupted (Ctrl-C) after {} optimizer steps; nothing was \
             written, since an interrupted fit is not a finished model (ask for fewer epochs \
             for a shorter fit)",
            r.steps
        ),
        StopReason::NonFinite { step } if r.best_epoch.is_none() => bail!(
            "{what}: the loss became NaN or infinite at optimizer step {step}, before any \
             epoch finished, so nothing was learned and nothing was written; try a smaller \
             learning rate and check the log's units and masses"
        ),
        _ if !r.best_val.is_finite() => bail!(
            "{what}: the best validation loss is {}; nothing was written",
            r.best_val
        ),
        _ => Ok(()),
    }
}

/// What will be fitted, settled before any work.
#[derive(Debug, Clone)]
pub struct ModelPlan {
    /// The structure as chosen.
    pub choice: ArchChoice,
    /// The energy network's structure for the data's degrees of freedom.
    pub arch: EnergyArch,
    /// Port terms (R, G); the input count is the data's.
    pub terms: PortArch,
    /// The integrator stored in the fitted model.
    pub integrator: Integrator,
}

impl ModelPlan {
    /// Whether the model has port terms (damping or inputs).
    pub fn has_port_terms(&self) -> bool {
        self.terms.dissipation || self.terms.inputs > 0
    }

    /// Trainable parameters of the energy model and its port terms.
    pub fn parameters(&self, dof: usize) -> usize {
        self.arch.param_count(dof) + self.terms.param_count(dof)
    }
}

/// Settle the model to fit on `train`: its structure, its port terms (the
/// input count taken from the data) and its integrator (`method` or the
/// default for the structure; `dt` or the log's median sampling interval).
/// Every refusal names the setting as `names` says.
pub fn plan_model(
    train: &Dataset,
    choice: ArchChoice,
    terms: PortArch,
    method: Option<MethodName>,
    dt: Option<f32>,
    names: SettingNames,
) -> Result<ModelPlan> {
    if !train.driven() && !terms.input_hidden.is_empty() {
        bail!(
            "{}: the training log has no input columns u1..um, so there is no G to learn",
            names.name("input_net")
        );
    }
    let terms = PortArch {
        inputs: train.inputs,
        ..terms
    };
    let port = terms.dissipation || terms.inputs > 0;
    let method = method.map_or(default_method(choice.separable, port), Method::from);
    check_method(method, choice.separable, port, &names.name("integrator"))?;
    let integrator = stored_integrator(method, dt, train, &names.name("dt"))?;
    let arch = choice.build(train.dof)?;
    Ok(ModelPlan {
        choice,
        arch,
        terms,
        integrator,
    })
}

/// Refuse a method that cannot step the model: the explicit symplectic
/// methods need a separable energy and cannot step port terms.
pub fn check_method(method: Method, separable: bool, port: bool, setting: &str) -> Result<()> {
    let name = method_name(method);
    if port && !method.handles_port_terms() {
        bail!(
            "{setting} = \"{name}\" cannot step a damped or driven model: it steps only J dH/dx and \
             would drop the dissipation R and the inputs G u; use discrete-gradient (the default; \
             exact energy balance) or midpoint"
        );
    }
    if method.needs_separable() && !separable {
        bail!(
            "{setting} = \"{name}\" needs a separable energy H = T(p) + V(q) (arch = separable); \
             a general or mechanical energy is not separable (a mechanical one's kinetic energy \
             depends on q through M(q)); use midpoint or discrete-gradient"
        );
    }
    Ok(())
}

/// The stored integrator: `method` at `dt`, or at the log's median
/// sampling interval when `dt` is not given.
fn stored_integrator(
    method: Method,
    dt: Option<f32>,
    train: &Dataset,
    setting: &str,
) -> Result<Integrator> {
    let dt = match dt {
        Some(dt) => dt,
        None => match median_step(train) {
            Some(v) => v as f32,
            None => bail!("cannot infer {setting}: the log has no two consecutive samples"),
        },
    };
    check_time_step(dt, setting)?;
    let integrator = Integrator::new(method, dt);
    if !integrator.is_valid() {
        bail!("{setting} = {dt} s is not a usable time step");
    }
    Ok(integrator)
}

/// The median sampling interval of a data set's trajectories.
pub fn median_step(ds: &Dataset) -> Option<f64> {
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

/// A flag Ctrl-C sets; the training loop stops and keeps the best so far.
/// The handler is installed once per process and every caller shares the
/// flag, so fits running side by side (a fleet's units on a thread pool)
/// neither fight over the handler nor warn about it.
pub fn interrupt_flag() -> Arc<AtomicBool> {
    crate::interrupt::flag()
}

/// What the fit stage produced.
pub struct FitOutcome {
    /// The energy model and how it was fitted.
    pub model: Fitted<EnergyModel>,
    /// The model as an f32 blob with the planned integrator.
    pub blob: Vec<u8>,
    /// The baseline, when asked for.
    pub baseline: Option<Fitted<BaselineModel>>,
}

/// Fit the planned model to `train` (early stopping on `val`), encode it
/// with the training envelope of `train`, and fit the baseline when `baseline` is set; an interrupted fit or one
/// that learned nothing is an error (see [`check_trusted`]).
pub fn fit_stage(
    train: &Dataset,
    val: Option<&Dataset>,
    plan: &ModelPlan,
    settings: &FitSettings,
    baseline: bool,
) -> Result<FitOutcome> {
    fit_stage_mode(train, val, plan, settings, baseline, None)
}

/// [`fit_stage`] in either fit mode: derivative matching, or with a
/// trajectory plan a derivative warm start and trajectory matching
/// ([`crate::learn::mode::fit_by_trajectories`]).
pub fn fit_stage_mode(
    train: &Dataset,
    val: Option<&Dataset>,
    plan: &ModelPlan,
    settings: &FitSettings,
    baseline: bool,
    trajectory: Option<&crate::learn::mode::TrajectoryPlan>,
) -> Result<FitOutcome> {
    let model = match trajectory {
        Some(tp) => crate::learn::mode::fit_by_trajectories(train, val, plan, settings, tp)?,
        None => fit_model(train, val, &plan.arch, &plan.terms, settings)?,
    };
    check_trusted(&model.report, "energy model")?;
    let blob = crate::deploy::fitted_blob::fitted_energy_blob(
        &model.model,
        plan.integrator,
        WeightKind::F32,
        train,
    )?;
    let baseline = if baseline {
        let hidden = &plan.choice.hidden;
        let fitted = fit_baseline(train, val, hidden, plan.choice.activation, settings)?;
        check_trusted(&fitted.report, "baseline")?;
        Some(fitted)
    } else {
        None
    };
    Ok(FitOutcome {
        model,
        blob,
        baseline,
    })
}

/// How a fit ended, in the words every command uses.
pub fn stop_text(stop: StopReason) -> String {
    match stop {
        StopReason::Completed => "all epochs done".into(),
        StopReason::EarlyStopped => "early stop (validation loss stopped improving)".into(),
        StopReason::Plateau {
            epochs,
            gain,
            threshold,
        } => format!(
            "plateau: the best loss improved by {:.3} % over the last {epochs} epochs, less than \
             the {:.3} % that counts (the loss's own sampling spread)",
            100.0 * gain,
            100.0 * threshold
        ),
        StopReason::Interrupted => "interrupted; kept the best parameters so far".into(),
        StopReason::NonFinite { step } => format!(
            "loss became NaN or infinite at step {step}; kept the last good parameters \
             (try a smaller learning rate)"
        ),
    }
}
