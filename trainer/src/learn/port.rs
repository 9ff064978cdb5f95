//! The port-Hamiltonian terms of damped and driven models,
//! dx/dt = (J - R(q)) dH/dx + G(q) u: which terms are learned
//! ([`PortArch`]), the loss with their parameter gradients
//! ([`PortObjective`]), and the conversion of the fitted terms to the
//! physical units the blob stores ([`PortModel`]).
//!
//! R = L L^T acts on the momentum block only (friction and damper forces;
//! position rates stay dH/dp), with the n x n lower-triangular L learned in
//! normalized units; G (2n x m) is learned for normalized inputs
//! u / input_scale. Each is either constant or, where the data needs it, a
//! small tanh network of the normalized coordinates z_q whose outputs are
//! the entries (a crane's trolley acceleration acts through cos(q), a
//! damper's force may depend on the stroke). R stays positive semidefinite
//! for any L, so passivity holds by construction either way.

use ndarray::{s, Array2, ArrayView1, ArrayView2, Axis};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};

use crate::learn::hnn::{tri_index, EnergyArch, HnnObjective, HnnWork, Normalization, Objective};
use crate::learn::net::{self, Activation, MlpShape, MlpWork};

/// Which port terms a damped or driven model learns.
#[derive(Debug, Clone, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct PortArch {
    /// Learn R = L L^T on the momentum block.
    pub dissipation: bool,
    /// Number of inputs m (G is learned when m > 0).
    pub inputs: usize,
    /// Hidden widths of L(q) as a network of z_q; empty: L is constant.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub dissipation_hidden: Vec<usize>,
    /// Hidden widths of G(q) as a network of z_q; empty: G is constant.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub input_hidden: Vec<usize>,
}

/// Initial output weights of a port network are scaled by this, so the
/// starting L (or G) is close to its bias (common practice: start a
/// correction network near its neutral value).
const NET_OUTPUT_GAIN: f32 = 0.1;
/// Initial L = 0.3 I (a non-zero L so its gradient is not zero).
const INITIAL_L_DIAGONAL: f32 = 0.3;

/// Most hidden layers of a port network (a small correction, and the
/// blob's layer limit leaves room for the output layer).
pub const MAX_PORT_HIDDEN_LAYERS: usize = 3;
/// Widest hidden layer of a port network.
pub const MAX_PORT_HIDDEN_WIDTH: usize = 64;

impl PortArch {
    /// The terms asked for: damping when `dissipation` or a dissipation
    /// network is given, each network's hidden widths checked (one to
    /// three layers of 1..=64 units); the input count comes from the data
    /// later. Errors name the setting as `what` gives it.
    pub fn with_networks(
        dissipation: bool,
        dissipation_hidden: &[usize],
        input_hidden: &[usize],
        what: impl Fn(&str) -> String,
    ) -> anyhow::Result<Self> {
        for (name, hidden) in [("dissipation", dissipation_hidden), ("input", input_hidden)] {
            let bad_width = hidden
                .iter()
                .any(|w| !(1..=MAX_PORT_HIDDEN_WIDTH).contains(w));
            if hidden.len() > MAX_PORT_HIDDEN_LAYERS || bad_width {
                anyhow::bail!(
                    "{}: {hidden:?}: a port network takes 1 to {MAX_PORT_HIDDEN_LAYERS} hidden \
                     widths, each 1..={MAX_PORT_HIDDEN_WIDTH}",
                    what(name)
                );
            }
        }
        Ok(Self {
            dissipation: dissipation || !dissipation_hidden.is_empty(),
            inputs: 0,
            dissipation_hidden: dissipation_hidden.to_vec(),
            input_hidden: input_hidden.to_vec(),
        })
    }

    /// Entries of L: n (n + 1) / 2, row by row.
    fn l_entries(dof: usize) -> usize {
        dof * (dof + 1) / 2
    }

    /// The network L(z_q), when L is one.
    pub fn dissipation_net(&self, dof: usize) -> Option<MlpShape> {
        (self.dissipation && !self.dissipation_hidden.is_empty()).then(|| {
            MlpShape::new(
                dof,
                &self.dissipation_hidden,
                Self::l_entries(dof),
                Activation::Tanh,
            )
        })
    }

