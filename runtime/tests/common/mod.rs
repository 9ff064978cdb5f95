//! Shared test support: a seeded generator and a builder for model blobs
//! with random weights (test fixtures, not trained models).
#![allow(dead_code)]

use visviva_runtime::format::{
    self, Activation, DissipationDesc, EnergyDesc, F32Bytes, InputDesc, KineticDesc, LayerDesc,
    MlpDesc, ModelDesc, WeightsDesc,
};
use visviva_runtime::{Integrator, Method};

/// xorshift64* (Vigna, 2016): small, seeded, good enough for fixtures.
pub struct Rng(pub u64);

impl Rng {
    pub fn next_u64(&mut self) -> u64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        self.0.wrapping_mul(0x2545_f491_4f6c_dd1d)
    }
    /// Uniform in [lo, hi).
    pub fn uniform(&mut self, lo: f64, hi: f64) -> f64 {
        lo + (hi - lo) * ((self.next_u64() >> 11) as f64 / (1u64 << 53) as f64)
    }
    pub fn below(&mut self, n: usize) -> usize {
        (self.next_u64() % n as u64) as usize
    }
}

/// Weight storage of a fixture network.
#[derive(Clone, Copy, PartialEq, Eq, Debug)]
pub enum Kind {
    F32,
    Int8,
}

/// An owned dense layer. `w` is row-major [out][in] in real values; for
/// int8 it holds the dequantized values `scale[j] * q[j][i]` exactly.
#[derive(Clone, Debug)]
pub struct OwnedLayer {
    pub inputs: usize,
    pub outputs: usize,
    pub w: Vec<f32>,
    pub b: Vec<f32>,
    pub q: Vec<i8>,
    pub scales: Vec<f32>,
    pub w_bytes: Vec<u8>,
    pub b_bytes: Vec<u8>,
    pub s_bytes: Vec<u8>,
    pub q_bytes: Vec<u8>,
}

fn le(v: &[f32]) -> Vec<u8> {
    v.iter().flat_map(|x| x.to_le_bytes()).collect()
}

/// An owned network: layer sizes `[inputs, hidden.., 1]`.
#[derive(Clone, Debug)]
pub struct OwnedMlp {
    pub activation: Activation,
    pub kind: Kind,
    pub layers: Vec<OwnedLayer>,
}

impl OwnedMlp {
    pub fn random(rng: &mut Rng, sizes: &[usize], activation: Activation, kind: Kind) -> Self {
        let mut layers = Vec::new();
        for win in sizes.windows(2) {
            let (ni, no) = (win[0], win[1]);
            let lim = (6.0 / (ni + no) as f64).sqrt();
            let mut w: Vec<f32> = (0..ni * no)
                .map(|_| rng.uniform(-lim, lim) as f32)
                .collect();
            let b: Vec<f32> = (0..no).map(|_| rng.uniform(-0.1, 0.1) as f32).collect();
            let mut q = Vec::new();
            let mut scales = Vec::new();
            if kind == Kind::Int8 {
                for j in 0..no {
                    let row = &w[j * ni..(j + 1) * ni];
                    let m = row.iter().fold(0.0f32, |a, v| a.max(v.abs()));
                    let s = if m > 0.0 { m / 127.0 } else { 1.0 };
                    scales.push(s);
                    for v in row {
                        q.push((v / s).round().clamp(-127.0, 127.0) as i8);
                    }
                }
                for j in 0..no {
                    for i in 0..ni {
                        w[j * ni + i] = scales[j] * q[j * ni + i] as f32;
                    }
                }
            }
            layers.push(OwnedLayer {
                inputs: ni,
                outputs: no,
                w_bytes: le(&w),
                b_bytes: le(&b),
                s_bytes: le(&scales),
                q_bytes: q.iter().map(|v| *v as u8).collect(),
                w,
                b,
                q,
                scales,
            });
        }
        Self {
            activation,
            kind,
            layers,
        }
    }

