//! The evidence before deploying: roll the model (through `keel-runtime`,
//! with the blob's integrator) and the plain baseline (RK4 on its vector
//! field) from each validation trajectory's first state, and measure
//! vector-field error, state error over the trajectory, and energy drift over
//! a long horizon — learned energy always, true energy for built-in systems.

use anyhow::{anyhow, Result};
use keel_runtime::{Hamiltonian, Integrator};
use serde::Serialize;

use crate::blob::HostModel;
use crate::dataset::{Dataset, Trajectory};
use crate::hnn::BaselineModel;
use crate::rollout::state_of;
use crate::systems::ReferenceSystem;

/// Check settings.
#[derive(Debug, Clone)]
pub struct CheckSettings {
    /// Long-horizon steps; `None` = 100 small-amplitude periods of a known
    /// system (at most 10^5 steps), else 10^4.
    pub horizon_steps: Option<usize>,
    /// Largest number of points kept per plotted series.
    pub plot_points: usize,
}

impl Default for CheckSettings {
    fn default() -> Self {
        Self {
            horizon_steps: None,
            plot_points: 1500,
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
    /// max |H(t) - H(0)| of the learned energy over the horizon, over the
    /// spread (max - min) of the learned energy on the trajectory's data.
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

fn median(mut v: Vec<f64>) -> f64 {
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
            .clamp(1, keel_runtime::integrate::MAX_SUBSTEPS),
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
    let spread = learned.map(|mdl| {
        let es: Vec<f64> = truth
            .iter()
            .filter_map(|r| {
                let v: Vec<f32> = r.iter().map(|v| *v as f32).collect();
                state_of(&v)
                    .ok()
                    .and_then(|s| mdl.energy(&s).ok())
                    .map(|e| e as f64)
            })
            .collect();
        es.iter().cloned().fold(f64::NEG_INFINITY, f64::max)
            - es.iter().cloned().fold(f64::INFINITY, f64::min)
    });
    let (mut td, mut ld) = (0.0f64, 0.0f64);
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
        energy.push((k as f64 * dt, t.or(l).unwrap_or(f64::NAN)));
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
    m.learned_energy_drift = match (learned, spread) {
        (Some(_), Some(sp)) => Some(if broke {
            f64::INFINITY
        } else {
            ld / sp.max(f64::MIN_POSITIVE)
        }),
        _ => None,
    };
    Run {
        metrics: m,
        phase: decimate(phase, keep),
        energy: decimate(energy, keep),
    }
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
        let horizon = settings.horizon_steps.unwrap_or_else(|| match system {
            Some(s) => ((100.0 * s.small_amplitude_period() / dt).ceil() as usize).min(100_000),
            None => 10_000,
        });
        let stepping = model
            .with_integrator(integrator_for(model.integrator(), dt))
            .map_err(|e| anyhow!("{e}"))?;
        let model_rates: Vec<Vec<f64>> = traj
            .x
            .rows()
            .into_iter()
            .map(|r| {
                let v: Vec<f32> = r.iter().map(|v| *v as f32).collect();
                let s = state_of(&v).expect("state of data dimension");
                let (mut fq, mut fp) = (
                    [0.0f32; crate::blob::HOST_MAX_DOF],
                    [0.0f32; crate::blob::HOST_MAX_DOF],
                );
                let ok = model.vector_field(&s, &mut fq, &mut fp).is_ok();
                let n = data.dof;
                fq[..n]
                    .iter()
                    .chain(&fp[..n])
                    .map(|v| if ok { *v as f64 } else { f64::NAN })
                    .collect()
            })
            .collect();
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
            let rates = traj
                .x
                .rows()
                .into_iter()
                .map(|r| {
                    let v: Vec<f32> = r.iter().map(|v| *v as f32).collect();
                    b.vector_field(&v).into_iter().map(f64::from).collect()
                })
                .collect();
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
        out.push(TrajectoryCheck {
            id: traj.id.clone(),
            samples: traj.t.len(),
            dt,
            horizon_steps: horizon,
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
    Ok(CheckReport {
        integrator: crate::integrator_args::method_name(model.integrator().method).into(),
        system: system.map(|s| s.name().to_string()),
        median_baseline: (!bs.is_empty()).then(|| summarize(&bs)),
        median_model,
        trajectories: out,
    })
}
