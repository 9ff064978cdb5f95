//! # visviva-blob-support
//!
//! Building model blobs on the host, for the runtime's tests and benchmarks
//! and for xtask's device fixtures (`std`, unpublished). The runtime decodes
//! what this crate encodes; nothing here evaluates a model.
//!
//! * [`rng`]: the seeded generators ([`SplitMix64`], [`XorShift64Star`])
//!   behind every fixture.
//! * [`quantize`]: symmetric per-row int8 quantization, as the runtime
//!   dequantizes it, and little-endian `f32` bytes.
//! * [`owned`]: the owned mirror of the blob description ([`OwnedModel`],
//!   [`OwnedMlp`], [`OwnedLayer`]) and its encoding into a blob.

pub mod owned;
pub mod quantize;
pub mod rng;

pub use owned::{encode, BuildError, OwnedEnergy, OwnedKinetic, OwnedLayer, OwnedMlp, OwnedModel};
pub use quantize::{f32_bytes, quantize_rows, Precision};
pub use rng::{Generator, SplitMix64, XorShift64Star};
