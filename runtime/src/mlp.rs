//! Validated multilayer perceptrons over borrowed weight bytes: a forward
//! pass that keeps what the backward pass needs, and the analytic gradient of
//! a scalar output with respect to the input (reverse mode, no finite
//! differences). Energy networks have one output; the networks of the port
//! terms R(q), G(q) have several and are only evaluated forward; the mass
//! factor L(q) of a mechanical model has several and is pulled back
//! (vector-Jacobian product). `W` bounds
//! every layer width and sizes the stack buffers. Aligned f32 weights
//! (format version 6, blob at a 4-byte-aligned address) are read in place
//! as `&[f32]`; other f32 weights are decoded from their bytes, to the same
//! bits.

use crate::error::{BlobError, Section};
use crate::format::{
    Activation, AlignedF32, F32Bytes, LayerDesc, MlpDesc, WeightsDesc, MAX_LAYERS,
};
use crate::math;

mod kernel;
use kernel::RowScale;
#[cfg(feature = "observer")]
mod tangent;

/// A layer's weights as the kernels read them.
#[derive(Debug, Clone, Copy)]
enum Weights<'a> {
    /// f32 values in place: one load per weight.
    Aligned(&'a [f32]),
    /// Little-endian f32 bytes at any address (format versions 1 to 5, or
    /// an aligned matrix of a blob placed at an unaligned address).
    Bytes(F32Bytes<'a>),
    /// int8 values and their per-row scales.
    Int8 {
        values: &'a [u8],
        scales: F32Bytes<'a>,
    },
}

impl<'a> Weights<'a> {
    /// The kernels' view of validated weights.
    fn of(desc: WeightsDesc<'a>) -> Self {
        match desc {
            WeightsDesc::F32Aligned(a) => match a.as_f32s() {
                Some(w) => Self::Aligned(w),
                None => Self::Bytes(a.values),
            },
            WeightsDesc::F32(w) => Self::Bytes(w),
            WeightsDesc::Int8 { values, scales } => Self::Int8 { values, scales },
        }
    }
}

/// A validated layer. Widths are stored as the blob stores them (`u16`),
/// which keeps a parsed model (and every copy of it on the stack) small.
#[derive(Debug, Clone, Copy)]
struct Layer<'a> {
    inputs: u16,
    outputs: u16,
    weights: Weights<'a>,
    bias: F32Bytes<'a>,
}

impl Layer<'_> {
    /// Input width.
    #[inline(always)]
    fn ni(&self) -> usize {
        self.inputs as usize
    }

    /// Output width.
    #[inline(always)]
    fn no(&self) -> usize {
        self.outputs as usize
    }
}

/// A validated network with inputs of width `inputs` and `outputs` outputs.
#[derive(Debug, Clone, Copy)]
pub struct Mlp<'a, const W: usize> {
    activation: Activation,
    layers: [Option<Layer<'a>>; MAX_LAYERS],
    count: usize,
}

fn all_finite(v: F32Bytes<'_>) -> bool {
    v.iter().all(f32::is_finite)
}

impl<'a, const W: usize> Mlp<'a, W> {
    /// Check shapes (`inputs` in, `outputs` out), byte lengths, finiteness
    /// and the activation.
    pub fn validate(
        desc: &MlpDesc<'a>,
        inputs: usize,
        outputs: usize,
        section: Section,
    ) -> Result<Self, BlobError> {
        if desc.activation == Activation::Relu {
            return Err(BlobError::ReluInEnergyNetwork { section });
        }
        let count = desc.layers.len();
        if count == 0 || count > MAX_LAYERS {
            return Err(BlobError::LayerCount {
                section,
                layers: count as u32,
            });
        }
        let mut layers = [None; MAX_LAYERS];
        let mut width = inputs;
        for (i, l) in desc.layers.iter().enumerate() {
            let li = i as u8;
            let (ni, no) = (l.inputs as usize, l.outputs as usize);
            if ni != width || no == 0 {
                return Err(BlobError::ShapeMismatch { section, layer: li });
            }
            if no > W || ni > W {
                return Err(BlobError::TooWide {
                    section,
                    layer: li,
                    width: no.max(ni) as u32,
                    max: W as u32,
                });
            }
            let last = i + 1 == count;
            if last && no != outputs {
                return Err(BlobError::ShapeMismatch { section, layer: li });
            }
            check_layer(l, ni, no, section, li)?;
            layers[i] = Some(Layer {
                inputs: l.inputs,
                outputs: l.outputs,
                weights: Weights::of(l.weights),
                bias: l.bias,
            });
            width = no;
        }
        Ok(Self {
            activation: desc.activation,
            layers,
            count,
        })
    }

