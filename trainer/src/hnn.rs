//! The Hamiltonian-neural-network loss (Greydanus, Dzamba & Yosinski, 2019)
//! and the plain vector-field baseline it is compared against, with their
//! parameter gradients.
//!
//! Units. The network sees z = (x - offset) / scale with offset and scale the
//! per-coordinate mean and standard deviation of the training states. Target
//! derivatives are compared in normalized units: component i is divided by
//! `rate_scale[i]`, its root-mean-square over the training data, so every
//! component of dx/dt weighs alike whatever its physical unit. The energy
//! scale is the geometric mean over the degrees of freedom of
//! `rate_scale(q_i) * scale(p_i)` and `rate_scale(p_i) * scale(q_i)`: with it
//! the factor between dE/dz and the normalized target is close to one, so E
//! and its gradient are O(1) (for the mass-spring both products are equal).
//!
//! Loss (per sample, then averaged over the batch): the mean over the 2n
//! components of the squared difference between J dH/dx = (dH/dp, -dH/dq)
//! and the target dx/dt, both divided by `rate_scale`.
//!
//! Damped, driven systems ([`PortObjective`]) predict the port-Hamiltonian
//! field (J - R) dH/dx + G u instead. R = L L^T acts on the momentum block
//! only (friction and damper forces; position rates stay dH/dp), with the
//! n x n lower-triangular L learned in normalized units (see [`PortModel`]
//! for the exact conversion to physical units); G (2n x m) is learned for
//! normalized inputs u / input_scale.

use anyhow::{bail, Result};
use ndarray::{s, Array1, Array2, ArrayView2, Axis};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};

use crate::dataset::Dataset;
use crate::net::{self, Activation, MlpShape, MlpWork};

/// Kinetic term of a separable energy.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub enum KineticArch {
    /// T = 1/2 z_p^T L L^T z_p. Parameters: the n (n + 1) / 2 entries of L row
    /// by row (L00, L10, L11, ...), diagonal entries stored as ln L_ii so the
    /// diagonal stays positive.
    Quadratic,
    /// T = MLP(z_p).
    Network(MlpShape),
}

/// The energy network's structure.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub enum EnergyArch {
    /// E = MLP(z) over all 2n coordinates.
    General(MlpShape),
    /// E = V(z_q) + T(z_p); parameters are V's followed by T's.
    Separable {
        /// The potential network over n coordinates.
        potential: MlpShape,
        /// The kinetic term.
        kinetic: KineticArch,
    },
}

impl EnergyArch {
    /// Number of trainable parameters for `dof` degrees of freedom.
    pub fn param_count(&self, dof: usize) -> usize {
        match self {
            Self::General(m) => m.param_count(),
            Self::Separable { potential, kinetic } => {
                potential.param_count()
                    + match kinetic {
                        KineticArch::Quadratic => dof * (dof + 1) / 2,
                        KineticArch::Network(m) => m.param_count(),
                    }
            }
        }
    }

    /// Seeded initial parameters: Glorot-uniform networks, L = identity.
    pub fn init(&self, dof: usize, seed: u64) -> Vec<f32> {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let mut p = Vec::with_capacity(self.param_count(dof));
        match self {
            Self::General(m) => m.init(&mut rng, &mut p),
            Self::Separable { potential, kinetic } => {
                potential.init(&mut rng, &mut p);
                match kinetic {
                    KineticArch::Quadratic => {
                        p.extend(std::iter::repeat_n(0.0, dof * (dof + 1) / 2))
                    }
                    KineticArch::Network(m) => m.init(&mut rng, &mut p),
                }
            }
        }
        p
    }
}

/// Index of L_ij (j <= i) in the row-by-row packed lower triangle.
pub fn tri_index(i: usize, j: usize) -> usize {
    i * (i + 1) / 2 + j
}

/// The Cholesky factor L (dense n x n) from packed parameters (log diagonal).
pub fn cholesky_from_params(raw: &[f32], n: usize) -> Array2<f32> {
    let mut l = Array2::zeros((n, n));
    for i in 0..n {
        for j in 0..=i {
            let v = raw[tri_index(i, j)];
            l[[i, j]] = if i == j { v.exp() } else { v };
        }
    }
    l
}

