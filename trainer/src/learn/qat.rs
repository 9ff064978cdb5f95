//! Quantization-aware fine-tuning: after the f32 fit, a copy of the
//! parameters is trained for a fixed number of optimizer steps with every
//! network weight matrix fake-quantized in the forward pass exactly as the
//! int8 exporter stores it (per output row: scale = max |w| / 127, value =
//! round(w / scale) clamped to [-127, 127], weight = scale * value;
//! `visviva_blob_support::quantize::quantize_rows`, dequantized as
//! `runtime/src/format.rs` states), the gradient with respect to the
//! rounded weights passed straight through to the f32 ones (the
//! straight-through estimator, Bengio, Leonard & Courville, 2013). Biases,
//! the quadratic kinetic factor and constant port terms stay f32, as the
//! blob stores them. The loss is the f32 fit's derivative-matching loss
//! ([`HnnObjective`] or [`PortObjective`]) and the loop the fit's own
//! ([`crate::learn::fit`]), seeded, with a small learning rate. The int8
//! blob is then quantized from the fine-tuned weights.
//!
//! Port networks' output rows are scaled into physical units before export
//! (`PortModel::physical_*`); their fake quantization here is of the
//! normalized rows, equal to the exporter's up to the f32 rounding of that
//! scaling. Energy networks are stored as trained, so theirs is exact.

use anyhow::Result;
use ndarray::{s, ArrayView2};
use serde::{Deserialize, Serialize};
use visviva_blob_support::quantize::quantize_rows;

use crate::data::dataset::Dataset;
use crate::learn::fit::{input_scales, run_arrays, stack_inputs, FitSettings};
use crate::learn::hnn::{EnergyArch, EnergyModel, HnnObjective, KineticArch, Objective};
use crate::learn::net::MlpShape;
use crate::learn::port::PortObjective;

/// Optimizer steps of the fine-tuning. Our choice: a few hundred steps (a
/// few epochs of the demo logs at batch 256) is enough for the weights to
/// settle on the int8 grid (each weight moves by at most about the learning
/// rate per Adam step, so 300 steps can cross several quantization steps of
/// a typical row) and costs a fraction of a second to a few seconds, a small
/// part of the fit it follows.
pub const STEPS: usize = 300;
/// Peak learning rate: a tenth of the fit's default (3e-3), so the
/// fine-tuning corrects the rounding without leaving the f32 fit's basin
/// (common practice for fine-tuning).
pub const LEARNING_RATE: f32 = 3e-4;
/// Samples per minibatch (the fit's default).
pub const BATCH: usize = 256;
/// Rows per loss evaluation when measuring (bounds the buffers).
const CHUNK: usize = 1024;

/// One weight matrix inside the flat parameter vector.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct WeightBlock {
    /// Index of its first weight.
    pub offset: usize,
    /// Output rows.
    pub outputs: usize,
    /// Inputs per row.
    pub inputs: usize,
}

/// What the fine-tuning did, for the command output and report.json.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct QatSummary {
    /// Optimizer steps taken.
    pub steps: usize,
    /// Peak learning rate.
    pub learning_rate: f32,
    /// Seed of the minibatch order.
    pub seed: u64,
    /// Mean loss on the validation rows (training rows when there are none)
    /// of the f32 model.
    pub loss_f32: f64,
    /// The same with the f32 model's weights rounded as the exporter rounds
    /// them (the int8 blob without fine-tuning).
    pub loss_rounded: f64,
    /// The same for the fine-tuned weights, rounded (the exported int8
    /// blob).
    pub loss_fine_tuned: f64,
    /// Whether the fine-tuned weights were kept (false: they were not
    /// better than the rounded f32 model on those rows, which is exported).
    pub kept: bool,
}

/// The weight matrices of `shape` whose parameters start at `base`.
fn shape_blocks(shape: &MlpShape, base: usize, out: &mut Vec<WeightBlock>) {
    for k in 0..shape.layers() {
        let (offset, outputs, inputs) = shape.layer_offset(k);
        out.push(WeightBlock {
            offset: base + offset,
            outputs,
            inputs,
        });
    }
}

