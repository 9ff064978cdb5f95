//! The model blob: one versioned, checksummed container for everything the
//! device needs. Layout (all integers little-endian):
//!
//! ```text
//! offset  size  field
//! 0       4     magic tag b"VVMB"
//! 4       2     format version (u16): 1; 2 with constant port terms;
//!                3 with port terms that are networks of q; 4 with a
//!                training envelope; 5 with a mechanical energy (mass
//!                matrix M(q))
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
/// the mechanical energy ([`EnergyDesc::Mechanical`]). A blob is always
/// written with the oldest version that can express it, so older firmware
/// keeps reading the blobs it understands.
pub const FORMAT_VERSION: u16 = 5;
/// The format version that added the training envelope section.
pub const ENVELOPE_VERSION: u16 = 4;
/// The version that added [`EnergyDesc::Mechanical`].
pub const MECHANICAL_VERSION: u16 = 5;
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
    /// Full-precision weights.
    F32(#[serde(borrow)] F32Bytes<'a>),
    /// Symmetric int8 weights, `w[j][i] = scales[j] * values[j][i]`.
    Int8 {
        /// The `i8` values as raw bytes.
        values: &'a [u8],
        /// One scale per output channel.
        #[serde(borrow)]
        scales: F32Bytes<'a>,
    },
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

impl ModelDesc<'_> {
    /// The oldest format version that can express this model.
    pub fn needed_version(&self) -> u16 {
        version_for(&self.dissipation, &self.input)
            .max(energy_version(&self.energy))
            .max(envelope_version(&self.envelope))
    }
}

/// The oldest format version that can express this energy.
fn energy_version(energy: &EnergyDesc<'_>) -> u16 {
    match energy {
        EnergyDesc::Mechanical { .. } => MECHANICAL_VERSION,
        EnergyDesc::General(_) | EnergyDesc::Separable { .. } => OLDEST_READABLE_VERSION,
    }
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
/// Fails with [`BlobError::Truncated`] when `out` is too small.
pub fn encode(desc: &ModelDesc<'_>, out: &mut [u8]) -> Result<usize, BlobError> {
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
    let mut trailing = Fields { rest };
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
    #[inline(never)]
    fn energy_version(&mut self) -> Result<u16, BlobError> {
        Ok(energy_version(&self.take::<EnergyDesc<'a>>()?))
    }

    /// Read the two port-term fields; return the format version they need.
    #[inline(never)]
    fn port_version(&mut self) -> Result<u16, BlobError> {
        let dissipation = self.take::<DissipationDesc<'a>>()?;
        let input = self.take::<InputDesc<'a>>()?;
        Ok(version_for(&dissipation, &input))
    }
}

/// Every check of [`decode`], in its order (container, every field decodes,
/// nothing left over, version covers the content), field by field without
/// keeping the description; returns the payload's fields to read again.
pub fn check_fields(bytes: &[u8]) -> Result<Fields<'_>, BlobError> {
    let (env, payload) = open(bytes)?;
    let start = Fields { rest: payload };
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