/// Normalization of states, target derivatives and energy (see module doc).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Normalization {
    /// Per-coordinate offsets (means), q then p.
    pub offset: Vec<f32>,
    /// Per-coordinate scales (standard deviations), q then p.
    pub scale: Vec<f32>,
    /// Per-component scales of dx/dt (root mean square).
    pub rate_scale: Vec<f32>,
    /// Physical energy per unit of E.
    pub energy_scale: f32,
}

impl Normalization {
    /// Statistics of `data` (f64 accumulation). With `momenta_at_zero` the
    /// momentum offsets are 0 and their scales the root mean square: a
    /// quadratic kinetic term 1/2 z_p^T L L^T z_p has its minimum at z_p = 0,
    /// which must be p = 0 (a data window rarely has zero mean momentum).
    pub fn from_data(data: &Dataset, momenta_at_zero: bool) -> Result<Self> {
        let d = 2 * data.dof;
        let count = data.samples();
        if count < 2 {
            bail!("need at least 2 samples to fit, found {count}");
        }
        let mut sum = vec![0.0f64; d];
        let mut sq = vec![0.0f64; d];
        let mut rate_sq = vec![0.0f64; d];
        for t in &data.trajectories {
            for (row, drow) in t.x.rows().into_iter().zip(t.dx.rows()) {
                for i in 0..d {
                    sum[i] += row[i];
                    sq[i] += row[i] * row[i];
                    rate_sq[i] += drow[i] * drow[i];
                }
            }
        }
        let nf = count as f64;
        let mut offset = vec![0.0f32; d];
        let mut scale = vec![0.0f32; d];
        let mut rate_scale = vec![0.0f32; d];
        for i in 0..d {
            let mean = if momenta_at_zero && i >= data.dof {
                0.0
            } else {
                sum[i] / nf
            };
            let var = (sq[i] / nf - mean * mean).max(0.0);
            let std = var.sqrt();
            offset[i] = mean as f32;
            // A coordinate that never moves gets unit scale (nothing to learn).
            scale[i] = if std > 1e-9 * mean.abs().max(1e-30) && std > 0.0 {
                std as f32
            } else {
                1.0
            };
            let rms = (rate_sq[i] / nf).sqrt();
            rate_scale[i] = if rms > 0.0 { rms as f32 } else { 1.0 };
        }
        let n = data.dof;
        let mut log_sum = 0.0f64;
        for i in 0..n {
            log_sum += (rate_scale[i] as f64 * scale[n + i] as f64).ln();
            log_sum += (rate_scale[n + i] as f64 * scale[i] as f64).ln();
        }
        let energy_scale = (log_sum / (2 * n) as f64).exp() as f32;
        if !energy_scale.is_finite() || energy_scale <= 0.0 {
            bail!("could not choose an energy scale from the data (all derivatives zero?)");
        }
        Ok(Self {
            offset,
            scale,
            rate_scale,
            energy_scale,
        })
    }

    /// Normalized states z and normalized targets dx / rate_scale, one row
    /// per sample, all trajectories stacked.
    pub fn normalize(&self, data: &Dataset) -> (Array2<f32>, Array2<f32>) {
        let d = 2 * data.dof;
        let count = data.samples();
        let mut z = Array2::zeros((count, d));
        let mut t = Array2::zeros((count, d));
        let mut r = 0;
        for tr in &data.trajectories {
            for (row, drow) in tr.x.rows().into_iter().zip(tr.dx.rows()) {
                for i in 0..d {
                    z[[r, i]] = ((row[i] - self.offset[i] as f64) / self.scale[i] as f64) as f32;
                    t[[r, i]] = (drow[i] / self.rate_scale[i] as f64) as f32;
                }
                r += 1;
            }
        }
        (z, t)
    }