    /// The network G(z_q), when G is one.
    pub fn input_net(&self, dof: usize) -> Option<MlpShape> {
        (self.inputs > 0 && !self.input_hidden.is_empty()).then(|| {
            MlpShape::new(
                dof,
                &self.input_hidden,
                2 * dof * self.inputs,
                Activation::Tanh,
            )
        })
    }

    /// Parameters of L: its entries, or its network's.
    pub fn l_count(&self, dof: usize) -> usize {
        match self.dissipation_net(dof) {
            Some(s) => s.param_count(),
            None if self.dissipation => Self::l_entries(dof),
            None => 0,
        }
    }

    /// Parameters of G: its entries (row-major 2n x m), or its network's.
    pub fn g_count(&self, dof: usize) -> usize {
        match self.input_net(dof) {
            Some(s) => s.param_count(),
            None => 2 * dof * self.inputs,
        }
    }

    /// Parameters: L's (plain values: L L^T is positive semidefinite for any
    /// L), then G's.
    pub fn param_count(&self, dof: usize) -> usize {
        self.l_count(dof) + self.g_count(dof)
    }

    /// Initial values: L = 0.3 I and G = 0; a network starts at Glorot
    /// weights with its output layer scaled by 0.1 and the same bias.
    pub fn init(&self, dof: usize, seed: u64) -> Vec<f32> {
        let mut rng = ChaCha8Rng::seed_from_u64(seed ^ 0x5eed_9047);
        let mut p = Vec::with_capacity(self.param_count(dof));
        let mut network = |shape: &MlpShape, p: &mut Vec<f32>| {
            let start = p.len();
            shape.init(&mut rng, p);
            let (off, o, i) = shape.layer_offset(shape.layers() - 1);
            for w in &mut p[start + off..start + off + o * i] {
                *w *= NET_OUTPUT_GAIN;
            }
            start + off + o * i
        };
        if let Some(shape) = self.dissipation_net(dof) {
            let bias = network(&shape, &mut p);
            for i in 0..dof {
                p[bias + tri_index(i, i)] = INITIAL_L_DIAGONAL;
            }
        } else if self.dissipation {
            let start = p.len();
            p.resize(start + Self::l_entries(dof), 0.0);
            for i in 0..dof {
                p[start + tri_index(i, i)] = INITIAL_L_DIAGONAL;
            }
        }
        if let Some(shape) = self.input_net(dof) {
            network(&shape, &mut p);
        } else {
            p.resize(p.len() + 2 * dof * self.inputs, 0.0);
        }
        p
    }

    /// Short label, e.g. `R network 1-8-1, G constant`.
    pub fn label(&self, dof: usize) -> String {
        let term = |net: Option<MlpShape>, on: bool| match (net, on) {
            (Some(s), _) => format!(
                "network {}",
                s.sizes
                    .iter()
                    .map(|v| v.to_string())
                    .collect::<Vec<_>>()
                    .join("-")
            ),
            (None, true) => "constant".to_string(),
            (None, false) => "none".to_string(),
        };
        format!(
            "R {}, G {}",
            term(self.dissipation_net(dof), self.dissipation),
            term(self.input_net(dof), self.inputs > 0)
        )
    }
}

/// A port term in physical units, as the blob stores it.
#[derive(Debug, Clone, PartialEq)]
pub enum PhysicalTerm {
    /// The entries.
    Constant(Vec<f32>),
    /// A network of z_q whose outputs are the entries.
    Network {
        /// Its shape.
        shape: MlpShape,
        /// Its parameters (layout of [`crate::learn::net`]).
        params: Vec<f32>,
    },
}

/// Learned port terms of a fitted model, in normalized units.
///
/// Physical conversion (exact up to f32 rounding): with a_i =
/// sqrt(rate_scale_i * scale_i / energy_scale) for momentum coordinate i,
/// the physical factor is L_phys = diag(a) L, so R_phys = L_phys L_phys^T;
/// G_phys[i][k] = rate_scale_i * G[i][k] / input_scale_k. For a network the
/// same factors scale the rows of its output layer.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PortModel {
    /// Which terms are learned.
    pub arch: PortArch,
    /// RMS of each input over the training data (1 where it is zero).
    pub input_scale: Vec<f32>,
    /// Parameters (layout as in [`PortArch::param_count`]).
    pub params: Vec<f32>,
}

