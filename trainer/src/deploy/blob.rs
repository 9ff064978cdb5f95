//! An owned, editable mirror of a `visviva-runtime` blob, for the host tools
//! that read, transform and write blobs (export, quantization, inspection).
//! Decoding goes through the runtime's own parser and validator, encoding
//! through its own encoder, so the host never has a second format.

use anyhow::{anyhow, bail, Context, Result};
use visviva_blob_support::quantize::quantize_rows;
use visviva_runtime::format::{
    self, Activation, AlignedF32, DissipationDesc, EnergyDesc, F32Bytes, InputDesc, KineticDesc,
    LayerDesc, MlpDesc, ModelDesc, TrainingEnvelope, WeightsDesc,
};
use visviva_runtime::{Integrator, Model};

/// Bounds used to validate blobs on the host: the largest the runtime takes.
pub const HOST_MAX_DOF: usize = visviva_runtime::MAX_DOF_SUPPORTED;
/// Widest layer the host tools accept.
pub const HOST_MAX_WIDTH: usize = 128;
/// The model type host tools evaluate.
pub type HostModel<'a> = Model<'a, HOST_MAX_DOF, HOST_MAX_WIDTH>;

/// Weights of one layer, row-major `[outputs][inputs]`.
#[derive(Debug, Clone, PartialEq)]
pub enum Weights {
    /// Full precision.
    F32(Vec<f32>),
    /// Symmetric int8 with one scale per output channel.
    Int8 {
        /// Quantized values.
        values: Vec<i8>,
        /// Per-output-channel scales.
        scales: Vec<f32>,
    },
}

/// One dense layer.
#[derive(Debug, Clone, PartialEq)]
pub struct Layer {
    /// Input width.
    pub inputs: usize,
    /// Output width.
    pub outputs: usize,
    /// The weights.
    pub weights: Weights,
    /// The biases.
    pub bias: Vec<f32>,
}

impl Layer {
    /// The weights as real numbers (dequantized for int8).
    pub fn real_weights(&self) -> Vec<f32> {
        match &self.weights {
            Weights::F32(w) => w.clone(),
            Weights::Int8 { values, scales } => values
                .iter()
                .enumerate()
                .map(|(k, v)| scales[k / self.inputs] * *v as f32)
                .collect(),
        }
    }
}

/// A network (scalar output for energies, several for port terms).
#[derive(Debug, Clone, PartialEq)]
pub struct Mlp {
    /// Hidden activation.
    pub activation: Activation,
    /// Layers from input to output.
    pub layers: Vec<Layer>,
}

/// The kinetic term of a separable model.
#[derive(Debug, Clone, PartialEq)]
pub enum Kinetic {
    /// Cholesky factor of M^-1, row by row.
    Quadratic(Vec<f32>),
    /// A network T(z_p).
    Network(Mlp),
}

/// The energy function.
#[derive(Debug, Clone, PartialEq)]
pub enum Energy {
    /// One network over all coordinates.
    General(Mlp),
    /// T(p) + V(q).
    Separable {
        /// V(z_q).
        potential: Mlp,
        /// T(z_p).
        kinetic: Kinetic,
    },
    /// 1/2 z_p^T (L(z_q) L(z_q)^T + floor I) z_p + V(z_q) (format version 5).
    Mechanical {
        /// The factor network L(z_q): n (n + 1) / 2 outputs, row by row,
        /// softplus on the diagonal.
        factor: Mlp,
        /// eps on the diagonal of M^-1 (normalized units).
        floor: f32,
        /// V(z_q).
        potential: Mlp,
    },
}

/// A port matrix (the factor L of R, or G): constant entries, or a network
/// of the normalized coordinates z_q whose outputs are the entries.
#[derive(Debug, Clone, PartialEq)]
pub enum PortTerm {
    /// The entries.
    Constant(Vec<f32>),
    /// A network of z_q.
    Network(Mlp),
}

impl PortTerm {
    fn from_constant(b: F32Bytes<'_>) -> Self {
        Self::Constant(f32s(b))
    }

    /// The network, if this term is one.
    pub fn network(&self) -> Option<&Mlp> {
        match self {
            Self::Constant(_) => None,
            Self::Network(m) => Some(m),
        }
    }

