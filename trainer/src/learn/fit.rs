//! The training loop: seeded minibatches, Adam with warm-up and cosine decay,
//! gradient clipping, early stopping on the validation loss (best parameters
//! kept), optional threads with a fixed batch partition and a fixed reduction
//! order (so a seed gives a bit-identical model for a given thread count),
//! a progress bar, Ctrl-C and non-finite-loss handling, and the loss history.

use std::io::IsTerminal;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::Instant;

use anyhow::{bail, Result};
use indicatif::{ProgressBar, ProgressStyle};
use ndarray::{s, Array2};
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use crate::data::dataset::Dataset;
use crate::learn::hnn::{
    BaselineModel, BaselineObjective, EnergyArch, EnergyModel, HnnObjective, KineticArch,
    Normalization, Objective, PortArch, PortModel, PortObjective,
};
use crate::learn::net::{Activation, MlpShape};
use crate::learn::pool::{with_pool, Pool, PoolSize, Rows};
use crate::learn::rows::{ArraySource, LogRows, RowSource};

/// Settings of one training run.
#[derive(Debug, Clone)]
pub struct FitSettings {
    /// Passes over the training data (ignored when `steps` is set).
    pub epochs: usize,
    /// Optimizer steps in total; overrides `epochs` when set.
    pub steps: Option<usize>,
    /// Samples per minibatch.
    pub batch: usize,
    /// Peak learning rate.
    pub lr: f32,
    /// Warm-up as a fraction of all steps.
    pub warmup_fraction: f32,
    /// Final learning rate as a fraction of the peak.
    pub lr_floor: f32,
    /// Gradient global-norm limit.
    pub clip: f32,
    /// Worker threads for the loss and gradient (1 = none).
    pub threads: usize,
    /// Stop when the validation loss has not improved for `patience` epochs.
    pub early_stop: bool,
    /// Epochs without improvement before stopping.
    pub patience: usize,
    /// Seed for initialization and shuffling.
    pub seed: u64,
    /// Hide the progress bar.
    pub quiet: bool,
    /// When set by another thread (Ctrl-C), stop and keep the best so far.
    pub interrupt: Option<Arc<AtomicBool>>,
}

impl Default for FitSettings {
    fn default() -> Self {
        Self {
            epochs: 300,
            steps: None,
            batch: 256,
            lr: 3e-3,
            warmup_fraction: 0.02,
            lr_floor: 0.01,
            clip: 10.0,
            threads: 1,
            early_stop: true,
            patience: 60,
            seed: 0,
            quiet: false,
            interrupt: None,
        }
    }
}

/// The structure of an energy model, as chosen on the command line.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ArchChoice {
    /// Separable E = V(q) + T(p), or general E(q, p).
    pub separable: bool,
    /// For separable models: quadratic T (learned inverse mass) or a network.
    pub quadratic_kinetic: bool,
    /// Mechanical E = V(q) + 1/2 p^T M(q)^-1 p with M(q)^-1 = L(q) L(q)^T +
    /// eps I (`separable` is then false).
    pub mechanical: bool,
    /// Hidden-layer widths.
    pub hidden: Vec<usize>,
    /// Hidden-layer activation.
    pub activation: Activation,
}

impl Default for ArchChoice {
    /// Separable with a quadratic kinetic term, 64-64 tanh: exact for a
    /// kinetic energy quadratic in p with a constant mass matrix (every
    /// built-in system but the linkages, `double-pendulum` and `crane-cart`),
    /// the fewest parameters, stepped by explicit Stormer-Verlet on the
    /// device. The library's default; `visviva fit` and projects default to
    /// `arch = "auto"`, which tries the others too.
    fn default() -> Self {
        Self {
            separable: true,
            quadratic_kinetic: true,
            mechanical: false,
            hidden: vec![64, 64],
            activation: Activation::Tanh,
        }
    }
}

