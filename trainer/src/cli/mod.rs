//! The `visviva` command line: the only place where clap types live. Each
//! command's file parses its arguments, calls the stage functions of the
//! library and prints; no module outside `cli/` imports anything from here.

use clap::{Parser, Subcommand};

pub mod check;
pub mod compare;
pub mod export;
pub mod fit;
pub mod fleet;
pub mod inspect;
pub mod observe;
pub mod rollout;
pub mod run;
pub mod shared_args;
pub mod simulate;
pub mod tune_observer;

/// Visviva turns logged motion of a mechanical system (q, p or velocity
/// columns in CSV) into an energy-consistent predictor for a
/// microcontroller: it fits a Hamiltonian neural network, checks it against
/// a plain baseline on held-out logs, exports a compact blob and reports
/// size, cost and accuracy. Start with `visviva run DIR` on a project folder
/// holding visviva.toml; the other commands are the same path step by step.
///
/// A learned model is not a safety function: validate it on the machine and
/// follow the applicable functional-safety standards.
#[derive(Debug, Parser)]
#[command(
    name = "visviva",
    version,
    about = "Fit an energy-consistent motion predictor from logs, check it, and deploy it to a microcontroller",
    long_about
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// The whole path for a project folder: data, fit, check, export, report.
    Run(run::Args),
    /// A fleet of units, one model each: run locally, submit to Slurm, status, report.
    Fleet(fleet::Args),
    /// Generate reference trajectories from a built-in system.
    Simulate(simulate::Args),
    /// Fit an energy model to trajectories and write a model blob.
    Fit(fit::Args),
    /// Compare the model with the baseline on held-out trajectories.
    Check(check::Args),
    /// Write a device blob: weight storage, integrator, and what it costs.
    Export(export::Args),
    /// Show what a blob holds and what it costs on a device.
    Inspect(inspect::Args),
    /// Step a blob on the host with the device's arithmetic; CSV out.
    Rollout(rollout::Args),
    /// Compare two trajectory CSVs bit for bit (exit 1 on a difference).
    Compare(compare::Args),
    /// Run the state observer and health monitor over a measurement log.
    Observe(observe::Args),
    /// Tune a blob's observer settings from its training and validation logs.
    TuneObserver(tune_observer::Args),
}

/// Parse the command line, run the command, and map its result to the exit
/// status: 0 on success, 1 on failure (for `compare`: 1 on a difference, 2
/// on unreadable input).
pub fn main() -> std::process::ExitCode {
    let cli = Cli::parse();
    let result = match cli.command {
        Command::Run(a) => run::run(a),
        Command::Fleet(a) => fleet::run(a),
        Command::Simulate(a) => simulate::run(a),
        Command::Fit(a) => fit::run(a),
        Command::Check(a) => check::run(a),
        Command::Export(a) => export::run(a),
        Command::Inspect(a) => inspect::run(a),
        Command::Rollout(a) => rollout::run(a),
        Command::Observe(a) => observe::run(a),
        Command::TuneObserver(a) => tune_observer::run(a),
        Command::Compare(a) => match compare::run(a) {
            Ok(true) => Ok(()),
            Ok(false) => return std::process::ExitCode::from(1),
            Err(e) => {
                eprintln!("error: {e:#}");
                return std::process::ExitCode::from(2);
            }
        },
    };
    match result {
        Ok(()) => std::process::ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("error: {e:#}");
            std::process::ExitCode::FAILURE
        }
    }
}
pub mod tables;
