//! Joint-rate logs without masses: a linkage's momenta are p = M(q) v with
//! an angle-dependent mass matrix M(q), so stated masses cannot form them.
//! This stage learns M(q) (with the potential and constant input gain and
//! joint friction) from the logged (q, v) alone by the Euler-Lagrange loss
//! of [`crate::learn::inertia_loss`], and turns every trajectory into
//! (q, p = M(q) v) with dp/dt estimated from the new momenta by the log's
//! Savitzky-Golay filter; the energy model is then fitted to those momenta
//! like any other log.
//!
//! Motion alone fixes M and V only up to one common factor. The stated
//! normalization: the mean of M_11 over the training samples is 1 (one
//! unit of coordinate 1's own inertia), unless the user states that mean
//! ([`InertiaSettings::reference_inertia`], e.g. in kg m^2), which makes
//! the momenta and energies physical.

use anyhow::{bail, Result};
use ndarray::{s, Array2};
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde::Serialize;

use crate::data::dataset::{Dataset, Trajectory};
use crate::data::derivative::SavitzkyGolay;
use crate::learn::fit::ArchChoice;
use crate::learn::hnn::{EnergyArch, HnnObjective, HnnWork, Normalization};
use crate::learn::inertia_loss::{Batch, Chunk, InertiaLoss};
use crate::learn::mechanical;
use crate::learn::net::{self, MlpWork};
use crate::learn::optim::{clip_global_norm, Adam, Schedule};

/// Window length in multiples of the velocity's time scale
/// rms(v) / rms(dv/dt) (our own choice: long enough that the momentum
/// change stands above the rate noise, short against a swing).
const WINDOW_TIME_SCALES: f64 = 0.5;
/// Window bounds in steps (our own choice).
const WINDOW_STEPS: (usize, usize) = (2, 32);
/// Samples per chunk, in windows (our own choice).
const CHUNK_WINDOWS: usize = 8;
/// Samples per mini-batch the pipeline uses, whatever the energy fit's
/// batch (our own choice, measured on the double pendulum of
/// `tests/tests/joint_rates.rs`: 300 epochs at 256 samples left M(q) off by
/// 8-31 %, at 64 by 0.9-1.4 %).
pub const BATCH: usize = 64;

/// How to fit the mass matrix.
#[derive(Debug, Clone)]
pub struct InertiaSettings {
    /// The networks (as the energy model's: hidden widths, activation).
    pub arch: ArchChoice,
    /// Passes over the training chunks.
    pub epochs: usize,
    /// Samples per mini-batch (at least one chunk).
    pub batch: usize,
    /// Peak learning rate.
    pub lr: f32,
    /// Seed of the initialization and the shuffling.
    pub seed: u64,
    /// The mean of M_11 over the training samples in physical units, when
    /// known; otherwise 1 (normalization).
    pub reference_inertia: Option<f64>,
}

impl InertiaSettings {
    /// The settings `visviva fit` and `visviva run` use: the energy model's
    /// hidden widths and activation, its epochs, learning rate and seed, and
    /// the stage's own mini-batch ([`BATCH`]).
    pub fn for_fit(
        hidden: &[usize],
        activation: crate::learn::net::Activation,
        (epochs, lr, seed): (usize, f32, u64),
        reference_inertia: Option<f64>,
    ) -> Self {
        Self {
            arch: ArchChoice {
                hidden: hidden.to_vec(),
                activation,
                ..ArchChoice::default()
            },
            epochs,
            batch: BATCH,
            lr,
            seed,
            reference_inertia,
        }
    }
}

/// What the stage found, for the command output and the report.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct InertiaSummary {
    /// Samples per window (steps + 1).
    pub window_samples: usize,
    /// Training epochs.
    pub epochs: usize,
    /// The loss (mean over coordinates of the residual's share of the
    /// momentum change, squared) on the training logs.
    pub train_ratio: f64,
    /// The same on the held-out logs, when there are any.
    pub held_out_ratio: Option<f64>,
    /// The stated mean of M_11, or `None` when normalized to 1.
    pub reference_inertia: Option<f64>,
    /// Range of each M_ii over the training samples.
    pub diagonal_range: Vec<(f64, f64)>,
    /// Largest |M_ij| / sqrt(M_ii M_jj), i != j, over the training samples.
    pub max_coupling: f64,
}