impl ArchChoice {
    /// The network structure for `dof` degrees of freedom.
    pub fn build(&self, dof: usize) -> Result<EnergyArch> {
        if self.hidden.len() + 1 > visviva_runtime::format::MAX_LAYERS {
            bail!(
                "{} hidden layers give {} layers; the runtime allows at most {}",
                self.hidden.len(),
                self.hidden.len() + 1,
                visviva_runtime::format::MAX_LAYERS
            );
        }
        if let Some(w) = self.hidden.iter().find(|w| **w == 0 || **w > 128) {
            bail!("hidden width {w} is outside 1..=128 (the runtime's widest layer)");
        }
        if 2 * dof > 128 {
            bail!("{dof} degrees of freedom is more than the runtime supports");
        }
        let a = self.activation;
        let factor_outputs = dof * (dof + 1) / 2;
        if self.mechanical && factor_outputs > 128 {
            bail!(
                "a mechanical model of {dof} degrees of freedom needs {factor_outputs} mass-factor \
                 outputs; the runtime's widest layer is 128"
            );
        }
        Ok(if self.mechanical {
            EnergyArch::Mechanical {
                potential: MlpShape::new(dof, &self.hidden, 1, a),
                factor: MlpShape::new(dof, &self.hidden, factor_outputs, a),
            }
        } else if self.separable {
            EnergyArch::Separable {
                potential: MlpShape::new(dof, &self.hidden, 1, a),
                kinetic: if self.quadratic_kinetic {
                    KineticArch::Quadratic
                } else {
                    KineticArch::Network(MlpShape::new(dof, &self.hidden, 1, a))
                },
            }
        } else {
            EnergyArch::General(MlpShape::new(2 * dof, &self.hidden, 1, a))
        })
    }
}

/// Why training ended.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum StopReason {
    /// All epochs or steps done.
    Completed,
    /// No validation improvement for `patience` epochs.
    EarlyStopped,
    /// The plateau test: over the last `epochs` epochs the best validation
    /// loss improved by `gain` (relative), less than `threshold`.
    Plateau {
        /// Epochs compared.
        epochs: usize,
        /// Relative improvement over them.
        gain: f64,
        /// Smallest relative improvement that counts.
        threshold: f64,
    },
    /// Interrupted (Ctrl-C).
    Interrupted,
    /// The loss or gradient became NaN or infinite at this step.
    NonFinite {
        /// The 0-based optimizer step.
        step: usize,
    },
}

/// Loss per epoch, for plots.
#[derive(Debug, Clone, Default, PartialEq, serde::Serialize)]
pub struct History {
    /// Mean minibatch training loss of each epoch.
    pub train: Vec<f64>,
    /// Validation loss after each epoch (training loss when there is no
    /// validation set).
    pub val: Vec<f64>,
}

/// What a run did.
#[derive(Debug, Clone)]
pub struct TrainReport {
    /// Loss history.
    pub history: History,
    /// Why it ended.
    pub stop: StopReason,
    /// Optimizer steps taken.
    pub steps: usize,
    /// Samples per step.
    pub batch: usize,
    /// Wall time of the loop in seconds.
    pub seconds: f64,
    /// Epoch (0-based) whose parameters were kept, if any finished.
    pub best_epoch: Option<usize>,
    /// The kept parameters' validation loss.
    pub best_val: f64,
}

impl TrainReport {
    /// Training throughput: steps x batch / wall time.
    pub fn samples_per_second(&self) -> f64 {
        (self.steps * self.batch) as f64 / self.seconds.max(1e-9)
    }
}

/// A fitted model and how it was fitted.
#[derive(Debug, Clone)]
pub struct Fitted<M> {
    /// The model.
    pub model: M,
    /// The run.
    pub report: TrainReport,
}

/// Fit an energy model of structure `arch` to `train`, stopping early on
/// `val` (or on the training loss when `val` is `None`): the one fit entry.
/// A conservative model is the special case without port terms: when
/// `terms` asks for no dissipation and the data carry no inputs, the model
/// is H alone; otherwise it is the damped and/or driven model of
/// [`PortObjective`], with `terms.inputs` taken from the data.
pub fn fit_model(
    train: &Dataset,
    val: Option<&Dataset>,
    arch: &EnergyArch,
    terms: &PortArch,
    settings: &FitSettings,
) -> Result<Fitted<EnergyModel>> {
    if let Some(v) = val {
        check_matching(train, v)?;
    }
    if terms.dissipation || train.driven() {
        fit_port(train, val, arch, terms, settings)
    } else {
        fit_conservative(train, val, arch, settings)
    }
}