/// Every network weight matrix of `model`, in the layout of its energy
/// parameters followed by its port parameters (the fit's layout).
pub fn weight_blocks(model: &EnergyModel) -> Vec<WeightBlock> {
    let mut v = Vec::new();
    match &model.arch {
        EnergyArch::General(m) => shape_blocks(m, 0, &mut v),
        EnergyArch::Mechanical { potential, factor } => {
            shape_blocks(potential, 0, &mut v);
            shape_blocks(factor, potential.param_count(), &mut v);
        }
        EnergyArch::Separable { potential, kinetic } => {
            shape_blocks(potential, 0, &mut v);
            if let KineticArch::Network(k) = kinetic {
                shape_blocks(k, potential.param_count(), &mut v);
            }
        }
    }
    if let Some(port) = &model.port {
        let (n, base) = (model.dof, model.params.len());
        if let Some(l) = port.arch.dissipation_net(n) {
            shape_blocks(&l, base, &mut v);
        }
        if let Some(g) = port.arch.input_net(n) {
            shape_blocks(&g, base + port.arch.l_count(n), &mut v);
        }
    }
    v
}

/// Replace the row-major rows of `w` (`inputs` each) by their int8
/// reconstruction, exactly as the exporter quantizes and the runtime
/// dequantizes them: scale * value in f32.
pub fn fake_quantize_rows(w: &mut [f32], inputs: usize) {
    let (values, scales) = quantize_rows(w, inputs);
    for (k, x) in w.iter_mut().enumerate() {
        *x = scales[k / inputs.max(1)] * f32::from(values[k]);
    }
}

/// `params` with every block fake-quantized, into `out`.
pub fn fake_quantize_into(params: &[f32], blocks: &[WeightBlock], out: &mut Vec<f32>) {
    out.clear();
    out.extend_from_slice(params);
    for b in blocks {
        fake_quantize_rows(
            &mut out[b.offset..b.offset + b.outputs * b.inputs],
            b.inputs,
        );
    }
}

/// An objective evaluated at fake-quantized weights; its gradient with
/// respect to them is returned as the gradient of the f32 weights (the
/// straight-through estimator: the clamp never binds, since each row's
/// scale is set by its own largest magnitude).
pub struct FakeQuantized<'a, O> {
    /// The loss.
    pub inner: &'a O,
    /// The weight matrices to round.
    pub blocks: &'a [WeightBlock],
}

impl<O: Objective> Objective for FakeQuantized<'_, O> {
    type Work = (O::Work, Vec<f32>);

    fn param_count(&self) -> usize {
        self.inner.param_count()
    }

    fn loss_sum(
        &self,
        p: &[f32],
        z: ArrayView2<'_, f32>,
        t: ArrayView2<'_, f32>,
        work: &mut Self::Work,
        grad: Option<&mut [f32]>,
    ) -> f64 {
        let (inner_work, rounded) = work;
        fake_quantize_into(p, self.blocks, rounded);
        self.inner.loss_sum(rounded, z, t, inner_work, grad)
    }
}

/// Mean of `obj`'s loss over the rows of (`z`, `t`), in chunks.
fn mean_loss<O: Objective>(
    obj: &O,
    p: &[f32],
    z: ArrayView2<'_, f32>,
    t: ArrayView2<'_, f32>,
) -> f64 {
    let mut work = O::Work::default();
    let mut total = 0.0;
    let mut start = 0;
    while start < z.nrows() {
        let end = (start + CHUNK).min(z.nrows());
        let (zc, tc) = (z.slice(s![start..end, ..]), t.slice(s![start..end, ..]));
        total += obj.loss_sum(p, zc, tc, &mut work, None);
        start = end;
    }
    total / z.nrows().max(1) as f64
}

/// Settings of one fine-tuning: the fit's seed and threads.
#[derive(Debug, Clone, Copy)]
pub struct QatSettings {
    /// Seed of the minibatch order.
    pub seed: u64,
    /// Worker threads.
    pub threads: usize,
    /// Optimizer steps ([`STEPS`] unless a test asks otherwise).
    pub steps: usize,
}