/// A network whose output layer is re-indexed and scaled: output `r` of
/// the result is `factor * (old output src)` for `map(r) = Some((src,
/// factor))`, and zero otherwise.
fn remap_outputs(
    shape: &MlpShape,
    params: &[f32],
    outputs: usize,
    map: impl Fn(usize) -> Option<(usize, f32)>,
) -> PhysicalTerm {
    let mut sizes = shape.sizes.clone();
    *sizes.last_mut().expect("at least one layer") = outputs;
    let out_shape = MlpShape {
        sizes,
        activation: shape.activation,
    };
    let last = shape.layers() - 1;
    let (off, _, h) = shape.layer_offset(last);
    let (w, b) = shape.layer(params, last);
    let mut p = params[..off].to_vec();
    let mut bias = Vec::with_capacity(outputs);
    for r in 0..outputs {
        match map(r) {
            Some((src, f)) => {
                p.extend(w.row(src).iter().map(|v| f * v));
                bias.push(f * b[src]);
            }
            None => {
                p.extend(std::iter::repeat_n(0.0, h));
                bias.push(0.0);
            }
        }
    }
    p.extend(bias);
    PhysicalTerm::Network {
        shape: out_shape,
        params: p,
    }
}

impl PortModel {
    /// L_phys as the runtime stores it: 2n x 2n lower triangle, row by row,
    /// zero outside the momentum block (for a network: its outputs).
    /// `None` without dissipation.
    pub fn physical_dissipation(&self, dof: usize, norm: &Normalization) -> Option<PhysicalTerm> {
        if !self.arch.dissipation {
            return None;
        }
        let n = dof;
        let d = 2 * n;
        let a: Vec<f32> = (0..n)
            .map(|i| (norm.rate_scale[n + i] * norm.scale[n + i] / norm.energy_scale).sqrt())
            .collect();
        let l = &self.params[..self.arch.l_count(n)];
        if let Some(shape) = self.arch.dissipation_net(n) {
            // Packed index r = tri(row, col) of the 2n x 2n factor back to
            // (row, col): momentum-block entries come from the network.
            let mut source = vec![None; d * (d + 1) / 2];
            for i in 0..n {
                for j in 0..=i {
                    source[tri_index(n + i, n + j)] = Some((tri_index(i, j), a[i]));
                }
            }
            return Some(remap_outputs(&shape, l, d * (d + 1) / 2, |r| source[r]));
        }
        let mut packed = vec![0.0f32; d * (d + 1) / 2];
        for i in 0..n {
            for j in 0..=i {
                packed[tri_index(n + i, n + j)] = a[i] * l[tri_index(i, j)];
            }
        }
        Some(PhysicalTerm::Constant(packed))
    }

    /// (m, G_phys row-major 2n x m); `None` without inputs.
    pub fn physical_input(
        &self,
        dof: usize,
        norm: &Normalization,
    ) -> Option<(usize, PhysicalTerm)> {
        let m = self.arch.inputs;
        if m == 0 {
            return None;
        }
        let g = &self.params[self.arch.l_count(dof)..];
        let factor = |idx: usize| norm.rate_scale[idx / m] / self.input_scale[idx % m];
        if let Some(shape) = self.arch.input_net(dof) {
            let term = remap_outputs(&shape, g, 2 * dof * m, |r| Some((r, factor(r))));
            return Some((m, term));
        }
        let out = (0..2 * dof * m)
            .map(|idx| norm.rate_scale[idx / m] * g[idx] / self.input_scale[idx % m])
            .collect();
        Some((m, PhysicalTerm::Constant(out)))
    }
}