    /// Multiply-accumulates of one forward pass plus one input gradient.
    pub fn macs_per_gradient(&self) -> u32 {
        2 * self.macs_forward()
    }

    /// Multiply-accumulates of one forward pass.
    pub fn macs_forward(&self) -> u32 {
        self.layers
            .iter()
            .flatten()
            .map(|l| (l.ni() * l.no()) as u32)
            .sum()
    }

    /// Number of weights and biases.
    pub fn parameters(&self) -> u32 {
        self.layers
            .iter()
            .flatten()
            .map(|l| (l.ni() * l.no() + l.no()) as u32)
            .sum()
    }

    /// The first output for input `x` (first `inputs` entries used).
    pub fn value(&self, x: &[f32]) -> f32 {
        let mut deriv = [[0.0f32; W]; MAX_LAYERS];
        let mut out = [0.0f32];
        self.forward(x, &mut deriv, &mut out);
        out[0]
    }

    /// All outputs for input `x`, written to `out[..outputs]` (a shorter
    /// `out` receives the leading outputs).
    pub fn evaluate(&self, x: &[f32], out: &mut [f32]) {
        let mut deriv = [[0.0f32; W]; MAX_LAYERS];
        self.forward(x, &mut deriv, out);
    }

    /// The first output and its gradient with respect to the input, written
    /// to `grad[..inputs]`.
    pub fn value_and_gradient(&self, x: &[f32], grad: &mut [f32]) -> f32 {
        let mut deriv = [[0.0f32; W]; MAX_LAYERS];
        let mut out = [0.0f32];
        self.forward(x, &mut deriv, &mut out);
        self.backward(&deriv, grad);
        out[0]
    }

    /// Forward pass into `out`; stores each hidden layer's activation
    /// derivative.
    fn forward(&self, x: &[f32], deriv: &mut [[f32; W]; MAX_LAYERS], out: &mut [f32]) {
        let mut cur = [0.0f32; W];
        let mut next = [0.0f32; W];
        for (k, layer) in self.layers.iter().take(self.count).enumerate() {
            let Some(l) = layer else { break };
            let input: &[f32] = if k == 0 { x } else { &cur[..l.ni()] };
            dense(l, input, &mut next[..l.no()]);
            if k + 1 == self.count {
                for (o, v) in out.iter_mut().zip(&next[..l.no()]) {
                    *o = *v;
                }
            } else if let Some(tape) = deriv.get_mut(k) {
                activate_row(self.activation, &next[..l.no()], &mut cur, tape);
            }
        }
    }

    /// Reverse pass from d(output) = 1 down to the input.
    fn backward(&self, deriv: &[[f32; W]; MAX_LAYERS], grad: &mut [f32]) {
        self.pullback(deriv, &[1.0], grad);
    }

    /// All outputs at `x` into `out`, keeping in `tape` what
    /// [`Self::pullback`] needs.
    pub fn evaluate_taped(&self, x: &[f32], tape: &mut [[f32; W]; MAX_LAYERS], out: &mut [f32]) {
        self.forward(x, tape, out);
    }

