//! The trajectory-matching loss: a separable energy H = V(q) + 1/2 p^T
//! M^-1 p (quadratic kinetic term) rolled out with the device's explicit
//! symplectic method over windows of K log steps, positions compared with
//! the log, and the exact gradient of that loss through every step (the
//! discrete adjoint of kick-drift-kick Stormer-Verlet, reverse mode).
//!
//! The step is the runtime's (`visviva-runtime`, `integrate.rs`): per
//! substep of size h, p' = p - h/2 dV/dq(q), q1 = q + h M^-1 p',
//! p1 = p' - h/2 dV/dq(q1); Yoshida-4 is three such substeps of sizes
//! w1 h, w0 h, w1 h (Yoshida 1990). The host checks and rollouts still call
//! the runtime; this is the training-side differentiable mirror of the same
//! formula (the tests compare both).
//!
//! Loss: the mean over windows, samples k = 0..K and coordinates i of
//! ((q_k,i - y_k,i) / sigma_i)^2, with sigma_i the coordinate's noise
//! standard deviation from the noise model (so a perfect model of a noisy
//! log sits near 1 on its own training windows).
//!
//! Adjoint (derived here). With G = dV/dq, qbar/pbar the adjoints of the
//! state, for a substep j: phbar_j = pbar_{j+1} + h_j M^-1 qbar_{j+1},
//! dLoss/dM^-1 += h_j qbar_{j+1} ph_j^T, and the potential enters at each
//! node q_j through r_j . G(q_j) with r_j = -(h_{j-1} + h_j)/2 phbar_j
//! (-h_0/2 at the first node; the last node's kick reaches only the
//! unobserved final momentum), whose q- and parameter-gradients are the
//! network's Hessian-vector product and double backpropagation.

use anyhow::{bail, Result};
use ndarray::{s, Array2};
use visviva_runtime::Method;

use crate::learn::hnn::{cholesky_from_params, tri_index, EnergyArch, KineticArch, Normalization};
use crate::learn::net::{self, MlpShape, MlpWork};

/// Substep sizes of one step, as fractions of the step (Yoshida's weights
/// w1 = 1 / (2 - 2^(1/3)), w0 = 1 - 2 w1).
pub fn substep_fractions(method: Method) -> Result<Vec<f64>> {
    let w1 = 1.0 / (2.0 - 2f64.powf(1.0 / 3.0));
    match method {
        Method::StormerVerlet => Ok(vec![1.0]),
        Method::Yoshida4 => Ok(vec![w1, 1.0 - 2.0 * w1, w1]),
        other => bail!(
            "trajectory matching differentiates through verlet and yoshida4 only; the \
             integrator {} is not supported (use verlet or yoshida4, or fit mode derivative)",
            crate::deploy::integrator::method_name(other)
        ),
    }
}

/// The loss for one structure, normalization, method and step.
#[derive(Debug, Clone)]
pub struct RolloutLoss {
    /// Degrees of freedom.
    pub dof: usize,
    potential: MlpShape,
    norm: Normalization,
    /// Substep sizes of one log step (s).
    hs: Vec<f64>,
    /// Noise standard deviation per coordinate (SI units).
    sigma: Vec<f64>,
}

/// One batch of windows: the logged positions at samples 0..=K (each
/// B x n) and the initial states (B x 2n, q then p, SI units).
#[derive(Debug, Clone)]
pub struct WindowBatch {
    /// `y[k]`: positions at sample k.
    pub y: Vec<Array2<f64>>,
    /// Initial states.
    pub x0: Array2<f64>,
}

/// Gradients of the loss: model parameters (the energy model's layout)
/// and initial states (B x 2n).
#[derive(Debug, Clone)]
pub struct RolloutGradient {
    /// d loss / d parameters.
    pub params: Vec<f64>,
    /// d loss / d initial states.
    pub x0: Array2<f64>,
}

/// Forward values kept for the adjoint.
struct Tape {
    /// q at every node (substep boundary), S + 1 entries.
    q: Vec<Array2<f64>>,
    /// p after the first half kick of every substep, S entries.
    ph: Vec<Array2<f64>>,
}