impl InertiaSummary {
    /// The lines `fit` and `run` print.
    pub fn lines(&self) -> Vec<String> {
        let scale = match self.reference_inertia {
            Some(m) => format!("mean M11 = {m:.6} as stated, so momenta and energies are physical"),
            None => "normalized so the mean M11 is 1 (state [data] reference_inertia for \
                     physical momenta and energies)"
                .into(),
        };
        let ranges: Vec<String> = self
            .diagonal_range
            .iter()
            .enumerate()
            .map(|(i, (lo, hi))| format!("M{0}{0} {lo:.4}..{hi:.4}", i + 1))
            .collect();
        vec![
            "joint rates without masses: momenta p = M(q) v from a mass matrix learned \
             from the log (Euler-Lagrange residual over windows of the log)"
                .into(),
            format!(
                "  residual share {:.2e} on the training logs{}; windows of {} samples; {scale}",
                self.train_ratio,
                self.held_out_ratio
                    .map_or(String::new(), |v| format!(", {v:.2e} held out")),
                self.window_samples
            ),
            format!(
                "  over the logged angles: {}; largest coupling |Mij|/sqrt(Mii Mjj) {:.3}",
                ranges.join(", "),
                self.max_coupling
            ),
        ]
    }
}

/// The fitted mass matrix and how it turns rates into momenta.
#[derive(Debug, Clone)]
pub struct InertiaModel {
    loss: InertiaLoss,
    params: Vec<f32>,
    norm: Normalization,
    /// M in stated units = `unit` x es K / (s_v,i s_v,j).
    unit: f64,
    /// What the fit found.
    pub summary: InertiaSummary,
}

/// Fit the mass matrix to `train` (states (q, v) with unit masses), keeping
/// the parameters with the best held-out loss when `val` is given.
pub fn fit_inertia(
    train: &Dataset,
    val: Option<&Dataset>,
    settings: &InertiaSettings,
) -> Result<InertiaModel> {
    let n = train.dof;
    let norm = Normalization::from_data(train, true)?;
    let arch = ArchChoice {
        mechanical: true,
        separable: false,
        ..settings.arch.clone()
    }
    .build(n)?;
    let window = window_samples(train, &norm);
    let input_scale = input_scales(train);
    let loss = InertiaLoss {
        objective: HnnObjective::new(n, arch.clone(), &norm),
        rate_gain: (0..n).map(|i| norm.scale[n + i] / norm.scale[i]).collect(),
        window,
        inputs: train.inputs,
    };
    let train_batches = training_batches(train, &norm, &input_scale, window, settings.batch)?;
    let held_out = match val {
        Some(v) if !v.trajectories.is_empty() => {
            Some(batches(v, &norm, &input_scale, window, settings.batch))
        }
        _ => None,
    };
    let mut params = arch.init(n, settings.seed);
    params.extend(std::iter::repeat_n(0.0, n * (train.inputs + 1)));
    let (params, train_ratio, held_out_ratio) =
        optimize(&loss, params, &train_batches, held_out.as_deref(), settings)?;
    let mut model = InertiaModel {
        loss,
        params,
        norm,
        unit: 1.0,
        summary: InertiaSummary {
            window_samples: window,
            epochs: settings.epochs,
            train_ratio,
            held_out_ratio,
            reference_inertia: settings.reference_inertia,
            diagonal_range: Vec::new(),
            max_coupling: 0.0,
        },
    };
    model.state_the_scale(train, settings.reference_inertia)?;
    Ok(model)
}

/// Samples per window from the velocity's time scale (see the constants).
fn window_samples(train: &Dataset, norm: &Normalization) -> usize {
    let n = train.dof;
    let tau = (0..n)
        .map(|i| (norm.scale[n + i] / norm.rate_scale[n + i]) as f64)
        .fold(f64::INFINITY, f64::min);
    let dt = median_step(train);
    let steps = (WINDOW_TIME_SCALES * tau / dt).round();
    let steps = if steps.is_finite() {
        steps as usize
    } else {
        WINDOW_STEPS.0
    };
    steps.clamp(WINDOW_STEPS.0, WINDOW_STEPS.1) + 1
}

/// The median sampling step over every trajectory.
fn median_step(ds: &Dataset) -> f64 {
    let mut steps: Vec<f64> = ds
        .trajectories
        .iter()
        .flat_map(|t| t.t.windows(2).map(|w| w[1] - w[0]))
        .collect();
    if steps.is_empty() {
        return 1.0;
    }
    steps.sort_by(f64::total_cmp);
    steps[steps.len() / 2]
}

