//! # visviva-trainer
//!
//! Host side of Visviva: reference data from built-in systems, loading and
//! checking motion logs, fitting Hamiltonian energy networks (and a plain
//! vector-field baseline), and writing `visviva-runtime` blobs.
//!
//! Module map (one folder per stage; see DEVELOPERS.md for the whole
//! workspace):
//! * [`data`]: motion logs in and out, splitting, derivative estimation.
//! * [`reference`]: built-in reference systems and their simulation.
//! * [`learn`]: networks, energy model, port terms, baseline, training loop.
//! * [`deploy`]: blobs, export, inspection, host rollouts.
//! * [`evidence`]: checks against held-out logs, charts, the report page.
//! * [`project`]: the project file and the stages `visviva run` chains.
//! * [`cli`]: the command line (the only place clap types live).
//! * [`atomic`]: all-or-nothing file writes.
//! * [`interrupt`]: Ctrl-C, polled by long work and every writer.
//! * [`capacity`]: sizes a user types, checked against this machine.
//! * [`outputs`]: output paths checked against the inputs before any work.

pub mod atomic;
pub mod capacity;
pub mod cli;
pub mod data;
pub mod deploy;
pub mod evidence;
pub mod interrupt;
pub mod learn;
pub mod outputs;
pub mod project;
pub mod reference;

/// Printed by every command whose output predicts motion.
pub const CAUTION: &str = "Caution: a learned model is not a safety function. Validate it on the real \
machine across its operating range, keep independent limits and interlocks, and follow the applicable \
functional-safety standards, local codes and licensed engineering practice.";
