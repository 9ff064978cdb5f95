//! The model blob: one versioned, checksummed container for everything the
//! device needs. Layout (all integers little-endian):
//!
//! ```text
//! offset  size  field
//! 0       4     magic tag b"VVMB"
//! 4       2     format version (u16): 1; 2 with constant port terms;
//!                3 with port terms that are networks of q; 4 with a
//!                training envelope; 5 with a mechanical energy (mass
//!                matrix M(q)); 6 with 4-byte-aligned f32 weight
//!                matrices
//! 6       4     payload length L (u32)
//! 10      L     payload: postcard encoding of [`ModelDesc`]
//! 10+L    4     CRC-32 (ISO-HDLC, the common "CRC-32") over bytes 4..10+L
//! ```
//!
//! Weight arrays inside the payload are postcard byte strings holding
//! little-endian `f32` (or raw `i8`) values, so a parsed model borrows them
//! straight from the blob (flash) with no copy. Enum variants are encoded by
//! index: new variants are appended, never reordered, and any change a reader
//! of the current version cannot skip bumps [`FORMAT_VERSION`].
//!
//! Aligned weights (version 6): a weight matrix written as
//! [`WeightsDesc::F32Aligned`] is a postcard byte string of `p` zero bytes
//! followed by the little-endian `f32` values, where `p` (0..=3) is the
//! string's length mod 4 (so a reader finds it without knowing where the
//! string sits) and is chosen by [`encode`] so that the values start at an
//! offset from the blob's first byte that is a multiple of 4. The reader
//! refuses such an array at any other offset as malformed. A firmware must
//! place the blob at a 4-byte-aligned address (e.g. a linker section with
//! `ALIGN(4)` or a `#[repr(align(4))]` wrapper): then every aligned matrix
//! is read in place as `&[f32]`, one load per weight. A blob at an
//! unaligned address still parses and steps to the same bits, through the
//! byte-decoding path that versions 1 to 5 use ([`WeightsDesc::F32`], whose
//! values follow the length directly at any offset). The writers
//! (`visviva-blob-support`, the trainer) write every f32 weight matrix
//! aligned, so every blob with f32 weights is version 6; int8 blobs need no
//! alignment (their weights are single bytes) and keep their older version
//! and bytes. Biases, scales and offsets stay byte strings at any offset:
//! they are read once per output, not once per multiply-accumulate.
//!
//! Optional trailing sections (version 4 on): after the port terms the
//! payload may end, or go on with one postcard `Option` per trailing section
//! in the order they were added. A blob writes none of them when all are
//! absent, so a blob without them keeps its older layout byte for byte; a
//! later section's presence means writing `None` (one zero byte) for the
//! absent ones before it. The one such section so far is the training
//! envelope ([`TrainingEnvelope`], version 4): per-coordinate lower and upper
//! bounds of the states the model was fitted on, each 2n little-endian
//! `f32` (q1..qn, p1..pn, physical units). The writer stores them already
//! widened: the training states' minimum and maximum per coordinate, each
//! moved outward by a tenth of that coordinate's range (max - min), then
//! rounded to the nearest `f32`; a reader compares a state with the stored
//! numbers as they are and widens nothing.
//!
//! Value ranges (checked by [`crate::Model::from_bytes`]; a value that is
//! finite but outside its range is refused with [`BlobError::OutOfRange`],
//! since no fitted model can mean it and it would give frozen or absurd
//! rollouts):
//!
//! ```text
//! field                                  accepted
//! normalization scales, energy scale     [MIN_SCALE, MAX_SCALE] = [1e-18, 1e18]
//! normalization offsets                  |offset| <= MAX_OFFSET = 1e18
//! inverse-mass Cholesky diagonal         [1e-18, 1e18]; other entries |v| <= 1e18
//! int8 row scales                        [1e-18, 1e18]
//! mechanical floor eps (M^-1 diagonal)   0 or [1e-18, 1e18]
//! time step dt (s)                       [MIN_DT, MAX_DT] = [1e-12, 1e6]
//! substeps                               1..=1024 (dt / substeps stays normal)
//! iteration limit                        1..=1000
//! implicit-method tolerance              [MIN_TOLERANCE, 1] = [1e-12, 1]
//! training envelope bounds               |bound| <= MAX_OFFSET = 1e18, lower <= upper
//! ```
//!
//! Subnormal values (below 1.18e-38) lie below every range above. Network
//! weights and biases, port-term constants and offsets inside the range are
//! only required to be finite: a tiny or zero weight is a legitimate fit.

use serde::{Deserialize, Serialize};

use crate::error::BlobError;
use crate::integrate::Integrator;

