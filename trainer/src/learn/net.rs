//! Batched multilayer perceptrons on `ndarray` (f32) for training: forward
//! pass with cached pre-activations, the input gradient of a scalar output
//! (or the vector-Jacobian product of a many-output one, seed g_{L-1}),
//! and parameter gradients of (a) a loss on the outputs and (b) a loss on the
//! *input gradient* (double backpropagation), all as matrix products over the
//! batch (`learn/product.rs`) with buffers kept in a reusable [`MlpWork`].
//!
//! Parameters live in one flat `f32` slice so the optimizer sees a single
//! vector. Layout, layer by layer from the input: the weight matrix `W`
//! row-major `[outputs][inputs]` (the runtime's layout), then the bias.
//!
//! Double backpropagation, derived here (reverse mode over forward mode).
//! With rows as samples, a_0 = x, z_k = a_k W_k^T + b_k, a_{k+1} = s(z_k) for
//! hidden layers and scalar output y = z_{L-1}:
//! * input gradient: g_{L-1} = 1, d_k = g_k W_k, g_{k-1} = d_k (.) s'(z_{k-1}),
//!   and dy/dx = d_0;
//! * for a loss l(dy/dx) with R = dl/d(dy/dx), l's parameter gradient equals
//!   that of the directional derivative sum_b R_b . dy/dx_b, obtained by a
//!   forward tangent pass (adot_0 = R, zdot_k = adot_k W_k^T,
//!   adot_{k+1} = s'(z_k) (.) zdot_k) and its reverse, where the adjoint of
//!   zdot_k is exactly g_k and the adjoint of z_k is
//!   zbar_{L-1} = 0, zbar_{k-1} = (zbar_k W_k) (.) s'(z_{k-1})
//!   + d_k (.) zdot_{k-1} (.) s''(z_{k-1});
//! * dl/dW_k = zbar_k^T a_k + g_k^T adot_k, dl/db_k = sum over rows of zbar_k.

use super::product::{mat_mul, Store};
use ndarray::{Array2, ArrayView1, ArrayView2, ArrayViewMut1, ArrayViewMut2, Axis};
use rand::Rng;
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};

pub use super::activation::Activation;

/// Layer widths and activation of one network; the parameters are separate.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct MlpShape {
    /// Widths from input to output: `[inputs, hidden.., outputs]`.
    pub sizes: Vec<usize>,
    /// Hidden-layer activation (the last layer is linear).
    pub activation: Activation,
}

impl MlpShape {
    /// A network `inputs -> hidden.. -> outputs`.
    pub fn new(inputs: usize, hidden: &[usize], outputs: usize, activation: Activation) -> Self {
        let mut sizes = Vec::with_capacity(hidden.len() + 2);
        sizes.push(inputs);
        sizes.extend_from_slice(hidden);
        sizes.push(outputs);
        Self { sizes, activation }
    }

    /// Number of dense layers.
    pub fn layers(&self) -> usize {
        self.sizes.len() - 1
    }

    /// Input width.
    pub fn inputs(&self) -> usize {
        self.sizes[0]
    }

    /// Output width.
    pub fn outputs(&self) -> usize {
        self.sizes[self.sizes.len() - 1]
    }

    /// Total weights and biases.
    pub fn param_count(&self) -> usize {
        self.sizes.windows(2).map(|w| w[0] * w[1] + w[1]).sum()
    }

    /// Start of layer `k`'s weights in the flat vector, and its (outputs, inputs).
    pub fn layer_offset(&self, k: usize) -> (usize, usize, usize) {
        let off: usize = self.sizes[..=k]
            .windows(2)
            .map(|w| w[0] * w[1] + w[1])
            .sum();
        (off, self.sizes[k + 1], self.sizes[k])
    }