    /// Weights and biases (or entries).
    pub fn parameters(&self) -> usize {
        match self {
            Self::Constant(v) => v.len(),
            Self::Network(m) => m.parameters(),
        }
    }

    fn converted(&self, kind: WeightKind) -> Self {
        match self {
            Self::Constant(v) => Self::Constant(v.clone()),
            Self::Network(m) => Self::Network(m.converted(kind)),
        }
    }

    /// Short label: `constant` or the network's widths.
    pub fn label(&self) -> String {
        match self {
            Self::Constant(_) => "constant".into(),
            Self::Network(m) => format!("network {}", m.label()),
        }
    }
}

/// Everything a blob holds, owned.
#[derive(Debug, Clone, PartialEq)]
pub struct BlobModel {
    /// Degrees of freedom.
    pub dof: usize,
    /// Offsets of the 2n coordinates.
    pub offset: Vec<f32>,
    /// Scales of the 2n coordinates.
    pub scale: Vec<f32>,
    /// Energy scale.
    pub energy_scale: f32,
    /// The energy function.
    pub energy: Energy,
    /// Integrator settings.
    pub integrator: Integrator,
    /// Factor L of the dissipation R = L L^T (2n x 2n lower-triangular, row
    /// by row), for damped models.
    pub dissipation: Option<PortTerm>,
    /// Inputs m and G (2n x m, row-major), for driven models.
    pub input: Option<(usize, PortTerm)>,
    /// The training envelope (format version 4): lower and upper bounds
    /// per coordinate, q then p, physical units, already widened (see
    /// [`crate::deploy::training_range`]).
    pub envelope: Option<Bounds>,
}

/// Per-coordinate lower and upper bounds (q1..qn, p1..pn).
#[derive(Debug, Clone, PartialEq)]
pub struct Bounds {
    /// Lower bounds.
    pub lower: Vec<f32>,
    /// Upper bounds.
    pub upper: Vec<f32>,
}

/// Precision of stored weight matrices.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum WeightKind {
    /// Little-endian f32.
    F32,
    /// Symmetric int8 per output channel, f32 scales and biases.
    Int8,
}

fn f32s(b: F32Bytes<'_>) -> Vec<f32> {
    b.iter().collect()
}

fn le(v: &[f32]) -> Vec<u8> {
    v.iter().flat_map(|x| x.to_le_bytes()).collect()
}

impl Mlp {
    fn from_desc(d: &MlpDesc<'_>) -> Self {
        let layers = d
            .layers
            .iter()
            .map(|l| Layer {
                inputs: l.inputs as usize,
                outputs: l.outputs as usize,
                weights: match l.weights {
                    WeightsDesc::F32(w) | WeightsDesc::F32Aligned(AlignedF32 { values: w, .. }) => {
                        Weights::F32(f32s(w))
                    }
                    WeightsDesc::Int8 { values, scales } => Weights::Int8 {
                        values: values.iter().map(|v| *v as i8).collect(),
                        scales: f32s(scales),
                    },
                },
                bias: f32s(l.bias),
            })
            .collect();
        Self {
            activation: d.activation,
            layers,
        }
    }

    /// Weight kind of the first layer (all layers share one in Visviva blobs).
    pub fn weight_kind(&self) -> WeightKind {
        match self.layers.first().map(|l| &l.weights) {
            Some(Weights::Int8 { .. }) => WeightKind::Int8,
            _ => WeightKind::F32,
        }
    }

    /// Layer widths `[inputs, hidden.., 1]`.
    pub fn widths(&self) -> Vec<usize> {
        let mut w: Vec<usize> = self
            .layers
            .first()
            .map(|l| vec![l.inputs])
            .unwrap_or_default();
        w.extend(self.layers.iter().map(|l| l.outputs));
        w
    }

    /// Weights and biases.
    pub fn parameters(&self) -> usize {
        self.layers
            .iter()
            .map(|l| l.inputs * l.outputs + l.outputs)
            .sum()
    }

