//! The owned mirror of the blob description: layers, networks, energies,
//! port terms and whole models that own their numbers, and their encoding
//! into a blob through `visviva_runtime::format::encode`. Each number is kept
//! twice, as a value (for references computed in `f64`) and as the bytes the
//! blob borrows; tests may edit the bytes alone to damage a blob on purpose.

use std::fmt;

use visviva_runtime::format::{
    self, Activation, AlignedF32, DissipationDesc, EnergyDesc, F32Bytes, InputDesc, KineticDesc,
    LayerDesc, MlpDesc, ModelDesc, TrainingEnvelope, WeightsDesc, MAX_LAYERS,
};
use visviva_runtime::{BlobError, Integrator};

use crate::quantize::{f32_bytes, quantize_rows, Precision};
use crate::rng::Generator;

/// Why an owned model could not be encoded.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum BuildError {
    /// A network with more layers than the format holds.
    TooManyLayers {
        /// The layer count found.
        layers: usize,
    },
    /// The encoder refused the description (it did not fit the buffer).
    Encode(BlobError),
}

impl fmt::Display for BuildError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Self::TooManyLayers { layers } => {
                write!(
                    f,
                    "network has {layers} layers; the format holds {MAX_LAYERS}"
                )
            }
            Self::Encode(e) => write!(f, "encoding the blob: {e}"),
        }
    }
}

impl std::error::Error for BuildError {}

/// One dense layer y = W x + b. `w` is row-major `[outputs][inputs]` and
/// holds the values the runtime computes with: for int8 the dequantized
/// `scales[j] * q[j][i]`, exactly.
#[derive(Debug, Clone)]
pub struct OwnedLayer {
    /// Input width.
    pub inputs: usize,
    /// Output width.
    pub outputs: usize,
    /// How the weights are stored.
    pub precision: Precision,
    /// Weights as evaluated.
    pub w: Vec<f32>,
    /// Biases.
    pub b: Vec<f32>,
    /// int8 values (empty for `f32`).
    pub q: Vec<i8>,
    /// Per-row int8 scales (empty for `f32`).
    pub scales: Vec<f32>,
    /// Bytes of `w`, `b`, `scales` and `q` as the blob stores them.
    pub w_bytes: Vec<u8>,
    /// Bytes of `b`.
    pub b_bytes: Vec<u8>,
    /// Bytes of `scales`.
    pub s_bytes: Vec<u8>,
    /// Bytes of `q`.
    pub q_bytes: Vec<u8>,
}

impl OwnedLayer {
    /// A layer from real weights `w` (row-major) and biases `b`, quantized
    /// to int8 when `precision` asks for it.
    pub fn new(inputs: usize, outputs: usize, w: &[f32], b: &[f32], precision: Precision) -> Self {
        let (q, scales, w) = match precision {
            Precision::F32 => (Vec::new(), Vec::new(), w.to_vec()),
            Precision::Int8 => {
                let (q, scales) = quantize_rows(w, inputs);
                let deq = q
                    .iter()
                    .enumerate()
                    .map(|(k, v)| scales[k / inputs.max(1)] * f32::from(*v))
                    .collect();
                (q, scales, deq)
            }
        };
        Self {
            inputs,
            outputs,
            precision,
            w_bytes: f32_bytes(&w),
            b_bytes: f32_bytes(b),
            s_bytes: f32_bytes(&scales),
            q_bytes: q.iter().map(|v| *v as u8).collect(),
            w,
            b: b.to_vec(),
            q,
            scales,
        }
    }

    /// Weights uniform in +-gain / sqrt(inputs), biases uniform in +-0.1.
    pub fn random_uniform(
        rng: &mut impl Generator,
        inputs: usize,
        outputs: usize,
        gain: f32,
        precision: Precision,
    ) -> Self {
        let bound = gain / (inputs as f32).sqrt();
        let w: Vec<f32> = (0..inputs * outputs)
            .map(|_| bound * rng.symmetric())
            .collect();
        let b: Vec<f32> = (0..outputs).map(|_| 0.1 * rng.symmetric()).collect();
        Self::new(inputs, outputs, &w, &b, precision)
    }

    /// Multiply weights and biases by `k` (a power of two keeps int8 values
    /// and scales exact).
    pub fn scale_by(&mut self, k: f32) {
        self.w.iter_mut().for_each(|v| *v *= k);
        self.b.iter_mut().for_each(|v| *v *= k);
        self.scales.iter_mut().for_each(|v| *v *= k);
        self.w_bytes = f32_bytes(&self.w);
        self.b_bytes = f32_bytes(&self.b);
        self.s_bytes = f32_bytes(&self.scales);
    }