/// First four bytes of every blob.
pub const MAGIC: [u8; 4] = *b"VVMB";
/// The newest format version this runtime reads and writes. Version 2 added
/// the dissipation and input sections, version 3 their network variants
/// (R and G as functions of q), version 4 the training envelope, version 5
/// the mechanical energy ([`EnergyDesc::Mechanical`]), version 6 the
/// aligned weight matrices ([`WeightsDesc::F32Aligned`]). A blob is always
/// written with the oldest version that can express it, so older firmware
/// keeps reading the blobs it understands.
pub const FORMAT_VERSION: u16 = 6;
/// The format version that added the training envelope section.
pub const ENVELOPE_VERSION: u16 = 4;
/// The version that added [`EnergyDesc::Mechanical`].
pub const MECHANICAL_VERSION: u16 = 5;
/// The version that added [`WeightsDesc::F32Aligned`].
pub const ALIGNED_VERSION: u16 = 6;
/// Most networks in one blob (energy: two; damping and input: one each).
const MAX_NETWORKS: usize = 4;
/// Most aligned weight matrices in one blob (one per layer).
const MAX_WEIGHT_ARRAYS: usize = MAX_NETWORKS * MAX_LAYERS;
/// The oldest format version this runtime reads.
pub const OLDEST_READABLE_VERSION: u16 = 1;
/// Bytes before the payload: magic, version, length.
pub const HEADER_LEN: usize = 10;
/// Bytes after the payload: the CRC.
pub const TRAILER_LEN: usize = 4;
/// Most layers (hidden plus output) in one network.
pub const MAX_LAYERS: usize = 5;
/// Smallest accepted scale: normalization scales, the energy scale, the
/// inverse-mass diagonal and int8 row scales.
pub const MIN_SCALE: f32 = 1e-18;
/// Largest accepted scale (the same fields as [`MIN_SCALE`]).
pub const MAX_SCALE: f32 = 1e18;
/// Largest accepted |offset| of a coordinate, and |entry| of the
/// inverse-mass factor off its diagonal.
pub const MAX_OFFSET: f32 = 1e18;

/// Whether `v` is a scale this format accepts (in `[MIN_SCALE, MAX_SCALE]`;
/// false for NaN).
pub fn scale_in_range(v: f32) -> bool {
    (MIN_SCALE..=MAX_SCALE).contains(&v)
}

/// Whether `|v| <= MAX_OFFSET` (false for NaN).
pub fn offset_in_range(v: f32) -> bool {
    v.abs() <= MAX_OFFSET
}

#[cfg(feature = "crc-table")]
const CRC32: crc::Crc<u32> = crc::Crc::<u32>::new(&crc::CRC_32_ISO_HDLC);
/// Without the `crc-table` feature: the same CRC-32 bit by bit, no table.
#[cfg(not(feature = "crc-table"))]
const CRC32: crc::Crc<u32, crc::NoTable> =
    crc::Crc::<u32, crc::NoTable>::new(&crc::CRC_32_ISO_HDLC);

/// The CRC-32 a blob's trailer holds (CRC-32/ISO-HDLC, the catalogue's
/// "CRC-32": check value 0xCBF43926 for the ASCII string "123456789").
pub fn checksum(bytes: &[u8]) -> u32 {
    CRC32.checksum(bytes)
}

/// Little-endian `f32` values stored as bytes (length a multiple of 4).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct F32Bytes<'a>(#[serde(borrow)] pub &'a [u8]);

impl<'a> F32Bytes<'a> {
    /// Number of whole `f32` values.
    pub fn len(&self) -> usize {
        self.0.len() / 4
    }

    /// True when empty.
    pub fn is_empty(&self) -> bool {
        self.0.len() < 4
    }

    /// Value `i`, or NaN when out of range (callers validate lengths first).
    #[inline(always)]
    pub fn get(&self, i: usize) -> f32 {
        match self.0.get(4 * i..4 * i + 4) {
            Some(&[a, b, c, d]) => f32::from_le_bytes([a, b, c, d]),
            _ => f32::NAN,
        }
    }

    /// Iterator over the values.
    pub fn iter(&self) -> impl Iterator<Item = f32> + 'a {
        self.0
            .chunks_exact(4)
            .map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]]))
    }
}

/// Little-endian `f32` values stored at a 4-byte-aligned offset from the
/// blob's start (format version 6): on the wire a byte string of `pad`
/// zero bytes, `pad` = its length mod 4, then the values (see the module's
/// layout comment). `values` holds the values alone; two are equal when
/// their values are (the padding is where the writer put them, not what
/// they are).
#[derive(Debug, Clone, Copy)]
pub struct AlignedF32<'a> {
    /// The values (length a multiple of 4).
    pub values: F32Bytes<'a>,
    /// Zero bytes written before the values (0..=3), chosen by [`encode`].
    pad: u8,
}