    /// Layer `k`'s weight matrix and bias inside `p`.
    pub fn layer<'a>(&self, p: &'a [f32], k: usize) -> (ArrayView2<'a, f32>, ArrayView1<'a, f32>) {
        let (off, o, i) = self.layer_offset(k);
        let w = ArrayView2::from_shape((o, i), &p[off..off + o * i]).expect("layer shape");
        let b = ArrayView1::from(&p[off + o * i..off + o * i + o]);
        (w, b)
    }

    fn layer_mut<'a>(
        &self,
        p: &'a mut [f32],
        k: usize,
    ) -> (ArrayViewMut2<'a, f32>, ArrayViewMut1<'a, f32>) {
        let (off, o, i) = self.layer_offset(k);
        let (w, b) = p[off..off + o * i + o].split_at_mut(o * i);
        (
            ArrayViewMut2::from_shape((o, i), w).expect("layer shape"),
            ArrayViewMut1::from(b),
        )
    }

    /// Glorot/Xavier uniform weights U(-a, a), a = sqrt(6 / (in + out))
    /// (Glorot & Bengio, 2010), zero biases; appended to `out`.
    pub fn init(&self, rng: &mut ChaCha8Rng, out: &mut Vec<f32>) {
        for w in self.sizes.windows(2) {
            let (i, o) = (w[0], w[1]);
            let a = (6.0 / (i + o) as f32).sqrt();
            for _ in 0..i * o {
                out.push(rng.random_range(-a..a));
            }
            out.extend(std::iter::repeat_n(0.0, o));
        }
    }
}

/// Reusable buffers for one network and one batch size.
#[derive(Debug, Default)]
pub struct MlpWork {
    rows: usize,
    /// Layer inputs a_k (a_0 = x).
    a: Vec<Array2<f32>>,
    /// Pre-activations z_k.
    z: Vec<Array2<f32>>,
    /// s'(z_k) and s''(z_k) for hidden layers.
    d1: Vec<Array2<f32>>,
    d2: Vec<Array2<f32>>,
    /// Adjoints of the output w.r.t. z_k (the input-gradient pass).
    g: Vec<Array2<f32>>,
    /// d_k = g_k W_k, adjoints w.r.t. layer inputs.
    d: Vec<Array2<f32>>,
    /// Tangent inputs and pre-activations.
    adot: Vec<Array2<f32>>,
    zdot: Vec<Array2<f32>>,
    /// Adjoints of the loss w.r.t. z_k.
    zbar: Vec<Array2<f32>>,
    /// Adjoint w.r.t. layer inputs (scratch).
    abar: Vec<Array2<f32>>,
    /// W_k^T (inputs x outputs), packed by [`forward`] once per parameter
    /// vector for it and the tangent pass (the product kernel reads B's
    /// rows whole).
    wt: Vec<Array2<f32>>,
}

impl MlpWork {
    /// Size the buffers for `rows` samples (allocates only when it changes).
    fn ensure(&mut self, shape: &MlpShape, rows: usize) {
        let l = shape.layers();
        if self.rows == rows && self.a.len() == l {
            return;
        }
        let ins = |k: usize| Array2::zeros((rows, shape.sizes[k]));
        let outs = |k: usize| Array2::zeros((rows, shape.sizes[k + 1]));
        self.rows = rows;
        self.a = (0..l).map(ins).collect();
        self.d = (0..l).map(ins).collect();
        self.adot = (0..l).map(ins).collect();
        self.abar = (0..l).map(ins).collect();
        self.z = (0..l).map(outs).collect();
        self.d1 = (0..l).map(outs).collect();
        self.d2 = (0..l).map(outs).collect();
        self.g = (0..l).map(outs).collect();
        self.zdot = (0..l).map(outs).collect();
        self.zbar = (0..l).map(outs).collect();
        self.wt = (0..l)
            .map(|k| Array2::zeros((shape.sizes[k], shape.sizes[k + 1])))
            .collect();
    }