    pub fn desc(&self) -> MlpDesc<'_> {
        let mut layers = heapless::Vec::new();
        for l in &self.layers {
            let weights = match self.kind {
                Kind::F32 => WeightsDesc::F32(F32Bytes(&l.w_bytes)),
                Kind::Int8 => WeightsDesc::Int8 {
                    values: &l.q_bytes,
                    scales: F32Bytes(&l.s_bytes),
                },
            };
            layers
                .push(LayerDesc {
                    inputs: l.inputs as u16,
                    outputs: l.outputs as u16,
                    weights,
                    bias: F32Bytes(&l.b_bytes),
                })
                .expect("fixture has too many layers");
        }
        MlpDesc {
            activation: self.activation,
            layers,
        }
    }

    pub fn parameters(&self) -> usize {
        self.layers.iter().map(|l| l.w.len() + l.b.len()).sum()
    }

    /// Multiply the last layer's weights and biases by `k` (a power of two
    /// keeps int8 values and scales exact).
    pub fn scale_last(&mut self, k: f32) {
        let l = self.layers.last_mut().expect("at least one layer");
        l.w.iter_mut().for_each(|v| *v *= k);
        l.b.iter_mut().for_each(|v| *v *= k);
        l.scales.iter_mut().for_each(|v| *v *= k);
        l.w_bytes = le(&l.w);
        l.b_bytes = le(&l.b);
        l.s_bytes = le(&l.scales);
    }

    /// All outputs at `x`, in f64 (an independent reference for the
    /// runtime's f32 kernels; tanh or softplus hidden layers).
    pub fn forward_f64(&self, x: &[f64]) -> Vec<f64> {
        let mut cur = x.to_vec();
        for (k, l) in self.layers.iter().enumerate() {
            let mut next: Vec<f64> = (0..l.outputs)
                .map(|j| {
                    l.b[j] as f64
                        + (0..l.inputs)
                            .map(|i| l.w[j * l.inputs + i] as f64 * cur[i])
                            .sum::<f64>()
                })
                .collect();
            if k + 1 < self.layers.len() {
                for v in &mut next {
                    *v = match self.activation {
                        Activation::Tanh => v.tanh(),
                        Activation::Softplus => v.exp().ln_1p(),
                        Activation::Relu => v.max(0.0),
                    };
                }
            }
            cur = next;
        }
        cur
    }
}

/// The kinetic part of a separable fixture.
#[derive(Clone, Debug)]
pub enum OwnedKinetic {
    /// Lower-triangular factor, row by row.
    Quadratic(Vec<f32>, Vec<u8>),
    Network(OwnedMlp),
}

#[derive(Clone, Debug)]
pub enum OwnedEnergy {
    General(OwnedMlp),
    Separable {
        potential: OwnedMlp,
        kinetic: OwnedKinetic,
    },
}

/// An owned model description that encodes into a blob.
#[derive(Clone, Debug)]
pub struct OwnedModel {
    pub dof: usize,
    pub offset: Vec<f32>,
    pub scale: Vec<f32>,
    pub energy_scale: f32,
    pub energy: OwnedEnergy,
    pub integrator: Integrator,
    pub offset_bytes: Vec<u8>,
    pub scale_bytes: Vec<u8>,
    /// Factor L of R = L L^T (2n x 2n lower-triangular, row by row), bytes.
    pub dissipation: Option<Vec<u8>>,
    /// Inputs m and G (2n x m, row-major), bytes.
    pub input: Option<(u8, Vec<u8>)>,
    /// L(q) as a network of z_q (replaces `dissipation` when set).
    pub dissipation_net: Option<OwnedMlp>,
    /// Inputs m and G(q) as a network of z_q (replaces `input` when set).
    pub input_net: Option<(u8, OwnedMlp)>,
}

impl OwnedModel {
    pub fn new(dof: usize, energy: OwnedEnergy, integrator: Integrator, rng: &mut Rng) -> Self {
        let offset: Vec<f32> = (0..2 * dof)
            .map(|_| rng.uniform(-0.2, 0.2) as f32)
            .collect();
        let scale: Vec<f32> = (0..2 * dof).map(|_| rng.uniform(0.5, 2.0) as f32).collect();
        Self {
            dof,
            offset_bytes: le(&offset),
            scale_bytes: le(&scale),
            offset,
            scale,
            energy_scale: 1.5,
            energy,
            integrator,
            dissipation: None,
            input: None,
            dissipation_net: None,
            input_net: None,
        }
    }

