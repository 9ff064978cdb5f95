//! Fitting by trajectory matching (multiple shooting): the training
//! trajectories cut into windows of K log steps, each window's initial state
//! fitted alongside the energy (initialized from the logged position and the
//! estimated momentum), the model rolled out over every window with the
//! device's integrator ([`crate::learn::rollout_loss`]) and its positions
//! compared with the log. Starts from a derivative-matching fit (warm
//! start); stops on a plateau test ([`Plateau`]).
//!
//! The energy scale is not identifiable from positions: V and M scaled by
//! the same factor give the same motion. It is fixed by holding coordinate
//! 1's inverse mass at 1 / m1 (a known mass or inertia, or 1 by
//! normalization), i.e. L_11 is not trained.

use std::sync::atomic::Ordering;
use std::time::Instant;

use anyhow::{bail, Result};
use ndarray::Array2;
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use visviva_runtime::Method;

use crate::data::dataset::Dataset;
use crate::learn::fit::{FitSettings, Fitted, History, StopReason, TrainReport};
use crate::learn::hnn::EnergyModel;
use crate::learn::optim::{clip_global_norm, Adam, Schedule};
use crate::learn::rollout_loss::{RolloutGradient, RolloutLoss, WindowBatch};

/// The plateau test: stop when the best validation loss improved by less
/// than `min_relative` of itself over the last `epochs` epochs.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Plateau {
    /// Epochs compared.
    pub epochs: usize,
    /// Smallest relative improvement that counts.
    pub min_relative: f64,
}

impl Plateau {
    /// Scaled to the problem: over a tenth of the run (at least 5 epochs),
    /// and an improvement must exceed the validation loss's own sampling
    /// spread, sqrt(2 / N) relative for N squared residuals (the relative
    /// standard deviation of a chi-square variable with N degrees of
    /// freedom; textbook), at least 1e-4.
    pub fn scaled(epochs: usize, residuals: usize) -> Self {
        Self {
            epochs: (epochs / 10).max(5),
            min_relative: (2.0 / residuals.max(1) as f64).sqrt().max(1e-4),
        }
    }

    /// Whether `best` (best-so-far loss per epoch) has reached a plateau.
    pub fn reached(&self, best: &[f64]) -> Option<f64> {
        let e = best.len();
        if e <= self.epochs {
            return None;
        }
        let (old, now) = (best[e - 1 - self.epochs], best[e - 1]);
        let gain = (old - now) / old.abs().max(1e-300);
        (gain < self.min_relative).then_some(gain)
    }
}

/// Settings of trajectory matching.
#[derive(Debug, Clone)]
pub struct TrajectorySettings {
    /// Log steps per window (K).
    pub window_steps: usize,
    /// Windows per optimizer step.
    pub windows_per_batch: usize,
    /// The device's method (verlet or yoshida4).
    pub method: Method,
    /// The log's sampling step (s).
    pub dt: f64,
    /// Noise standard deviation per coordinate (SI units).
    pub sigma: Vec<f64>,
    /// Mass (or inertia) of coordinate 1 fixing the energy scale; `None`
    /// keeps the warm start's (a log with velocities or momenta fixes it).
    pub mass1: Option<f64>,
}

/// Windows of one data set: logged positions (K + 1 rows x n each) and
/// initial states (q logged, p as in the data set).
pub struct Windows {
    y: Vec<Array2<f64>>,
    x0: Vec<Vec<f64>>,
}

impl Windows {
    /// Consecutive windows of `k` steps (sharing end samples) of every
    /// trajectory; a trajectory's tail shorter than a window is left out.
    pub fn cut(ds: &Dataset, k: usize) -> Self {
        let n = ds.dof;
        let (mut y, mut x0) = (Vec::new(), Vec::new());
        for t in &ds.trajectories {
            let mut start = 0;
            while start + k < t.t.len() {
                y.push(t.x.slice(ndarray::s![start..=start + k, ..n]).to_owned());
                x0.push(t.x.row(start).to_vec());
                start += k;
            }
        }
        Self { y, x0 }
    }