    /// The output of the last [`forward`] (rows x outputs).
    pub fn output(&self) -> ArrayView2<'_, f32> {
        self.z[self.z.len() - 1].view()
    }

    /// The input gradient of the last [`input_gradient`] (rows x inputs).
    pub fn input_grad(&self) -> ArrayView2<'_, f32> {
        self.d[0].view()
    }

    /// The output tangent J R of the last [`backprop_input_gradient_loss`]
    /// along R (rows x outputs).
    pub fn tangent_output(&self) -> ArrayView2<'_, f32> {
        self.zdot[self.zdot.len() - 1].view()
    }
}

/// Forward pass over the rows of `x`; caches what the backward passes need.
/// The output is then in [`MlpWork::output`].
pub fn forward(shape: &MlpShape, p: &[f32], x: ArrayView2<'_, f32>, work: &mut MlpWork) {
    let l = shape.layers();
    work.ensure(shape, x.nrows());
    work.a[0].assign(&x);
    for k in 0..l {
        let (w, b) = shape.layer(p, k);
        work.wt[k].assign(&w.t());
        let z = &mut work.z[k];
        mat_mul(
            work.a[k].view(),
            work.wt[k].view(),
            Store::Overwrite,
            &mut z.view_mut(),
        );
        *z += &b;
        if k + 1 < l {
            shape.activation.eval_rows(
                standard(z),
                standard_mut(&mut work.a[k + 1]),
                standard_mut(&mut work.d1[k]),
                standard_mut(&mut work.d2[k]),
            );
        }
    }
}

/// The elements of a work buffer (always in standard layout) as one slice.
fn standard(m: &Array2<f32>) -> &[f32] {
    m.as_slice().expect("work buffers are in standard layout")
}

fn standard_mut(m: &mut Array2<f32>) -> &mut [f32] {
    m.as_slice_mut()
        .expect("work buffers are in standard layout")
}

/// Gradient of the scalar output with respect to the input, for the rows of
/// the last [`forward`]; the result is in [`MlpWork::input_grad`].
pub fn input_gradient(shape: &MlpShape, p: &[f32], work: &mut MlpWork) {
    assert_eq!(shape.outputs(), 1, "input gradient needs a scalar output");
    let l = shape.layers();
    work.g[l - 1].fill(1.0);
    input_pullback(shape, p, work);
}

/// The vector-Jacobian product J(x_b)^T seed_b of a many-output network
/// for the rows of the last [`forward`] (`seed`: rows x outputs); the
/// result is in [`MlpWork::input_grad`]. [`backprop_input_gradient_loss`]
/// then gives the parameter gradient of sum_b R_b . J^T seed_b with the
/// seed held fixed, and [`MlpWork::tangent_output`] the tangent J R.
pub fn input_vjp(shape: &MlpShape, p: &[f32], seed: ArrayView2<'_, f32>, work: &mut MlpWork) {
    let l = shape.layers();
    work.g[l - 1].assign(&seed);
    input_pullback(shape, p, work);
}

/// The reverse pass from the output adjoint in `work.g[L-1]` to the input.
fn input_pullback(shape: &MlpShape, p: &[f32], work: &mut MlpWork) {
    let l = shape.layers();
    for k in (0..l).rev() {
        let (w, _) = shape.layer(p, k);
        mat_mul(
            work.g[k].view(),
            w,
            Store::Overwrite,
            &mut work.d[k].view_mut(),
        );
        if k > 0 {
            ndarray::Zip::from(&mut work.g[k - 1])
                .and(&work.d[k])
                .and(&work.d1[k - 1])
                .for_each(|g, &d, &s| *g = d * s);
        }
    }
}