/// RMS of each input (1 when an input never moves).
fn input_scales(ds: &Dataset) -> Vec<f32> {
    (0..ds.inputs)
        .map(|j| {
            let (sum, count) = ds.trajectories.iter().fold((0.0f64, 0usize), |acc, t| {
                let c = t.u.column(j);
                (
                    acc.0 + c.iter().map(|v| v * v).sum::<f64>(),
                    acc.1 + c.len(),
                )
            });
            let rms = (sum / count.max(1) as f64).sqrt();
            if rms > 0.0 {
                rms as f32
            } else {
                1.0
            }
        })
        .collect()
}

/// The training mini-batches; an error when no trajectory holds one
/// window.
fn training_batches(
    ds: &Dataset,
    norm: &Normalization,
    us: &[f32],
    window: usize,
    rows: usize,
) -> Result<Vec<Batch>> {
    let out = batches(ds, norm, us, window, rows);
    if out.is_empty() {
        bail!(
            "learning the mass matrix needs trajectories of at least {window} samples \
             (one window); none is that long"
        );
    }
    Ok(out)
}

/// Chunks of `CHUNK_WINDOWS` windows (overlapping by one window less one
/// sample, so every window lies in exactly one chunk), stacked into
/// mini-batches of at least `rows` samples.
fn batches(
    ds: &Dataset,
    norm: &Normalization,
    us: &[f32],
    window: usize,
    rows: usize,
) -> Vec<Batch> {
    let len = window * CHUNK_WINDOWS;
    let stride = len - (window - 1);
    let mut out = Vec::new();
    let mut pending: Vec<Chunk> = Vec::new();
    let mut filled = 0;
    for t in &ds.trajectories {
        let samples = t.t.len();
        let mut start = 0;
        while start + window <= samples {
            let end = (start + len).min(samples);
            let c = chunk(t, norm, us, start..end);
            filled += c.z.nrows();
            pending.push(c);
            if filled >= rows.max(1) {
                out.push(Batch::of(&pending.iter().collect::<Vec<_>>()));
                (pending, filled) = (Vec::new(), 0);
            }
            start += stride;
        }
    }
    if !pending.is_empty() {
        out.push(Batch::of(&pending.iter().collect::<Vec<_>>()));
    }
    out
}

/// One chunk: normalized states and inputs, and the steps.
fn chunk(t: &Trajectory, norm: &Normalization, us: &[f32], rows: std::ops::Range<usize>) -> Chunk {
    let d = t.x.ncols();
    let z = Array2::from_shape_fn((rows.len(), d), |(k, i)| {
        ((t.x[[rows.start + k, i]] - norm.offset[i] as f64) / norm.scale[i] as f64) as f32
    });
    let u = Array2::from_shape_fn((rows.len(), us.len()), |(k, j)| {
        (t.u[[rows.start + k, j]] / us[j] as f64) as f32
    });
    let h = rows
        .clone()
        .map(|k| {
            if k == 0 {
                0.0
            } else {
                (t.t[k] - t.t[k - 1]) as f32
            }
        })
        .collect();
    Chunk { z, u, h }
}

/// Adam over shuffled mini-batches of chunks; the parameters with the best
/// held-out loss (or the last ones), their training and held-out losses.
fn optimize(
    loss: &InertiaLoss,
    mut params: Vec<f32>,
    train: &[Batch],
    held_out: Option<&[Batch]>,
    settings: &InertiaSettings,
) -> Result<(Vec<f32>, f64, Option<f64>)> {
    let total = settings.epochs.max(1) * train.len();
    let schedule = Schedule {
        peak: settings.lr,
        warmup: (total / 50).max(1),
        total,
        floor: 0.01,
    };
    let mut adam = Adam::new(params.len());
    let mut rng = ChaCha8Rng::seed_from_u64(settings.seed ^ 0x1e7a);
    let mut work = HnnWork::default();
    let mut grad = vec![0.0f32; params.len()];
    let mut best = (f64::INFINITY, params.clone());
    let mut order: Vec<usize> = (0..train.len()).collect();
    let mut step = 0;
    for _ in 0..settings.epochs.max(1) {
        order.shuffle(&mut rng);
        for &b in &order {
            grad.fill(0.0);
            let l = loss.loss(&params, &train[b], &mut work, Some(&mut grad));
            if !l.is_finite() {
                bail!("learning the mass matrix diverged (loss {l}) at step {step}");
            }
            clip_global_norm(&mut grad, 10.0);
            adam.step(&mut params, &grad, schedule.rate(step));
            step += 1;
        }
        if let Some(v) = held_out {
            let l = mean_loss(loss, &params, v, &mut work);
            if l < best.0 {
                best = (l, params.clone());
            }
        }
    }
    let params = if held_out.is_some() { best.1 } else { params };
    let train_ratio = mean_loss(loss, &params, train, &mut work);
    let held = held_out.map(|v| mean_loss(loss, &params, v, &mut work));
    Ok((params, train_ratio, held))
}