impl<'a> AlignedF32<'a> {
    /// The values `bytes` (little-endian `f32`, length a multiple of 4),
    /// to be aligned by [`encode`].
    pub fn new(bytes: &'a [u8]) -> Self {
        Self {
            values: F32Bytes(bytes),
            pad: 0,
        }
    }

    /// The zero bytes before the values in the blob this was read from
    /// (0..=3).
    pub fn pad(&self) -> usize {
        usize::from(self.pad)
    }

    /// The values as `&[f32]` when they sit at a 4-byte-aligned address on
    /// a little-endian target (a checked cast, no copy); `None` otherwise.
    pub fn as_f32s(&self) -> Option<&'a [f32]> {
        if cfg!(target_endian = "big") {
            return None;
        }
        bytemuck::try_cast_slice::<u8, f32>(self.values.0).ok()
    }
}

impl PartialEq for AlignedF32<'_> {
    fn eq(&self, other: &Self) -> bool {
        self.values == other.values
    }
}

impl Eq for AlignedF32<'_> {}

impl Serialize for AlignedF32<'_> {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        use serde::ser::SerializeSeq;
        // The same bytes as a postcard byte string: length, then the bytes.
        let pad = usize::from(self.pad % 4);
        let mut seq = s.serialize_seq(Some(pad + self.values.0.len()))?;
        for b in [0u8; 3][..pad.min(3)].iter().chain(self.values.0) {
            seq.serialize_element(b)?;
        }
        seq.end()
    }
}

impl<'de: 'a, 'a> Deserialize<'de> for AlignedF32<'a> {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        let raw = <&'de [u8]>::deserialize(d)?;
        let (pad, values) = raw.split_at(raw.len() % 4);
        if pad.iter().any(|b| *b != 0) {
            return Err(serde::de::Error::custom("non-zero padding"));
        }
        Ok(Self {
            values: F32Bytes(values),
            pad: pad.len() as u8,
        })
    }
}

/// Activation functions of hidden layers. ReLU is representable so that a
/// blob using it can be refused with an explanation rather than as garbage.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum Activation {
    /// Hyperbolic tangent (the default).
    Tanh,
    /// Softplus ln(1 + e^x).
    Softplus,
    /// Rectified linear unit; refused in energy networks.
    Relu,
}

/// Weights of one dense layer, row-major `[outputs][inputs]`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub enum WeightsDesc<'a> {
    /// Full-precision weights at any offset (format versions 1 to 5; read
    /// through the byte-decoding path).
    F32(#[serde(borrow)] F32Bytes<'a>),
    /// Symmetric int8 weights, `w[j][i] = scales[j] * values[j][i]`.
    Int8 {
        /// The `i8` values as raw bytes.
        values: &'a [u8],
        /// One scale per output channel.
        #[serde(borrow)]
        scales: F32Bytes<'a>,
    },
    /// Full-precision weights at a 4-byte-aligned offset from the blob's
    /// start (format version 6), read in place as `&[f32]`.
    F32Aligned(#[serde(borrow)] AlignedF32<'a>),
}

/// One dense layer y = W x + b.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct LayerDesc<'a> {
    /// Input width.
    pub inputs: u16,
    /// Output width.
    pub outputs: u16,
    /// The weight matrix.
    #[serde(borrow)]
    pub weights: WeightsDesc<'a>,
    /// Biases, always `f32`.
    #[serde(borrow)]
    pub bias: F32Bytes<'a>,
}

/// A multilayer perceptron with a scalar linear output; every layer but the
/// last is followed by `activation`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct MlpDesc<'a> {
    /// Hidden-layer activation.
    pub activation: Activation,
    /// Layers from input to output.
    #[serde(borrow)]
    pub layers: heapless::Vec<LayerDesc<'a>, MAX_LAYERS>,
}

/// Kinetic energy of a separable model, in normalized momenta z_p.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub enum KineticDesc<'a> {
    /// T = 1/2 z_p^T L L^T z_p with L lower triangular (positive diagonal),
    /// stored row by row: L00, L10, L11, L20, ...
    Quadratic {
        /// n (n + 1) / 2 entries of the Cholesky factor of M^-1.
        #[serde(borrow)]
        cholesky: F32Bytes<'a>,
    },
    /// T = MLP(z_p).
    Network(#[serde(borrow)] MlpDesc<'a>),
}

