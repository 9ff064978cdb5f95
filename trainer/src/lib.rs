//! # visviva-trainer
//!
//! Host side of Visviva: reference data from built-in systems, loading and
//! checking motion logs, fitting Hamiltonian energy networks (and a plain
//! vector-field baseline), and writing `visviva-runtime` blobs.
//!
//! Module map (see DEVELOPERS.md for the whole workspace):
//! * [`dataset`]: in-memory trajectories shared by every stage.
//! * [`atomic`]: all-or-nothing file writes.
//! * [`systems`], [`simulate`]: built-in reference systems and their data.
//! * [`data`], [`derivative`]: CSV logs in, validated; derivative estimation.
//! * [`net`], [`hnn`], [`optim`], [`fit`]: the energy network, its loss and
//!   gradients, the optimizer and the training loop.
//! * [`export`]: writing runtime blobs from fitted models.
//! * [`blob`]: an owned, editable mirror of a blob (quantization, inspection).
//! * [`rollout`], [`integrator_args`]: host rollouts through `visviva-runtime`.
//! * `cmd_*`: one module per `visviva` subcommand.

pub mod atomic;
pub mod blob;
pub mod check;
pub mod cmd_check;
pub mod cmd_compare;
pub mod cmd_export;
pub mod cmd_fit;
pub mod cmd_inspect;
pub mod cmd_rollout;
pub mod cmd_run;
pub mod cmd_simulate;
pub mod data;
pub mod dataset;
pub mod derivative;
pub mod export;
pub mod fit;
pub mod hnn;
pub mod integrator_args;
pub mod net;
pub mod optim;
pub mod port;
pub mod project;
pub mod report;
pub mod rollout;
pub mod simulate;
pub mod svgplot;
pub mod systems;

/// Printed by every command whose output predicts motion.
pub const CAUTION: &str = "Caution: a learned model is not a safety function. Validate it on the real \
machine across its operating range, keep independent limits and interlocks, and follow the applicable \
functional-safety standards, local codes and licensed engineering practice.";