    /// Factors from dE/dz to normalized J dH/dx: component i < n (dq_i/dt)
    /// is `gain[i] * dE/dz_{p_i}`, component n + i (dp_i/dt) is
    /// `gain[n + i] * dE/dz_{q_i}` (negative).
    pub fn gains(&self, n: usize) -> Vec<f32> {
        let es = self.energy_scale;
        let mut g = vec![0.0; 2 * n];
        for i in 0..n {
            g[i] = es / (self.scale[n + i] * self.rate_scale[i]);
            g[n + i] = -es / (self.scale[i] * self.rate_scale[n + i]);
        }
        g
    }
}

/// A training objective over normalized states and targets: the sum over the
/// rows of the per-sample loss, and optionally its parameter gradient (added
/// to `grad`). Implementations are deterministic for given inputs.
pub trait Objective: Sync {
    /// Reusable buffers.
    type Work: Default + Send;
    /// Number of parameters.
    fn param_count(&self) -> usize;
    /// Sum of per-sample losses over the rows of `z`, `t`.
    fn loss_sum(
        &self,
        p: &[f32],
        z: ArrayView2<'_, f32>,
        t: ArrayView2<'_, f32>,
        work: &mut Self::Work,
        grad: Option<&mut [f32]>,
    ) -> f64;
}

/// Buffers of [`HnnObjective`].
#[derive(Debug, Default)]
pub struct HnnWork {
    first: MlpWork,
    second: MlpWork,
    /// dE/dz (rows x 2n).
    u: Array2<f32>,
    /// d loss / d u.
    r: Array2<f32>,
}

/// The Hamiltonian-network loss for one architecture.
#[derive(Debug, Clone)]
pub struct HnnObjective {
    /// Degrees of freedom.
    pub dof: usize,
    /// Network structure.
    pub arch: EnergyArch,
    /// See [`Normalization::gains`].
    pub gains: Vec<f32>,
}

impl HnnObjective {
    /// The loss for `arch` under `norm`.
    pub fn new(dof: usize, arch: EnergyArch, norm: &Normalization) -> Self {
        Self {
            dof,
            arch,
            gains: norm.gains(dof),
        }
    }

    /// dE/dz into `work.u` and E per row into the returned vector.
    pub fn energy_gradient(
        &self,
        p: &[f32],
        z: ArrayView2<'_, f32>,
        work: &mut HnnWork,
    ) -> Array1<f32> {
        let n = self.dof;
        let rows = z.nrows();
        if work.u.dim() != (rows, 2 * n) {
            work.u = Array2::zeros((rows, 2 * n));
            work.r = Array2::zeros((rows, 2 * n));
        }
        match &self.arch {
            EnergyArch::General(m) => {
                net::forward(m, p, z, &mut work.first);
                net::input_gradient(m, p, &mut work.first);
                work.u.assign(&work.first.input_grad());
                work.first.output().column(0).to_owned()
            }
            EnergyArch::Separable { potential, kinetic } => {
                let np = potential.param_count();
                let (pv, pt) = p.split_at(np);
                let zq = z.slice(s![.., ..n]);
                let zp = z.slice(s![.., n..]);
                net::forward(potential, pv, zq, &mut work.first);
                net::input_gradient(potential, pv, &mut work.first);
                work.u
                    .slice_mut(s![.., ..n])
                    .assign(&work.first.input_grad());
                let mut e = work.first.output().column(0).to_owned();
                match kinetic {
                    KineticArch::Network(m) => {
                        net::forward(m, pt, zp, &mut work.second);
                        net::input_gradient(m, pt, &mut work.second);
                        work.u
                            .slice_mut(s![.., n..])
                            .assign(&work.second.input_grad());
                        e += &work.second.output().column(0);
                    }
                    KineticArch::Quadratic => {
                        let l = cholesky_from_params(pt, n);
                        // v_b = L^T z_b, i.e. V = Z L; dT/dz = L v, i.e. V L^T.
                        let v = zp.dot(&l);
                        work.u.slice_mut(s![.., n..]).assign(&v.dot(&l.t()));
                        e += &(v.map_axis(Axis(1), |r| 0.5 * r.dot(&r)));
                    }
                }
                e
            }
        }
    }
}