/// Validation data must have the training data's degrees of freedom and
/// inputs.
fn check_matching(train: &Dataset, val: &Dataset) -> Result<()> {
    if val.dof != train.dof {
        bail!(
            "validation data has {} degrees of freedom, training data {}",
            val.dof,
            train.dof
        );
    }
    if val.inputs != train.inputs {
        bail!(
            "the training data has {} input columns; the validation data has {}",
            train.inputs,
            val.inputs
        );
    }
    Ok(())
}

/// Whether the kinetic energy is quadratic in p (constant or q-dependent
/// mass): its minimum must then sit at p = 0, so momenta are not centred.
fn quadratic_kinetic(arch: &EnergyArch) -> bool {
    matches!(
        arch,
        EnergyArch::Separable {
            kinetic: KineticArch::Quadratic,
            ..
        } | EnergyArch::Mechanical { .. }
    )
}

/// H alone (no R, no G).
fn fit_conservative(
    train: &Dataset,
    val: Option<&Dataset>,
    arch: &EnergyArch,
    settings: &FitSettings,
) -> Result<Fitted<EnergyModel>> {
    let norm = Normalization::from_data(train, quadratic_kinetic(arch))?;
    let obj = HnnObjective::new(train.dof, arch.clone(), &norm);
    let init = arch.init(train.dof, settings.seed);
    let (params, report) = run(&obj, init, &norm, train, val, settings)?;
    Ok(Fitted {
        model: EnergyModel {
            dof: train.dof,
            arch: arch.clone(),
            norm,
            params,
            port: None,
        },
        report,
    })
}

/// RMS of each input over all trajectories (1 where it is zero); empty
/// without inputs.
pub fn input_scales(ds: &Dataset) -> Vec<f32> {
    (0..ds.inputs)
        .map(|k| {
            let (sq, count) = ds.trajectories.iter().fold((0.0f64, 0usize), |(s, c), t| {
                (
                    s + t.u.column(k).iter().map(|v| v * v).sum::<f64>(),
                    c + t.u.nrows(),
                )
            });
            let rms = (sq / count.max(1) as f64).sqrt();
            if rms > 0.0 {
                rms as f32
            } else {
                1.0
            }
        })
        .collect()
}

/// Normalized rows of `ds` (see [`Normalization::normalize`]) with the
/// inputs u / `input_scale` appended to each state row: (rows x (2n + m),
/// targets rows x 2n). With an empty `input_scale` exactly
/// [`Normalization::normalize`].
pub fn stack_inputs(
    norm: &Normalization,
    ds: &Dataset,
    input_scale: &[f32],
) -> Result<(Array2<f32>, Array2<f32>)> {
    let n = ds.dof;
    let m = input_scale.len();
    let (z, t) = norm.normalize(ds);
    if m == 0 {
        return Ok((z, t));
    }
    if ds.inputs != m {
        bail!("the training data has {m} input columns; the validation data must too");
    }
    let mut zu = Array2::zeros((z.nrows(), 2 * n + m));
    zu.slice_mut(s![.., ..2 * n]).assign(&z);
    let mut r = 0;
    for traj in &ds.trajectories {
        for row in traj.u.rows() {
            if r >= z.nrows() {
                bail!("more input rows than state rows ({})", z.nrows());
            }
            for k in 0..m {
                zu[[r, 2 * n + k]] = (row[k] / input_scale[k] as f64) as f32;
            }
            r += 1;
        }
    }
    if r != z.nrows() {
        bail!(
            "input rows ({r}) do not match the state rows ({})",
            z.nrows()
        );
    }
    Ok((zu, t))
}

