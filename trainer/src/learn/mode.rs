//! The fit mode: derivative matching (the Hamiltonian-network loss on
//! estimated or given dx/dt) or trajectory matching (rollouts through the
//! device's integrator, [`crate::learn::trajectory`]); the default chosen by
//! the log and said in the output, and the trajectory fit as a stage: a
//! derivative-matching warm start, then trajectory matching.

use anyhow::{bail, Result};
use serde::{Deserialize, Serialize};
use visviva_runtime::Method;

use crate::data::dataset::Dataset;
use crate::learn::fit::{fit_model, FitSettings, Fitted};
use crate::learn::hnn::EnergyModel;
use crate::learn::stage::ModelPlan;
use crate::learn::trajectory::{fit_trajectory, TrajectorySettings};

/// How the energy model is fitted.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum FitMode {
    /// Match dx/dt (given or estimated) with J dH/dx.
    Derivative,
    /// Match logged positions with rollouts through the device's integrator.
    Trajectory,
}

impl FitMode {
    /// The name used on the command line and in the project file.
    pub fn as_str(self) -> &'static str {
        match self {
            Self::Derivative => "derivative",
            Self::Trajectory => "trajectory",
        }
    }
}

/// The mode to use and why, in words for the output.
pub fn choose_mode(requested: Option<FitMode>, positions_only: bool) -> (FitMode, String) {
    match (requested, positions_only) {
        (Some(m), _) => (m, format!("fit mode {} (as asked)", m.as_str())),
        (None, true) => (
            FitMode::Trajectory,
            "fit mode trajectory (default for a positions-only log: velocities are only \
             estimates, so the model is fitted to the logged positions themselves)"
                .into(),
        ),
        (None, false) => (
            FitMode::Derivative,
            "fit mode derivative (default for a log with velocity or momentum columns)".into(),
        ),
    }
}

/// What trajectory matching needs beyond the model plan.
#[derive(Debug, Clone)]
pub struct TrajectoryPlan {
    /// Log steps per window (K).
    pub window_steps: usize,
    /// Windows per optimizer step.
    pub windows_per_batch: usize,
    /// Epochs of trajectory matching (after the warm start).
    pub epochs: usize,
    /// Peak learning rate of trajectory matching.
    pub lr: f32,
    /// The log's sampling step (s).
    pub dt: f64,
    /// Noise standard deviation per coordinate (SI units).
    pub sigma: Vec<f64>,
    /// Mass or inertia of coordinate 1 fixing the energy scale; `None` for
    /// a log with velocities or momenta (they fix it; the warm start's is
    /// kept).
    pub mass1: Option<f64>,
    /// Whether `mass1` was stated by the user (else 1 by normalization).
    pub mass_stated: bool,
}

impl TrajectoryPlan {
    /// Defaults for a positions-only log sampled every `dt` with noise
    /// `sigma`: coordinate 1's mass `mass1` when stated, else 1.
    pub fn new(dt: f64, sigma: Vec<f64>, mass1: Option<f64>) -> Self {
        Self {
            window_steps: 25,
            windows_per_batch: 32,
            epochs: 150,
            lr: 3e-4,
            dt,
            sigma,
            mass1: Some(mass1.unwrap_or(1.0)),
            mass_stated: mass1.is_some(),
        }
    }

    /// The statement printed with every trajectory fit.
    pub fn energy_scale_note(&self) -> String {
        let Some(m1) = self.mass1 else {
            return "energy scale: from the logged velocities or momenta (derivative warm \
                    start), held during trajectory matching"
                .into();
        };
        if self.mass_stated {
            format!(
                "energy scale: positions do not fix it; fixed by coordinate 1's stated mass \
                 (or inertia) m1 = {m1} (energies in the units that mass implies)"
            )
        } else {
            "energy scale: positions do not fix it; fixed by normalization, coordinate 1's \
             mass (or inertia) taken as 1 (energies are per unit of that mass; give the masses \
             to get physical energies)"
                .into()
        }
    }
}