impl Objective for HnnObjective {
    type Work = HnnWork;

    fn param_count(&self) -> usize {
        self.arch.param_count(self.dof)
    }

    fn loss_sum(
        &self,
        p: &[f32],
        z: ArrayView2<'_, f32>,
        t: ArrayView2<'_, f32>,
        work: &mut HnnWork,
        grad: Option<&mut [f32]>,
    ) -> f64 {
        let n = self.dof;
        let d = 2 * n;
        self.energy_gradient(p, z, work);
        let inv_d = 1.0 / d as f32;
        let mut total = 0.0f64;
        for b in 0..z.nrows() {
            let mut row_sum = 0.0f32;
            for i in 0..d {
                // prediction i uses dE/dz of its conjugate coordinate.
                let src = if i < n { n + i } else { i - n };
                let e = self.gains[i] * work.u[[b, src]] - t[[b, i]];
                row_sum += e * e;
                work.r[[b, src]] = 2.0 * e * self.gains[i] * inv_d;
            }
            total += (row_sum * inv_d) as f64;
        }
        let Some(grad) = grad else { return total };
        self.backprop(p, z, work, grad);
        total
    }
}

impl HnnObjective {
    /// Add d loss / d params to `grad`, given d loss / d(dE/dz) in `work.r`
    /// after [`Self::energy_gradient`] on the same `z` (2n columns used).
    fn backprop(&self, p: &[f32], z: ArrayView2<'_, f32>, work: &mut HnnWork, grad: &mut [f32]) {
        let n = self.dof;
        match &self.arch {
            EnergyArch::General(m) => {
                net::backprop_input_gradient_loss(m, p, work.r.view(), &mut work.first, grad);
            }
            EnergyArch::Separable { potential, kinetic } => {
                let np = potential.param_count();
                let (pv, pt) = p.split_at(np);
                let (gv, gt) = grad.split_at_mut(np);
                net::backprop_input_gradient_loss(
                    potential,
                    pv,
                    work.r.slice(s![.., ..n]),
                    &mut work.first,
                    gv,
                );
                let rp = work.r.slice(s![.., n..]);
                match kinetic {
                    KineticArch::Network(m) => {
                        net::backprop_input_gradient_loss(m, pt, rp, &mut work.second, gt);
                    }
                    KineticArch::Quadratic => {
                        // u = L L^T z: dl/dL = R^T (Z L) + Z^T (R L), lower part;
                        // the diagonal is parameterized as exp(raw).
                        let l = cholesky_from_params(pt, n);
                        let zp = z.slice(s![.., n..2 * n]);
                        let g = rp.t().dot(&zp.dot(&l)) + zp.t().dot(&rp.dot(&l));
                        for i in 0..n {
                            for j in 0..=i {
                                let chain = if i == j { l[[i, i]] } else { 1.0 };
                                gt[tri_index(i, j)] += g[[i, j]] * chain;
                            }
                        }
                    }
                }
            }
        }
    }
}

/// Which port terms a damped or driven model learns.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct PortArch {
    /// Learn R = L L^T on the momentum block.
    pub dissipation: bool,
    /// Number of inputs m (G is learned when m > 0).
    pub inputs: usize,
}

impl PortArch {
    /// Parameters: n (n + 1) / 2 entries of L (row by row, plain values:
    /// L L^T is positive semidefinite for any L), then G row-major 2n x m.
    pub fn param_count(&self, dof: usize) -> usize {
        self.l_count(dof) + 2 * dof * self.inputs
    }

    fn l_count(&self, dof: usize) -> usize {
        if self.dissipation {
            dof * (dof + 1) / 2
        } else {
            0
        }
    }

    /// Initial values: L = 0.3 I (a non-zero L so its gradient is not zero),
    /// G = 0.
    pub fn init(&self, dof: usize) -> Vec<f32> {
        let mut p = vec![0.0; self.param_count(dof)];
        if self.dissipation {
            for i in 0..dof {
                p[tri_index(i, i)] = 0.3;
            }
        }
        p
    }
}

