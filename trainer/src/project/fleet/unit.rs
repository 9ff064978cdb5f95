//! One fleet unit: `visviva run`'s stages on the unit's folder with the
//! fleet's template (quiet, no progress bars), the learned figures the
//! fleet compares across units, and the status file
//! `<unit>/out/fleet-unit.json` that `fleet status` and `fleet report` read
//! wherever the filesystem is mounted. A unit whose logs and settings hash
//! to its last finished run is skipped.

use std::sync::atomic::Ordering;
use std::time::Instant;

use anyhow::{anyhow, Result};
use serde::{Deserialize, Serialize};

use crate::deploy::blob::{BlobModel, HostModel};
use crate::evidence::check::rest_modes;
use crate::evidence::report::{Evidence, RunReport};
use crate::learn::stage::interrupt_flag;
use crate::project::cache::{read_json, sha, write_json};
use crate::project::fleet::file::Unit;
use crate::project::pipeline::{self, Prepared};

/// The status file's name inside `<unit>/out/`.
pub const STATUS_FILE: &str = "fleet-unit.json";

/// Where a unit stands.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum UnitState {
    /// Started, not finished (or the task was killed).
    Running,
    /// Finished: `report.json` is written.
    Done,
    /// Failed: `error` says why.
    Failed,
}

/// One learned physical figure of a unit.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Figure {
    /// Key, the same for every unit of a fleet (e.g. `mode1_period_s`).
    pub key: String,
    /// Label with unit, for tables and charts.
    pub label: String,
    /// Value.
    pub value: f64,
}

/// `<unit>/out/fleet-unit.json`.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct UnitStatus {
    /// Unit name.
    pub unit: String,
    /// Where it stands.
    pub state: UnitState,
    /// Why it failed.
    pub error: Option<String>,
    /// Wall time of this run, seconds.
    pub seconds: f64,
    /// Hash of the logs, the unit's settings and the Visviva version.
    pub input_hash: String,
    /// Whether this run skipped the unit (inputs unchanged since it was done).
    pub skipped: bool,
    /// The unit's overrides of the template.
    pub overrides: Vec<String>,
    /// Learned figures (modes), compared across the fleet.
    pub figures: Vec<Figure>,
    /// Seconds since the Unix epoch when this status was written.
    pub written_unix: u64,
}

fn now_unix() -> u64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| d.as_secs())
}

/// Read a unit's status file, if any.
pub fn read_status(unit: &Unit) -> Option<UnitStatus> {
    read_json(&unit.dir.join("out").join(STATUS_FILE))
}

/// Run one unit (never returns early: a failure is the status). `force`
/// refits even when nothing changed.
pub fn run_unit(unit: &Unit, force: bool) -> UnitStatus {
    let started = Instant::now();
    let mut status = UnitStatus {
        unit: unit.name.clone(),
        state: UnitState::Running,
        error: None,
        seconds: 0.0,
        input_hash: String::new(),
        skipped: false,
        overrides: unit.overrides.clone(),
        figures: Vec::new(),
        written_unix: now_unix(),
    };
    let result = attempt(unit, force, &mut status);
    status.seconds = started.elapsed().as_secs_f64();
    status.written_unix = now_unix();
    match result {
        Ok(()) => status.state = UnitState::Done,
        Err(e) => {
            status.state = UnitState::Failed;
            status.error = Some(format!("{e:#}"));
        }
    }
    let out = unit.dir.join("out");
    if std::fs::create_dir_all(&out).is_ok() {
        if let Err(e) = write_json(&out.join(STATUS_FILE), &status) {
            status.state = UnitState::Failed;
            status.error = Some(format!("writing the status file: {e:#}"));
        }
    }
    status
}

fn attempt(unit: &Unit, force: bool, status: &mut UnitStatus) -> Result<()> {
    let interrupt = interrupt_flag();
    if interrupt.load(Ordering::SeqCst) {
        return Err(anyhow!("not started: interrupted (Ctrl-C)"));
    }
    let label = format!(
        "{} (fleet template)",
        unit.dir.join("visviva.toml").display()
    );
    let mut prep = pipeline::prepare_project(&unit.dir, unit.project.clone(), &label)?;
    // A unit has no visviva.toml of its own: the fleet reruns it.
    prep.command = format!("visviva fleet run FLEET_DIR --force (unit {})", unit.name);
    let settings = serde_json::to_vec(&prep.project)?;
    let hash = sha(&[
        &prep.logs.train_bytes,
        &prep.logs.val_bytes,
        &settings,
        env!("CARGO_PKG_VERSION").as_bytes(),
    ]);
    status.input_hash = hash.clone();
    let last = read_status(unit);
    if let Some(last) = last.filter(|s| {
        !force
            && s.state == UnitState::Done
            && s.input_hash == hash
            && prep.out.join("report.json").exists()
    }) {
        status.skipped = true;
        status.figures = last.figures;
        return Ok(());
    }
    std::fs::create_dir_all(&prep.out)?;
    write_json(&prep.out.join(STATUS_FILE), &*status)?;
    let fit = pipeline::fit(&prep, force, true)?;
    if interrupt.load(Ordering::SeqCst) {
        return Err(anyhow!("interrupted (Ctrl-C) during the fit"));
    }
    let checked = pipeline::check(&prep, &fit)?;
    let devices = pipeline::export(&prep, &checked, force)?
        .into_iter()
        .map(|e| e.device)
        .collect();
    let report = pipeline::report(&prep, fit, checked, devices)?;
    status.figures = figures(&prep, &report)?;
    Ok(())
}

/// The learned figures: per mode the natural frequency and damping ratio of
/// a damped or driven model (from its report), or the small-amplitude
/// period 2 pi / omega of a conservative one (its linearization at rest).
pub fn figures(prep: &Prepared, report: &RunReport) -> Result<Vec<Figure>> {
    let mut out = Vec::new();
    match &report.evidence {
        Evidence::Port(p) => {
            for (k, m) in p.modes.iter().enumerate() {
                out.push(Figure {
                    key: format!("mode{}_hz", k + 1),
                    label: format!("mode {} natural frequency (Hz)", k + 1),
                    value: m.natural_hz,
                });
                out.push(Figure {
                    key: format!("mode{}_damping_ratio", k + 1),
                    label: format!("mode {} damping ratio", k + 1),
                    value: m.damping_ratio,
                });
            }
        }
        Evidence::Check(_) => {
            let bytes = std::fs::read(prep.out.join("model.vvb"))?;
            let model = HostModel::from_bytes(&bytes).map_err(|e| anyhow!("{e}"))?;
            let blob = BlobModel::from_bytes(&bytes).map_err(|e| anyhow!("{e}"))?;
            let (_, _, modes) = rest_modes(&model, &blob, &prep.logs.val)?;
            for (k, m) in modes.iter().filter(|m| m.natural_hz > 0.0).enumerate() {
                out.push(Figure {
                    key: format!("mode{}_period_s", k + 1),
                    label: format!("mode {} small-amplitude period (s)", k + 1),
                    value: 1.0 / m.natural_hz,
                });
            }
        }
    }
    Ok(out)
}