/// Refuse a plan trajectory matching cannot fit, naming the setting.
pub fn check_trajectory_plan(plan: &ModelPlan, names: &dyn Fn(&str) -> String) -> Result<()> {
    if plan.has_port_terms() {
        bail!(
            "{} = trajectory fits conservative models only; this model has dissipation or \
             inputs (use derivative)",
            names("mode")
        );
    }
    if !(plan.choice.separable && plan.choice.quadratic_kinetic) {
        bail!(
            "{} = trajectory needs arch = separable with kinetic = quadratic (the \
             differentiable step covers H = V(q) + 1/2 p^T M^-1 p); use derivative",
            names("mode")
        );
    }
    if !matches!(
        plan.integrator.method,
        Method::StormerVerlet | Method::Yoshida4
    ) {
        bail!(
            "{} = trajectory rolls out with the device's integrator, and only verlet and \
             yoshida4 are differentiated; {} is not (use derivative)",
            names("mode"),
            crate::deploy::integrator::method_name(plan.integrator.method)
        );
    }
    Ok(())
}

/// Warm start by derivative matching, then trajectory matching with the
/// device's method at the log's step.
pub fn fit_by_trajectories(
    train: &Dataset,
    val: Option<&Dataset>,
    plan: &ModelPlan,
    settings: &FitSettings,
    tp: &TrajectoryPlan,
) -> Result<Fitted<EnergyModel>> {
    let warm = fit_model(train, val, &plan.arch, &plan.terms, settings)?;
    let ts = TrajectorySettings {
        window_steps: tp.window_steps,
        windows_per_batch: tp.windows_per_batch,
        method: plan.integrator.method,
        dt: tp.dt,
        sigma: tp.sigma.clone(),
        mass1: tp.mass1,
    };
    let s = FitSettings {
        epochs: tp.epochs,
        steps: None,
        lr: tp.lr,
        ..settings.clone()
    };
    fit_trajectory(train, val, warm.model, &ts, &s)
}

/// What the user asked of the fit mode (flags or `[fit]` keys).
#[derive(Debug, Clone, Default)]
pub struct ModeRequest {
    /// `derivative` or `trajectory`; default chosen by the log.
    pub mode: Option<FitMode>,
    /// Log steps per window.
    pub window_steps: Option<usize>,
    /// Epochs of trajectory matching.
    pub epochs: Option<usize>,
    /// Masses m1..mn, when stated (m1 fixes the energy scale).
    pub masses: Option<Vec<f64>>,
}

/// Settle the fit mode for `train`: the words saying which and why, and
/// the trajectory plan when it is trajectory matching. `rig` is what a
/// mapped or positions-only log told (noise model, step); `names` turns a
/// setting into its flag or key for refusals.
pub fn plan_mode(
    request: &ModeRequest,
    rig: Option<&crate::data::columns::RigSummary>,
    train: &Dataset,
    plan: &ModelPlan,
    names: &dyn Fn(&str) -> String,
) -> Result<(String, Option<TrajectoryPlan>)> {
    let positions_only = rig.is_some_and(|r| r.positions_only);
    let (mode, words) = choose_mode(request.mode, positions_only);
    if mode == FitMode::Derivative {
        return Ok((words, None));
    }
    check_trajectory_plan(plan, names)?;
    let dt = match rig {
        Some(r) => r.step,
        None => crate::learn::stage::median_step(train)
            .ok_or_else(|| anyhow::anyhow!("the log has no two consecutive samples"))?,
    };
    let sigma = match rig {
        Some(r) => r.noise.clone(),
        None => crate::data::columns::coordinate_noise(train),
    };
    let sigma = sigma
        .iter()
        .map(|s| if *s > 0.0 { *s } else { 1e-9 })
        .collect();
    let mass1 = request.masses.as_ref().and_then(|m| m.first().copied());
    let mut tp = TrajectoryPlan::new(dt, sigma, mass1);
    if !positions_only {
        tp.mass1 = None;
        tp.mass_stated = false;
    }
    if let Some(k) = request.window_steps {
        if k == 0 {
            bail!("{} must be at least 1", names("window_steps"));
        }
        tp.window_steps = k;
    }
    if let Some(e) = request.epochs {
        if e == 0 {
            bail!("{} must be at least 1", names("trajectory_epochs"));
        }
        tp.epochs = e;
    }
    Ok((words, Some(tp)))
}