    /// Reverse pass (vector-Jacobian product): `grad[..inputs]` receives
    /// J^T `seed`, with J the Jacobian of the outputs at the input the tape
    /// was recorded at (`seed` holds the leading outputs' weights; the rest
    /// count as 0).
    pub fn pullback(&self, deriv: &[[f32; W]; MAX_LAYERS], seed: &[f32], grad: &mut [f32]) {
        // The adjoint of the current layer's output and of its input; they
        // trade places after each layer (a swap of references, no copy).
        let mut buffers = ([0.0f32; W], [0.0f32; W]);
        let (mut g, mut gp) = (&mut buffers.0, &mut buffers.1);
        for (gj, s) in g.iter_mut().zip(seed) {
            *gj = *s;
        }
        for k in (0..self.count).rev() {
            let Some(l) = self.layers[k] else { continue };
            if let (true, Some(tape)) = (k + 1 < self.count, deriv.get(k)) {
                for (gj, d) in g.iter_mut().zip(&tape[..l.no()]) {
                    *gj *= d;
                }
            }
            let target: &mut [f32] = if k == 0 {
                &mut grad[..l.ni()]
            } else {
                &mut gp[..l.ni()]
            };
            dense_transpose(&l, &g[..l.no()], target);
            core::mem::swap(&mut g, &mut gp);
        }
    }
}

/// Byte lengths and finiteness of one layer.
fn check_layer(
    l: &LayerDesc<'_>,
    ni: usize,
    no: usize,
    section: Section,
    li: u8,
) -> Result<(), BlobError> {
    let shape = BlobError::ShapeMismatch { section, layer: li };
    if l.bias.0.len() != 4 * no {
        return Err(shape);
    }
    match l.weights {
        WeightsDesc::F32(w) | WeightsDesc::F32Aligned(AlignedF32 { values: w, .. }) => {
            if w.0.len() != 4 * ni * no {
                return Err(shape);
            }
            if !all_finite(w) {
                return Err(BlobError::NonFinite { section });
            }
        }
        WeightsDesc::Int8 { .. } if !cfg!(feature = "int8") => {
            return Err(BlobError::NotInThisBuild { section });
        }
        WeightsDesc::Int8 { values, scales } => {
            if values.len() != ni * no || scales.0.len() != 4 * no {
                return Err(shape);
            }
            if !all_finite(scales) {
                return Err(BlobError::NonFinite { section });
            }
            if !scales.iter().all(crate::format::scale_in_range) {
                return Err(BlobError::OutOfRange { section });
            }
        }
    }
    if !all_finite(l.bias) {
        return Err(BlobError::NonFinite { section });
    }
    Ok(())
}

/// Activation values `a` and derivatives `d` of the pre-activations `z`
/// ([`activate`] element by element).
#[inline]
fn activate_row(act: Activation, z: &[f32], a: &mut [f32], d: &mut [f32]) {
    for (zj, (aj, dj)) in z.iter().zip(a.iter_mut().zip(d.iter_mut())) {
        (*aj, *dj) = activate(act, *zj);
    }
}

/// Activation value and derivative at pre-activation `a`.
#[inline]
fn activate(act: Activation, a: f32) -> (f32, f32) {
    match act {
        Activation::Tanh => {
            let t = math::tanh(a);
            (t, 1.0 - t * t)
        }
        Activation::Softplus => (math::softplus(a), math::sigmoid(a)),
        // Refused at validation; kept total so no input can panic.
        Activation::Relu => {
            if a > 0.0 {
                (a, 1.0)
            } else {
                (0.0, 0.0)
            }
        }
    }
}

/// Rows processed together by the dense kernels. Each output keeps its own
/// accumulator and its own summation order (index order), so blocking
/// changes no bit of the result; it lets one load of `x[i]` (or of an
/// accumulator) serve four weights (see DEVELOPERS.md, device cost).
const BLOCK: usize = 4;

/// A little-endian f32 from a 4-byte chunk (from `chunks_exact(4)`).
#[inline(always)]
fn le_f32(c: &[u8]) -> f32 {
    f32::from_le_bytes([c[0], c[1], c[2], c[3]])
}

