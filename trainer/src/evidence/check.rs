//! The evidence before deploying: roll the model (through `visviva-runtime`,
//! with the blob's integrator) and the plain baseline (RK4 on its vector
//! field) from each validation trajectory's first state, and measure
//! vector-field error, state error over the trajectory, and energy drift over
//! a long horizon — learned energy always, true energy for built-in systems
//! — and the state errors at chosen horizons ([`crate::evidence::horizons`]).
//! Damped or driven models get [`check_port`] instead: damping per mode of
//! the linearization at rest and driven rollouts with the logged inputs.

use anyhow::{anyhow, Result};
use serde::Serialize;
use visviva_runtime::{Hamiltonian, Integrator};

use crate::data::dataset::{Dataset, Trajectory};
use crate::deploy::blob::{HostModel, HOST_MAX_DOF};
use crate::deploy::rollout::state_of;
use crate::evidence::horizons::{
    errors_at, summarize as summarize_horizons, HorizonError, HorizonSummary, DEFAULT_HORIZONS,
};
use crate::learn::hnn::BaselineModel;
use crate::reference::ReferenceSystem;

/// Check settings.
#[derive(Debug, Clone)]
pub struct CheckSettings {
    /// Long-horizon steps; `None` = 100 small-amplitude periods of a known
    /// system (at most 10^5 steps), else 10^4.
    pub horizon_steps: Option<usize>,
    /// Largest number of points kept per plotted series.
    pub plot_points: usize,
    /// Horizons (s) at which the state errors are reported.
    pub horizons: Vec<f64>,
}

impl Default for CheckSettings {
    fn default() -> Self {
        Self {
            horizon_steps: None,
            plot_points: 1500,
            horizons: DEFAULT_HORIZONS.to_vec(),
        }
    }
}

/// Numbers for one model on one trajectory.
#[derive(Debug, Clone, Serialize, Default)]
pub struct Metrics {
    /// RMS of (predicted - logged) dx/dt over RMS of logged dx/dt.
    pub vector_field_rel_rmse: f64,
    /// RMS state error of the rollout over the trajectory, over the state's
    /// RMS.
    pub state_rel_rmse: f64,
    /// Relative state error at each logged sample of the rollout (plots).
    #[serde(skip)]
    pub state_error: Vec<f64>,
    /// max |H(t) - H(0)| / |H(0)| of the true energy over the horizon
    /// (built-in systems only).
    pub true_energy_drift: Option<f64>,
    /// max |H(t) - H(0)| of the learned energy over the horizon, in energy
    /// scales (the blob's: the training data's typical energy, a scale
    /// that does not shrink as the model gets more accurate).
    pub learned_energy_drift: Option<f64>,
    /// Steps completed on the long horizon (less than asked when it failed).
    pub horizon_steps_done: usize,
    /// Why a rollout stopped early.
    pub failure: Option<String>,
}

/// One validation trajectory's check.
#[derive(Debug, Clone, Serialize)]
pub struct TrajectoryCheck {
    /// Trajectory id.
    pub id: String,
    /// Samples in the log.
    pub samples: usize,
    /// Sampling interval used as the rollout step (s).
    pub dt: f64,
    /// Long-horizon steps asked.
    pub horizon_steps: usize,
    /// The energy model.
    pub model: Metrics,
    /// The baseline, when given.
    pub baseline: Option<Metrics>,
    /// State errors of model and baseline at the chosen horizons.
    pub horizons: Vec<HorizonError>,
    /// Plot data: logged, model and baseline (q1, p1) over the trajectory.
    #[serde(skip)]
    pub phase: [Vec<(f64, f64)>; 3],
    /// Plot data: time and energy (true if known, else learned) over the
    /// horizon for model and baseline.
    #[serde(skip)]
    pub energy: [Vec<(f64, f64)>; 2],
}

/// The whole check.
#[derive(Debug, Clone, Serialize)]
pub struct CheckReport {
    /// Integrator used for the model.
    pub integrator: String,
    /// Whether energies are true energies of a built-in system.
    pub system: Option<String>,
    /// Per trajectory.
    pub trajectories: Vec<TrajectoryCheck>,
    /// Medians over trajectories: model.
    pub median_model: Summary,
    /// Medians over trajectories: baseline.
    pub median_baseline: Option<Summary>,
    /// Medians at each chosen horizon over the trajectories reaching it.
    pub horizons: Vec<HorizonSummary>,
}