/// The energy function, in normalized coordinates z = (x - offset) / scale.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub enum EnergyDesc<'a> {
    /// H = MLP(z) over all 2n coordinates.
    General(#[serde(borrow)] MlpDesc<'a>),
    /// H = T(z_p) + V(z_q).
    Separable {
        /// Potential network V over the n coordinates.
        #[serde(borrow)]
        potential: MlpDesc<'a>,
        /// Kinetic term T over the n momenta.
        #[serde(borrow)]
        kinetic: KineticDesc<'a>,
    },
    /// H = 1/2 z_p^T (L(z_q) L(z_q)^T + floor I) z_p + V(z_q): the energy
    /// of a rigid linkage, whose inverse mass matrix depends on the
    /// coordinates. L is lower triangular; its diagonal is the softplus of
    /// the factor network's diagonal outputs, so M^-1 is positive definite.
    /// Format version 5.
    Mechanical {
        /// Network of the n coordinates z_q with n (n + 1) / 2 outputs: L
        /// row by row (L00, L10, L11, L20, ...), diagonal entries before
        /// their softplus.
        #[serde(borrow)]
        factor: MlpDesc<'a>,
        /// The floor eps >= 0 added to the diagonal of M^-1 (normalized
        /// units): 0 or in [MIN_SCALE, MAX_SCALE].
        floor: f32,
        /// Potential network V over the n coordinates.
        #[serde(borrow)]
        potential: MlpDesc<'a>,
    },
}

/// Dissipation in the port-Hamiltonian form dx/dt = (J - R) dH/dx + G u.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub enum DissipationDesc<'a> {
    /// Conservative model (R = 0).
    None,
    /// Constant R = L L^T (positive semidefinite by construction), in
    /// physical units, with L the lower-triangular 2n x 2n factor stored row
    /// by row (L00, L10, L11, ...): n (2n + 1) values. Format version 2.
    Constant {
        /// The factor L.
        #[serde(borrow)]
        factor: F32Bytes<'a>,
    },
    /// R(q) = L(q) L(q)^T with the factor a network of the normalized
    /// coordinates z_q (n inputs) whose n (2n + 1) outputs are L(q) in
    /// physical units, packed as in `Constant`. Format version 3.
    Network(#[serde(borrow)] MlpDesc<'a>),
}

/// Input coupling G u of a driven model.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub enum InputDesc<'a> {
    /// Autonomous model.
    None,
    /// Constant G (2n x m, row-major, physical units). Format version 2.
    Constant {
        /// Number of inputs m (1..=[`crate::MAX_INPUTS`]).
        inputs: u8,
        /// The matrix G.
        #[serde(borrow)]
        matrix: F32Bytes<'a>,
    },
    /// G(q) as a network of the normalized coordinates z_q (n inputs) whose
    /// 2n m outputs are G(q) in physical units, row-major. Format version 3.
    Network {
        /// Number of inputs m (1..=[`crate::MAX_INPUTS`]).
        inputs: u8,
        /// The network.
        #[serde(borrow)]
        net: MlpDesc<'a>,
    },
}

/// Per-coordinate bounds of the states a model was trained on (format
/// version 4): 2n lower and 2n upper bounds, q1..qn then p1..pn, physical
/// units, stored already widened (see the module's layout comment). The
/// runtime checks at parse time that both hold 2n finite values within
/// +-[`MAX_OFFSET`] and that no lower bound exceeds its upper bound.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct TrainingEnvelope<'a> {
    /// Lower bounds, q then p.
    #[serde(borrow)]
    pub lower: F32Bytes<'a>,
    /// Upper bounds, q then p.
    #[serde(borrow)]
    pub upper: F32Bytes<'a>,
}

impl TrainingEnvelope<'_> {
    /// Number of coordinates (2n once validated).
    pub fn coordinates(&self) -> usize {
        self.lower.len()
    }

    /// Whether each value of `x`, a state laid out as q1..qn, p1..pn, lies
    /// within its coordinate's bounds, ends included (false for NaN and
    /// for values beyond the stored coordinates).
    pub fn contains(&self, x: &[f32]) -> bool {
        x.iter()
            .enumerate()
            .all(|(k, v)| (self.lower.get(k)..=self.upper.get(k)).contains(v))
    }
}

impl<'a> ModelDesc<'a> {
    /// The oldest format version that can express this model.
    pub fn needed_version(&self) -> u16 {
        version_for(&self.dissipation, &self.input)
            .max(energy_version(&self.energy))
            .max(envelope_version(&self.envelope))
            .max(weights_version(&port_networks(
                &self.dissipation,
                &self.input,
            )))
    }