/// Buffers of [`PortObjective`].
#[derive(Debug, Default)]
pub struct PortWork {
    hnn: HnnWork,
    l_net: MlpWork,
    g_net: MlpWork,
    /// d loss / d L(q) and d loss / d G(q) per row (network terms only).
    dl: Array2<f32>,
    dg: Array2<f32>,
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

/// Row `b` of a network's output, or the constant entries.
fn entries<'a>(net: &'a Option<(MlpShape, &MlpWork)>, constant: &'a [f32], b: usize) -> RowRef<'a> {
    match net {
        Some((_, work)) => RowRef::Row(work.output().index_axis_move(Axis(0), b)),
        None => RowRef::Slice(constant),
    }
}

/// Entries of L or G for one row.
enum RowRef<'a> {
    Slice(&'a [f32]),
    Row(ArrayView1<'a, f32>),
}

impl RowRef<'_> {
    fn get(&self, i: usize) -> f32 {
        match self {
            Self::Slice(s) => s[i],
            Self::Row(r) => r[i],
        }
    }
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

    /// dE/dz into `work.hnn`, and the port networks' outputs for the rows
    /// of `z`.
    fn forward(&self, p: &[f32], z: ArrayView2<'_, f32>, work: &mut PortWork) {
        let n = self.hnn.dof;
        let ne = self.hnn.param_count();
        let (pe, pp) = p.split_at(ne);
        self.hnn
            .energy_gradient(pe, z.slice(s![.., ..2 * n]), &mut work.hnn);
        let (pl, pg) = pp.split_at(self.port.l_count(n));
        let zq = z.slice(s![.., ..n]);
        if let Some(shape) = self.port.dissipation_net(n) {
            net::forward(&shape, pl, zq, &mut work.l_net);
        }
        if let Some(shape) = self.port.input_net(n) {
            net::forward(&shape, pg, zq, &mut work.g_net);
        }
    }

    /// Normalized predictions (rows x 2n) for parameters `p` at rows of `z`.
    pub fn predict(&self, p: &[f32], z: ArrayView2<'_, f32>) -> Array2<f32> {
        let n = self.hnn.dof;
        let d = 2 * n;
        let mut work = PortWork::default();
        self.forward(p, z, &mut work);
        let pp = &p[self.hnn.param_count()..];
        let (pl, pg) = pp.split_at(self.port.l_count(n));
        let l_net = self.port.dissipation_net(n).map(|s| (s, &work.l_net));
        let g_net = self.port.input_net(n).map(|s| (s, &work.g_net));
        let mut out = Array2::zeros((z.nrows(), d));
        let mut row = vec![0.0f32; d];
        for b in 0..z.nrows() {
            let (l, g) = (entries(&l_net, pl, b), entries(&g_net, pg, b));
            self.predict_row(&l, &g, work.hnn.u.row(b), z.row(b), &mut row);
            out.row_mut(b).assign(&ArrayView1::from(&row));
        }
        out
    }

    /// One row's prediction from dE/dz (`u`), the entries of L and G, and
    /// the row of `z`.
    fn predict_row(
        &self,
        l: &RowRef<'_>,
        g: &RowRef<'_>,
        u: ArrayView1<'_, f32>,
        z: ArrayView1<'_, f32>,
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
            let v: Vec<f32> = (0..n).map(|j| u[n + j] / self.c[n + j]).collect();
            let y = llt_times(l, n, &v);
            for i in 0..n {
                out[n + i] -= self.c[n + i] * y[i];
            }
        }
        for (i, o) in out.iter_mut().enumerate().take(d) {
            for k in 0..m {
                *o += g.get(i * m + k) * z[d + k];
            }
        }
    }
}

/// L L^T v for L packed row by row (n x n lower triangle).
fn llt_times(l: &RowRef<'_>, n: usize, v: &[f32]) -> Vec<f32> {
    let w = lt_times(l, n, v);
    (0..n)
        .map(|i| (0..=i).map(|j| l.get(tri_index(i, j)) * w[j]).sum())
        .collect()
}

/// L^T v for L packed row by row.
fn lt_times(l: &RowRef<'_>, n: usize, v: &[f32]) -> Vec<f32> {
    (0..n)
        .map(|j| (j..n).map(|i| l.get(tri_index(i, j)) * v[i]).sum())
        .collect()
}

impl Objective for PortObjective {
    type Work = PortWork;

    fn param_count(&self) -> usize {
        self.hnn.param_count() + self.port.param_count(self.hnn.dof)
    }