/// A damped and/or driven model (see [`PortObjective`]): R = L L^T on the
/// momentum block if `terms.dissipation`, G if the data carry inputs, each
/// constant or a network of q as `terms` says.
fn fit_port(
    train: &Dataset,
    val: Option<&Dataset>,
    arch: &EnergyArch,
    terms: &PortArch,
    settings: &FitSettings,
) -> Result<Fitted<EnergyModel>> {
    let n = train.dof;
    let norm = Normalization::from_data(train, quadratic_kinetic(arch))?;
    let input_scale = input_scales(train);
    let (z, t) = stack_inputs(&norm, train, &input_scale)?;
    let validation = match val {
        Some(v) => Some(stack_inputs(&norm, v, &input_scale)?),
        None => None,
    };
    let port = PortArch {
        inputs: train.inputs,
        ..terms.clone()
    };
    let obj = PortObjective::new(n, arch.clone(), port.clone(), &norm);
    let mut init = arch.init(n, settings.seed);
    let energy_count = init.len();
    init.extend(port.init(n, settings.seed));
    let (mut params, report) = run_arrays(&obj, init, z, t, validation, settings)?;
    let port_params = params.split_off(energy_count);
    Ok(Fitted {
        model: EnergyModel {
            dof: n,
            arch: arch.clone(),
            norm,
            params,
            port: Some(PortModel {
                arch: port,
                input_scale,
                params: port_params,
            }),
        },
        report,
    })
}

/// Fit the plain vector-field baseline (same hidden sizes, 2n outputs). For
/// data with inputs u1..um the network takes the normalized state and the
/// normalized inputs u / input_scale (RMS over the training data).
pub fn fit_baseline(
    train: &Dataset,
    val: Option<&Dataset>,
    hidden: &[usize],
    activation: Activation,
    settings: &FitSettings,
) -> Result<Fitted<BaselineModel>> {
    if let Some(v) = val {
        check_matching(train, v)?;
    }
    let norm = Normalization::from_data(train, false)?;
    let d = 2 * train.dof;
    let input_scale = input_scales(train);
    let shape = MlpShape::new(d + input_scale.len(), hidden, d, activation);
    let obj = BaselineObjective {
        shape: shape.clone(),
    };
    let mut init = Vec::new();
    shape.init(&mut ChaCha8Rng::seed_from_u64(settings.seed), &mut init);
    let (z, t) = stack_inputs(&norm, train, &input_scale)?;
    let validation = match val {
        Some(v) => Some(stack_inputs(&norm, v, &input_scale)?),
        None => None,
    };
    let (params, report) = run_arrays(&obj, init, z, t, validation, settings)?;
    Ok(Fitted {
        model: BaselineModel {
            dof: train.dof,
            shape,
            norm,
            params,
            input_scale,
        },
        report,
    })
}

/// The most worker threads a fit starts (each is an operating-system
/// thread; beyond the cores they only cost memory).
pub const MAX_THREADS: usize = 256;

/// Mean loss over the validation rows (`rows` of them), evaluated in
/// chunks of `chunk` rows.
fn mean_loss<O: Objective>(
    pool: &mut Pool<'_, '_, O>,
    p: &[f32],
    rows: usize,
    chunk: usize,
) -> f64 {
    let mut total = 0.0;
    let mut start = 0;
    while start < rows {
        let end = (start + chunk).min(rows);
        total += pool.loss_sum(p, Rows::Validation(start, end), None);
        start = end;
    }
    total / rows.max(1) as f64
}

/// The bar counts samples (steps x batch), so it shows samples/s and the
/// time left.
fn progress_bar(steps: usize, batch: usize, quiet: bool) -> ProgressBar {
    if quiet || !std::io::stderr().is_terminal() {
        return ProgressBar::hidden();
    }
    let bar = ProgressBar::new((steps * batch) as u64);
    let template = "{bar:30} {human_pos}/{human_len} samples  {rate} samples/s  ETA {eta}  {msg}";
    if let Ok(style) = ProgressStyle::with_template(template) {
        bar.set_style(style.with_key(
            "rate",
            |st: &indicatif::ProgressState, w: &mut dyn std::fmt::Write| {
                let _ = write!(w, "{:.0}", st.per_sec());
            },
        ));
    }
    bar
}