    /// Every network in the order the payload holds them (energy, then
    /// damping, then input), mutable, for the encoder's alignment.
    fn networks_mut(&mut self) -> [Option<&mut MlpDesc<'a>>; MAX_NETWORKS] {
        let (e0, e1) = match &mut self.energy {
            EnergyDesc::General(m) => (Some(m), None),
            EnergyDesc::Separable { potential, kinetic } => (
                Some(potential),
                match kinetic {
                    KineticDesc::Network(m) => Some(m),
                    KineticDesc::Quadratic { .. } => None,
                },
            ),
            EnergyDesc::Mechanical {
                factor, potential, ..
            } => (Some(factor), Some(potential)),
        };
        let d = match &mut self.dissipation {
            DissipationDesc::Network(m) => Some(m),
            _ => None,
        };
        let i = match &mut self.input {
            InputDesc::Network { net, .. } => Some(net),
            _ => None,
        };
        [e0, e1, d, i]
    }
}

/// The energy's networks (one or two), in payload order.
fn energy_networks<'d, 'a>(energy: &'d EnergyDesc<'a>) -> [Option<&'d MlpDesc<'a>>; 2] {
    match energy {
        EnergyDesc::General(m) => [Some(m), None],
        EnergyDesc::Separable { potential, kinetic } => [
            Some(potential),
            match kinetic {
                KineticDesc::Network(m) => Some(m),
                KineticDesc::Quadratic { .. } => None,
            },
        ],
        EnergyDesc::Mechanical {
            factor, potential, ..
        } => [Some(factor), Some(potential)],
    }
}

/// The port terms' networks (none to two), in payload order.
fn port_networks<'d, 'a>(
    dissipation: &'d DissipationDesc<'a>,
    input: &'d InputDesc<'a>,
) -> [Option<&'d MlpDesc<'a>>; 2] {
    let d = match dissipation {
        DissipationDesc::Network(m) => Some(m),
        _ => None,
    };
    let i = match input {
        InputDesc::Network { net, .. } => Some(net),
        _ => None,
    };
    [d, i]
}

/// The aligned weight matrices of `nets`, in payload order.
fn aligned_arrays<'d, 'a>(
    nets: &'d [Option<&'d MlpDesc<'a>>],
) -> impl Iterator<Item = &'d AlignedF32<'a>> + 'd {
    nets.iter()
        .flatten()
        .flat_map(|m| m.layers.iter())
        .filter_map(|l| match &l.weights {
            WeightsDesc::F32Aligned(a) => Some(a),
            _ => None,
        })
}

