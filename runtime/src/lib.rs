//! # visviva-runtime
//!
//! Evaluates a learned Hamiltonian energy model H(q, p) and steps it in time,
//! on a microcontroller or on the host, with the same arithmetic bit for bit.
//!
//! A firmware needs only the crate root: [`blob_len`] cuts a blob out of its
//! flash region, [`Model::from_bytes`] parses it, [`Model::dof`] and
//! [`Model::inputs`] size the state and input, [`Model::step`] and
//! [`Model::step_driven`] advance a [`State`].
//!
//! * [`format`]: the versioned, CRC-checked blob and its description types.
//! * [`model`]: [`Model::from_bytes`] parses a blob without copying weights
//!   and implements [`Hamiltonian`].
//! * `energy`, `mlp` (crate-private): the energy networks and their analytic
//!   gradients (general, separable, and mechanical: M(q)^-1 = L L^T + eps I).
//! * [`hamiltonian`]: the trait the integrators step (energy, gradient, and
//!   the field (J - R) g + G u).
//! * [`integrate`]: Stormer-Verlet, Yoshida-4, implicit midpoint, RK4 and the
//!   discrete-gradient method.
//! * [`state`]: the state (q, p) with a const bound on its size.
//! * [`tangent`]: the [`Tangent`] trait (Hessian-vector products and the
//!   coordinate tangent of the port terms; `mlp` and `model` implement it
//!   analytically, forward over reverse through the networks).
//! * [`jacobian`]: the exact Jacobian of one integrator step by tangent
//!   propagation through every method (no finite differences).
//! * [`observer`]: the extended Kalman filter [`Observer`] (prediction = the
//!   model's own step, Joseph-form covariance, position and velocity
//!   measurements, missed samples, process noise constant or growing with
//!   the energy) and `Model::momentum_from_velocity`
//!   (p = M v for separable models with a quadratic kinetic term;
//!   `Model::momentum_from_velocity_at` also for the mechanical energy,
//!   p = M(q) v).
//! * [`monitor`]: health flags (windowed NIS against chi-square bounds,
//!   out-of-envelope with the blob's training envelope or caller-given
//!   bounds, energy-balance residual).
//! * [`linalg`]: small stack matrices (products, pivoted solve, LDL^T test).
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

// Cargo features leave out parts a firmware does not use (default: all).
#[cfg(not(any(
    feature = "verlet",
    feature = "yoshida4",
    feature = "midpoint",
    feature = "rk4",
    feature = "discrete-gradient"
)))]
compile_error!(
    "visviva-runtime needs at least one integrator feature: verlet, yoshida4, midpoint, rk4 or discrete-gradient"
);
#[cfg(not(any(feature = "separable", feature = "general", feature = "mechanical")))]
compile_error!(
    "visviva-runtime needs at least one model kind feature: separable, general or mechanical"
);

mod energy;
pub mod error;
pub mod format;
pub mod hamiltonian;
pub mod integrate;
#[cfg(feature = "observer")]
pub mod jacobian;
#[cfg(feature = "observer")]
pub mod linalg;
pub mod math;
mod mlp;
pub mod model;
#[cfg(feature = "observer")]
pub mod monitor;
#[cfg(feature = "observer")]
pub mod observer;
pub mod state;
#[cfg(feature = "observer")]
pub mod tangent;

pub use error::{BlobError, Section, StepError};
pub use format::blob_len;
pub use hamiltonian::Hamiltonian;
pub use integrate::{Integrator, Method};
pub use model::{Cost, Model};
#[cfg(feature = "observer")]
pub use observer::{Channel, Measurement, Observer, ObserverError};
pub use state::State;
#[cfg(feature = "observer")]
pub use tangent::Tangent;

/// Largest number of degrees of freedom any build of the runtime accepts;
/// a model's own bound `D` may be smaller.
pub const MAX_DOF_SUPPORTED: usize = 16;

/// Most inputs u1..um of a driven model.
pub const MAX_INPUTS: usize = 8;
