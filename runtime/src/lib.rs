//! # visviva-runtime
//!
//! Evaluates a learned Hamiltonian energy model H(q, p) and steps it in time,
//! on a microcontroller or on the host, with the same arithmetic bit for bit.
//!
//! * [`format`]: the versioned, CRC-checked blob and its description types.
//! * [`model`]: [`Model::from_bytes`] parses a blob without copying weights
//!   and implements [`Hamiltonian`].
//! * [`energy`], [`mlp`]: the energy networks and their analytic gradients.
//! * [`integrate`]: Stormer-Verlet, Yoshida-4, implicit midpoint and RK4.
//! * [`math`]: deterministic `tanh`, `softplus` and friends.
//! * [`error`]: every failure as a typed enum; nothing here panics.
//!
//! `no_std`, no heap, no `unsafe`. Floating-point sums run in a fixed order
//! and Rust never contracts `a * b + c` into a fused multiply-add, so x86_64
//! and Cortex-M4F results agree exactly.
#![no_std]
#![forbid(unsafe_code)]
#![warn(missing_docs)]
// No heap, so large variants cannot be boxed: they stay inline by design.
#![allow(clippy::large_enum_variant)]

pub mod energy;
pub mod error;
pub mod format;
pub mod hamiltonian;
pub mod integrate;
pub mod math;
pub mod mlp;
pub mod model;
pub mod state;

pub use error::{BlobError, Section, StepError};
pub use hamiltonian::Hamiltonian;
pub use integrate::{Integrator, Method};
pub use model::{Cost, Model};
pub use state::State;

/// Largest number of degrees of freedom any build of the runtime accepts;
/// a model's own bound `D` may be smaller.
pub const MAX_DOF_SUPPORTED: usize = 16;