/// Medians of the per-trajectory numbers.
#[derive(Debug, Clone, Serialize)]
pub struct Summary {
    /// Vector-field relative RMSE.
    pub vector_field_rel_rmse: f64,
    /// State relative RMSE.
    pub state_rel_rmse: f64,
    /// True-energy drift (built-in systems).
    pub true_energy_drift: Option<f64>,
    /// Learned-energy drift (the energy model only).
    pub learned_energy_drift: Option<f64>,
}

/// The median of `v` (the upper middle for an even count; NaN when empty).
pub fn median(mut v: Vec<f64>) -> f64 {
    if v.is_empty() {
        return f64::NAN;
    }
    v.sort_by(|a, b| a.total_cmp(b));
    v[v.len() / 2]
}

fn summarize(ms: &[&Metrics]) -> Summary {
    let opt = |f: &dyn Fn(&Metrics) -> Option<f64>| {
        let v: Vec<f64> = ms.iter().filter_map(|m| f(m)).collect();
        (!v.is_empty()).then(|| median(v))
    };
    Summary {
        vector_field_rel_rmse: median(ms.iter().map(|m| m.vector_field_rel_rmse).collect()),
        state_rel_rmse: median(ms.iter().map(|m| m.state_rel_rmse).collect()),
        true_energy_drift: opt(&|m| m.true_energy_drift),
        learned_energy_drift: opt(&|m| m.learned_energy_drift),
    }
}

fn rel_rmse(pred: &[Vec<f64>], truth: &[Vec<f64>]) -> f64 {
    let (mut e, mut r) = (0.0, 0.0);
    for (p, t) in pred.iter().zip(truth) {
        for (a, b) in p.iter().zip(t) {
            e += (a - b) * (a - b);
            r += b * b;
        }
    }
    (e / r.max(f64::MIN_POSITIVE)).sqrt()
}

fn decimate(v: Vec<(f64, f64)>, keep: usize) -> Vec<(f64, f64)> {
    let stride = v.len().div_ceil(keep.max(1)).max(1);
    v.into_iter().step_by(stride).collect()
}