impl QatSettings {
    /// [`STEPS`] steps with `seed` on `threads` threads.
    pub fn new(seed: u64, threads: usize) -> Self {
        Self {
            seed,
            threads,
            steps: STEPS,
        }
    }

    fn fit_settings(&self) -> FitSettings {
        FitSettings {
            steps: Some(self.steps),
            batch: BATCH,
            lr: LEARNING_RATE,
            threads: self.threads,
            early_stop: false,
            seed: self.seed,
            quiet: true,
            ..FitSettings::default()
        }
    }
}

/// Fine-tune `model` (an f32 fit on `train`) with its weights
/// fake-quantized; the best parameters by the rounded loss on `val` (or on
/// `train` without it) are kept when they beat the rounded f32 model there.
/// Returns the model to quantize for export and what was measured.
pub fn fine_tune(
    model: &EnergyModel,
    train: &Dataset,
    val: Option<&Dataset>,
    settings: &QatSettings,
) -> Result<(EnergyModel, QatSummary)> {
    match &model.port {
        None => {
            let obj = HnnObjective::new(model.dof, model.arch.clone(), &model.norm);
            tune_with(&obj, model, train, val, settings)
        }
        Some(port) => {
            let obj = PortObjective::new(
                model.dof,
                model.arch.clone(),
                port.arch.clone(),
                &model.norm,
            );
            tune_with(&obj, model, train, val, settings)
        }
    }
}

/// [`fine_tune`] with the model's own loss `obj`.
fn tune_with<O: Objective>(
    obj: &O,
    model: &EnergyModel,
    train: &Dataset,
    val: Option<&Dataset>,
    settings: &QatSettings,
) -> Result<(EnergyModel, QatSummary)> {
    let input_scale = model
        .port
        .as_ref()
        .map_or_else(|| input_scales(train), |p| p.input_scale.clone());
    let (z, t) = stack_inputs(&model.norm, train, &input_scale)?;
    let validation = val
        .map(|v| stack_inputs(&model.norm, v, &input_scale))
        .transpose()?;
    let (vz, vt) = validation
        .as_ref()
        .map_or((z.view(), t.view()), |(a, b)| (a.view(), b.view()));
    let blocks = weight_blocks(model);
    let rounded = FakeQuantized {
        inner: obj,
        blocks: &blocks,
    };
    let start: Vec<f32> = joined(model);
    let loss_f32 = mean_loss(obj, &start, vz, vt);
    let loss_rounded = mean_loss(&rounded, &start, vz, vt);
    let (vz, vt) = (vz.to_owned(), vt.to_owned());
    let (tuned, report) = run_arrays(
        &rounded,
        start.clone(),
        z,
        t,
        Some((vz.clone(), vt.clone())),
        &settings.fit_settings(),
    )?;
    let loss_tuned = mean_loss(&rounded, &tuned, vz.view(), vt.view());
    let kept = loss_tuned < loss_rounded;
    let summary = QatSummary {
        steps: report.steps,
        learning_rate: LEARNING_RATE,
        seed: settings.seed,
        loss_f32,
        loss_rounded,
        loss_fine_tuned: if kept { loss_tuned } else { loss_rounded },
        kept,
    };
    let params = if kept { tuned } else { start };
    Ok((split_back(model, params), summary))
}

/// The energy parameters followed by the port parameters.
fn joined(model: &EnergyModel) -> Vec<f32> {
    let port = model.port.as_ref().map_or(&[][..], |p| p.params.as_slice());
    model.params.iter().chain(port).copied().collect()
}

/// `model` with the joined parameters `p` put back.
fn split_back(model: &EnergyModel, mut p: Vec<f32>) -> EnergyModel {
    let port_params = p.split_off(model.params.len());
    let mut out = model.clone();
    out.params = p;
    if let Some(port) = out.port.as_mut() {
        port.params = port_params;
    }
    out
}
