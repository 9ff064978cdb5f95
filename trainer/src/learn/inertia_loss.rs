//! The loss that learns a mass matrix from joint rates: the Euler-Lagrange
//! equation d/dt (dL/dv) = dL/dq + Q in its integral form over short
//! windows of the log,
//!
//! r = p(t_k+K) - p(t_k) - sum_j h_j / 2 (f(t_j) + f(t_j+1)),
//!
//! with p = dL/dv, f = dL/dq + Q and the sum the trapezoid rule over the
//! window's K steps. L(q, v) = 1/2 v^T M(q) v - V(q) is the mechanical
//! structure's energy read as a Lagrangian (the same networks: the factor
//! gives M = L L^T + eps I, the scalar network -V), so the gradient code of
//! [`crate::learn::hnn`] serves unchanged. The generalized force is
//! Q = B u - D v, B (n x m) an input gain and D (n) a viscous joint
//! friction, both constant and learned alongside.
//!
//! Units: everything is in the normalized momentum units of the model
//! (pi = dE/dz_v, phi = (s_v / s_q) dE/dz_q + B u~ - D z_v, u~ the inputs
//! over their RMS), per second. The loss is sum |r|^2 / sum |dp|^2 over the
//! windows and coordinates (dp the window's momentum change): a Lagrangian
//! and any multiple of it give the same motion, so an absolute residual
//! would shrink the model towards zero; this ratio is the same for every
//! multiple, and the scale is fixed afterwards by a stated normalization.
//! (A ratio per coordinate, averaged, was tried first: on one of three
//! double-pendulum logs it stopped in a minimum with M(q) 83 % off; the
//! single ratio fitted all three within 1.4 %.)
//!
//! Gradient (derived here): with N = sum r^2, D = sum dp^2, dl/dr = 2 r / D
//! on the integral and 2 r / D - 2 N dp / D^2 on the momentum difference
//! (r = dp - integral); those reach pi at the window's
//! ends (+ at the last sample, - at the first) and phi at every sample with
//! its trapezoid weight (minus sign), and from pi and phi the energy
//! gradient's cotangent that [`HnnObjective::backprop`] takes.

use std::ops::Range;

use ndarray::{concatenate, s, Array2, ArrayView2, Axis};

use crate::learn::hnn::{HnnObjective, HnnWork};

/// One contiguous run of samples with its windows.
#[derive(Debug, Clone)]
pub struct Chunk {
    /// Normalized states (rows x 2n): z_q then z_v.
    pub z: Array2<f32>,
    /// Normalized inputs (rows x m).
    pub u: Array2<f32>,
    /// Step before each sample (s); `h[0]` unused.
    pub h: Vec<f32>,
}

/// Chunks stacked for one pass of the networks over all their rows; every
/// window stays inside its own chunk (`segments`).
#[derive(Debug, Clone)]
pub struct Batch {
    /// The chunks' rows, one after another.
    pub rows: Chunk,
    /// Each chunk's rows in `rows`.
    pub segments: Vec<Range<usize>>,
}

impl Batch {
    /// `chunks` stacked in order.
    pub fn of(chunks: &[&Chunk]) -> Self {
        let mut segments = Vec::with_capacity(chunks.len());
        let mut start = 0;
        for c in chunks {
            segments.push(start..start + c.z.nrows());
            start += c.z.nrows();
        }
        let stack = |f: fn(&Chunk) -> ArrayView2<'_, f32>| {
            let views: Vec<ArrayView2<'_, f32>> = chunks.iter().map(|c| f(c)).collect();
            concatenate(Axis(0), &views).expect("chunks of one log have equal widths")
        };
        Self {
            rows: Chunk {
                z: stack(|c| c.z.view()),
                u: stack(|c| c.u.view()),
                h: chunks.iter().flat_map(|c| c.h.iter().copied()).collect(),
            },
            segments,
        }
    }
}

/// The loss's fixed settings.
#[derive(Debug, Clone)]
pub struct InertiaLoss {
    /// The energy model's objective (mechanical structure).
    pub objective: HnnObjective,
    /// s_v,i / s_q,i (1/s), from dE/dz_q to normalized momentum rate.
    pub rate_gain: Vec<f32>,
    /// Samples per window (K + 1).
    pub window: usize,
    /// Inputs m.
    pub inputs: usize,
}

/// Per-sample momentum and generalized force of a batch.
struct Terms {
    pi: Array2<f32>,
    phi: Array2<f32>,
}

impl InertiaLoss {
    /// Degrees of freedom.
    fn dof(&self) -> usize {
        self.objective.dof
    }

    /// Parameters: the networks', then B (n x m, row-major), then D (n).
    pub fn param_count(&self) -> usize {
        self.objective.arch.param_count(self.dof()) + self.dof() * (self.inputs + 1)
    }

    /// The loss over `batch` (one mini-batch) and, with `grad`, its
    /// gradient added to `grad`.
    pub fn loss(
        &self,
        p: &[f32],
        batch: &Batch,
        work: &mut HnnWork,
        grad: Option<&mut [f32]>,
    ) -> f64 {
        let terms = self.terms(p, &batch.rows, work);
        let (num, den) = self.sums(batch, &terms);
        let den = den.max(1e-30);
        if let Some(grad) = grad {
            let (c_pi, c_phi) = self.cotangents(batch, &terms, (num, den));
            self.pull_back(p, &batch.rows, c_pi.view(), c_phi.view(), work, grad);
        }
        num / den
    }