/// The loop shared by the energy model and the baseline.
fn run<O: Objective>(
    obj: &O,
    params: Vec<f32>,
    norm: &Normalization,
    train: &Dataset,
    val: Option<&Dataset>,
    s: &FitSettings,
) -> Result<(Vec<f32>, TrainReport)> {
    if s.batch == 0 {
        bail!("batch size must be at least 1");
    }
    if !(s.lr.is_finite() && s.lr > 0.0) {
        bail!("learning rate must be positive, got {}", s.lr);
    }
    if let Some(v) = val {
        if v.dof != train.dof {
            bail!(
                "validation data has {} degrees of freedom, training data {}",
                v.dof,
                train.dof
            );
        }
    }
    let rows = LogRows::new(norm, train);
    let val_rows = val.map(|v| LogRows::new(norm, v));
    run_sources(
        obj,
        params,
        &rows,
        val_rows.as_ref().map(|v| v as &dyn RowSource),
        s,
    )
}

/// The settings a fit cannot start without.
fn check_settings(s: &FitSettings) -> Result<()> {
    if s.batch == 0 {
        bail!("batch size must be at least 1");
    }
    if s.threads > MAX_THREADS {
        bail!(
            "--threads ([fit] threads) {} is more than {MAX_THREADS}, the most a fit starts",
            s.threads
        );
    }
    if !(s.lr.is_finite() && s.lr > 0.0) {
        bail!("learning rate must be positive, got {}", s.lr);
    }
    Ok(())
}

/// The mean loss and the clipped mean gradient (left in `grad`) of the
/// training rows `idx`; returns (loss, gradient norm before clipping).
fn minibatch_gradient<O: Objective>(
    pool: &mut Pool<'_, '_, O>,
    params: &[f32],
    idx: &[usize],
    grad: &mut [f32],
    clip: f32,
) -> (f64, f32) {
    let b = idx.len();
    let sum = pool.loss_sum(params, Rows::Train(idx), Some(grad));
    let inv = 1.0 / b as f32;
    grad.iter_mut().for_each(|g| *g *= inv);
    let norm = crate::learn::optim::clip_global_norm(grad, clip);
    (sum / b as f64, norm)
}

/// Fewest rows per validation evaluation (more when the minibatch is
/// larger).
const VALIDATION_CHUNK: usize = 256;

/// The shape of one run: rows, minibatch, steps and epochs, the
/// learning-rate schedule.
struct RunPlan {
    rows: usize,
    batch: usize,
    total: usize,
    epochs: usize,
    val_rows: Option<usize>,
    schedule: crate::learn::optim::Schedule,
}

/// [`run`] on normalized arrays (rows of inputs `z` and targets `t`).
pub(crate) fn run_arrays<O: Objective>(
    obj: &O,
    params: Vec<f32>,
    z: Array2<f32>,
    t: Array2<f32>,
    validation: Option<(Array2<f32>, Array2<f32>)>,
    s: &FitSettings,
) -> Result<(Vec<f32>, TrainReport)> {
    let rows = ArraySource {
        z: z.view(),
        t: t.view(),
    };
    let val = validation.as_ref().map(|(z, t)| ArraySource {
        z: z.view(),
        t: t.view(),
    });
    run_sources(
        obj,
        params,
        &rows,
        val.as_ref().map(|v| v as &dyn RowSource),
        s,
    )
}