    /// The layer as the blob describes it, borrowing the bytes.
    pub fn desc(&self) -> LayerDesc<'_> {
        let weights = match self.precision {
            Precision::F32 => WeightsDesc::F32Aligned(AlignedF32::new(&self.w_bytes)),
            Precision::Int8 => WeightsDesc::Int8 {
                values: &self.q_bytes,
                scales: F32Bytes(&self.s_bytes),
            },
        };
        LayerDesc {
            inputs: self.inputs as u16,
            outputs: self.outputs as u16,
            weights,
            bias: F32Bytes(&self.b_bytes),
        }
    }
}

/// A multilayer perceptron: `activation` after every layer but the last.
#[derive(Debug, Clone)]
pub struct OwnedMlp {
    /// Hidden-layer activation.
    pub activation: Activation,
    /// Layers from input to output.
    pub layers: Vec<OwnedLayer>,
}

impl OwnedMlp {
    /// Layers of widths `sizes[0] -> sizes[1] -> ...` with Glorot-uniform
    /// weights (limit sqrt(6 / (in + out)), common practice) and biases
    /// uniform in +-0.1.
    pub fn random(
        rng: &mut impl Generator,
        sizes: &[usize],
        activation: Activation,
        precision: Precision,
    ) -> Self {
        let layers = sizes
            .windows(2)
            .map(|win| {
                let (ni, no) = (win[0], win[1]);
                let lim = (6.0 / (ni + no) as f64).sqrt();
                let w: Vec<f32> = (0..ni * no)
                    .map(|_| rng.uniform(-lim, lim) as f32)
                    .collect();
                let b: Vec<f32> = (0..no).map(|_| rng.uniform(-0.1, 0.1) as f32).collect();
                OwnedLayer::new(ni, no, &w, &b, precision)
            })
            .collect();
        Self { activation, layers }
    }

    /// The network as the blob describes it.
    pub fn desc(&self) -> Result<MlpDesc<'_>, BuildError> {
        let too_many = BuildError::TooManyLayers {
            layers: self.layers.len(),
        };
        let mut layers = heapless::Vec::new();
        for l in &self.layers {
            layers.push(l.desc()).map_err(|_| too_many)?;
        }
        Ok(MlpDesc {
            activation: self.activation,
            layers,
        })
    }

    /// Number of weights and biases.
    pub fn parameters(&self) -> usize {
        self.layers.iter().map(|l| l.w.len() + l.b.len()).sum()
    }

    /// Multiply the last layer's weights and biases by `k`.
    pub fn scale_last(&mut self, k: f32) {
        if let Some(l) = self.layers.last_mut() {
            l.scale_by(k);
        }
    }

    /// All outputs at `x` in `f64` (tanh or softplus hidden layers): an
    /// independent reference for the runtime's `f32` kernels.
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

/// The kinetic part of a separable energy.
#[derive(Debug, Clone)]
pub enum OwnedKinetic {
    /// 1/2 z^T L L^T z: the lower-triangular factor L row by row (values,
    /// bytes).
    Quadratic(Vec<f32>, Vec<u8>),
    /// A network T(z_p).
    Network(OwnedMlp),
}

impl OwnedKinetic {
    /// A quadratic kinetic term with factor `l` (row by row).
    pub fn quadratic(l: Vec<f32>) -> Self {
        let bytes = f32_bytes(&l);
        Self::Quadratic(l, bytes)
    }
}

/// The energy function.
#[derive(Debug, Clone)]
pub enum OwnedEnergy {
    /// H = MLP(z) over all 2n coordinates.
    General(OwnedMlp),
    /// H = T(z_p) + V(z_q).
    Separable {
        /// V over the n coordinates.
        potential: OwnedMlp,
        /// T over the n momenta.
        kinetic: OwnedKinetic,
    },
    /// H = 1/2 z_p^T (L(z_q) L(z_q)^T + floor I) z_p + V(z_q), L from the
    /// factor network (n (n + 1) / 2 outputs, softplus on the diagonal).
    Mechanical {
        /// The factor network L(z_q).
        factor: OwnedMlp,
        /// eps on the diagonal of M^-1.
        floor: f32,
        /// V over the n coordinates.
        potential: OwnedMlp,
    },
}

