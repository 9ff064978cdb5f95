//! Typed errors: [`BlobError`] for everything wrong with model bytes,
//! [`StepError`] for everything that can go wrong while evaluating or
//! integrating. Nothing in the runtime panics; every failure is one of these.

use core::fmt;

/// Which part of a blob an error refers to.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum Section {
    /// Input offsets and scales.
    Normalization,
    /// The energy scale factor.
    EnergyScale,
    /// The general energy network H(x).
    General,
    /// The potential network V(q) of a separable model.
    Potential,
    /// The kinetic network T(p) of a separable model.
    Kinetic,
    /// The Cholesky factor of the learned inverse mass matrix.
    InverseMass,
    /// The integrator settings.
    Integrator,
    /// Dissipation R (constant factor or network of q).
    Dissipation,
    /// Input coupling G (constant matrix or network of q).
    InputCoupling,
    /// The training envelope (per-coordinate bounds of the training states).
    Envelope,
    /// The factor network L(q) of a mechanical model's inverse mass
    /// matrix M(q)^-1 = L L^T + eps I, and its floor eps.
    MassFactor,
}

/// Why a blob was refused by [`crate::Model::from_bytes`]. Field names are
/// self-explanatory; `Display` gives the full sentence.
#[allow(missing_docs)]
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum BlobError {
    /// Fewer bytes than the header, or than the header's length field says.
    Truncated { needed: u32, found: u32 },
    /// The bytes do not start with [`crate::format::MAGIC`].
    BadMagic,
    /// A format version this runtime does not read.
    UnsupportedVersion { found: u16, supported: u16 },
    /// The stored CRC-32 does not match the bytes.
    CrcMismatch { stored: u32, computed: u32 },
    /// The payload is not a valid encoding of the model description.
    Malformed,
    /// Bytes left over after the CRC or inside the payload.
    TrailingBytes,
    /// Degrees of freedom outside 1..=the runtime's bound.
    DofOutOfRange { dof: u32, max: u32 },
    /// A layer wider than the runtime's bound (`layer` counts from 0).
    TooWide {
        section: Section,
        layer: u8,
        width: u32,
        max: u32,
    },
    /// No layers, or more than [`crate::format::MAX_LAYERS`].
    LayerCount { section: Section, layers: u32 },
    /// A layer whose size disagrees with its neighbour or its byte length.
    ShapeMismatch { section: Section, layer: u8 },
    /// A NaN or infinite weight, bias, scale or setting.
    NonFinite { section: Section },
    /// A zero or negative scale, or a non-positive diagonal entry.
    NotPositive { section: Section },
    /// A finite value outside the range its field accepts (a subnormal or
    /// absurdly large scale, offset or inverse-mass entry; see the table in
    /// [`crate::format`]).
    OutOfRange { section: Section },
    /// ReLU refused in an energy network (see the `Display` text).
    ReluInEnergyNetwork { section: Section },
    /// Step, substeps, iteration limit or tolerance out of range.
    BadIntegratorSettings,
    /// An explicit separable-only method paired with a general or
    /// mechanical model.
    MethodNeedsSeparableModel,
    /// A dissipation or input term this runtime version cannot evaluate.
    UnsupportedTerm { section: Section },
    /// An explicit symplectic method paired with dissipation or inputs.
    MethodIgnoresPortTerms,
    /// A header whose payload length makes the blob longer than 2^32 - 1 bytes.
    LengthOutOfRange { payload_len: u32 },
    /// The blob needs a part of the runtime (model kind, integrator, port
    /// terms, int8 weights) that this build leaves out by its cargo features.
    NotInThisBuild { section: Section },
    /// A training envelope whose lower or upper bounds do not hold one
    /// value per coordinate (2n; `found` is the shorter side's count).
    EnvelopeCount { found: u32, expected: u32 },
    /// A training envelope whose lower bound exceeds its upper bound at
    /// `coordinate` (0-based over q1..qn, p1..pn).
    EnvelopeInverted { coordinate: u8 },
}

