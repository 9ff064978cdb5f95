//! `visviva`: the host command line. Each subcommand lives in its own `cmd_*`
//! module of the library; this file only dispatches.

use clap::{Parser, Subcommand};
use visviva_trainer::{
    cmd_check, cmd_compare, cmd_export, cmd_fit, cmd_inspect, cmd_rollout, cmd_run, cmd_simulate,
};

/// Visviva: from logged motion to a verified energy-consistent predictor on a
/// microcontroller.
#[derive(Debug, Parser)]
#[command(name = "visviva", version, about)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// The whole path for a project folder: data, fit, check, export, report.
    Run(cmd_run::Args),
    /// Generate reference trajectories from a built-in system.
    Simulate(cmd_simulate::Args),
    /// Fit an energy model to trajectories and write a model blob.
    Fit(cmd_fit::Args),
    /// Compare the model with the baseline on held-out trajectories.
    Check(cmd_check::Args),
    /// Write a device blob: weight storage, integrator, and what it costs.
    Export(cmd_export::Args),
    /// Show what a blob holds and what it costs on a device.
    Inspect(cmd_inspect::Args),
    /// Step a blob on the host with the device's arithmetic; CSV out.
    Rollout(cmd_rollout::Args),
    /// Compare two trajectory CSVs bit for bit (exit 1 on a difference).
    Compare(cmd_compare::Args),
}

fn main() -> std::process::ExitCode {
    let cli = Cli::parse();
    let result = match cli.command {
        Command::Run(a) => cmd_run::run(a),
        Command::Simulate(a) => cmd_simulate::run(a),
        Command::Fit(a) => cmd_fit::run(a),
        Command::Check(a) => cmd_check::run(a),
        Command::Export(a) => cmd_export::run(a),
        Command::Inspect(a) => cmd_inspect::run(a),
        Command::Rollout(a) => cmd_rollout::run(a),
        Command::Compare(a) => match cmd_compare::run(a) {
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