impl RolloutLoss {
    /// The loss for a separable quadratic-kinetic `arch` under `norm`,
    /// stepped by `method` with log step `dt` (s); `sigma` per coordinate.
    pub fn new(
        dof: usize,
        arch: &EnergyArch,
        norm: &Normalization,
        method: Method,
        dt: f64,
        sigma: Vec<f64>,
    ) -> Result<Self> {
        let EnergyArch::Separable {
            potential,
            kinetic: KineticArch::Quadratic,
        } = arch
        else {
            bail!(
                "trajectory matching needs arch = separable with kinetic = quadratic (the \
                 differentiable step covers H = V(q) + 1/2 p^T M^-1 p); use fit mode derivative"
            );
        };
        if sigma.len() != dof || sigma.iter().any(|s| !(s.is_finite() && *s > 0.0)) {
            bail!("noise scales {sigma:?} must be {dof} finite positive numbers");
        }
        if !(dt.is_finite() && dt > 0.0) {
            bail!("time step {dt} s is not usable");
        }
        let hs = substep_fractions(method)?.iter().map(|c| c * dt).collect();
        Ok(Self {
            dof,
            potential: potential.clone(),
            norm: norm.clone(),
            hs,
            sigma,
        })
    }

    /// M^-1 = es diag(1/s_p) L L^T diag(1/s_p) and the factor L (f64).
    fn inverse_mass(&self, params: &[f32]) -> (Array2<f64>, Array2<f64>) {
        let n = self.dof;
        let raw = &params[self.potential.param_count()..];
        let l = cholesky_from_params(raw, n).mapv(f64::from);
        let es = self.norm.energy_scale as f64;
        let mut minv = l.dot(&l.t());
        for i in 0..n {
            for j in 0..n {
                let (si, sj) = (self.norm.scale[n + i], self.norm.scale[n + j]);
                minv[[i, j]] *= es / (si as f64 * sj as f64);
            }
        }
        (minv, l)
    }

    /// Normalized network inputs of positions `q`.
    fn inputs(&self, q: &Array2<f64>) -> Array2<f32> {
        let (off, sc) = (&self.norm.offset, &self.norm.scale);
        Array2::from_shape_fn(q.dim(), |(b, i)| {
            ((q[[b, i]] - off[i] as f64) / sc[i] as f64) as f32
        })
    }

    /// dV/dq (SI) at positions `q` (B x n).
    fn potential_gradient(&self, params: &[f32], q: &Array2<f64>, w: &mut MlpWork) -> Array2<f64> {
        let pv = &params[..self.potential.param_count()];
        net::forward(&self.potential, pv, self.inputs(q).view(), w);
        net::input_gradient(&self.potential, pv, w);
        let es = self.norm.energy_scale as f64;
        let g = w.input_grad();
        Array2::from_shape_fn(q.dim(), |(b, i)| {
            g[[b, i]] as f64 * es / self.norm.scale[i] as f64
        })
    }

    /// For the scalar sum_b r_b . G(q_b): its parameter gradient added to
    /// `grad` (the potential's part) and its q-gradient returned.
    fn potential_vjp(
        &self,
        params: &[f32],
        q: &Array2<f64>,
        r: &Array2<f64>,
        w: &mut MlpWork,
        grad: &mut [f32],
    ) -> Array2<f64> {
        let np = self.potential.param_count();
        let pv = &params[..np];
        net::forward(&self.potential, pv, self.inputs(q).view(), w);
        net::input_gradient(&self.potential, pv, w);
        let es = self.norm.energy_scale as f64;
        let sc = &self.norm.scale;
        let rz = Array2::from_shape_fn(q.dim(), |(b, i)| (r[[b, i]] * es / sc[i] as f64) as f32);
        net::backprop_input_gradient_loss(&self.potential, pv, rz.view(), w, &mut grad[..np]);
        let hv = net::input_hessian_product(&self.potential, pv, w);
        Array2::from_shape_fn(q.dim(), |(b, i)| hv[[b, i]] as f64 / sc[i] as f64)
    }

    /// Roll every window's initial state over K steps; the tape holds q at
    /// every node and the half-kicked momenta.
    fn forward(&self, params: &[f32], x0: &Array2<f64>, steps: usize, w: &mut MlpWork) -> Tape {
        let n = self.dof;
        let (minv, _) = self.inverse_mass(params);
        let mut q = x0.slice(s![.., ..n]).to_owned();
        let mut p = x0.slice(s![.., n..]).to_owned();
        let mut g = self.potential_gradient(params, &q, w);
        let mut tape = Tape {
            q: vec![q.clone()],
            ph: Vec::new(),
        };
        for _ in 0..steps {
            for &h in &self.hs {
                let ph = &p - &(&g * (0.5 * h));
                q = &q + &(ph.dot(&minv) * h);
                g = self.potential_gradient(params, &q, w);
                p = &ph - &(&g * (0.5 * h));
                tape.ph.push(ph);
                tape.q.push(q.clone());
            }
        }
        tape
    }