    /// Number of windows.
    pub fn len(&self) -> usize {
        self.y.len()
    }

    /// Whether there are none.
    pub fn is_empty(&self) -> bool {
        self.y.is_empty()
    }

    /// The windows `idx` with initial states `x0` (one per index).
    fn batch(&self, idx: &[usize], x0: &[Vec<f64>]) -> WindowBatch {
        let n = self.y[0].ncols();
        let k = self.y[0].nrows();
        let y = (0..k)
            .map(|s| Array2::from_shape_fn((idx.len(), n), |(b, i)| self.y[idx[b]][[s, i]]))
            .collect();
        let d = x0[0].len();
        WindowBatch {
            y,
            x0: Array2::from_shape_fn((idx.len(), d), |(b, i)| x0[idx[b]][i]),
        }
    }

    /// Mean loss over every window from `x0`, in chunks.
    fn mean_loss(&self, loss: &RolloutLoss, params: &[f32], x0: &[Vec<f64>]) -> f64 {
        let all: Vec<usize> = (0..self.len()).collect();
        let mut total = 0.0;
        for chunk in all.chunks(256) {
            total += loss.loss(params, &self.batch(chunk, x0), None) * chunk.len() as f64;
        }
        total / self.len().max(1) as f64
    }
}

/// Adam over the window states, updating only the windows of a batch.
struct StateOptimizer {
    m: Vec<Vec<f64>>,
    v: Vec<Vec<f64>>,
    t: Vec<i32>,
}

impl StateOptimizer {
    fn new(count: usize, d: usize) -> Self {
        Self {
            m: vec![vec![0.0; d]; count],
            v: vec![vec![0.0; d]; count],
            t: vec![0; count],
        }
    }

    /// One Adam step (Kingma & Ba 2015) of window `w`'s normalized state.
    fn step(&mut self, w: usize, state: &mut [f64], grad: &[f64], lr: f64) {
        let (b1, b2) = (0.9f64, 0.999f64);
        self.t[w] += 1;
        let (c1, c2) = (1.0 - b1.powi(self.t[w]), 1.0 - b2.powi(self.t[w]));
        for i in 0..state.len() {
            let (m, v) = (&mut self.m[w][i], &mut self.v[w][i]);
            *m = b1 * *m + (1.0 - b1) * grad[i];
            *v = b2 * *v + (1.0 - b2) * grad[i] * grad[i];
            state[i] -= lr * (*m / c1) / ((*v / c2).sqrt() + 1e-8);
        }
    }
}

/// Fix the energy scale: coordinate 1's inverse mass becomes 1 / `mass1`
/// (L_11 = s_p1 / sqrt(es m1)), or stays the warm start's without one;
/// returns the index of the frozen parameter.
fn fix_energy_scale(model: &mut EnergyModel, mass1: Option<f64>) -> Result<usize> {
    let n = model.dof;
    let index = model.params.len() - n * (n + 1) / 2;
    let Some(mass1) = mass1 else {
        return Ok(index);
    };
    if !(mass1.is_finite() && mass1 > 0.0) {
        bail!("the mass fixing the energy scale must be finite and positive, got {mass1}");
    }
    let es = model.norm.energy_scale as f64;
    let sp = model.norm.scale[n] as f64;
    model.params[index] = (sp / (es * mass1).sqrt()).ln() as f32;
    Ok(index)
}

/// The running state of one trajectory fit.
struct Run<'a> {
    loss: &'a RolloutLoss,
    train: Windows,
    states: Vec<Vec<f64>>,
    scale: Vec<f64>,
    offset: Vec<f64>,
    adam: Adam,
    state_adam: StateOptimizer,
    frozen: usize,
}