/// The oldest format version that can express the weights of `nets`.
fn weights_version(nets: &[Option<&MlpDesc<'_>>]) -> u16 {
    match aligned_arrays(nets).next() {
        Some(_) => ALIGNED_VERSION,
        None => OLDEST_READABLE_VERSION,
    }
}

/// Whether every aligned matrix of `nets` starts at a multiple of 4 bytes
/// from `base`, the address of the blob's first byte.
fn aligned_from(nets: &[Option<&MlpDesc<'_>>], base: usize) -> bool {
    aligned_arrays(nets).all(|a| misalignment(a, base) == 0)
}

/// How far (0..=3 bytes) past a multiple of 4 from `base` `a`'s values start.
fn misalignment(a: &AlignedF32<'_>, base: usize) -> usize {
    (a.values.0.as_ptr() as usize).wrapping_sub(base) % 4
}

/// The oldest format version that can express this energy.
fn energy_version(energy: &EnergyDesc<'_>) -> u16 {
    let kind = match energy {
        EnergyDesc::Mechanical { .. } => MECHANICAL_VERSION,
        EnergyDesc::General(_) | EnergyDesc::Separable { .. } => OLDEST_READABLE_VERSION,
    };
    kind.max(weights_version(&energy_networks(energy)))
}

/// The oldest format version that can carry this training envelope.
fn envelope_version(envelope: &Option<TrainingEnvelope<'_>>) -> u16 {
    match envelope {
        Some(_) => ENVELOPE_VERSION,
        None => OLDEST_READABLE_VERSION,
    }
}

/// The oldest format version that can express these port terms.
fn version_for(dissipation: &DissipationDesc<'_>, input: &InputDesc<'_>) -> u16 {
    let networks = matches!(dissipation, DissipationDesc::Network(_))
        || matches!(input, InputDesc::Network { .. });
    let port = *dissipation != DissipationDesc::None || *input != InputDesc::None;
    if networks {
        3
    } else if port {
        2
    } else {
        OLDEST_READABLE_VERSION
    }
}

/// Everything a blob describes. Physical energy is
/// `H(x) = energy_scale * E((x - offset) / scale)` with `E` from `energy`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ModelDesc<'a> {
    /// Degrees of freedom n; the state is (q1..qn, p1..pn).
    pub dof: u8,
    /// Offsets of the 2n coordinates (q first, then p).
    #[serde(borrow)]
    pub offset: F32Bytes<'a>,
    /// Scales of the 2n coordinates, all positive.
    #[serde(borrow)]
    pub scale: F32Bytes<'a>,
    /// Energy scale, positive.
    pub energy_scale: f32,
    /// The energy network.
    #[serde(borrow)]
    pub energy: EnergyDesc<'a>,
    /// How to step the model.
    pub integrator: Integrator,
    /// Dissipation R (none for a conservative model).
    #[serde(borrow)]
    pub dissipation: DissipationDesc<'a>,
    /// Input coupling G (none for an autonomous model).
    #[serde(borrow)]
    pub input: InputDesc<'a>,
    /// The training envelope (format version 4), a trailing optional
    /// section: [`encode`] and [`decode`] write and read it after the
    /// fields above (serde skips it, so a blob without it keeps its layout).
    #[serde(skip)]
    pub envelope: Option<TrainingEnvelope<'a>>,
}

/// Write `desc` as a complete blob into `out`; returns the bytes used.
/// Fails with [`BlobError::Truncated`] when `out` is too small. Weight
/// matrices given as [`WeightsDesc::F32Aligned`] are padded to start at a
/// multiple of 4 bytes from the blob's start (each padding fixed in payload
/// order: a matrix's padding moves only what follows it, and the length
/// prefix keeps its size across paddings 0..=3 since its varint steps come
/// at multiples of 128); [`WeightsDesc::F32`] matrices are written packed,
/// as versions 1 to 5 hold them.
pub fn encode(desc: &ModelDesc<'_>, out: &mut [u8]) -> Result<usize, BlobError> {
    let mut desc = desc.clone();
    for _ in 0..=MAX_WEIGHT_ARRAYS {
        let len = write_blob(&desc, out)?;
        match first_misaligned(out.get(..len).unwrap_or(&[]))? {
            None => return Ok(len),
            Some((k, past)) => pad_array(&mut desc, k, past),
        }
    }
    Err(BlobError::Malformed)
}

/// All networks of `desc` in payload order.
fn all_networks<'d, 'a>(desc: &'d ModelDesc<'a>) -> [Option<&'d MlpDesc<'a>>; MAX_NETWORKS] {
    let [e0, e1] = energy_networks(&desc.energy);
    let [d, i] = port_networks(&desc.dissipation, &desc.input);
    [e0, e1, d, i]
}

/// The first aligned matrix of the blob `bytes` that does not start at a
/// multiple of 4 bytes from the blob's start: its index in payload order
/// and how many bytes past the multiple it starts.
fn first_misaligned(bytes: &[u8]) -> Result<Option<(usize, usize)>, BlobError> {
    let base = bytes.as_ptr() as usize;
    let payload = bytes.get(HEADER_LEN..).unwrap_or(&[]);
    let (desc, _) =
        postcard::take_from_bytes::<ModelDesc<'_>>(payload).map_err(|_| BlobError::Malformed)?;
    let nets = all_networks(&desc);
    let first = aligned_arrays(&nets)
        .map(|a| misalignment(a, base))
        .enumerate()
        .find(|(_, m)| *m != 0);
    Ok(first)
}

/// Move the values of aligned matrix `k` (payload order) forward so that
/// they no longer start `past` bytes after a multiple of 4.
fn pad_array(desc: &mut ModelDesc<'_>, k: usize, past: usize) {
    let target = desc
        .networks_mut()
        .into_iter()
        .flatten()
        .flat_map(|m| m.layers.iter_mut())
        .filter_map(|l| match &mut l.weights {
            WeightsDesc::F32Aligned(a) => Some(a),
            _ => None,
        })
        .nth(k);
    if let Some(a) = target {
        a.pad = (a.pad + 4 - (past % 4) as u8) % 4;
    }
}

/// One pass of [`encode`]: header, payload as `desc` holds it, CRC.
fn write_blob(desc: &ModelDesc<'_>, out: &mut [u8]) -> Result<usize, BlobError> {
    let room = out.len() as u32;
    if out.len() < HEADER_LEN + TRAILER_LEN {
        return Err(BlobError::Truncated {
            needed: (HEADER_LEN + TRAILER_LEN) as u32,
            found: room,
        });
    }
    let body_room = out.len() - HEADER_LEN - TRAILER_LEN;
    let (head, rest) = out.split_at_mut(HEADER_LEN);
    let too_small = BlobError::Truncated {
        needed: room.saturating_add(1),
        found: room,
    };
    let body = &mut rest[..body_room];
    let fields_len = postcard::to_slice(desc, &mut *body)
        .map_err(|_| too_small)?
        .len();
    let trailing_len = match &desc.envelope {
        None => 0,
        Some(envelope) => {
            let tail = body.get_mut(fields_len..).ok_or(too_small)?;
            postcard::to_slice(&Some(*envelope), tail)
                .map_err(|_| too_small)?
                .len()
        }
    };
    let body_len = fields_len + trailing_len;
    head[..4].copy_from_slice(&MAGIC);
    // The oldest version that can express the model, so older firmware
    // keeps reading the blobs it understands.
    let version = desc.needed_version();
    head[4..6].copy_from_slice(&version.to_le_bytes());
    head[6..10].copy_from_slice(&(body_len as u32).to_le_bytes());
    let end = HEADER_LEN + body_len;
    let crc = CRC32.checksum(&out[4..end]);
    out[end..end + 4].copy_from_slice(&crc.to_le_bytes());
    Ok(end + TRAILER_LEN)
}

/// Facts about a blob's container, readable even when the payload is not.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Envelope {
    /// Format version.
    pub version: u16,
    /// Payload length in bytes.
    pub payload_len: u32,
    /// CRC-32 stored in the blob.
    pub stored_crc: u32,
    /// CRC-32 computed over the bytes.
    pub computed_crc: u32,
}