/// y = W x + b, summing each row in index order.
#[inline]
fn dense(l: &Layer<'_>, x: &[f32], y: &mut [f32]) {
    let ni = l.ni();
    let x = &x[..ni.min(x.len())];
    match l.weights {
        Weights::Aligned(w) => kernel::dense(w, ni, RowScale::NONE, l.bias, x, y),
        Weights::Bytes(w) => {
            let mut j = 0;
            while j + BLOCK <= y.len() {
                let base = 4 * ni * j;
                let r = |b: usize| &w.0[base + 4 * ni * b..base + 4 * ni * (b + 1)];
                let (r0, r1, r2, r3) = (r(0), r(1), r(2), r(3));
                let mut acc = [0.0f32; BLOCK];
                let quads = r0
                    .chunks_exact(4)
                    .zip(r1.chunks_exact(4))
                    .zip(r2.chunks_exact(4))
                    .zip(r3.chunks_exact(4));
                for ((((c0, c1), c2), c3), xi) in quads.zip(x) {
                    acc[0] += le_f32(c0) * xi;
                    acc[1] += le_f32(c1) * xi;
                    acc[2] += le_f32(c2) * xi;
                    acc[3] += le_f32(c3) * xi;
                }
                for (b, a) in acc.iter().enumerate() {
                    y[j + b] = a + l.bias.get(j + b);
                }
                j += BLOCK;
            }
            for (jj, row) in w.0.chunks_exact(4 * ni).enumerate().skip(j) {
                let mut acc = 0.0f32;
                for (c, xi) in row.chunks_exact(4).zip(x) {
                    acc += le_f32(c) * xi;
                }
                if let Some(yj) = y.get_mut(jj) {
                    *yj = acc + l.bias.get(jj);
                }
            }
        }
        // Refused at validation when left out of the build.
        Weights::Int8 { .. } if !cfg!(feature = "int8") => {}
        Weights::Int8 { values, scales } => {
            kernel::dense(values, ni, RowScale::int8(scales), l.bias, x, y)
        }
    }
}

/// gx = W^T g, accumulated over outputs j in index order for every input
/// (four rows per pass, same order, same bits).
#[inline]
fn dense_transpose(l: &Layer<'_>, g: &[f32], gx: &mut [f32]) {
    let ni = l.ni();
    gx.iter_mut().for_each(|v| *v = 0.0);
    let no = g.len();
    match l.weights {
        Weights::Aligned(w) => kernel::dense_transpose(w, ni, RowScale::NONE, g, gx),
        Weights::Bytes(w) => {
            let mut j = 0;
            while j + BLOCK <= no {
                let base = 4 * ni * j;
                let r = |b: usize| &w.0[base + 4 * ni * b..base + 4 * ni * (b + 1)];
                let (r0, r1, r2, r3) = (r(0), r(1), r(2), r(3));
                let (g0, g1, g2, g3) = (g[j], g[j + 1], g[j + 2], g[j + 3]);
                let quads = r0
                    .chunks_exact(4)
                    .zip(r1.chunks_exact(4))
                    .zip(r2.chunks_exact(4))
                    .zip(r3.chunks_exact(4));
                for ((((c0, c1), c2), c3), o) in quads.zip(gx.iter_mut()) {
                    let mut v = *o;
                    v += le_f32(c0) * g0;
                    v += le_f32(c1) * g1;
                    v += le_f32(c2) * g2;
                    v += le_f32(c3) * g3;
                    *o = v;
                }
                j += BLOCK;
            }
            for (gj, row) in g.iter().zip(w.0.chunks_exact(4 * ni)).skip(j) {
                for (c, o) in row.chunks_exact(4).zip(gx.iter_mut()) {
                    *o += le_f32(c) * gj;
                }
            }
        }
        Weights::Int8 { .. } if !cfg!(feature = "int8") => {}
        Weights::Int8 { values, scales } => {
            kernel::dense_transpose(values, ni, RowScale::int8(scales), g, gx)
        }
    }
}