/// Learned port terms of a fitted model, in normalized units.
///
/// Physical conversion (exact up to f32 rounding): with a_i =
/// sqrt(rate_scale_i * scale_i / energy_scale) for momentum coordinate i,
/// the physical factor is L_phys = diag(a) L, so R_phys = L_phys L_phys^T;
/// G_phys[i][k] = rate_scale_i * G[i][k] / input_scale_k.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PortModel {
    /// Which terms are learned.
    pub arch: PortArch,
    /// RMS of each input over the training data (1 where it is zero).
    pub input_scale: Vec<f32>,
    /// Parameters (layout as in [`PortArch::param_count`]).
    pub params: Vec<f32>,
}

impl PortModel {
    /// L_phys as the runtime stores it: 2n x 2n lower triangle, row by row,
    /// zero outside the momentum block. `None` without dissipation.
    pub fn physical_dissipation(&self, dof: usize, norm: &Normalization) -> Option<Vec<f32>> {
        if !self.arch.dissipation {
            return None;
        }
        let n = dof;
        let d = 2 * n;
        let mut packed = vec![0.0f32; d * (d + 1) / 2];
        for i in 0..n {
            let a = (norm.rate_scale[n + i] * norm.scale[n + i] / norm.energy_scale).sqrt();
            for j in 0..=i {
                packed[tri_index(n + i, n + j)] = a * self.params[tri_index(i, j)];
            }
        }
        Some(packed)
    }

    /// (m, G_phys row-major 2n x m); `None` without inputs.
    pub fn physical_input(&self, dof: usize, norm: &Normalization) -> Option<(usize, Vec<f32>)> {
        let m = self.arch.inputs;
        if m == 0 {
            return None;
        }
        let g = &self.params[self.arch.l_count(dof)..];
        let out = (0..2 * dof * m)
            .map(|idx| norm.rate_scale[idx / m] * g[idx] / self.input_scale[idx % m])
            .collect();
        Some((m, out))
    }
}

/// The port-Hamiltonian loss: mean squared error between the normalized
/// (J - R) dH/dx + G u and the normalized targets. Rows of `z` hold the 2n
/// normalized coordinates followed by the m normalized inputs. Parameters
/// are the energy's followed by the port terms'.
#[derive(Debug, Clone)]
pub struct PortObjective {
    /// The conservative part (energy network and gains).
    pub hnn: HnnObjective,
    /// The port terms.
    pub port: PortArch,
    /// c_i = sqrt(scale_i / (rate_scale_i * energy_scale)) per coordinate:
    /// the normalized R term is -C L L^T C^-1 dE/dz on the momentum block.
    pub c: Vec<f32>,
}

impl PortObjective {
    /// The loss for `arch` and `port` under `norm`.
    pub fn new(dof: usize, arch: EnergyArch, port: PortArch, norm: &Normalization) -> Self {
        let c = (0..2 * dof)
            .map(|i| (norm.scale[i] / (norm.rate_scale[i] * norm.energy_scale)).sqrt())
            .collect();
        Self {
            hnn: HnnObjective::new(dof, arch, norm),
            port,
            c,
        }
    }

    /// Normalized predictions (rows x 2n) for parameters `p` at rows of `z`.
    pub fn predict(&self, p: &[f32], z: ArrayView2<'_, f32>) -> Array2<f32> {
        let d = 2 * self.hnn.dof;
        let (pe, pp) = p.split_at(self.hnn.param_count());
        let mut work = HnnWork::default();
        self.hnn
            .energy_gradient(pe, z.slice(s![.., ..d]), &mut work);
        let mut out = Array2::zeros((z.nrows(), d));
        let mut row = vec![0.0f32; d];
        for b in 0..z.nrows() {
            self.predict_row(pp, work.u.row(b), z.row(b), &mut row);
            out.row_mut(b).assign(&ndarray::ArrayView1::from(&row));
        }
        out
    }

