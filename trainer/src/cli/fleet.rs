//! `visviva fleet run|submit|status|report FLEET_DIR`: one model per unit of
//! a fleet described by `FLEET_DIR/fleet.toml`, on this machine (`run`, N
//! units at a time) or as a Slurm job array (`submit`; the hidden `task`
//! is what each array task runs). `status` and `report` read only the
//! files the units wrote.

use std::path::PathBuf;
use std::time::Instant;

use anyhow::{bail, Result};

use crate::evidence::fleet_report::FleetReport;
use crate::project::fleet::file::Fleet;
use crate::project::fleet::unit::{run_unit, UnitState, UnitStatus};
use crate::project::fleet::{local, slurm, write_report};

/// Arguments of `visviva fleet`.
#[derive(Debug, clap::Args)]
pub struct Args {
    #[command(subcommand)]
    command: FleetCommand,
}

#[derive(Debug, clap::Subcommand)]
enum FleetCommand {
    /// Run every unit on this machine, N at a time, then write the fleet report.
    Run {
        /// Fleet folder holding fleet.toml.
        #[arg(value_name = "DIR")]
        dir: PathBuf,
        /// Units run in parallel (each fit uses its [fit] threads).
        #[arg(long, short, default_value_t = 1, value_name = "N")]
        jobs: usize,
        /// Rerun units even when their inputs did not change.
        #[arg(long)]
        force: bool,
        /// No progress bar.
        #[arg(long, short)]
        quiet: bool,
    },
    /// Write a Slurm job array (one task per unit) and submit it with sbatch.
    Submit {
        /// Fleet folder holding fleet.toml.
        #[arg(value_name = "DIR")]
        dir: PathBuf,
        /// Write the batch script only; do not call sbatch.
        #[arg(long)]
        dry_run: bool,
    },
    /// Where every unit stands, from the files the units wrote.
    Status {
        /// Fleet folder holding fleet.toml.
        #[arg(value_name = "DIR")]
        dir: PathBuf,
    },
    /// Write out/fleet.json and out/fleet.html from the files the units wrote.
    Report {
        /// Fleet folder holding fleet.toml.
        #[arg(value_name = "DIR")]
        dir: PathBuf,
    },
    /// Run one unit: what a Slurm array task runs.
    #[command(hide = true)]
    Task {
        /// Fleet folder holding fleet.toml.
        #[arg(value_name = "DIR")]
        dir: PathBuf,
        /// Array task index (the line in out/fleet-units.txt).
        #[arg(long, value_name = "N")]
        index: usize,
    },
}

/// Run the command.
pub fn run(args: Args) -> Result<()> {
    match args.command {
        FleetCommand::Run {
            dir,
            jobs,
            force,
            quiet,
        } => run_local(&dir, jobs, force, quiet),
        FleetCommand::Submit { dir, dry_run } => submit(&dir, dry_run),
        FleetCommand::Status { dir } => status(&dir),
        FleetCommand::Report { dir } => {
            let fleet = Fleet::load(&dir)?;
            let r = write_report(&fleet)?;
            print_report(&fleet, &r);
            Ok(())
        }
        FleetCommand::Task { dir, index } => task(&dir, index),
    }
}

fn line(s: &UnitStatus) -> String {
    match s.state {
        UnitState::Done if s.skipped => format!("  {}: inputs unchanged, skipped", s.unit),
        UnitState::Done => format!("  {}: done in {:.1} s", s.unit, s.seconds),
        _ => format!(
            "  {}: FAILED: {}",
            s.unit,
            s.error.as_deref().unwrap_or("unknown")
        ),
    }
}