    /// Widths joined by dashes and the activation, e.g. `1-16-2 tanh`.
    pub fn label(&self) -> String {
        let widths: Vec<String> = self.widths().iter().map(|v| v.to_string()).collect();
        format!(
            "{} {}",
            widths.join("-"),
            format!("{:?}", self.activation).to_lowercase()
        )
    }

    /// This network with every weight matrix stored as `kind`.
    pub fn converted(&self, kind: WeightKind) -> Self {
        let layers = self
            .layers
            .iter()
            .map(|l| {
                let real = l.real_weights();
                let weights = match kind {
                    WeightKind::F32 => Weights::F32(real),
                    WeightKind::Int8 => {
                        let (values, scales) = quantize_rows(&real, l.inputs);
                        Weights::Int8 { values, scales }
                    }
                };
                Layer {
                    weights,
                    ..l.clone()
                }
            })
            .collect();
        Self {
            activation: self.activation,
            layers,
        }
    }
}

/// Owned byte buffers a [`ModelDesc`] can borrow from.
struct Bytes {
    layers: Vec<(Vec<u8>, Vec<u8>, Vec<u8>)>,
}

impl Bytes {
    fn of(m: &Mlp) -> Self {
        Self {
            layers: m
                .layers
                .iter()
                .map(|l| match &l.weights {
                    Weights::F32(w) => (le(w), Vec::new(), le(&l.bias)),
                    Weights::Int8 { values, scales } => (
                        values.iter().map(|v| *v as u8).collect(),
                        le(scales),
                        le(&l.bias),
                    ),
                })
                .collect(),
        }
    }

    fn desc<'a>(&'a self, m: &Mlp) -> Result<MlpDesc<'a>> {
        let mut layers = heapless::Vec::new();
        for (l, (w, s, b)) in m.layers.iter().zip(&self.layers) {
            let weights = match l.weights {
                Weights::F32(_) => WeightsDesc::F32Aligned(AlignedF32::new(w)),
                Weights::Int8 { .. } => WeightsDesc::Int8 {
                    values: w,
                    scales: F32Bytes(s),
                },
            };
            layers
                .push(LayerDesc {
                    inputs: u16::try_from(l.inputs).context("layer too wide")?,
                    outputs: u16::try_from(l.outputs).context("layer too wide")?,
                    weights,
                    bias: F32Bytes(b),
                })
                .map_err(|_| anyhow!("more than {} layers", format::MAX_LAYERS))?;
        }
        Ok(MlpDesc {
            activation: m.activation,
            layers,
        })
    }
}

impl BlobModel {
    /// Parse and fully validate a blob (with the host's bounds).
    pub fn from_bytes(bytes: &[u8]) -> Result<Self, visviva_runtime::BlobError> {
        HostModel::from_bytes(bytes)?;
        let d = format::decode(bytes)?;
        let energy = match &d.energy {
            EnergyDesc::General(m) => Energy::General(Mlp::from_desc(m)),
            EnergyDesc::Separable { potential, kinetic } => Energy::Separable {
                potential: Mlp::from_desc(potential),
                kinetic: match kinetic {
                    KineticDesc::Quadratic { cholesky } => Kinetic::Quadratic(f32s(*cholesky)),
                    KineticDesc::Network(m) => Kinetic::Network(Mlp::from_desc(m)),
                },
            },
            EnergyDesc::Mechanical {
                factor,
                floor,
                potential,
            } => Energy::Mechanical {
                factor: Mlp::from_desc(factor),
                floor: *floor,
                potential: Mlp::from_desc(potential),
            },
        };
        Ok(Self {
            dof: d.dof as usize,
            offset: f32s(d.offset),
            scale: f32s(d.scale),
            energy_scale: d.energy_scale,
            energy,
            integrator: d.integrator,
            dissipation: match &d.dissipation {
                DissipationDesc::None => None,
                DissipationDesc::Constant { factor } => Some(PortTerm::from_constant(*factor)),
                DissipationDesc::Network(m) => Some(PortTerm::Network(Mlp::from_desc(m))),
            },
            input: match &d.input {
                InputDesc::None => None,
                InputDesc::Constant { inputs, matrix } => {
                    Some((*inputs as usize, PortTerm::from_constant(*matrix)))
                }
                InputDesc::Network { inputs, net } => {
                    Some((*inputs as usize, PortTerm::Network(Mlp::from_desc(net))))
                }
            },
            envelope: d.envelope.map(|e| Bounds {
                lower: f32s(e.lower),
                upper: f32s(e.upper),
            }),
        })
    }