/// A whole model that encodes into a blob.
#[derive(Debug, Clone)]
pub struct OwnedModel {
    /// Degrees of freedom n.
    pub dof: usize,
    /// Offsets of the 2n coordinates.
    pub offset: Vec<f32>,
    /// Scales of the 2n coordinates.
    pub scale: Vec<f32>,
    /// Bytes of `offset`.
    pub offset_bytes: Vec<u8>,
    /// Bytes of `scale`.
    pub scale_bytes: Vec<u8>,
    /// Energy scale.
    pub energy_scale: f32,
    /// The energy network.
    pub energy: OwnedEnergy,
    /// How to step the model.
    pub integrator: Integrator,
    /// Constant factor L of R = L L^T (2n x 2n lower-triangular, row by
    /// row), as bytes.
    pub dissipation: Option<Vec<u8>>,
    /// Inputs m and constant G (2n x m, row-major), as bytes.
    pub input: Option<(u8, Vec<u8>)>,
    /// L(q) as a network of z_q (replaces `dissipation` when set).
    pub dissipation_net: Option<OwnedMlp>,
    /// Inputs m and G(q) as a network of z_q (replaces `input` when set).
    pub input_net: Option<(u8, OwnedMlp)>,
    /// The training envelope's lower and upper bounds (2n each, q then p),
    /// as bytes (format version 4).
    pub envelope: Option<(Vec<u8>, Vec<u8>)>,
}

impl OwnedModel {
    /// A conservative, autonomous model.
    pub fn new(
        dof: usize,
        offset: Vec<f32>,
        scale: Vec<f32>,
        energy_scale: f32,
        energy: OwnedEnergy,
        integrator: Integrator,
    ) -> Self {
        Self {
            dof,
            offset_bytes: f32_bytes(&offset),
            scale_bytes: f32_bytes(&scale),
            offset,
            scale,
            energy_scale,
            energy,
            integrator,
            dissipation: None,
            input: None,
            dissipation_net: None,
            input_net: None,
            envelope: None,
        }
    }

    /// Add a training envelope: lower and upper bounds, q then p (not
    /// checked here, so tests can store bounds the runtime refuses).
    pub fn with_envelope(mut self, lower: &[f32], upper: &[f32]) -> Self {
        self.envelope = Some((f32_bytes(lower), f32_bytes(upper)));
        self
    }

    /// Add constant port terms: the factor L of R (n (2n + 1) values) and,
    /// when given, m inputs with G (2n m values, row-major).
    pub fn with_constant_port(mut self, factor: &[f32], input: Option<(u8, &[f32])>) -> Self {
        self.dissipation = Some(f32_bytes(factor));
        self.input = input.map(|(m, g)| (m, f32_bytes(g)));
        self
    }

    /// Add R = L L^T with a random factor in +-`damping` and G with `m`
    /// random columns in +-1.
    pub fn with_port(self, rng: &mut impl Generator, damping: f64, m: usize) -> Self {
        let n2 = 2 * self.dof;
        let l: Vec<f32> = (0..n2 * (n2 + 1) / 2)
            .map(|_| rng.uniform(-damping, damping) as f32)
            .collect();
        let g: Vec<f32> = (0..n2 * m).map(|_| rng.uniform(-1.0, 1.0) as f32).collect();
        let input = (m > 0).then_some((m as u8, &g[..]));
        self.with_constant_port(&l, input)
    }

    /// Add L(q) and (when `m > 0`) G(q) as random networks of z_q with one
    /// hidden tanh layer of `hidden` units; L's last layer is scaled by
    /// `damping`.
    pub fn with_port_networks(
        mut self,
        rng: &mut impl Generator,
        damping: f32,
        m: usize,
        hidden: usize,
        precision: Precision,
    ) -> Self {
        let (n, n2) = (self.dof, 2 * self.dof);
        let sizes = [n, hidden, n2 * (n2 + 1) / 2];
        let mut l = OwnedMlp::random(rng, &sizes, Activation::Tanh, precision);
        l.scale_last(damping);
        self.dissipation_net = Some(l);
        if m > 0 {
            let g = OwnedMlp::random(rng, &[n, hidden, n2 * m], Activation::Tanh, precision);
            self.input_net = Some((m as u8, g));
        }
        self
    }

    /// The model as the blob describes it, borrowing the bytes.
    pub fn desc(&self) -> Result<ModelDesc<'_>, BuildError> {
        let energy = match &self.energy {
            OwnedEnergy::General(m) => EnergyDesc::General(m.desc()?),
            OwnedEnergy::Mechanical {
                factor,
                floor,
                potential,
            } => EnergyDesc::Mechanical {
                factor: factor.desc()?,
                floor: *floor,
                potential: potential.desc()?,
            },
            OwnedEnergy::Separable { potential, kinetic } => EnergyDesc::Separable {
                potential: potential.desc()?,
                kinetic: match kinetic {
                    OwnedKinetic::Quadratic(_, bytes) => KineticDesc::Quadratic {
                        cholesky: F32Bytes(bytes),
                    },
                    OwnedKinetic::Network(m) => KineticDesc::Network(m.desc()?),
                },
            },
        };
        let dissipation = match (&self.dissipation_net, &self.dissipation) {
            (Some(net), _) => DissipationDesc::Network(net.desc()?),
            (None, None) => DissipationDesc::None,
            (None, Some(b)) => DissipationDesc::Constant {
                factor: F32Bytes(b),
            },
        };
        let input = match (&self.input_net, &self.input) {
            (Some((m, net)), _) => InputDesc::Network {
                inputs: *m,
                net: net.desc()?,
            },
            (None, None) => InputDesc::None,
            (None, Some((m, b))) => InputDesc::Constant {
                inputs: *m,
                matrix: F32Bytes(b),
            },
        };
        Ok(ModelDesc {
            dof: self.dof as u8,
            offset: F32Bytes(&self.offset_bytes),
            scale: F32Bytes(&self.scale_bytes),
            energy_scale: self.energy_scale,
            energy,
            integrator: self.integrator,
            dissipation,
            input,
            envelope: self.envelope.as_ref().map(|(lo, hi)| TrainingEnvelope {
                lower: F32Bytes(lo),
                upper: F32Bytes(hi),
            }),
        })
    }

    /// The complete blob (header, payload, CRC).
    pub fn blob(&self) -> Result<Vec<u8>, BuildError> {
        encode(&self.desc()?)
    }
}

