//! Second-order and tangent passes through a network, for the observer's
//! exact step Jacobian: the Hessian-vector product of a scalar network
//! (forward-mode tangent of the reverse-mode gradient, "forward over
//! reverse"), its generalization to a many-output network's
//! vector-Jacobian product with a moving seed (the mechanical energy's
//! factor network), and the forward tangent of a many-output network (the port
//! terms L(q), G(q)). Plain loops, index-order sums, no finite differences.

use super::Weights;
use super::{Layer, Mlp};
use crate::format::{Activation, MAX_LAYERS};
use crate::math;

/// Weight (row `j`, column `i`) of a layer as the runtime evaluates it
/// (int8: value times row scale).
#[inline(always)]
fn weight(l: &Layer<'_>, j: usize, i: usize) -> f32 {
    let k = j * l.ni() + i;
    match l.weights {
        Weights::Aligned(w) => w.get(k).copied().unwrap_or(f32::NAN),
        Weights::Bytes(w) => w.get(k),
        Weights::Int8 { values, scales } => {
            values.get(k).map_or(f32::NAN, |v| (*v as i8) as f32) * scales.get(j)
        }
    }
}

/// Activation value, first and second derivative at `a`.
#[inline]
fn activate2(act: Activation, a: f32) -> (f32, f32, f32) {
    match act {
        Activation::Tanh => {
            let t = math::tanh(a);
            let d = 1.0 - t * t;
            (t, d, -2.0 * t * d)
        }
        Activation::Softplus => {
            let s = math::sigmoid(a);
            (math::softplus(a), s, s * (1.0 - s))
        }
        // Refused at validation; kept total so no input can panic.
        Activation::Relu => (a.max(0.0), if a > 0.0 { 1.0 } else { 0.0 }, 0.0),
    }
}

/// Per hidden layer: first and second activation derivatives and the
/// tangent of the pre-activation.
struct Tape<const W: usize> {
    d1: [[f32; W]; MAX_LAYERS],
    d2: [[f32; W]; MAX_LAYERS],
    da: [[f32; W]; MAX_LAYERS],
}

impl<const W: usize> Mlp<'_, W> {
    /// Forward pass with a tangent: `out`/`dout` receive the outputs and
    /// their directional derivatives along `dx`; the tape keeps what the
    /// second-order reverse pass needs.
    fn forward_tangent(
        &self,
        x: &[f32],
        dx: &[f32],
        tape: &mut Tape<W>,
        out: &mut [f32],
        dout: &mut [f32],
    ) {
        let (mut h, mut dh) = ([0.0f32; W], [0.0f32; W]);
        let (mut nh, mut ndh) = ([0.0f32; W], [0.0f32; W]);
        for (k, layer) in self.layers.iter().take(self.count).enumerate() {
            let Some(l) = layer else { break };
            let (input, dinput): (&[f32], &[f32]) = if k == 0 {
                (x, dx)
            } else {
                (&h[..l.ni()], &dh[..l.ni()])
            };
            for j in 0..l.no() {
                let (mut a, mut da) = (0.0f32, 0.0f32);
                for i in 0..l.ni() {
                    let w = weight(l, j, i);
                    a += w * input.get(i).copied().unwrap_or(0.0);
                    da += w * dinput.get(i).copied().unwrap_or(0.0);
                }
                nh[j] = a + l.bias.get(j);
                ndh[j] = da;
            }
            if k + 1 == self.count {
                let m = l.no().min(out.len()).min(dout.len()).min(W);
                out[..m].copy_from_slice(&nh[..m]);
                dout[..m].copy_from_slice(&ndh[..m]);
            } else {
                for j in 0..l.no() {
                    let (v, d1, d2) = activate2(self.activation, nh[j]);
                    tape.d1[k][j] = d1;
                    tape.d2[k][j] = d2;
                    tape.da[k][j] = ndh[j];
                    h[j] = v;
                    dh[j] = d1 * ndh[j];
                }
            }
        }
    }

    /// The first output's gradient at `x` into `grad` and its directional
    /// derivative along `dx` (the Hessian-vector product) into `hv`, both
    /// of length `inputs`.
    pub fn gradient_and_hvp(&self, x: &[f32], dx: &[f32], grad: &mut [f32], hv: &mut [f32]) {
        self.pullback_and_tangent(x, dx, &[1.0], &[0.0], grad, hv);
    }

    /// The vector-Jacobian product J(x)^T `seed` into `grad` and its
    /// directional derivative along `dx` with the seed moving at `dseed`,
    /// (dJ)^T seed + J^T dseed, into `hv` (forward over reverse; a scalar
    /// network with seed 1, dseed 0 gives the gradient and the
    /// Hessian-vector product). Outputs beyond `seed` get seed 0.
    pub fn pullback_and_tangent(
        &self,
        x: &[f32],
        dx: &[f32],
        seed: &[f32],
        dseed: &[f32],
        grad: &mut [f32],
        hv: &mut [f32],
    ) {
        let mut tape = Tape {
            d1: [[0.0; W]; MAX_LAYERS],
            d2: [[0.0; W]; MAX_LAYERS],
            da: [[0.0; W]; MAX_LAYERS],
        };
        let (mut out, mut dout) = ([0.0f32; W], [0.0f32; W]);
        self.forward_tangent(x, dx, &mut tape, &mut out, &mut dout);
        // g: adjoint of the layer output, dg: its tangent.
        let (mut g, mut dg) = ([0.0f32; W], [0.0f32; W]);
        for (k, s) in seed.iter().enumerate().take(W) {
            g[k] = *s;
        }
        for (k, s) in dseed.iter().enumerate().take(W) {
            dg[k] = *s;
        }
        for k in (0..self.count).rev() {
            let Some(l) = self.layers[k] else { continue };
            if k + 1 < self.count {
                for j in 0..l.no() {
                    let (d1, d2, da) = (tape.d1[k][j], tape.d2[k][j], tape.da[k][j]);
                    dg[j] = dg[j] * d1 + g[j] * d2 * da;
                    g[j] *= d1;
                }
            }
            let (mut pg, mut pdg) = ([0.0f32; W], [0.0f32; W]);
            for i in 0..l.ni() {
                let (mut acc, mut dacc) = (0.0f32, 0.0f32);
                for j in 0..l.no() {
                    let w = weight(&l, j, i);
                    acc += w * g[j];
                    dacc += w * dg[j];
                }
                pg[i] = acc;
                pdg[i] = dacc;
            }
            g = pg;
            dg = pdg;
        }
        let n = grad.len().min(hv.len()).min(W);
        grad[..n].copy_from_slice(&g[..n]);
        hv[..n].copy_from_slice(&dg[..n]);
    }

    /// All outputs at `x` into `out` and their directional derivatives along
    /// `dx` into `dout` (a shorter slice receives the leading outputs).
    pub fn evaluate_tangent(&self, x: &[f32], dx: &[f32], out: &mut [f32], dout: &mut [f32]) {
        let mut tape = Tape {
            d1: [[0.0; W]; MAX_LAYERS],
            d2: [[0.0; W]; MAX_LAYERS],
            da: [[0.0; W]; MAX_LAYERS],
        };
        self.forward_tangent(x, dx, &mut tape, out, dout);
    }
}
