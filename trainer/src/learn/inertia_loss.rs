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

use ndarray::{s, Array2, ArrayView2};

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

/// Per-sample momentum and generalized force of one chunk.
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

    /// The loss over `chunks` (one mini-batch) and, with `grad`, its
    /// gradient added to `grad`.
    pub fn loss(
        &self,
        p: &[f32],
        chunks: &[&Chunk],
        work: &mut HnnWork,
        grad: Option<&mut [f32]>,
    ) -> f64 {
        let terms: Vec<Terms> = chunks.iter().map(|c| self.terms(p, c, work)).collect();
        let (num, den) = self.sums(chunks, &terms);
        let den = den.max(1e-30);
        if let Some(grad) = grad {
            for (c, t) in chunks.iter().zip(&terms) {
                self.backprop_chunk(p, c, t, (num, den), work, grad);
            }
        }
        num / den
    }

    /// pi and phi at every sample of a chunk.
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

    /// Residual and momentum change of the window starting at `k`.
    fn window(&self, c: &Chunk, t: &Terms, k: usize, i: usize) -> (f64, f64) {
        let last = k + self.window - 1;
        let dp = (t.pi[[last, i]] - t.pi[[k, i]]) as f64;
        let integral: f64 = (k..last)
            .map(|j| 0.5 * c.h[j + 1] as f64 * (t.phi[[j, i]] + t.phi[[j + 1, i]]) as f64)
            .sum();
        (dp - integral, dp)
    }

    /// Window starts of a chunk.
    fn starts(&self, c: &Chunk) -> std::ops::Range<usize> {
        0..(c.z.nrows() + 1).saturating_sub(self.window)
    }

    /// Sum r^2 and sum dp^2 over every window and coordinate.
    fn sums(&self, chunks: &[&Chunk], terms: &[Terms]) -> (f64, f64) {
        let (mut num, mut den) = (0.0, 0.0);
        for (c, t) in chunks.iter().zip(terms) {
            for k in self.starts(c) {
                for i in 0..self.dof() {
                    let (r, dp) = self.window(c, t, k, i);
                    num += r * r;
                    den += dp * dp;
                }
            }
        }
        (num, den)
    }

    /// Cotangents on pi and phi, then through the networks and B, D.
    fn backprop_chunk(
        &self,
        p: &[f32],
        c: &Chunk,
        t: &Terms,
        (num, den): (f64, f64),
        work: &mut HnnWork,
        grad: &mut [f32],
    ) {
        let n = self.dof();
        let rows = c.z.nrows();
        let (mut c_pi, mut c_phi) = (Array2::<f64>::zeros((rows, n)), Array2::zeros((rows, n)));
        for k in self.starts(c) {
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
        self.pull_back(p, c, c_pi.view(), c_phi.view(), work, grad);
    }

    /// From cotangents on pi and phi to the parameter gradient.
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
        self.objective.energy_gradient(&p[..np], c.z.view(), work);
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