    pub fn desc(&self) -> ModelDesc<'_> {
        let energy = match &self.energy {
            OwnedEnergy::General(m) => EnergyDesc::General(m.desc()),
            OwnedEnergy::Separable { potential, kinetic } => EnergyDesc::Separable {
                potential: potential.desc(),
                kinetic: match kinetic {
                    OwnedKinetic::Quadratic(_, bytes) => KineticDesc::Quadratic {
                        cholesky: F32Bytes(bytes),
                    },
                    OwnedKinetic::Network(m) => KineticDesc::Network(m.desc()),
                },
            },
        };
        ModelDesc {
            dof: self.dof as u8,
            offset: F32Bytes(&self.offset_bytes),
            scale: F32Bytes(&self.scale_bytes),
            energy_scale: self.energy_scale,
            energy,
            integrator: self.integrator,
            dissipation: match (&self.dissipation_net, &self.dissipation) {
                (Some(net), _) => DissipationDesc::Network(net.desc()),
                (None, None) => DissipationDesc::None,
                (None, Some(b)) => DissipationDesc::Constant {
                    factor: F32Bytes(b),
                },
            },
            input: match (&self.input_net, &self.input) {
                (Some((m, net)), _) => InputDesc::Network {
                    inputs: *m,
                    net: net.desc(),
                },
                (None, None) => InputDesc::None,
                (None, Some((m, b))) => InputDesc::Constant {
                    inputs: *m,
                    matrix: F32Bytes(b),
                },
            },
        }
    }

    /// Add L(q) and (when `m > 0`) G(q) as random networks of z_q with one
    /// hidden layer of `hidden` units; L's last layer is scaled by
    /// `damping`.
    pub fn with_port_networks(
        mut self,
        rng: &mut Rng,
        damping: f32,
        m: usize,
        hidden: usize,
        kind: Kind,
    ) -> Self {
        let (n, n2) = (self.dof, 2 * self.dof);
        let mut l = OwnedMlp::random(rng, &[n, hidden, n2 * (n2 + 1) / 2], Activation::Tanh, kind);
        l.scale_last(damping);
        self.dissipation_net = Some(l);
        if m > 0 {
            let g = OwnedMlp::random(rng, &[n, hidden, n2 * m], Activation::Tanh, kind);
            self.input_net = Some((m as u8, g));
        }
        self
    }

    /// Add R = L L^T with a random factor and G with `m` random columns.
    pub fn with_port(mut self, rng: &mut Rng, damping: f64, m: usize) -> Self {
        let n2 = 2 * self.dof;
        let l: Vec<f32> = (0..n2 * (n2 + 1) / 2)
            .map(|_| rng.uniform(-damping, damping) as f32)
            .collect();
        self.dissipation = Some(le(&l));
        if m > 0 {
            let g: Vec<f32> = (0..n2 * m).map(|_| rng.uniform(-1.0, 1.0) as f32).collect();
            self.input = Some((m as u8, le(&g)));
        }
        self
    }

    pub fn blob(&self) -> Vec<u8> {
        encode(&self.desc())
    }
}

/// Encode a description into a fresh vector.
pub fn encode(desc: &ModelDesc<'_>) -> Vec<u8> {
    let mut buf = vec![0u8; 1 << 20];
    let n = format::encode(desc, &mut buf).expect("fixture fits in 1 MiB");
    buf.truncate(n);
    buf
}

/// A random Cholesky factor with positive diagonal.
pub fn random_cholesky(rng: &mut Rng, n: usize) -> OwnedKinetic {
    let mut l = Vec::new();
    for i in 0..n {
        for j in 0..=i {
            l.push(if i == j {
                rng.uniform(0.6, 1.4) as f32
            } else {
                rng.uniform(-0.3, 0.3) as f32
            });
        }
    }
    let bytes = le(&l);
    OwnedKinetic::Quadratic(l, bytes)
}

/// A separable fixture: V is an MLP with `hidden` widths, T quadratic.
pub fn separable(
    rng: &mut Rng,
    dof: usize,
    hidden: &[usize],
    act: Activation,
    kind: Kind,
    method: Method,
    dt: f32,
) -> OwnedModel {
    let mut sizes = vec![dof];
    sizes.extend_from_slice(hidden);
    sizes.push(1);
    let potential = OwnedMlp::random(rng, &sizes, act, kind);
    let kinetic = random_cholesky(rng, dof);
    OwnedModel::new(
        dof,
        OwnedEnergy::Separable { potential, kinetic },
        Integrator::new(method, dt),
        rng,
    )
}

/// A general fixture: H is one MLP over all 2n coordinates.
pub fn general(
    rng: &mut Rng,
    dof: usize,
    hidden: &[usize],
    act: Activation,
    kind: Kind,
    method: Method,
    dt: f32,
) -> OwnedModel {
    let mut sizes = vec![2 * dof];
    sizes.extend_from_slice(hidden);
    sizes.push(1);
    let net = OwnedMlp::random(rng, &sizes, act, kind);
    OwnedModel::new(
        dof,
        OwnedEnergy::General(net),
        Integrator::new(method, dt),
        rng,
    )
}