impl Run<'_> {
    /// Physical initial states from the normalized ones.
    fn physical(&self) -> Vec<Vec<f64>> {
        self.states
            .iter()
            .map(|s| {
                s.iter()
                    .zip(self.scale.iter().zip(&self.offset))
                    .map(|(v, (sc, off))| v * sc + off)
                    .collect()
            })
            .collect()
    }

    /// One optimizer step on the windows `idx`; the batch loss.
    fn step(&mut self, params: &mut [f32], idx: &[usize], lr: f32, clip: f32) -> f64 {
        let x0 = self.physical();
        let batch = self.train.batch(idx, &x0);
        let mut g = RolloutGradient {
            params: Vec::new(),
            x0: Array2::zeros((0, 0)),
        };
        let value = self.loss.loss(params, &batch, Some(&mut g));
        let mut gp: Vec<f32> = g.params.iter().map(|v| *v as f32).collect();
        gp[self.frozen] = 0.0;
        let norm = clip_global_norm(&mut gp, clip);
        if !(value.is_finite() && norm.is_finite()) {
            return f64::NAN;
        }
        self.adam.step(params, &gp, lr);
        for (b, &w) in idx.iter().enumerate() {
            let grad: Vec<f64> = (0..self.scale.len())
                .map(|i| g.x0[[b, i]] * self.scale[i])
                .collect();
            self.state_adam
                .step(w, &mut self.states[w], &grad, lr as f64);
        }
        value
    }
}

/// Fit `warm` (a derivative-matching fit of the same structure) by
/// trajectory matching on `train`, stopping on `val` (or the training
/// windows) by the plateau test.
pub fn fit_trajectory(
    train: &Dataset,
    val: Option<&Dataset>,
    warm: EnergyModel,
    ts: &TrajectorySettings,
    s: &FitSettings,
) -> Result<Fitted<EnergyModel>> {
    if warm.port.is_some() || train.driven() {
        bail!(
            "trajectory matching fits conservative models only (no dissipation, no inputs); \
             use fit mode derivative for damped or driven rigs"
        );
    }
    if ts.window_steps == 0 || ts.windows_per_batch == 0 {
        bail!("window steps and windows per batch must be at least 1");
    }
    let mut model = warm;
    let frozen = fix_energy_scale(&mut model, ts.mass1)?;
    let loss = RolloutLoss::new(
        model.dof,
        &model.arch,
        &model.norm,
        ts.method,
        ts.dt,
        ts.sigma.clone(),
    )?;
    let windows = Windows::cut(train, ts.window_steps);
    if windows.is_empty() {
        bail!(
            "no training trajectory is longer than one window of {} steps",
            ts.window_steps
        );
    }
    let validation = val.map(|v| Windows::cut(v, ts.window_steps));
    let setup = Setup {
        windows,
        validation,
        frozen,
        batch: ts.windows_per_batch,
    };
    let (params, report) = optimize(&loss, model.clone(), setup, s)?;
    model.params = params;
    Ok(Fitted { model, report })
}

/// The windows and the frozen parameter of one fit.
struct Setup {
    windows: Windows,
    validation: Option<Windows>,
    frozen: usize,
    batch: usize,
}