/// The loss over all `batches`: sum |r|^2 over sum |dp|^2 of them all.
fn mean_loss(loss: &InertiaLoss, params: &[f32], batches: &[Batch], work: &mut HnnWork) -> f64 {
    let (num, den) = batches.iter().fold((0.0, 0.0), |acc, b| {
        let (n, d) = loss.sums_of(params, b, work);
        (acc.0 + n, acc.1 + d)
    });
    num / den.max(1e-30)
}

impl InertiaModel {
    /// M(q) in stated units at the positions `q` (rows x n).
    pub fn mass_matrices(&self, q: &Array2<f64>) -> Vec<Array2<f64>> {
        let n = self.loss.objective.dof;
        let EnergyArch::Mechanical { potential, factor } = &self.loss.objective.arch else {
            unreachable!("the inertia stage builds the mechanical structure")
        };
        let np = potential.param_count();
        let pf = &self.params[np..np + factor.param_count()];
        let zq = Array2::from_shape_fn((q.nrows(), n), |(k, i)| {
            ((q[[k, i]] - self.norm.offset[i] as f64) / self.norm.scale[i] as f64) as f32
        });
        let mut work = MlpWork::default();
        net::forward(factor, pf, zq.view(), &mut work);
        let es = self.norm.energy_scale as f64;
        let sv = |i: usize| self.norm.scale[n + i] as f64;
        work.output()
            .rows()
            .into_iter()
            .map(|raw| {
                let k = mechanical::inverse_mass(raw, n);
                Array2::from_shape_fn((n, n), |(i, j)| {
                    self.unit * es * k[[i, j]] / (sv(i) * sv(j))
                })
            })
            .collect()
    }

    /// Fix the common factor (see the module doc) and record the ranges.
    fn state_the_scale(&mut self, train: &Dataset, reference: Option<f64>) -> Result<()> {
        let all: Vec<Array2<f64>> = train
            .trajectories
            .iter()
            .flat_map(|t| self.mass_matrices(&t.x.slice(s![.., ..train.dof]).to_owned()))
            .collect();
        let mean11 = all.iter().map(|m| m[[0, 0]]).sum::<f64>() / all.len().max(1) as f64;
        if !(mean11.is_finite() && mean11 > 0.0) {
            bail!("the learned mass matrix has no usable scale (mean M11 {mean11})");
        }
        let factor = reference.unwrap_or(1.0) / mean11;
        self.unit = factor;
        let scaled = all.iter().map(|m| m * factor);
        self.summary.diagonal_range = vec![(f64::INFINITY, f64::NEG_INFINITY); train.dof];
        for m in scaled {
            for i in 0..train.dof {
                let r = &mut self.summary.diagonal_range[i];
                *r = (r.0.min(m[[i, i]]), r.1.max(m[[i, i]]));
                for j in 0..i {
                    let c = m[[i, j]].abs() / (m[[i, i]] * m[[j, j]]).sqrt();
                    self.summary.max_coupling = self.summary.max_coupling.max(c);
                }
            }
        }
        Ok(())
    }

    /// `ds` (states (q, v)) with momenta p = M(q) v and dp/dt estimated
    /// from them by `filter`.
    pub fn with_momenta(&self, ds: &Dataset, filter: &SavitzkyGolay) -> Result<Dataset> {
        let n = ds.dof;
        crate::data::rates::with_momenta(ds, filter, |t| {
            let masses = self.mass_matrices(&t.x.slice(s![.., ..n]).to_owned());
            let mut p = Array2::zeros((t.x.nrows(), n));
            for (k, m) in masses.iter().enumerate() {
                p.row_mut(k).assign(&m.dot(&t.x.slice(s![k, n..])));
            }
            Ok(p)
        })
    }
}

/// A joint-rate log without masses made ready for the energy fit: the mass
/// matrix fitted to `train` (best on `val`), both turned into momenta.
pub fn momenta_from_rates(
    train: &Dataset,
    val: Option<&Dataset>,
    settings: &InertiaSettings,
    filter: &SavitzkyGolay,
) -> Result<(Dataset, Option<Dataset>, InertiaSummary)> {
    let model = fit_inertia(train, val, settings)?;
    let train = model.with_momenta(train, filter)?;
    let val = val.map(|v| model.with_momenta(v, filter)).transpose()?;
    Ok((train, val, model.summary))
}