    /// The rolled-out positions at samples 0..=`steps` (each B x n) from
    /// the initial states `x0` (B x 2n).
    pub fn positions(&self, params: &[f32], x0: &Array2<f64>, steps: usize) -> Vec<Array2<f64>> {
        let tape = self.forward(params, x0, steps, &mut MlpWork::default());
        tape.q.into_iter().step_by(self.hs.len()).collect()
    }

    /// Mean squared normalized position error of `batch`; with `grad`, its
    /// gradient by the discrete adjoint (see the module doc).
    pub fn loss(
        &self,
        params: &[f32],
        batch: &WindowBatch,
        grad: Option<&mut RolloutGradient>,
    ) -> f64 {
        let n = self.dof;
        let steps = batch.y.len().saturating_sub(1);
        let rows = batch.x0.nrows();
        let mut w = MlpWork::default();
        let tape = self.forward(params, &batch.x0, steps, &mut w);
        let per = self.hs.len();
        let count = (rows * (steps + 1) * n).max(1) as f64;
        let mut total = 0.0;
        // d loss / d q at each observed node.
        let mut obs = Vec::with_capacity(steps + 1);
        for (k, y) in batch.y.iter().enumerate() {
            let q = &tape.q[k * per];
            let mut d = Array2::zeros((rows, n));
            for b in 0..rows {
                for i in 0..n {
                    let e = (q[[b, i]] - y[[b, i]]) / self.sigma[i];
                    total += e * e;
                    d[[b, i]] = 2.0 * e / (self.sigma[i] * count);
                }
            }
            obs.push(d);
        }
        if let Some(g) = grad {
            self.adjoint(params, &tape, &obs, &mut w, g);
        }
        total / count
    }

    /// The reverse pass over the tape; `obs[k]` is d loss / d q at sample k.
    fn adjoint(
        &self,
        params: &[f32],
        tape: &Tape,
        obs: &[Array2<f64>],
        w: &mut MlpWork,
        out: &mut RolloutGradient,
    ) {
        let n = self.dof;
        let per = self.hs.len();
        let nodes = tape.ph.len();
        let (minv, l) = self.inverse_mass(params);
        let mut gnet = vec![0.0f32; params.len()];
        let mut gm = Array2::<f64>::zeros((n, n));
        let mut qbar = obs[obs.len() - 1].clone();
        let mut pbar = Array2::<f64>::zeros(qbar.dim());
        for j in (0..nodes).rev() {
            let h = self.hs[j % per];
            let ph = &tape.ph[j];
            let phbar = &pbar + &(qbar.dot(&minv) * h);
            gm = gm + qbar.t().dot(ph) * h;
            if j % per == 0 {
                qbar += &obs[j / per];
            }
            let h_prev = if j > 0 { self.hs[(j - 1) % per] } else { 0.0 };
            let r = &phbar * (-0.5 * (h + h_prev));
            qbar = qbar + self.potential_vjp(params, &tape.q[j], &r, w, &mut gnet);
            pbar = phbar;
        }
        out.x0 = ndarray::concatenate(ndarray::Axis(1), &[qbar.view(), pbar.view()])
            .expect("q and p adjoints have the same rows");
        out.params = gnet.iter().map(|v| *v as f64).collect();
        self.kinetic_gradient(&gm, &l, &mut out.params);
    }

    /// Chain d loss / d M^-1 (`gm`) to the packed factor L (log diagonal).
    fn kinetic_gradient(&self, gm: &Array2<f64>, l: &Array2<f64>, out: &mut [f64]) {
        let n = self.dof;
        let es = self.norm.energy_scale as f64;
        let a: Vec<f64> = (0..n)
            .map(|i| 1.0 / self.norm.scale[n + i] as f64)
            .collect();
        // M^-1 = es A L L^T A: dLoss/dL = es A (Gm + Gm^T) A L.
        let sym = Array2::from_shape_fn((n, n), |(i, j)| {
            es * a[i] * (gm[[i, j]] + gm[[j, i]]) * a[j]
        });
        let dl = sym.dot(l);
        let base = self.potential.param_count();
        for i in 0..n {
            for j in 0..=i {
                let chain = if i == j { l[[i, i]] } else { 1.0 };
                out[base + tri_index(i, j)] += dl[[i, j]] * chain;
            }
        }
    }
}