/// The loop: epochs of shuffled window batches, Adam with warm-up and
/// cosine decay, best parameters kept, plateau test.
fn optimize(
    loss: &RolloutLoss,
    model: EnergyModel,
    setup: Setup,
    s: &FitSettings,
) -> Result<(Vec<f32>, TrainReport)> {
    let Setup {
        windows,
        validation,
        frozen,
        batch,
    } = setup;
    let n = model.dof;
    let scale: Vec<f64> = model.norm.scale.iter().map(|v| *v as f64).collect();
    let mut offset: Vec<f64> = model.norm.offset.iter().map(|v| *v as f64).collect();
    offset[n..].iter_mut().for_each(|v| *v = 0.0);
    let states = windows
        .x0
        .iter()
        .map(|x| (0..2 * n).map(|i| (x[i] - offset[i]) / scale[i]).collect())
        .collect();
    let count = windows.len();
    let batch = batch.clamp(1, count);
    let per_epoch = count.div_ceil(batch);
    let total = s.steps.unwrap_or(s.epochs * per_epoch).max(1);
    let schedule = Schedule {
        peak: s.lr,
        warmup: ((total as f32 * s.warmup_fraction) as usize).max(1),
        total,
        floor: s.lr_floor,
    };
    let val_windows = validation.as_ref().filter(|v| !v.is_empty());
    let residuals = windows.len() * windows.y[0].nrows() * n;
    let plateau = Plateau::scaled(total.div_ceil(per_epoch), residuals);
    let mut run = Run {
        loss,
        adam: Adam::new(model.params.len()),
        state_adam: StateOptimizer::new(count, 2 * n),
        train: windows,
        states,
        scale,
        offset,
        frozen,
    };
    let mut params = model.params.clone();
    let mut rng = ChaCha8Rng::seed_from_u64(s.seed ^ 0x5bd1_e995_7f4a_7c15);
    let mut order: Vec<usize> = (0..count).collect();
    let (mut history, mut best_curve) = (History::default(), Vec::new());
    let (mut best, mut best_val, mut best_epoch) = (params.clone(), f64::INFINITY, None);
    let (mut step, mut stop) = (0usize, StopReason::Completed);
    let start = Instant::now();
    'epochs: for epoch in 0..total.div_ceil(per_epoch) {
        order.shuffle(&mut rng);
        let mut batches = 0;
        for idx in order.chunks(batch) {
            if step >= total {
                break;
            }
            if s.interrupt
                .as_ref()
                .is_some_and(|f| f.load(Ordering::SeqCst))
            {
                stop = StopReason::Interrupted;
                break 'epochs;
            }
            let before = params.clone();
            let v = run.step(&mut params, idx, schedule.rate(step), s.clip);
            if !v.is_finite() {
                params = before;
                stop = StopReason::NonFinite { step };
                break 'epochs;
            }
            batches += 1;
            step += 1;
        }
        if batches == 0 {
            break;
        }
        // Validation windows start from estimated states, whose error
        // dominates a short window, so the kept parameters and the plateau
        // test follow the training windows from their fitted states; the
        // validation loss is recorded beside it.
        let train_loss = run.train.mean_loss(loss, &params, &run.physical());
        let val_loss = match val_windows {
            Some(v) => v.mean_loss(loss, &params, &v.x0),
            None => train_loss,
        };
        history.train.push(train_loss);
        history.val.push(val_loss);
        if train_loss < best_val {
            (best_val, best_epoch) = (train_loss, Some(epoch));
            best.clone_from(&params);
        }
        best_curve.push(best_val);
        if let Some(gain) = plateau.reached(&best_curve) {
            stop = StopReason::Plateau {
                epochs: plateau.epochs,
                gain,
                threshold: plateau.min_relative,
            };
            break;
        }
    }
    let kept = if best_epoch.is_some() { best } else { params };
    let report = TrainReport {
        history,
        stop,
        steps: step,
        batch,
        seconds: start.elapsed().as_secs_f64(),
        best_epoch,
        best_val,
    };
    Ok((kept, report))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn plateau_needs_a_full_window_and_a_small_gain() {
        let p = Plateau {
            epochs: 2,
            min_relative: 0.01,
        };
        assert_eq!(p.reached(&[1.0, 0.5]), None);
        assert_eq!(p.reached(&[1.0, 0.5, 0.4]), None);
        assert!(p.reached(&[1.0, 0.5, 0.5, 0.499]).is_some());
        let scaled = Plateau::scaled(300, 20_000);
        assert_eq!(scaled.epochs, 30);
        assert!((scaled.min_relative - 0.01).abs() < 1e-12);
    }
}