/// A state stepper: the energy model or the baseline.
enum Stepper<'m, 'a> {
    Model(&'m HostModel<'a>),
    Baseline(&'m BaselineModel, f32),
}

impl Stepper<'_, '_> {
    fn step(&self, x: &mut Vec<f32>) -> Result<(), String> {
        match self {
            Stepper::Model(m) => {
                let mut s = state_of(x).map_err(|e| e.to_string())?;
                m.step(&mut s).map_err(|e| e.to_string())?;
                x.clear();
                x.extend_from_slice(s.q());
                x.extend_from_slice(s.p());
                Ok(())
            }
            Stepper::Baseline(b, dt) => {
                b.step_rk4(x, *dt);
                if x.iter().all(|v| v.is_finite()) {
                    Ok(())
                } else {
                    Err("baseline rollout produced NaN or infinity".into())
                }
            }
        }
    }
}

/// Model settings for stepping at the log's sampling interval `dt`: the
/// blob's method, with enough substeps to keep its own step or smaller.
pub fn integrator_for(base: Integrator, dt: f64) -> Integrator {
    let sub = (dt / base.dt as f64 / base.substeps.max(1) as f64)
        .ceil()
        .max(1.0);
    Integrator {
        dt: dt as f32,
        substeps: (sub as u16)
            .saturating_mul(base.substeps.max(1))
            .clamp(1, visviva_runtime::integrate::MAX_SUBSTEPS),
        ..base
    }
}

fn trajectory_dt(t: &Trajectory) -> f64 {
    let n = t.t.len();
    if n < 2 {
        return 0.0;
    }
    (t.t[n - 1] - t.t[0]) / (n - 1) as f64
}

struct Run {
    metrics: Metrics,
    phase: Vec<(f64, f64)>,
    energy: Vec<(f64, f64)>,
}

#[allow(clippy::too_many_arguments)]
fn run_one(
    stepper: &Stepper<'_, '_>,
    traj: &Trajectory,
    dt: f64,
    horizon: usize,
    system: Option<&dyn ReferenceSystem>,
    learned: Option<&HostModel<'_>>,
    predicted_rates: Vec<Vec<f64>>,
    keep: usize,
) -> Run {
    let n2 = traj.x.ncols();
    let n = n2 / 2;
    let truth: Vec<Vec<f64>> = traj.x.rows().into_iter().map(|r| r.to_vec()).collect();
    let rates: Vec<Vec<f64>> = traj.dx.rows().into_iter().map(|r| r.to_vec()).collect();
    let mut m = Metrics {
        vector_field_rel_rmse: rel_rmse(&predicted_rates, &rates),
        ..Metrics::default()
    };
    let x0: Vec<f32> = truth[0].iter().map(|v| *v as f32).collect();
    let energy_of = |x: &[f32]| -> (Option<f64>, Option<f64>) {
        let t = system.map(|s| s.hamiltonian(&x.iter().map(|v| *v as f64).collect::<Vec<_>>()));
        let l = learned.and_then(|mdl| {
            state_of(x)
                .ok()
                .and_then(|s| mdl.energy(&s).ok())
                .map(|e| e as f64)
        });
        (t, l)
    };
    // Over the logged trajectory.
    let mut x = x0.clone();
    let mut pred = vec![truth[0].clone()];
    let mut phase = vec![(x[0] as f64, x[n] as f64)];
    for _ in 1..truth.len() {
        if let Err(e) = stepper.step(&mut x) {
            m.failure = Some(e);
            break;
        }
        pred.push(x.iter().map(|v| *v as f64).collect());
        phase.push((x[0] as f64, x[n] as f64));
    }
    m.state_rel_rmse = if m.failure.is_some() {
        f64::INFINITY
    } else {
        rel_rmse(&pred, &truth)
    };
    let rms = (truth.iter().flatten().map(|v| v * v).sum::<f64>()
        / (truth.len() * n2).max(1) as f64)
        .sqrt();
    m.state_error = pred
        .iter()
        .zip(&truth)
        .map(|(p, t)| {
            (p.iter().zip(t).map(|(a, b)| (a - b) * (a - b)).sum::<f64>() / n2 as f64).sqrt()
                / rms.max(f64::MIN_POSITIVE)
        })
        .collect();
    // Long horizon.
    let mut x = x0;
    let (t0, l0) = energy_of(&x);
    let scale = learned.map(|mdl| mdl.energy_scale() as f64);
    let (mut td, mut ld) = (0.0f64, 0.0f64);
    // The energy series is decimated as it is produced (every `stride`-th
    // step, as `decimate` would keep them), so memory does not grow with
    // the horizon.
    let stride = (horizon + 1).div_ceil(keep.max(1)).max(1);
    let mut energy = vec![(0.0, t0.or(l0).unwrap_or(f64::NAN))];
    let mut done = 0;
    for k in 1..=horizon {
        if let Err(e) = stepper.step(&mut x) {
            m.failure.get_or_insert(e);
            break;
        }
        done = k;
        let (t, l) = energy_of(&x);
        if let (Some(t), Some(t0)) = (t, t0) {
            td = td.max((t - t0).abs());
        }
        if let (Some(l), Some(l0)) = (l, l0) {
            ld = ld.max((l - l0).abs());
        }
        if k % stride == 0 {
            energy.push((k as f64 * dt, t.or(l).unwrap_or(f64::NAN)));
        }
    }
    m.horizon_steps_done = done;
    let broke = done < horizon;
    m.true_energy_drift = t0.map(|e0| {
        if broke {
            f64::INFINITY
        } else {
            td / e0.abs().max(f64::MIN_POSITIVE)
        }
    });
    m.learned_energy_drift = scale.map(|es| {
        if broke {
            f64::INFINITY
        } else {
            ld / es.max(f64::MIN_POSITIVE)
        }
    });
    Run {
        metrics: m,
        phase: decimate(phase, keep),
        energy,
    }
}

/// The model's vector field at every logged state (NaN where it fails).
fn model_rates(model: &HostModel<'_>, traj: &Trajectory, n: usize) -> Vec<Vec<f64>> {
    traj.x
        .rows()
        .into_iter()
        .map(|r| {
            let v: Vec<f32> = r.iter().map(|v| *v as f32).collect();
            let s = state_of(&v).expect("state of data dimension");
            let (mut fq, mut fp) = ([0.0f32; HOST_MAX_DOF], [0.0f32; HOST_MAX_DOF]);
            let ok = model.vector_field(&s, &mut fq, &mut fp).is_ok();
            fq[..n]
                .iter()
                .chain(&fp[..n])
                .map(|v| if ok { *v as f64 } else { f64::NAN })
                .collect()
        })
        .collect()
}

/// The baseline's vector field at every logged state.
fn baseline_rates(b: &BaselineModel, traj: &Trajectory) -> Vec<Vec<f64>> {
    traj.x
        .rows()
        .into_iter()
        .map(|r| {
            let v: Vec<f32> = r.iter().map(|v| *v as f32).collect();
            b.vector_field(&v).into_iter().map(f64::from).collect()
        })
        .collect()
}

/// Check `model` (and `baseline`) on every trajectory of `data`.
pub fn check(
    model: &HostModel<'_>,
    baseline: Option<&BaselineModel>,
    data: &Dataset,
    system: Option<&dyn ReferenceSystem>,
    settings: &CheckSettings,
) -> Result<CheckReport> {
    if model.dof() != data.dof {
        return Err(anyhow!(
            "the model has {} degrees of freedom, the data {}",
            model.dof(),
            data.dof
        ));
    }
    if let Some(b) = baseline {
        if b.dof != data.dof {
            return Err(anyhow!(
                "the baseline has {} degrees of freedom, the data {}",
                b.dof,
                data.dof
            ));
        }
    }
    let mut out = Vec::new();
    for traj in &data.trajectories {
        let dt = trajectory_dt(traj);
        if traj.t.len() < 2 || dt <= 0.0 {
            continue;
        }
        let period = system.and_then(|s| s.small_amplitude_period());
        let horizon = settings.horizon_steps.unwrap_or_else(|| match period {
            Some(period) => ((100.0 * period / dt).ceil() as usize).min(100_000),
            None => 10_000,
        });
        let stepping = model
            .with_integrator(integrator_for(model.integrator(), dt))
            .map_err(|e| anyhow!("{e}"))?;
        let model_rates = model_rates(model, traj, data.dof);
        let mr = run_one(
            &Stepper::Model(&stepping),
            traj,
            dt,
            horizon,
            system,
            Some(&stepping),
            model_rates,
            settings.plot_points,
        );
        let br = baseline.map(|b| {
            let rates = baseline_rates(b, traj);
            run_one(
                &Stepper::Baseline(b, dt as f32),
                traj,
                dt,
                horizon,
                system,
                None,
                rates,
                settings.plot_points,
            )
        });
        let data_phase: Vec<(f64, f64)> = traj
            .x
            .rows()
            .into_iter()
            .map(|r| (r[0], r[data.dof]))
            .collect();
        let horizons = errors_at(
            &traj.t,
            dt,
            &mr.metrics.state_error,
            br.as_ref().map(|b| b.metrics.state_error.as_slice()),
            &settings.horizons,
        );
        out.push(TrajectoryCheck {
            id: traj.id.clone(),
            samples: traj.t.len(),
            dt,
            horizon_steps: horizon,
            horizons,
            phase: [
                decimate(data_phase, settings.plot_points),
                mr.phase,
                br.as_ref().map(|b| b.phase.clone()).unwrap_or_default(),
            ],
            energy: [
                mr.energy,
                br.as_ref().map(|b| b.energy.clone()).unwrap_or_default(),
            ],
            model: mr.metrics,
            baseline: br.map(|b| b.metrics),
        });
    }
    if out.is_empty() {
        return Err(anyhow!("no trajectory with at least two samples to check"));
    }
    let median_model = summarize(&out.iter().map(|t| &t.model).collect::<Vec<_>>());
    let bs: Vec<&Metrics> = out.iter().filter_map(|t| t.baseline.as_ref()).collect();
    let per: Vec<&[HorizonError]> = out.iter().map(|t| t.horizons.as_slice()).collect();
    let horizons = summarize_horizons(&per, &settings.horizons, baseline.is_some());
    Ok(CheckReport {
        horizons,
        integrator: crate::deploy::integrator::method_name(model.integrator().method).into(),
        system: system.map(|s| s.name().to_string()),
        median_baseline: (!bs.is_empty()).then(|| summarize(&bs)),
        median_model,
        trajectories: out,
    })
}

// ------------------------------------------------ damped and driven models

/// One mode of a damped model's linearization at rest.
#[derive(Debug, Clone, Serialize)]
pub struct ModeDamping {
    /// Eigenvalue real part (1/s).
    pub real: f64,
    /// Eigenvalue imaginary part (rad/s, positive member of the pair).
    pub imag: f64,
    /// Undamped natural frequency |lambda| / (2 pi) in Hz.
    pub natural_hz: f64,
    /// Damping ratio -Re(lambda) / |lambda| (1 for a real, decaying mode).
    pub damping_ratio: f64,
}

/// A driven rollout of one held-out trajectory.
#[derive(Debug, Clone, Serialize)]
pub struct DrivenRollout {
    /// Trajectory id.
    pub id: String,
    /// sqrt(mean over coordinates of MSE_i / mean(x_i^2)): each
    /// coordinate's error over its own RMS, so units do not mix.
    pub state_rel_rmse: f64,
    /// Why the rollout stopped early.
    pub failure: Option<String>,
    /// The states of the rollout, the initial state first (for plots).
    #[serde(skip)]
    pub states: Vec<Vec<f32>>,
}

/// sqrt(mean over coordinates of MSE_i / mean(x_i^2)) of rolled-out
/// `states` against the logged trajectory (rows beyond either end are left
/// out).
fn driven_rel_rmse(states: &[Vec<f32>], traj: &Trajectory) -> f64 {
    let d = traj.x.ncols();
    let mut sum = 0.0;
    for i in 0..d {
        let (mut e, mut r) = (0.0, 0.0);
        for (s, truth) in states.iter().zip(traj.x.rows()) {
            e += (s[i] as f64 - truth[i]).powi(2);
            r += truth[i] * truth[i];
        }
        sum += e / r.max(f64::MIN_POSITIVE);
    }
    (sum / d as f64).sqrt()
}

/// The driven rollout's error at each logged sample (as many as `states`
/// reach): sqrt(mean over coordinates of (x_i - logged x_i)^2 /
/// mean(logged x_i^2)), the per-sample form of [`driven_rel_rmse`].
fn driven_errors(states: &[Vec<f32>], traj: &Trajectory) -> Vec<f64> {
    let d = traj.x.ncols();
    let ms: Vec<f64> = (0..d)
        .map(|i| {
            let c = traj.x.column(i);
            (c.iter().map(|v| v * v).sum::<f64>() / c.len().max(1) as f64).max(f64::MIN_POSITIVE)
        })
        .collect();
    states
        .iter()
        .zip(traj.x.rows())
        .map(|(s, truth)| {
            let e: f64 = (0..d)
                .map(|i| (s[i] as f64 - truth[i]).powi(2) / ms[i])
                .sum();
            (e / d as f64).sqrt()
        })
        .collect()
}

/// The driven rollouts' state errors (model, and baseline when given) of
/// one held-out trajectory at the chosen horizons.
pub fn driven_horizons(
    traj: &Trajectory,
    model: &DrivenRollout,
    baseline: Option<&DrivenRollout>,
    horizons: &[f64],
) -> Vec<HorizonError> {
    let m = driven_errors(&model.states, traj);
    let b = baseline.map(|b| driven_errors(&b.states, traj));
    errors_at(&traj.t, trajectory_dt(traj), &m, b.as_deref(), horizons)
}

/// A trajectory's logged inputs as f32 rows (empty without inputs).
fn input_rows(traj: &Trajectory) -> Vec<Vec<f32>> {
    if traj.u.ncols() == 0 {
        return Vec::new();
    }
    traj.u
        .rows()
        .into_iter()
        .map(|r| r.iter().map(|v| *v as f32).collect())
        .collect()
}

/// The baseline's driven rollouts of the held-out trajectories: RK4 at the
/// log's interval with logged input row k held over step k, scored as the
/// model's in [`check_port`].
pub fn driven_baseline(baseline: &BaselineModel, data: &Dataset) -> Vec<DrivenRollout> {
    let mut out = Vec::new();
    for traj in &data.trajectories {
        let dt = trajectory_dt(traj) as f32;
        let u = input_rows(traj);
        let mut x: Vec<f32> = traj.x.row(0).iter().map(|v| *v as f32).collect();
        let mut states = vec![x.clone()];
        let mut failure = None;
        for step in 0..traj.t.len().saturating_sub(1) {
            baseline.step_rk4_driven(&mut x, u.get(step).map_or(&[], Vec::as_slice), dt);
            if !x.iter().all(|v| v.is_finite()) {
                failure = Some(format!(
                    "step {step}: baseline rollout produced NaN or infinity"
                ));
                break;
            }
            states.push(x.clone());
        }
        out.push(DrivenRollout {
            id: traj.id.clone(),
            state_rel_rmse: if failure.is_some() {
                f64::INFINITY
            } else {
                driven_rel_rmse(&states, traj)
            },
            failure,
            states,
        });
    }
    out
}

/// The checks specific to damped and driven models.
#[derive(Debug, Clone, Serialize)]
pub struct PortCheckReport {
    /// The rest state found (f(x) = 0 with u = 0), q then p.
    pub rest: Vec<f64>,
    /// Largest |f(rest)| relative to the RMS rates of the data.
    pub rest_residual: f64,
    /// Modes of the linearization at rest, oscillatory pairs once, rigid
    /// (zero) modes left out, by natural frequency.
    pub modes: Vec<ModeDamping>,
    /// Driven rollouts with the logged inputs.
    pub rollouts: Vec<DrivenRollout>,
}

/// f(x) with u = 0 through the runtime, in f64.
fn unforced_field(model: &HostModel<'_>, x: &[f64]) -> Result<Vec<f64>> {
    let n = x.len() / 2;
    let xf: Vec<f32> = x.iter().map(|v| *v as f32).collect();
    let s = state_of(&xf)?;
    let (mut dq, mut dp) = ([0.0f32; HOST_MAX_DOF], [0.0f32; HOST_MAX_DOF]);
    model
        .vector_field(&s, &mut dq, &mut dp)
        .map_err(|e| anyhow!("vector field: {e}"))?;
    Ok(dq[..n].iter().chain(&dp[..n]).map(|v| *v as f64).collect())
}

/// Jacobian of the unforced field by central differences with steps
/// `h_j = 1e-3 * scale_j` (f32 evaluation: about 3 to 4 digits).
fn field_jacobian(model: &HostModel<'_>, x: &[f64], scale: &[f64]) -> Result<Vec<Vec<f64>>> {
    let d = x.len();
    let mut a = vec![vec![0.0; d]; d];
    for j in 0..d {
        let h = 1e-3 * scale[j];
        let mut plus = x.to_vec();
        let mut minus = x.to_vec();
        plus[j] += h;
        minus[j] -= h;
        let (fp, fm) = (
            unforced_field(model, &plus)?,
            unforced_field(model, &minus)?,
        );
        for i in 0..d {
            a[i][j] = (fp[i] - fm[i]) / (2.0 * h);
        }
    }
    Ok(a)
}

/// Solve (A^T A + mu I) s = A^T b (Levenberg-Marquardt step; works for a
/// singular A, as for a free rotation).
fn lm_step(a: &[Vec<f64>], b: &[f64], mu: f64) -> Vec<f64> {
    let d = b.len();
    let mut m = vec![vec![0.0; d + 1]; d];
    for i in 0..d {
        for j in 0..d {
            m[i][j] =
                (0..d).map(|k| a[k][i] * a[k][j]).sum::<f64>() + if i == j { mu } else { 0.0 };
        }
        m[i][d] = (0..d).map(|k| a[k][i] * b[k]).sum();
    }
    // Gaussian elimination with partial pivoting (the matrix is SPD).
    for c in 0..d {
        let p = (c..d)
            .max_by(|&r, &s| m[r][c].abs().total_cmp(&m[s][c].abs()))
            .unwrap_or(c);
        m.swap(c, p);
        for r in c + 1..d {
            let f = m[r][c] / m[c][c];
            let pivot = m[c].clone();
            for (dst, src) in m[r].iter_mut().zip(&pivot).skip(c) {
                *dst -= f * src;
            }
        }
    }
    let mut s = vec![0.0; d];
    for r in (0..d).rev() {
        let acc: f64 = (r + 1..d).map(|k| m[r][k] * s[k]).sum();
        s[r] = (m[r][d] - acc) / m[r][r];
    }
    s
}

#[derive(Debug, Clone, Copy)]
struct Complex(f64, f64);

impl Complex {
    fn add(self, o: Self) -> Self {
        Self(self.0 + o.0, self.1 + o.1)
    }
    fn sub(self, o: Self) -> Self {
        Self(self.0 - o.0, self.1 - o.1)
    }
    fn mul(self, o: Self) -> Self {
        Self(self.0 * o.0 - self.1 * o.1, self.0 * o.1 + self.1 * o.0)
    }
    fn div(self, o: Self) -> Self {
        let d = o.0 * o.0 + o.1 * o.1;
        Self(
            (self.0 * o.0 + self.1 * o.1) / d,
            (self.1 * o.0 - self.0 * o.1) / d,
        )
    }
    fn abs(self) -> f64 {
        self.0.hypot(self.1)
    }
}

/// Eigenvalues of a small real matrix: characteristic polynomial by the
/// Faddeev-LeVerrier recursion, roots by the Durand-Kerner (Weierstrass)
/// iteration.
pub fn eigenvalues(a: &[Vec<f64>]) -> Vec<(f64, f64)> {
    let d = a.len();
    // c[k] is the coefficient of lambda^(d - k), c[0] = 1.
    let mut c = vec![0.0; d + 1];
    c[0] = 1.0;
    let mut m = vec![vec![0.0; d]; d];
    for k in 1..=d {
        // M_k = A M_(k-1) + c_(k-1) I; c_k = -tr(A M_k) / k.
        let mut next = vec![vec![0.0; d]; d];
        for i in 0..d {
            for j in 0..d {
                next[i][j] = (0..d).map(|l| a[i][l] * m[l][j]).sum::<f64>()
                    + if i == j { c[k - 1] } else { 0.0 };
            }
        }
        m = next;
        let tr: f64 = (0..d)
            .map(|i| (0..d).map(|l| a[i][l] * m[l][i]).sum::<f64>())
            .sum();
        c[k] = -tr / k as f64;
    }
    let poly = |z: Complex| {
        c.iter().fold(Complex(0.0, 0.0), |acc, &ck| {
            acc.mul(z).add(Complex(ck, 0.0))
        })
    };
    let radius = 1.0 + c.iter().skip(1).fold(0.0f64, |r, v| r.max(v.abs()));
    let mut roots: Vec<Complex> = (0..d)
        .map(|k| {
            let angle = 0.4 + 2.0 * std::f64::consts::PI * k as f64 / d as f64;
            Complex(radius * angle.cos(), radius * angle.sin())
        })
        .collect();
    for _ in 0..2000 {
        let mut change = 0.0f64;
        for i in 0..d {
            let mut denom = Complex(1.0, 0.0);
            for j in 0..d {
                if i != j {
                    denom = denom.mul(roots[i].sub(roots[j]));
                }
            }
            let delta = poly(roots[i]).div(denom);
            roots[i] = roots[i].sub(delta);
            change = change.max(delta.abs() / roots[i].abs().max(1e-300));
        }
        if change < 1e-14 {
            break;
        }
    }
    roots.iter().map(|z| (z.0, z.1)).collect()
}

/// Modes of the linear field dx/dt = A x: oscillatory pairs once, rigid
/// (zero) modes left out, sorted by natural frequency.
fn modes_of(a: &[Vec<f64>]) -> Vec<ModeDamping> {
    let eig = eigenvalues(a);
    let largest = eig.iter().map(|(r, i)| r.hypot(*i)).fold(0.0, f64::max);
    // Imaginary parts below 1e-9 of the largest modulus are rounding: real.
    let mut modes: Vec<ModeDamping> = eig
        .iter()
        .map(|&(r, i)| (r, if i.abs() < 1e-9 * largest { 0.0 } else { i }))
        .filter(|(r, i)| r.hypot(*i) > 1e-3 * largest && *i >= 0.0)
        .map(|(real, imag)| {
            let w = real.hypot(imag);
            ModeDamping {
                real,
                imag,
                natural_hz: w / (2.0 * std::f64::consts::PI),
                damping_ratio: -real / w,
            }
        })
        .collect();
    modes.sort_by(|a, b| a.natural_hz.total_cmp(&b.natural_hz));
    modes
}

/// Modes of a built-in damped or driven system linearized at x = 0 (its
/// rest state): A = (J - R) Hess H, the Hessian by central differences of
/// the exact gradient (steps 1e-6, exact for the quadratic energies of the
/// built-in systems up to rounding).
pub fn reference_modes(system: &dyn ReferenceSystem) -> Vec<ModeDamping> {
    let n = system.dof();
    let d = 2 * n;
    let r = system.dissipation(&vec![0.0; d]);
    let mut hess = vec![vec![0.0; d]; d];
    let (mut gp, mut gm) = (vec![0.0; d], vec![0.0; d]);
    let h = 1e-6;
    for j in 0..d {
        let mut x = vec![0.0; d];
        x[j] = h;
        system.gradient(&x, &mut gp);
        x[j] = -h;
        system.gradient(&x, &mut gm);
        for i in 0..d {
            hess[i][j] = (gp[i] - gm[i]) / (2.0 * h);
        }
    }
    // (J - R)[i][k]: J = [[0, I], [-I, 0]].
    let jr = |i: usize, k: usize| -> f64 {
        let j = if i < n && k == i + n {
            1.0
        } else if i >= n && k + n == i {
            -1.0
        } else {
            0.0
        };
        j - r[i * d + k]
    };
    let a: Vec<Vec<f64>> = (0..d)
        .map(|i| {
            (0..d)
                .map(|c| (0..d).map(|k| jr(i, k) * hess[k][c]).sum())
                .collect()
        })
        .collect();
    modes_of(&a)
}

/// The model's rest state (f(x) = 0 with u = 0, from the centre of the
/// fitted range), its residual relative to the data's RMS rates, and the
/// modes of the linearization there: for a conservative model the
/// oscillatory pairs are +-i omega (small-amplitude frequencies), for a
/// damped one they carry the damping ratio.
pub fn rest_modes(
    model: &HostModel<'_>,
    blob: &crate::deploy::blob::BlobModel,
    data: &Dataset,
) -> Result<(Vec<f64>, f64, Vec<ModeDamping>)> {
    let d = 2 * blob.dof;
    let scale: Vec<f64> = blob.scale.iter().map(|v| *v as f64).collect();
    let rates: Vec<f64> = (0..d)
        .map(|i| {
            let (s, c) = data.trajectories.iter().fold((0.0, 0usize), |(s, c), t| {
                (
                    s + t.dx.column(i).iter().map(|v| v * v).sum::<f64>(),
                    c + t.t.len(),
                )
            });
            (s / c.max(1) as f64).sqrt().max(f64::MIN_POSITIVE)
        })
        .collect();
    // Rest: f(x) = 0, from the centre of the fitted range.
    let mut x: Vec<f64> = blob.offset.iter().map(|v| *v as f64).collect();
    for _ in 0..30 {
        let f = unforced_field(model, &x)?;
        let a = field_jacobian(model, &x, &scale)?;
        let mu = 1e-9 * a.iter().flatten().map(|v| v * v).sum::<f64>();
        let s = lm_step(&a, &f, mu);
        x.iter_mut().zip(&s).for_each(|(v, s)| *v -= s);
    }
    let f = unforced_field(model, &x)?;
    let rest_residual = f
        .iter()
        .zip(&rates)
        .map(|(v, r)| v.abs() / r)
        .fold(0.0, f64::max);
    let a = field_jacobian(model, &x, &scale)?;
    Ok((x, rest_residual, modes_of(&a)))
}

/// Damping per mode at the model's rest state, and driven rollouts of the
/// held-out trajectories with their logged inputs (none for an undriven
/// model).
pub fn check_port(
    model: &HostModel<'_>,
    blob: &crate::deploy::blob::BlobModel,
    data: &Dataset,
) -> Result<PortCheckReport> {
    let (rest, rest_residual, modes) = rest_modes(model, blob, data)?;
    let mut rollouts = Vec::new();
    for traj in &data.trajectories {
        let dt = trajectory_dt(traj);
        let stepped = model
            .with_integrator(integrator_for(model.integrator(), dt))
            .map_err(|e| anyhow!("{e}"))?;
        let u = input_rows(traj);
        let x0: Vec<f32> = traj.x.row(0).iter().map(|v| *v as f32).collect();
        let steps = traj.t.len() - 1;
        let out = crate::deploy::rollout::roll_driven(&stepped, &x0, steps, &u)?;
        rollouts.push(DrivenRollout {
            id: traj.id.clone(),
            state_rel_rmse: driven_rel_rmse(&out.states, traj),
            failure: out.failure.map(|(k, e)| format!("step {k}: {e}")),
            states: out.states,
        });
    }
    Ok(PortCheckReport {
        rest,
        rest_residual,
        modes,
        rollouts,
    })
}