/// Encode a description into a fresh vector (room for 1 MiB).
pub fn encode(desc: &ModelDesc<'_>) -> Result<Vec<u8>, BuildError> {
    let mut buf = vec![0u8; 1 << 20];
    let n = format::encode(desc, &mut buf).map_err(BuildError::Encode)?;
    buf.truncate(n);
    Ok(buf)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::rng::SplitMix64;
    use visviva_runtime::{Method, Model};

    fn sample(precision: Precision) -> OwnedModel {
        let mut rng = SplitMix64(3);
        let potential = OwnedMlp::random(&mut rng, &[2, 8, 1], Activation::Tanh, precision);
        let energy = OwnedEnergy::Separable {
            potential,
            kinetic: OwnedKinetic::quadratic(vec![1.0, 0.1, 0.9]),
        };
        let it = Integrator::new(Method::StormerVerlet, 0.01);
        OwnedModel::new(2, vec![0.0; 4], vec![1.0; 4], 1.0, energy, it)
    }

    #[test]
    fn blobs_round_trip_through_the_runtime_decoder() {
        for precision in [Precision::F32, Precision::Int8] {
            let owned = sample(precision);
            let blob = owned.blob().unwrap();
            assert_eq!(format::decode(&blob).unwrap(), owned.desc().unwrap());
            assert!(Model::<2, 8>::from_bytes(&blob).is_ok());
        }
    }

    #[test]
    fn int8_layers_hold_exactly_what_the_runtime_dequantizes() {
        // The format's rule: w[j][i] = scales[j] * values[j][i].
        let owned = sample(Precision::Int8);
        let OwnedEnergy::Separable { potential, .. } = &owned.energy else {
            unreachable!()
        };
        for l in &potential.layers {
            for (k, w) in l.w.iter().enumerate() {
                assert_eq!(*w, l.scales[k / l.inputs] * f32::from(l.q[k]));
            }
        }
    }

    #[test]
    fn an_envelope_round_trips_and_steps_the_header_to_version_4() {
        // int8 weights need no alignment, so the blob keeps version 1 (f32
        // weights would make it version 6).
        let plain = sample(Precision::Int8).blob().unwrap();
        let owned =
            sample(Precision::Int8).with_envelope(&[-1.0, -2.0, -3.0, -4.0], &[1.0, 2.0, 3.0, 4.0]);
        let blob = owned.blob().unwrap();
        assert_eq!(format::decode(&blob).unwrap(), owned.desc().unwrap());
        assert_eq!(u16::from_le_bytes([plain[4], plain[5]]), 1);
        assert_eq!(u16::from_le_bytes([blob[4], blob[5]]), 4);
        // The section follows the version-1 payload: an Option tag and two
        // byte strings of 16 bytes (postcard varint lengths), 35 bytes.
        assert_eq!(blob.len(), plain.len() + 1 + 2 * (1 + 16));
        let m = Model::<2, 8>::from_bytes(&blob).unwrap();
        let env = m.envelope().unwrap();
        assert_eq!(
            env.lower.iter().collect::<Vec<_>>(),
            [-1.0, -2.0, -3.0, -4.0]
        );
        assert_eq!(env.upper.iter().collect::<Vec<_>>(), [1.0, 2.0, 3.0, 4.0]);
    }

    #[test]
    fn too_many_layers_is_an_error_not_a_panic() {
        let mut rng = SplitMix64(1);
        let sizes = vec![2; MAX_LAYERS + 2];
        let net = OwnedMlp::random(&mut rng, &sizes, Activation::Tanh, Precision::F32);
        assert_eq!(
            net.desc().unwrap_err(),
            BuildError::TooManyLayers {
                layers: MAX_LAYERS + 1
            }
        );
    }
}