impl fmt::Display for BlobError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match *self {
            Self::Truncated { needed, found } => {
                write!(f, "blob truncated: needs {needed} bytes, has {found}")
            }
            Self::BadMagic => f.write_str("not a Visviva model blob (magic tag missing)"),
            Self::UnsupportedVersion { found, supported } => write!(
                f,
                "blob format version {found} is not supported (this runtime reads version {supported}); \
                 re-export the model with a matching visviva version"
            ),
            Self::CrcMismatch { stored, computed } => write!(
                f,
                "blob corrupted: CRC-32 stored {stored:#010x}, computed {computed:#010x}"
            ),
            Self::Malformed => f.write_str("blob payload is malformed"),
            Self::TrailingBytes => f.write_str("blob has unexpected trailing bytes"),
            Self::DofOutOfRange { dof, max } => write!(
                f,
                "model has {dof} degrees of freedom; this runtime is built for 1..={max}"
            ),
            Self::TooWide { section, layer, width, max } => write!(
                f,
                "{section:?} network layer {layer} is {width} units wide; this runtime is built for at most {max}"
            ),
            Self::LayerCount { section, layers } => {
                write!(f, "{section:?} network has an unsupported number of layers ({layers})")
            }
            Self::ShapeMismatch { section, layer } => {
                write!(f, "{section:?} network layer {layer} has inconsistent shape")
            }
            Self::NonFinite { section } => write!(f, "{section:?} holds a NaN or infinite value"),
            Self::NotPositive { section } => {
                write!(f, "{section:?} holds a zero or negative value where a positive one is required")
            }
            Self::OutOfRange { section } => write!(
                f,
                "{section:?} holds a value no model can mean (subnormal or out of range: scales \
                 must lie in [1e-18, 1e18], offsets and other entries within +-1e18)"
            ),
            Self::ReluInEnergyNetwork { section } => write!(
                f,
                "{section:?} network uses ReLU: its derivative is piecewise constant, so the vector field \
                 dH/dx would be discontinuous and the integrators lose their accuracy and energy behaviour; \
                 use tanh or softplus"
            ),
            Self::BadIntegratorSettings => f.write_str(
                "integrator settings out of range (time step must lie in [1e-12, 1e6] s, substeps \
                 1..=1024, iteration limit 1..=1000, tolerance in [1e-12, 1])",
            ),
            Self::MethodNeedsSeparableModel => f.write_str(
                "Stormer-Verlet and Yoshida-4 need a separable model H = T(p) + V(q); a general \
                 model, or a mechanical one (whose kinetic energy depends on q through M(q)), is \
                 not separable: use implicit midpoint, the discrete-gradient method or RK4",
            ),
            Self::MethodIgnoresPortTerms => f.write_str(
                "Stormer-Verlet and Yoshida-4 would drop the damping and input terms; store the \
                 discrete-gradient method (or implicit midpoint) for a damped or driven model",
            ),
            Self::UnsupportedTerm { section } => {
                write!(f, "{section:?} term is not supported by this runtime version")
            }
            Self::LengthOutOfRange { payload_len } => write!(
                f,
                "blob header states a payload of {payload_len} bytes: the blob would not fit in 2^32 - 1 bytes"
            ),
            Self::NotInThisBuild { section } => write!(
                f,
                "{section:?} needs a part of visviva-runtime this firmware was built without; \
                 enable the matching cargo feature (or the default features)"
            ),
            Self::EnvelopeCount { found, expected } => write!(
                f,
                "training envelope holds {found} bounds per side; the model's coordinates need {expected}"
            ),
            Self::EnvelopeInverted { coordinate } => write!(
                f,
                "training envelope's lower bound exceeds its upper bound at coordinate {coordinate} \
                 (counted from 0 over q1..qn, p1..pn)"
            ),
        }
    }
}

/// Why an evaluation or integration step failed. The state is left unchanged.
#[allow(missing_docs)]
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum StepError {
    /// The state's degrees of freedom differ from the model's.
    DofMismatch { model: u32, state: u32 },
    /// The state holds NaN or infinity.
    NonFiniteState,
    /// The step produced NaN or infinity (the step size is too large for the
    /// model, or the model leaves its trained region).
    Diverged,
    /// An implicit method (midpoint, discrete gradient) did not converge
    /// within its iteration limit.
    NotConverged { iterations: u16 },
    /// A separable-only method was asked of a non-separable system.
    NotSeparable,
    /// Integrator settings out of range.
    BadSettings,
    /// The number of inputs given differs from the model's.
    InputMismatch { model: u32, given: u32 },
    /// An explicit symplectic method was asked to step a damped or driven
    /// model; it would silently drop R and G.
    MethodIgnoresPortTerms,
}

impl fmt::Display for StepError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match *self {
            Self::DofMismatch { model, state } => write!(
                f,
                "state has {state} degrees of freedom, the model {model}"
            ),
            Self::NonFiniteState => f.write_str("state holds NaN or infinity"),
            Self::Diverged => f.write_str(
                "step produced NaN or infinity: reduce the time step or stay within the trained region",
            ),
            Self::NotConverged { iterations } => write!(
                f,
                "the implicit step did not converge in {iterations} iterations: reduce the time \
                 step or raise the iteration limit"
            ),
            Self::NotSeparable => f.write_str("method needs a separable Hamiltonian"),
            Self::BadSettings => f.write_str("integrator settings out of range"),
            Self::InputMismatch { model, given } => {
                write!(f, "{given} input values given, the model takes {model}")
            }
            Self::MethodIgnoresPortTerms => f.write_str(
                "Stormer-Verlet and Yoshida-4 step only the conservative part; use the \
                 discrete-gradient method (or implicit midpoint) for a damped or driven model",
            ),
        }
    }
}