    /// Sum |r|^2 and sum |dp|^2 of `batch`, for a loss over several
    /// batches (their ratio).
    pub fn sums_of(&self, p: &[f32], batch: &Batch, work: &mut HnnWork) -> (f64, f64) {
        let terms = self.terms(p, &batch.rows, work);
        self.sums(batch, &terms)
    }

    /// pi and phi at every row; leaves the energy gradient of those rows in
    /// `work` for [`Self::pull_back`].
    fn terms(&self, p: &[f32], c: &Chunk, work: &mut HnnWork) -> Terms {
        let n = self.dof();
        let np = self.objective.arch.param_count(n);
        self.objective.energy_gradient(&p[..np], c.z.view(), work);
        let pi = work.u.slice(s![.., n..]).to_owned();
        let mut phi = Array2::zeros((c.z.nrows(), n));
        let (b, d) = p[np..].split_at(n * self.inputs);
        for k in 0..c.z.nrows() {
            for i in 0..n {
                let input: f32 = (0..self.inputs)
                    .map(|j| b[i * self.inputs + j] * c.u[[k, j]])
                    .sum();
                phi[[k, i]] = self.rate_gain[i] * work.u[[k, i]] + input - d[i] * c.z[[k, n + i]];
            }
        }
        Terms { pi, phi }
    }

    /// Residual and momentum change of the window starting at row `k`.
    fn window(&self, c: &Chunk, t: &Terms, k: usize, i: usize) -> (f64, f64) {
        let last = k + self.window - 1;
        let dp = (t.pi[[last, i]] - t.pi[[k, i]]) as f64;
        let integral: f64 = (k..last)
            .map(|j| 0.5 * c.h[j + 1] as f64 * (t.phi[[j, i]] + t.phi[[j + 1, i]]) as f64)
            .sum();
        (dp - integral, dp)
    }

    /// Window starts of every segment of a batch.
    fn starts<'a>(&'a self, batch: &'a Batch) -> impl Iterator<Item = usize> + 'a {
        batch
            .segments
            .iter()
            .flat_map(|seg| seg.start..(seg.end + 1).saturating_sub(self.window).max(seg.start))
    }

    /// Sum r^2 and sum dp^2 over every window and coordinate.
    fn sums(&self, batch: &Batch, terms: &Terms) -> (f64, f64) {
        let (mut num, mut den) = (0.0, 0.0);
        for k in self.starts(batch) {
            for i in 0..self.dof() {
                let (r, dp) = self.window(&batch.rows, terms, k, i);
                num += r * r;
                den += dp * dp;
            }
        }
        (num, den)
    }

    /// Cotangents on pi and phi of every row.
    fn cotangents(
        &self,
        batch: &Batch,
        t: &Terms,
        (num, den): (f64, f64),
    ) -> (Array2<f64>, Array2<f64>) {
        let n = self.dof();
        let c = &batch.rows;
        let rows = c.z.nrows();
        let (mut c_pi, mut c_phi) = (Array2::<f64>::zeros((rows, n)), Array2::zeros((rows, n)));
        for k in self.starts(batch) {
            let last = k + self.window - 1;
            for i in 0..n {
                let (r, dp) = self.window(c, t, k, i);
                let g_int = -2.0 * r / den;
                let g_dp = 2.0 * r / den - 2.0 * num * dp / (den * den);
                c_pi[[last, i]] += g_dp;
                c_pi[[k, i]] -= g_dp;
                for j in k..last {
                    let w = 0.5 * c.h[j + 1] as f64 * g_int;
                    c_phi[[j, i]] += w;
                    c_phi[[j + 1, i]] += w;
                }
            }
        }
        (c_pi, c_phi)
    }

    /// From cotangents on pi and phi to the parameter gradient, through the
    /// energy gradient [`Self::terms`] left in `work`.
    fn pull_back(
        &self,
        p: &[f32],
        c: &Chunk,
        c_pi: ArrayView2<'_, f64>,
        c_phi: ArrayView2<'_, f64>,
        work: &mut HnnWork,
        grad: &mut [f32],
    ) {
        let n = self.dof();
        let np = self.objective.arch.param_count(n);
        let (g_net, g_rest) = grad.split_at_mut(np);
        let (g_b, g_d) = g_rest.split_at_mut(n * self.inputs);
        for k in 0..c.z.nrows() {
            for i in 0..n {
                let cphi = c_phi[[k, i]];
                work.r[[k, i]] = (cphi * self.rate_gain[i] as f64) as f32;
                work.r[[k, n + i]] = c_pi[[k, i]] as f32;
                for j in 0..self.inputs {
                    g_b[i * self.inputs + j] += (cphi * c.u[[k, j]] as f64) as f32;
                }
                g_d[i] -= (cphi * c.z[[k, n + i]] as f64) as f32;
            }
        }
        self.objective.backprop(&p[..np], c.z.view(), work, g_net);
    }
}