    /// One row's prediction from dE/dz (`u`) and the row of `z`.
    fn predict_row(
        &self,
        pp: &[f32],
        u: ndarray::ArrayView1<'_, f32>,
        z: ndarray::ArrayView1<'_, f32>,
        out: &mut [f32],
    ) {
        let n = self.hnn.dof;
        let d = 2 * n;
        let m = self.port.inputs;
        for (i, o) in out.iter_mut().enumerate().take(d) {
            let src = if i < n { n + i } else { i - n };
            *o = self.hnn.gains[i] * u[src];
        }
        if self.port.dissipation {
            let l = &pp[..n * (n + 1) / 2];
            let v: Vec<f32> = (0..n).map(|j| u[n + j] / self.c[n + j]).collect();
            let y = llt_times(l, n, &v);
            for i in 0..n {
                out[n + i] -= self.c[n + i] * y[i];
            }
        }
        let g = &pp[self.port.l_count(n)..];
        for i in 0..d {
            for k in 0..m {
                out[i] += g[i * m + k] * z[d + k];
            }
        }
    }
}

/// L L^T v for L packed row by row (n x n lower triangle).
fn llt_times(l: &[f32], n: usize, v: &[f32]) -> Vec<f32> {
    let w = lt_times(l, n, v);
    (0..n)
        .map(|i| (0..=i).map(|j| l[tri_index(i, j)] * w[j]).sum())
        .collect()
}

/// L^T v for L packed row by row.
fn lt_times(l: &[f32], n: usize, v: &[f32]) -> Vec<f32> {
    (0..n)
        .map(|j| (j..n).map(|i| l[tri_index(i, j)] * v[i]).sum())
        .collect()
}

impl Objective for PortObjective {
    type Work = HnnWork;

    fn param_count(&self) -> usize {
        self.hnn.param_count() + self.port.param_count(self.hnn.dof)
    }

    fn loss_sum(
        &self,
        p: &[f32],
        z: ArrayView2<'_, f32>,
        t: ArrayView2<'_, f32>,
        work: &mut HnnWork,
        grad: Option<&mut [f32]>,
    ) -> f64 {
        let n = self.hnn.dof;
        let d = 2 * n;
        let m = self.port.inputs;
        let ne = self.hnn.param_count();
        let (pe, pp) = p.split_at(ne);
        let zs = z.slice(s![.., ..d]);
        self.hnn.energy_gradient(pe, zs, work);
        let inv_d = 1.0 / d as f32;
        let lc = self.port.l_count(n);
        let mut port_grad = vec![0.0f32; pp.len()];
        let mut pred = vec![0.0f32; d];
        let mut w = vec![0.0f32; d];
        let mut total = 0.0f64;
        for b in 0..z.nrows() {
            self.predict_row(pp, work.u.row(b), z.row(b), &mut pred);
            let mut row_sum = 0.0f32;
            for i in 0..d {
                let e = pred[i] - t[[b, i]];
                row_sum += e * e;
                w[i] = 2.0 * e * inv_d;
                let src = if i < n { n + i } else { i - n };
                work.r[[b, src]] = w[i] * self.hnn.gains[i];
            }
            total += (row_sum * inv_d) as f64;
            if self.port.dissipation {
                // pred_p -= C L L^T C^-1 u_p: with a = C w_p, v = C^-1 u_p,
                // d/du_p = -C^-1 L L^T a, d/dL = -(a (L^T v)^T + v (L^T a)^T).
                let l = &pp[..lc];
                let a: Vec<f32> = (0..n).map(|i| self.c[n + i] * w[n + i]).collect();
                let v: Vec<f32> = (0..n).map(|j| work.u[[b, n + j]] / self.c[n + j]).collect();
                let back = llt_times(l, n, &a);
                for (j, bj) in back.iter().enumerate() {
                    work.r[[b, n + j]] -= bj / self.c[n + j];
                }
                let ltv = lt_times(l, n, &v);
                let lta = lt_times(l, n, &a);
                for i in 0..n {
                    for j in 0..=i {
                        port_grad[tri_index(i, j)] -= a[i] * ltv[j] + v[i] * lta[j];
                    }
                }
            }
            for i in 0..d {
                for k in 0..m {
                    port_grad[lc + i * m + k] += w[i] * z[[b, d + k]];
                }
            }
        }
        let Some(grad) = grad else { return total };
        let (ge, gp) = grad.split_at_mut(ne);
        self.hnn.backprop(pe, zs, work, ge);
        gp.iter_mut().zip(&port_grad).for_each(|(a, b)| *a += b);
        total
    }
}

