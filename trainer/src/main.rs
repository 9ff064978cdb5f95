//! `keel`: the host command line. Each subcommand lives in its own `cmd_*`
//! module of the library; this file only dispatches.

use clap::{Parser, Subcommand};
use keel_trainer::{cmd_fit, cmd_simulate};

/// Keel: from logged motion to a verified energy-consistent predictor on a
/// microcontroller.
#[derive(Debug, Parser)]
#[command(name = "keel", version, about)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// Generate reference trajectories from a built-in system.
    Simulate(cmd_simulate::Args),
    /// Fit an energy model to trajectories and write a model blob.
    Fit(cmd_fit::Args),
}

fn main() -> std::process::ExitCode {
    let cli = Cli::parse();
    let result = match cli.command {
        Command::Simulate(a) => cmd_simulate::run(a),
        Command::Fit(a) => cmd_fit::run(a),
    };
    match result {
        Ok(()) => std::process::ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("error: {e:#}");
            std::process::ExitCode::FAILURE
        }
    }
}