fn run_local(dir: &std::path::Path, jobs: usize, force: bool, quiet: bool) -> Result<()> {
    if jobs == 0 {
        bail!("--jobs must be at least 1");
    }
    let started = Instant::now();
    let fleet = Fleet::load(dir)?;
    println!(
        "visviva fleet run: {} ({} units, {} at a time)",
        fleet.name,
        fleet.units.len(),
        jobs.min(fleet.units.len())
    );
    print_overrides(&fleet);
    let statuses = local::run_fleet(&fleet, jobs, force, !quiet, &line);
    let failed = statuses
        .iter()
        .filter(|s| s.state != UnitState::Done)
        .count();
    let r = write_report(&fleet)?;
    println!(
        "fleet run: {} of {} units done in {:.1} s",
        statuses.len() - failed,
        fleet.units.len(),
        started.elapsed().as_secs_f64()
    );
    print_report(&fleet, &r);
    if failed > 0 {
        bail!("{failed} unit(s) failed (see above and out/fleet.html)");
    }
    Ok(())
}

fn print_overrides(fleet: &Fleet) {
    for u in fleet.units.iter().filter(|u| !u.overrides.is_empty()) {
        println!("  {} overrides: {}", u.name, u.overrides.join(", "));
    }
}

fn print_report(fleet: &Fleet, r: &FleetReport) {
    for f in &r.figures {
        println!(
            "  {}: median {:.5}, MAD {:.3e}, flagged (|M| > {}): {}",
            f.label,
            f.median,
            f.mad,
            r.threshold,
            if f.outliers.is_empty() {
                "none".into()
            } else {
                f.outliers.join(", ")
            }
        );
    }
    println!(
        "fleet report: {} of {} units done, outliers: {}",
        r.units_done,
        r.units_total,
        if r.outliers.is_empty() {
            "none".into()
        } else {
            r.outliers.join(", ")
        }
    );
    println!("report: {}", fleet.out().join("fleet.html").display());
    println!("{}", crate::CAUTION);
}

fn submit(dir: &std::path::Path, dry_run: bool) -> Result<()> {
    let fleet = Fleet::load(dir)?;
    print_overrides(&fleet);
    let (script, id) = slurm::submit(&fleet, !dry_run)?;
    println!(
        "batch script: {} (array of {} tasks, one per unit)",
        script.display(),
        fleet.units.len()
    );
    if let Some(id) = id {
        println!("submitted job {id}");
        println!(
            "follow with: visviva fleet status {}; then visviva fleet report {}",
            dir.display(),
            dir.display()
        );
    }
    Ok(())
}

fn status(dir: &std::path::Path) -> Result<()> {
    let fleet = Fleet::load(dir)?;
    let since = slurm::last_submit(&fleet.out());
    if let Some((id, _)) = &since {
        println!("last submitted job: {id}");
    }
    let mut counts = std::collections::BTreeMap::new();
    for u in &fleet.units {
        let s = crate::project::fleet::unit::read_status(u);
        let stale = matches!((&s, &since), (Some(s), Some((_, t))) if s.written_unix < *t);
        let state = match &s {
            None => "not started".to_string(),
            Some(_) if stale => "not started (status from before the last submit)".to_string(),
            Some(s) => match s.state {
                UnitState::Done => format!("done ({:.1} s)", s.seconds),
                UnitState::Running => "running".into(),
                UnitState::Failed => {
                    format!("FAILED: {}", s.error.as_deref().unwrap_or("unknown"))
                }
            },
        };
        let key = if state.starts_with("not started") {
            "not started".to_string()
        } else {
            state.split([' ', ':']).next().unwrap_or("").to_string()
        };
        *counts.entry(key).or_insert(0usize) += 1;
        println!("  {}: {state}", u.name);
    }
    let summary: Vec<String> = counts.iter().map(|(k, n)| format!("{n} {k}")).collect();
    println!("fleet status: {}", summary.join(", "));
    Ok(())
}

fn task(dir: &std::path::Path, index: usize) -> Result<()> {
    let fleet = Fleet::load(dir)?;
    let name = slurm::unit_of_index(&fleet.out(), index)?;
    let Some(unit) = fleet.units.iter().find(|u| u.name == name) else {
        bail!("array task {index}: unit {name} is no longer in the fleet file");
    };
    let s = run_unit(unit, false);
    println!("{}", line(&s));
    if s.state != UnitState::Done {
        bail!("unit {name} failed");
    }
    Ok(())
}