/// Check the header (magic, readable version) and return the format version
/// and the payload length it states.
fn read_header(bytes: &[u8]) -> Result<(u16, u32), BlobError> {
    let (Some(magic), Some(&[v0, v1]), Some(&[l0, l1, l2, l3])) =
        (bytes.get(0..4), bytes.get(4..6), bytes.get(6..HEADER_LEN))
    else {
        return Err(BlobError::Truncated {
            needed: (HEADER_LEN + TRAILER_LEN) as u32,
            found: bytes.len() as u32,
        });
    };
    if magic != MAGIC {
        return Err(BlobError::BadMagic);
    }
    let version = u16::from_le_bytes([v0, v1]);
    if !(OLDEST_READABLE_VERSION..=FORMAT_VERSION).contains(&version) {
        return Err(BlobError::UnsupportedVersion {
            found: version,
            supported: FORMAT_VERSION,
        });
    }
    Ok((version, u32::from_le_bytes([l0, l1, l2, l3])))
}

/// The total length in bytes (header, payload and CRC) of the blob whose
/// header starts `header`; only the first [`HEADER_LEN`] bytes are read.
/// Firmware uses it to cut a blob out of a larger flash region. Checks the
/// magic tag, the version and that the length fits in 32 bits; the payload
/// and CRC are checked later by [`crate::Model::from_bytes`].
pub fn blob_len(header: &[u8]) -> Result<usize, BlobError> {
    let (_, payload_len) = read_header(header)?;
    let total = u64::from(payload_len) + (HEADER_LEN + TRAILER_LEN) as u64;
    u32::try_from(total)
        .ok()
        .and_then(|t| usize::try_from(t).ok())
        .ok_or(BlobError::LengthOutOfRange { payload_len })
}

/// Check magic, version, length and CRC; return the envelope and the payload.
pub fn open(bytes: &[u8]) -> Result<(Envelope, &[u8]), BlobError> {
    let found = bytes.len() as u32;
    let (version, payload_len) = read_header(bytes)?;
    let end = (HEADER_LEN as u64) + payload_len as u64;
    let total = end + TRAILER_LEN as u64;
    if (bytes.len() as u64) < total {
        return Err(BlobError::Truncated {
            needed: total.min(u32::MAX as u64) as u32,
            found,
        });
    }
    if (bytes.len() as u64) > total {
        return Err(BlobError::TrailingBytes);
    }
    let end = end as usize;
    let stored_crc = match bytes.get(end..end + 4) {
        Some(&[a, b, c, d]) => u32::from_le_bytes([a, b, c, d]),
        _ => return Err(BlobError::Malformed),
    };
    let computed_crc = CRC32.checksum(bytes.get(4..end).unwrap_or(&[]));
    if stored_crc != computed_crc {
        return Err(BlobError::CrcMismatch {
            stored: stored_crc,
            computed: computed_crc,
        });
    }
    let env = Envelope {
        version,
        payload_len,
        stored_crc,
        computed_crc,
    };
    Ok((env, bytes.get(HEADER_LEN..end).unwrap_or(&[])))
}