/// Buffers of [`BaselineObjective`].
#[derive(Debug, Default)]
pub struct BaselineWork {
    net: MlpWork,
    dy: Array2<f32>,
}

/// The baseline: a plain network f(z) with 2n outputs fitted to the
/// normalized targets by mean squared error. For driven data the rows of
/// `z` hold the 2n normalized coordinates followed by the m normalized
/// inputs u / input_scale (the network then has 2n + m inputs).
#[derive(Debug, Clone)]
pub struct BaselineObjective {
    /// The network, 2n (+ m) inputs and 2n outputs.
    pub shape: MlpShape,
}

impl Objective for BaselineObjective {
    type Work = BaselineWork;

    fn param_count(&self) -> usize {
        self.shape.param_count()
    }

    fn loss_sum(
        &self,
        p: &[f32],
        z: ArrayView2<'_, f32>,
        t: ArrayView2<'_, f32>,
        work: &mut BaselineWork,
        grad: Option<&mut [f32]>,
    ) -> f64 {
        net::forward(&self.shape, p, z, &mut work.net);
        let d = self.shape.outputs();
        if work.dy.dim() != (z.nrows(), d) {
            work.dy = Array2::zeros((z.nrows(), d));
        }
        let inv_d = 1.0 / d as f32;
        let mut total = 0.0f64;
        let y = work.net.output();
        for b in 0..z.nrows() {
            let mut row_sum = 0.0f32;
            for i in 0..d {
                let e = y[[b, i]] - t[[b, i]];
                row_sum += e * e;
                work.dy[[b, i]] = 2.0 * e * inv_d;
            }
            total += (row_sum * inv_d) as f64;
        }
        if let Some(grad) = grad {
            net::backprop_output_loss(&self.shape, p, work.dy.view(), &mut work.net, grad);
        }
        total
    }
}

/// A fitted energy model: structure, normalization and parameters.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct EnergyModel {
    /// Degrees of freedom n.
    pub dof: usize,
    /// Structure.
    pub arch: EnergyArch,
    /// Normalization.
    pub norm: Normalization,
    /// Trained parameters (layout as in [`EnergyArch`]).
    pub params: Vec<f32>,
    /// Learned dissipation and input terms of a damped or driven model.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub port: Option<PortModel>,
}

impl EnergyModel {
    /// Physical dx/dt = (J - R) dH/dx + G u for states `x` (rows x 2n) and
    /// inputs `u` (rows x m; ignored without a learned G), computed in
    /// normalized units exactly as in training.
    pub fn vector_field_driven(
        &self,
        x: ArrayView2<'_, f32>,
        u: ArrayView2<'_, f32>,
    ) -> Array2<f32> {
        let d = 2 * self.dof;
        let port = self.port.clone().unwrap_or(PortModel {
            arch: PortArch {
                dissipation: false,
                inputs: 0,
            },
            input_scale: Vec::new(),
            params: Vec::new(),
        });
        let m = port.arch.inputs;
        let z = Array2::from_shape_fn((x.nrows(), d + m), |(r, i)| {
            if i < d {
                (x[[r, i]] - self.norm.offset[i]) / self.norm.scale[i]
            } else {
                u[[r, i - d]] / port.input_scale[i - d]
            }
        });
        let obj = PortObjective::new(self.dof, self.arch.clone(), port.arch.clone(), &self.norm);
        let p: Vec<f32> = self.params.iter().chain(&port.params).copied().collect();
        let mut y = obj.predict(&p, z.view());
        for mut row in y.rows_mut() {
            for i in 0..d {
                row[i] *= self.norm.rate_scale[i];
            }
        }
        y
    }

