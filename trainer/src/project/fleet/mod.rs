//! A fleet of machines of one kind, one model per unit: the fleet file
//! (`file`), one unit's run and status file (`unit`), every unit on this
//! machine on a bounded thread pool (`local`), or one Slurm array task per
//! unit (`slurm`); the fleet report is built from the files the units wrote
//! (`evidence::fleet_report`).

pub mod file;
pub mod local;
pub mod slurm;
pub mod unit;

use anyhow::Result;

use crate::evidence::fleet_report::{build, render_html, FleetReport, UnitInput};
use crate::project::cache::{read_json, write_json};
use file::Fleet;
use unit::{read_status, UnitState};

/// Each unit as its files show it: `fleet-unit.json` and `report.json`.
pub fn collect(fleet: &Fleet) -> Vec<UnitInput> {
    fleet
        .units
        .iter()
        .map(|u| {
            let status = read_status(u);
            let state = match status.as_ref().map(|s| s.state) {
                Some(UnitState::Done) => "done",
                Some(UnitState::Failed) => "failed",
                Some(UnitState::Running) => "running",
                None => "not started",
            };
            let done = state == "done";
            UnitInput {
                name: u.name.clone(),
                state: state.into(),
                error: status.as_ref().and_then(|s| s.error.clone()),
                overrides: u.overrides.clone(),
                figures: status
                    .as_ref()
                    .filter(|_| done)
                    .map(|s| {
                        s.figures
                            .iter()
                            .map(|f| (f.key.clone(), f.label.clone(), f.value))
                            .collect()
                    })
                    .unwrap_or_default(),
                report: done
                    .then(|| read_json::<serde_json::Value>(&u.dir.join("out/report.json")))
                    .flatten(),
            }
        })
        .collect()
}

/// Build the fleet report from the units' files and write `out/fleet.json`
/// and `out/fleet.html`.
pub fn write_report(fleet: &Fleet) -> Result<FleetReport> {
    let report = build(&fleet.name, &collect(fleet));
    let out = fleet.out();
    std::fs::create_dir_all(&out)?;
    write_json(&out.join("fleet.json"), &report)?;
    crate::atomic::write_atomic(&out.join("fleet.html"), render_html(&report).as_bytes())?;
    Ok(report)
}