/// The fit of `obj` on the rows of `train`, validated on `validation`.
fn run_sources<O: Objective>(
    obj: &O,
    params: Vec<f32>,
    train: &dyn RowSource,
    validation: Option<&dyn RowSource>,
    s: &FitSettings,
) -> Result<(Vec<f32>, TrainReport)> {
    check_settings(s)?;
    let rows = train.rows();
    let batch = s.batch.min(rows);
    let per_epoch = rows.div_ceil(batch);
    let total = s.steps.unwrap_or(s.epochs.saturating_mul(per_epoch)).max(1);
    let plan = RunPlan {
        rows,
        batch,
        total,
        epochs: total.div_ceil(per_epoch),
        val_rows: validation.map(|v| v.rows()),
        schedule: crate::learn::optim::Schedule {
            peak: s.lr,
            warmup: ((total as f32 * s.warmup_fraction) as usize).max(1),
            total,
            floor: s.lr_floor,
        },
    };
    let np = obj.param_count();
    // Each thread keeps a gradient and its workspace (about as large).
    let lane = 8 * np as u128;
    crate::capacity::check_memory("--threads ([fit] threads)", s.threads as u128, lane)?;
    let size = PoolSize {
        threads: s.threads.max(1),
        params: np,
        max_rows: batch.max(VALIDATION_CHUNK),
    };
    Ok(with_pool(obj, train, validation, size, |pool| {
        train_loop(pool, params, &plan, s)
    }))
}

/// The epochs: shuffled minibatches, Adam steps, validation after each
/// epoch, early stopping, Ctrl-C and non-finite losses.
fn train_loop<O: Objective>(
    pool: &mut Pool<'_, '_, O>,
    mut params: Vec<f32>,
    plan: &RunPlan,
    s: &FitSettings,
) -> (Vec<f32>, TrainReport) {
    let (batch, total) = (plan.batch, plan.total);
    let mut adam = crate::learn::optim::Adam::new(params.len());
    let mut grad = vec![0.0f32; params.len()];
    let mut order: Vec<usize> = (0..plan.rows).collect();
    // A stream apart from the initialization's (which uses `seed` itself).
    let mut rng = ChaCha8Rng::seed_from_u64(s.seed ^ 0x9e37_79b9_7f4a_7c15);
    let mut history = History::default();
    let mut best = params.clone();
    let mut best_val = f64::INFINITY;
    let mut best_epoch = None;
    let mut last_good = params.clone();
    let mut step = 0usize;
    let mut stop = StopReason::Completed;
    let bar = progress_bar(total, batch, s.quiet);
    let start = Instant::now();
    'epochs: for epoch in 0..plan.epochs {
        order.shuffle(&mut rng);
        let mut epoch_loss = 0.0f64;
        let mut epoch_batches = 0usize;
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
            let (loss, norm) = minibatch_gradient(pool, &params, idx, &mut grad, s.clip);
            if !loss.is_finite() || !norm.is_finite() {
                stop = StopReason::NonFinite { step };
                params.clone_from(&last_good);
                break 'epochs;
            }
            last_good.clone_from(&params);
            adam.step(&mut params, &grad, plan.schedule.rate(step));
            epoch_loss += loss;
            epoch_batches += 1;
            step += 1;
            bar.inc(idx.len() as u64);
        }
        if epoch_batches == 0 {
            break;
        }
        let train_loss = epoch_loss / epoch_batches as f64;
        let val_loss = match plan.val_rows {
            Some(rows) => mean_loss(pool, &params, rows, batch.max(VALIDATION_CHUNK)),
            None => train_loss,
        };
        history.train.push(train_loss);
        history.val.push(val_loss);
        bar.set_message(format!("train {train_loss:.3e}  val {val_loss:.3e}"));
        if !val_loss.is_finite() {
            stop = StopReason::NonFinite { step };
            break;
        }
        if val_loss < best_val {
            best_val = val_loss;
            best.clone_from(&params);
            best_epoch = Some(epoch);
        } else if s.early_stop && best_epoch.is_some_and(|e| epoch - e >= s.patience) {
            stop = StopReason::EarlyStopped;
            break;
        }
    }
    bar.finish_and_clear();
    let seconds = start.elapsed().as_secs_f64();
    let kept = if best_epoch.is_some() { best } else { params };
    let report = TrainReport {
        history,
        stop,
        steps: step,
        batch,
        seconds,
        best_epoch,
        best_val,
    };
    (kept, report)
}