/// Check the container and decode the description (not yet validated).
pub fn decode(bytes: &[u8]) -> Result<ModelDesc<'_>, BlobError> {
    let (env, payload) = open(bytes)?;
    let (mut desc, rest) =
        postcard::take_from_bytes::<ModelDesc<'_>>(payload).map_err(|_| BlobError::Malformed)?;
    // Aligned weights off their alignment: malformed, reported before the
    // trailing sections as `check_fields` reports it.
    let base = bytes.as_ptr() as usize;
    if !aligned_from(&all_networks(&desc), base) {
        return Err(BlobError::Malformed);
    }
    let mut trailing = Fields { rest, base };
    desc.envelope = trailing.take_trailing::<TrainingEnvelope<'_>>()?;
    if !trailing.rest.is_empty() {
        return Err(BlobError::TrailingBytes);
    }
    // Version 1 has no port terms, version 2 no port networks, version 3
    // no envelope and versions before 5 no mechanical energy; a blob whose
    // content needs a newer version than it claims is damaged.
    if env.version < desc.needed_version() {
        return Err(BlobError::Malformed);
    }
    Ok(desc)
}

/// The payload read one field of [`ModelDesc`] at a time, in its order
/// (postcard writes a struct as its fields in order with nothing between
/// them, so this reads exactly what [`decode`] reads). A firmware parse
/// then never holds more than one section's description on the stack:
/// the whole description, decoded at once, costs several KiB of stack.
#[derive(Debug, Clone, Copy)]
pub struct Fields<'a> {
    rest: &'a [u8],
    /// Address of the blob's first byte, for the alignment check.
    base: usize,
}

impl<'a> Fields<'a> {
    /// The next field.
    pub fn take<T: Deserialize<'a>>(&mut self) -> Result<T, BlobError> {
        let (value, rest) =
            postcard::take_from_bytes::<T>(self.rest).map_err(|_| BlobError::Malformed)?;
        self.rest = rest;
        Ok(value)
    }

    /// The next optional trailing section (see the layout comment): `None`
    /// when the payload has ended or the section is written as absent.
    pub fn take_trailing<T: Deserialize<'a>>(&mut self) -> Result<Option<T>, BlobError> {
        if self.rest.is_empty() {
            return Ok(None);
        }
        self.take::<Option<T>>()
    }

    /// Skip the next field (decoded in its own stack frame, then dropped).
    #[inline(never)]
    fn skip<T: Deserialize<'a>>(&mut self) -> Result<(), BlobError> {
        self.take::<T>().map(drop)
    }

    /// Read the energy field; return the format version it needs.
    /// Aligned weights off their alignment are malformed.
    #[inline(never)]
    fn energy_version(&mut self) -> Result<u16, BlobError> {
        let energy = self.take::<EnergyDesc<'a>>()?;
        if !aligned_from(&energy_networks(&energy), self.base) {
            return Err(BlobError::Malformed);
        }
        Ok(energy_version(&energy))
    }

    /// Read the two port-term fields; return the format version they need.
    /// Aligned weights off their alignment are malformed.
    #[inline(never)]
    fn port_version(&mut self) -> Result<u16, BlobError> {
        let dissipation = self.take::<DissipationDesc<'a>>()?;
        let input = self.take::<InputDesc<'a>>()?;
        let nets = port_networks(&dissipation, &input);
        if !aligned_from(&nets, self.base) {
            return Err(BlobError::Malformed);
        }
        Ok(version_for(&dissipation, &input).max(weights_version(&nets)))
    }
}

/// Every check of [`decode`], in its order (container, every field decodes,
/// nothing left over, version covers the content), field by field without
/// keeping the description; returns the payload's fields to read again.
pub fn check_fields(bytes: &[u8]) -> Result<Fields<'_>, BlobError> {
    let (env, payload) = open(bytes)?;
    let start = Fields {
        rest: payload,
        base: bytes.as_ptr() as usize,
    };
    let mut f = start;
    f.skip::<u8>()?;
    f.skip::<F32Bytes<'_>>()?;
    f.skip::<F32Bytes<'_>>()?;
    f.skip::<f32>()?;
    let energy = f.energy_version()?;
    f.skip::<Integrator>()?;
    let port = f.port_version()?;
    let envelope = f.take_trailing::<TrainingEnvelope<'_>>()?;
    let needed = port.max(energy).max(envelope_version(&envelope));
    if !f.rest.is_empty() {
        return Err(BlobError::TrailingBytes);
    }
    if env.version < needed {
        return Err(BlobError::Malformed);
    }
    Ok(start)
}
