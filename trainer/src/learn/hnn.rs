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
//! Damped, driven systems ([`PortObjective`], in [`crate::learn::port`]) predict
//! the port-Hamiltonian field (J - R) dH/dx + G u instead.

use anyhow::{bail, Result};
use ndarray::{s, Array1, Array2, ArrayView1, ArrayView2, Axis};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};

use crate::data::dataset::Dataset;
use crate::learn::mechanical;
use crate::learn::net::{self, Activation, MlpShape, MlpWork};
pub use crate::learn::port::{PhysicalTerm, PortArch, PortModel, PortObjective};

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
    /// E = V(z_q) + 1/2 z_p^T (L(z_q) L(z_q)^T + eps I) z_p (see
    /// [`crate::learn::mechanical`]); parameters are V's followed by the
    /// factor network's.
    Mechanical {
        /// The potential network over n coordinates.
        potential: MlpShape,
        /// The factor network: n inputs, n (n + 1) / 2 outputs.
        factor: MlpShape,
    },
}

impl EnergyArch {
    /// Number of trainable parameters for `dof` degrees of freedom.
    pub fn param_count(&self, dof: usize) -> usize {
        match self {
            Self::General(m) => m.param_count(),
            Self::Mechanical { potential, factor } => {
                potential.param_count() + factor.param_count()
            }
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
            Self::Mechanical { potential, factor } => {
                potential.init(&mut rng, &mut p);
                factor.init(&mut rng, &mut p);
            }
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
        let rows = data
            .trajectories
            .iter()
            .flat_map(|tr| tr.x.rows().into_iter().zip(tr.dx.rows()));
        for ((row, drow), (mut zr, mut tr)) in rows.zip(z.rows_mut().into_iter().zip(t.rows_mut()))
        {
            let zr = zr.as_slice_mut().expect("standard layout");
            let tr = tr.as_slice_mut().expect("standard layout");
            self.normalize_row(row, drow, zr, tr);
        }
        (z, t)
    }

    /// One sample: z = (x - offset) / scale and t = dx / rate_scale, each
    /// computed in f64 and rounded to f32 once.
    pub fn normalize_row(
        &self,
        x: ArrayView1<'_, f64>,
        dx: ArrayView1<'_, f64>,
        z: &mut [f32],
        t: &mut [f32],
    ) {
        for i in 0..z.len() {
            z[i] = ((x[i] - self.offset[i] as f64) / self.scale[i] as f64) as f32;
            t[i] = (dx[i] / self.rate_scale[i] as f64) as f32;
        }
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
    pub(crate) u: Array2<f32>,
    /// d loss / d u.
    pub(crate) r: Array2<f32>,
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
            EnergyArch::Mechanical { potential, factor } => {
                let (pv, pf) = p.split_at(potential.param_count());
                let zq = z.slice(s![.., ..n]);
                net::forward(potential, pv, zq, &mut work.first);
                net::input_gradient(potential, pv, &mut work.first);
                net::forward(factor, pf, zq, &mut work.second);
                let zp = z.slice(s![.., n..2 * n]);
                let (t, up, seed) = mechanical::kinetic(work.second.output(), zp, n);
                net::input_vjp(factor, pf, seed.view(), &mut work.second);
                let uq = &work.first.input_grad() + &work.second.input_grad();
                work.u.slice_mut(s![.., ..n]).assign(&uq);
                work.u.slice_mut(s![.., n..]).assign(&up);
                &work.first.output().column(0) + &t
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
    pub(crate) fn backprop(
        &self,
        p: &[f32],
        z: ArrayView2<'_, f32>,
        work: &mut HnnWork,
        grad: &mut [f32],
    ) {
        let n = self.dof;
        match &self.arch {
            EnergyArch::General(m) => {
                net::backprop_input_gradient_loss(m, p, work.r.view(), &mut work.first, grad);
            }
            EnergyArch::Mechanical { potential, factor } => {
                let np = potential.param_count();
                let (pv, pf) = p.split_at(np);
                let (gv, gf) = grad.split_at_mut(np);
                let rq = work.r.slice(s![.., ..n]);
                net::backprop_input_gradient_loss(potential, pv, rq, &mut work.first, gv);
                // r_q . J^T a at fixed a, then a's and dT/dz_p's dependence
                // on the factor outputs.
                net::backprop_input_gradient_loss(factor, pf, rq, &mut work.second, gf);
                let c = mechanical::factor_cotangent(
                    work.second.output(),
                    z.slice(s![.., n..2 * n]),
                    work.r.slice(s![.., n..]),
                    work.second.tangent_output(),
                    n,
                );
                net::backprop_output_loss(factor, pf, c.view(), &mut work.second, gf);
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
            arch: PortArch::default(),
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
            EnergyArch::Separable { potential, .. } | EnergyArch::Mechanical { potential, .. } => {
                potential.activation
            }
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