    /// Read a blob file, naming the file in errors.
    pub fn read(path: &std::path::Path) -> Result<Self> {
        let bytes =
            std::fs::read(path).with_context(|| format!("{}: cannot read", path.display()))?;
        Self::from_bytes(&bytes).map_err(|e| anyhow!("{}: {e}", path.display()))
    }

    /// Encode as a blob; the result is checked by the runtime's parser.
    pub fn to_bytes(&self) -> Result<Vec<u8>> {
        let offset = le(&self.offset);
        let scale = le(&self.scale);
        let (pb, kb, chol) = match &self.energy {
            Energy::General(m) => (Bytes::of(m), None, Vec::new()),
            Energy::Mechanical {
                factor, potential, ..
            } => (Bytes::of(potential), Some(Bytes::of(factor)), Vec::new()),
            Energy::Separable { potential, kinetic } => match kinetic {
                Kinetic::Quadratic(l) => (Bytes::of(potential), None, le(l)),
                Kinetic::Network(k) => (Bytes::of(potential), Some(Bytes::of(k)), Vec::new()),
            },
        };
        let energy = match &self.energy {
            Energy::General(m) => EnergyDesc::General(pb.desc(m)?),
            Energy::Mechanical {
                factor,
                floor,
                potential,
            } => EnergyDesc::Mechanical {
                factor: kb
                    .as_ref()
                    .context("mechanical factor bytes")?
                    .desc(factor)?,
                floor: *floor,
                potential: pb.desc(potential)?,
            },
            Energy::Separable { potential, kinetic } => EnergyDesc::Separable {
                potential: pb.desc(potential)?,
                kinetic: match (kinetic, &kb) {
                    (Kinetic::Network(k), Some(kb)) => KineticDesc::Network(kb.desc(k)?),
                    _ => KineticDesc::Quadratic {
                        cholesky: F32Bytes(&chol),
                    },
                },
            },
        };
        // Bytes of each port term: a constant's entries, or a network's.
        enum TermBytes {
            Constant(Vec<u8>),
            Network(Bytes),
        }
        let term_bytes = |t: &PortTerm| match t {
            PortTerm::Constant(v) => TermBytes::Constant(le(v)),
            PortTerm::Network(m) => TermBytes::Network(Bytes::of(m)),
        };
        let factor = self.dissipation.as_ref().map(term_bytes);
        let g = self.input.as_ref().map(|(m, g)| (*m, g, term_bytes(g)));
        let bounds = self.envelope.as_ref().map(|b| (le(&b.lower), le(&b.upper)));
        let desc = ModelDesc {
            dof: u8::try_from(self.dof).context("too many degrees of freedom")?,
            offset: F32Bytes(&offset),
            scale: F32Bytes(&scale),
            energy_scale: self.energy_scale,
            energy,
            integrator: self.integrator,
            dissipation: match (&factor, &self.dissipation) {
                (Some(TermBytes::Constant(f)), _) => DissipationDesc::Constant {
                    factor: F32Bytes(f),
                },
                (Some(TermBytes::Network(b)), Some(PortTerm::Network(m))) => {
                    DissipationDesc::Network(b.desc(m)?)
                }
                _ => DissipationDesc::None,
            },
            input: match &g {
                None => InputDesc::None,
                Some((m, term, bytes)) => {
                    let inputs = u8::try_from(*m).context("too many inputs")?;
                    match (bytes, term) {
                        (TermBytes::Network(b), PortTerm::Network(net)) => InputDesc::Network {
                            inputs,
                            net: b.desc(net)?,
                        },
                        (TermBytes::Constant(c), _) => InputDesc::Constant {
                            inputs,
                            matrix: F32Bytes(c),
                        },
                        _ => bail!("inconsistent input term"),
                    }
                }
            },
            envelope: bounds.as_ref().map(|(lo, hi)| TrainingEnvelope {
                lower: F32Bytes(lo),
                upper: F32Bytes(hi),
            }),
        };
        let room = 64 * 1024 + 16 * (offset.len() + chol.len() + self.parameters());
        let mut buf = vec![0u8; room];
        let n = format::encode(&desc, &mut buf).map_err(|e| anyhow!("encoding the blob: {e}"))?;
        buf.truncate(n);
        if let Err(e) = HostModel::from_bytes(&buf) {
            bail!("the encoded blob does not validate: {e}");
        }
        Ok(buf)
    }