/// Add to `grad` the parameter gradient of a loss on the input gradient,
/// given `r` = d(loss)/d(input gradient) (rows x inputs). Needs
/// [`forward`] and [`input_gradient`] on the same rows and parameters first.
pub fn backprop_input_gradient_loss(
    shape: &MlpShape,
    p: &[f32],
    r: ArrayView2<'_, f32>,
    work: &mut MlpWork,
    grad: &mut [f32],
) {
    let l = shape.layers();
    // Tangent pass along r, with the W_k^T that `forward` packed.
    work.adot[0].assign(&r);
    for k in 0..l {
        let zdot = &mut work.zdot[k].view_mut();
        mat_mul(
            work.adot[k].view(),
            work.wt[k].view(),
            Store::Overwrite,
            zdot,
        );
        if k + 1 < l {
            ndarray::Zip::from(&mut work.adot[k + 1])
                .and(&work.zdot[k])
                .and(&work.d1[k])
                .for_each(|a, &zd, &s| *a = zd * s);
        }
    }
    // Reverse pass.
    work.zbar[l - 1].fill(0.0);
    for k in (0..l).rev() {
        let (w, _) = shape.layer(p, k);
        {
            let (mut gw, mut gb) = shape.layer_mut(grad, k);
            if k + 1 < l {
                mat_mul(work.zbar[k].t(), work.a[k].view(), Store::Add, &mut gw);
                gb += &work.zbar[k].sum_axis(Axis(0));
            }
            mat_mul(work.g[k].t(), work.adot[k].view(), Store::Add, &mut gw);
        }
        if k > 0 {
            let (lo, hi) = work.zbar.split_at_mut(k);
            let zb_prev = &mut lo[k - 1];
            if k + 1 < l {
                mat_mul(
                    hi[0].view(),
                    w,
                    Store::Overwrite,
                    &mut work.abar[k].view_mut(),
                );
            } else {
                work.abar[k].fill(0.0);
            }
            ndarray::Zip::from(zb_prev)
                .and(&work.abar[k])
                .and(&work.d1[k - 1])
                .and(&work.d[k])
                .and(&work.zdot[k - 1])
                .and(&work.d2[k - 1])
                .for_each(|zb, &ab, &s1, &d, &zd, &s2| *zb = ab * s1 + d * zd * s2);
        }
    }
}

/// Add to `grad` the parameter gradient of a loss on the outputs, given
/// `dy` = d(loss)/d(output) (rows x outputs). Needs [`forward`] first.
pub fn backprop_output_loss(
    shape: &MlpShape,
    p: &[f32],
    dy: ArrayView2<'_, f32>,
    work: &mut MlpWork,
    grad: &mut [f32],
) {
    let l = shape.layers();
    work.zbar[l - 1].assign(&dy);
    for k in (0..l).rev() {
        let (w, _) = shape.layer(p, k);
        {
            let (mut gw, mut gb) = shape.layer_mut(grad, k);
            mat_mul(work.zbar[k].t(), work.a[k].view(), Store::Add, &mut gw);
            gb += &work.zbar[k].sum_axis(Axis(0));
        }
        if k > 0 {
            let (lo, hi) = work.zbar.split_at_mut(k);
            mat_mul(
                hi[0].view(),
                w,
                Store::Overwrite,
                &mut work.abar[k].view_mut(),
            );
            ndarray::Zip::from(&mut lo[k - 1])
                .and(&work.abar[k])
                .and(&work.d1[k - 1])
                .for_each(|zb, &ab, &s1| *zb = ab * s1);
        }
    }
}

/// The Hessian-vector product (d^2 y / dx^2) r of the scalar output for the
/// rows of the last [`backprop_input_gradient_loss`] with `r` (rows x
/// inputs): the input adjoint of the directional derivative r . dy/dx,
/// zbar_0 W_0 in the notation of the module doc (x enters only z_0 =
/// x W_0^T + b_0; the tangent seed r does not depend on x). A network
/// without hidden layers is linear, so its Hessian is zero.
pub fn input_hessian_product(shape: &MlpShape, p: &[f32], work: &MlpWork) -> Array2<f32> {
    if shape.layers() < 2 {
        return Array2::zeros((work.rows, shape.inputs()));
    }
    let (w, _) = shape.layer(p, 0);
    work.zbar[0].dot(&w)
}