    fn loss_sum(
        &self,
        p: &[f32],
        z: ArrayView2<'_, f32>,
        t: ArrayView2<'_, f32>,
        work: &mut PortWork,
        grad: Option<&mut [f32]>,
    ) -> f64 {
        let n = self.hnn.dof;
        let d = 2 * n;
        let m = self.port.inputs;
        let ne = self.hnn.param_count();
        self.forward(p, z, work);
        let (pe, pp) = p.split_at(ne);
        let lc = self.port.l_count(n);
        let (pl, pg) = pp.split_at(lc);
        let (l_shape, g_shape) = (self.port.dissipation_net(n), self.port.input_net(n));
        let rows = z.nrows();
        if l_shape.is_some() && work.dl.dim() != (rows, PortArch::l_entries(n)) {
            work.dl = Array2::zeros((rows, PortArch::l_entries(n)));
        }
        if g_shape.is_some() && work.dg.dim() != (rows, d * m) {
            work.dg = Array2::zeros((rows, d * m));
        }
        let inv_d = 1.0 / d as f32;
        // Gradients of constant L and G; network terms collect per-row
        // output gradients in `dl`, `dg` instead.
        let mut port_grad = vec![0.0f32; pp.len()];
        let mut pred = vec![0.0f32; d];
        let mut w = vec![0.0f32; d];
        let mut row_dl = vec![0.0f32; PortArch::l_entries(n)];
        let mut total = 0.0f64;
        let PortWork {
            hnn,
            l_net,
            g_net,
            dl,
            dg,
        } = work;
        let l_rows = l_shape.clone().map(|s| (s, &*l_net));
        let g_rows = g_shape.clone().map(|s| (s, &*g_net));
        for b in 0..rows {
            let (l, g) = (entries(&l_rows, pl, b), entries(&g_rows, pg, b));
            self.predict_row(&l, &g, hnn.u.row(b), z.row(b), &mut pred);
            let mut row_sum = 0.0f32;
            for i in 0..d {
                let e = pred[i] - t[[b, i]];
                row_sum += e * e;
                w[i] = 2.0 * e * inv_d;
                let src = if i < n { n + i } else { i - n };
                hnn.r[[b, src]] = w[i] * self.hnn.gains[i];
            }
            total += (row_sum * inv_d) as f64;
            if self.port.dissipation {
                // pred_p -= C L L^T C^-1 u_p: with a = C w_p, v = C^-1 u_p,
                // d/du_p = -C^-1 L L^T a, d/dL = -(a (L^T v)^T + v (L^T a)^T).
                let a: Vec<f32> = (0..n).map(|i| self.c[n + i] * w[n + i]).collect();
                let v: Vec<f32> = (0..n).map(|j| hnn.u[[b, n + j]] / self.c[n + j]).collect();
                let back = llt_times(&l, n, &a);
                for (j, bj) in back.iter().enumerate() {
                    hnn.r[[b, n + j]] -= bj / self.c[n + j];
                }
                let ltv = lt_times(&l, n, &v);
                let lta = lt_times(&l, n, &a);
                for i in 0..n {
                    for j in 0..=i {
                        row_dl[tri_index(i, j)] = -(a[i] * ltv[j] + v[i] * lta[j]);
                    }
                }
                if l_shape.is_some() {
                    dl.row_mut(b).assign(&ArrayView1::from(&row_dl));
                } else {
                    port_grad[..lc]
                        .iter_mut()
                        .zip(&row_dl)
                        .for_each(|(acc, v)| *acc += v);
                }
            }
            for i in 0..d {
                for k in 0..m {
                    let v = w[i] * z[[b, d + k]];
                    if g_shape.is_some() {
                        dg[[b, i * m + k]] = v;
                    } else {
                        port_grad[lc + i * m + k] += v;
                    }
                }
            }
        }
        let Some(grad) = grad else { return total };
        let (ge, gp) = grad.split_at_mut(ne);
        self.hnn.backprop(pe, z.slice(s![.., ..d]), hnn, ge);
        gp.iter_mut().zip(&port_grad).for_each(|(a, b)| *a += b);
        let (gl, gg) = gp.split_at_mut(lc);
        if let Some(shape) = &l_shape {
            net::backprop_output_loss(shape, pl, dl.view(), l_net, gl);
        }
        if let Some(shape) = &g_shape {
            net::backprop_output_loss(shape, pg, dg.view(), g_net, gg);
        }
        total
    }
}