    /// The networks, potential (or general) first, then those of the port
    /// terms.
    pub fn networks(&self) -> Vec<(&'static str, &Mlp)> {
        let mut v = match &self.energy {
            Energy::General(m) => vec![("energy", m)],
            Energy::Mechanical {
                factor, potential, ..
            } => vec![("potential", potential), ("mass factor", factor)],
            Energy::Separable { potential, kinetic } => {
                let mut v = vec![("potential", potential)];
                if let Kinetic::Network(k) = kinetic {
                    v.push(("kinetic", k));
                }
                v
            }
        };
        if let Some(m) = self.dissipation.as_ref().and_then(PortTerm::network) {
            v.push(("dissipation", m));
        }
        if let Some(m) = self.input.as_ref().and_then(|(_, g)| g.network()) {
            v.push(("input", m));
        }
        v
    }

    /// Number of weights and biases (port terms included).
    pub fn parameters(&self) -> usize {
        let nets: usize = self.networks().iter().map(|(_, m)| m.parameters()).sum();
        let chol = match &self.energy {
            Energy::Separable {
                kinetic: Kinetic::Quadratic(l),
                ..
            } => l.len(),
            _ => 0,
        };
        let constant = |t: &PortTerm| match t {
            PortTerm::Constant(v) => v.len(),
            PortTerm::Network(_) => 0,
        };
        nets + chol
            + self.dissipation.as_ref().map_or(0, constant)
            + self.input.as_ref().map_or(0, |(_, g)| constant(g))
    }

    /// Weight storage of the networks.
    pub fn weight_kind(&self) -> WeightKind {
        self.networks()
            .first()
            .map(|(_, m)| m.weight_kind())
            .unwrap_or(WeightKind::F32)
    }

    /// The same model with weights stored as `kind`.
    pub fn converted(&self, kind: WeightKind) -> Self {
        let energy = match &self.energy {
            Energy::General(m) => Energy::General(m.converted(kind)),
            Energy::Mechanical {
                factor,
                floor,
                potential,
            } => Energy::Mechanical {
                factor: factor.converted(kind),
                floor: *floor,
                potential: potential.converted(kind),
            },
            Energy::Separable { potential, kinetic } => Energy::Separable {
                potential: potential.converted(kind),
                kinetic: match kinetic {
                    Kinetic::Quadratic(l) => Kinetic::Quadratic(l.clone()),
                    Kinetic::Network(k) => Kinetic::Network(k.converted(kind)),
                },
            },
        };
        Self {
            energy,
            dissipation: self.dissipation.as_ref().map(|t| t.converted(kind)),
            input: self.input.as_ref().map(|(m, g)| (*m, g.converted(kind))),
            ..self.clone()
        }
    }

    /// Short architecture label, e.g. `separable V 1-64-64-1, T quadratic`.
    pub fn architecture(&self) -> String {
        let w = |m: &Mlp| {
            m.widths()
                .iter()
                .map(|v| v.to_string())
                .collect::<Vec<_>>()
                .join("-")
        };
        let act = |m: &Mlp| format!("{:?}", m.activation).to_lowercase();
        match &self.energy {
            Energy::General(m) => format!("general H {} {}", w(m), act(m)),
            Energy::Mechanical {
                factor, potential, ..
            } => format!(
                "mechanical V {} {}, M(q)^-1 factor {} {}",
                w(potential),
                act(potential),
                w(factor),
                act(factor)
            ),
            Energy::Separable { potential, kinetic } => format!(
                "separable V {} {}, T {}",
                w(potential),
                act(potential),
                match kinetic {
                    Kinetic::Quadratic(_) => "quadratic".to_string(),
                    Kinetic::Network(k) => format!("{} {}", w(k), act(k)),
                }
            ),
        }
    }
}