    /// Physical energies H(x) and gradients dH/dx for states as rows.
    pub fn energy_and_gradient(&self, x: ArrayView2<'_, f32>) -> (Array1<f32>, Array2<f32>) {
        let d = 2 * self.dof;
        let mut z = x.to_owned();
        for mut row in z.rows_mut() {
            for i in 0..d {
                row[i] = (row[i] - self.norm.offset[i]) / self.norm.scale[i];
            }
        }
        let obj = HnnObjective::new(self.dof, self.arch.clone(), &self.norm);
        let mut work = HnnWork::default();
        let e = obj.energy_gradient(&self.params, z.view(), &mut work);
        let es = self.norm.energy_scale;
        let mut g = work.u;
        for mut row in g.rows_mut() {
            for i in 0..d {
                row[i] *= es / self.norm.scale[i];
            }
        }
        (e * es, g)
    }

    /// The hidden-layer activation of the networks.
    pub fn activation(&self) -> Activation {
        match &self.arch {
            EnergyArch::General(m) => m.activation,
            EnergyArch::Separable { potential, .. } => potential.activation,
        }
    }
}

/// A fitted baseline vector field, physical units in and out. A driven
/// baseline (fitted on data with inputs u1..um) also takes the inputs,
/// normalized by `input_scale`; it is stepped by RK4 with u held constant
/// over the step.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct BaselineModel {
    /// Degrees of freedom n.
    pub dof: usize,
    /// The network (2n + m in, 2n out).
    pub shape: MlpShape,
    /// Normalization shared with the energy model's data.
    pub norm: Normalization,
    /// Trained parameters.
    pub params: Vec<f32>,
    /// RMS of each input over the training data (1 where it is zero);
    /// empty for a baseline without inputs.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub input_scale: Vec<f32>,
}

impl BaselineModel {
    /// Number of inputs m the baseline takes.
    pub fn inputs(&self) -> usize {
        self.input_scale.len()
    }

    /// dx/dt at state `x` (length 2n), inputs at zero.
    pub fn vector_field(&self, x: &[f32]) -> Vec<f32> {
        self.vector_field_driven(x, &[])
    }

    /// dx/dt at state `x` (length 2n) and inputs `u` (length m; missing
    /// entries count as zero).
    pub fn vector_field_driven(&self, x: &[f32], u: &[f32]) -> Vec<f32> {
        let d = 2 * self.dof;
        let m = self.inputs();
        let z = Array2::from_shape_fn((1, d + m), |(_, i)| {
            if i < d {
                (x[i] - self.norm.offset[i]) / self.norm.scale[i]
            } else {
                u.get(i - d).copied().unwrap_or(0.0) / self.input_scale[i - d]
            }
        });
        let mut work = MlpWork::default();
        net::forward(&self.shape, &self.params, z.view(), &mut work);
        let y = work.output();
        (0..d)
            .map(|i| y[[0, i]] * self.norm.rate_scale[i])
            .collect()
    }

    /// One classical Runge-Kutta-4 step of size `dt` (the usual way to roll
    /// out a learned vector field).
    pub fn step_rk4(&self, x: &mut [f32], dt: f32) {
        self.step_rk4_driven(x, &[], dt);
    }

    /// [`Self::step_rk4`] with the inputs `u` held constant over the step.
    pub fn step_rk4_driven(&self, x: &mut [f32], u: &[f32], dt: f32) {
        let d = x.len();
        let k1 = self.vector_field_driven(x, u);
        let at = |k: &[f32], h: f32| -> Vec<f32> { (0..d).map(|i| x[i] + h * k[i]).collect() };
        let k2 = self.vector_field_driven(&at(&k1, 0.5 * dt), u);
        let k3 = self.vector_field_driven(&at(&k2, 0.5 * dt), u);
        let k4 = self.vector_field_driven(&at(&k3, dt), u);
        for i in 0..d {
            x[i] += dt / 6.0 * (k1[i] + 2.0 * k2[i] + 2.0 * k3[i] + k4[i]);
        }
    }
}
