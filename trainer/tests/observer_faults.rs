//! The health monitor on two fault scenarios of our own, with logs made by
//! the built-in reference simulators (`visviva simulate --change`, commands
//! in xtask/src/demos.rs) and the demo projects' committed blobs:
//! * crane-sway: the payload's rope paid out from 8 m to 8.8 m (10 %
//!   longer) at t = 30 s of 60 s logs;
//! * flexure-sensor: the flexure cracked, stiffness 20 -> 18 N/m (10 %
//!   lower) at t = 1 s of 2 s logs.
//!
//! Each observer is tuned from logs of the healthy machine only (crane: the
//! project's training and validation logs; flexure: a commissioning log
//! with position noise, the training logs being noise-free), then run on
//! held-out healthy logs with position noise (false alarms: full windows
//! flagged by the upper bound, the alarm that says the machine or model
//! changed, against the upper tail's share of the chosen two-sided rate, as
//! the chi-square window test promises, Bar-Shalom, Li and Kirubarajan
//! 2001; lower flags, "settings too pessimistic", against a bound of ours,
//! see `LOWER_FLAG_BOUND`) and on the changed logs (detection delay: first
//! upper flag after the change, per trajectory).

use std::path::PathBuf;

use visviva_runtime::monitor::FalseAlarm;
use visviva_trainer::data::dataset::Dataset;
use visviva_trainer::data::log::{load_csv, LoadOptions};
use visviva_trainer::deploy::blob::HostModel;
use visviva_trainer::deploy::observe::ObserverRun;
use visviva_trainer::deploy::observer_settings::ObserverSettings;
use visviva_trainer::deploy::observer_tuning::{monitor_counts, position_rows, tune};

/// Lower flags allowed on a healthy held-out log, as a share of the full
/// windows: 10 %, a requirement of ours. The chi-square test's nominal
/// share is 0.5 % (the lower tail's half of 1 %), which holds for white
/// innovations; a learned model's error is correlated over time, so the
/// window sums spread wider than the chi-square and neither demo reaches
/// the nominal share (measured: crane 3.3 %, flexure 6.0 %; with one
/// constant process-noise level the flexure had 65 %). The bound keeps the
/// lower flag meaningful, "settings too pessimistic" on at most one window
/// in ten, and guards the energy-scaled process noise.
const LOWER_FLAG_BOUND: f64 = 0.10;

fn demo(name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("../models-demo")
        .join(name)
}

fn load(name: &str, file: &str) -> Dataset {
    load_csv(&demo(name).join("data").join(file), &LoadOptions::default()).unwrap()
}

/// Per trajectory: the first upper flag at or after `at` (delay, s) and the
/// flags before `at`.
fn delays(
    model: &HostModel<'_>,
    settings: &ObserverSettings,
    ds: &Dataset,
    at: f64,
) -> Vec<(Option<f64>, usize)> {
    let mut run = ObserverRun::new(model, settings.clone()).unwrap();
    let mut out = Vec::new();
    for t in &ds.trajectories {
        let (mut first, mut early) = (None, 0usize);
        for row in position_rows(t, model.dof()) {
            let e = run.push(&row).unwrap();
            if row.t < at {
                early += usize::from(e.health.nis_high || e.health.nis_low);
            } else if first.is_none() && e.health.nis_high {
                first = Some(row.t - at);
            }
        }
        out.push((first, early));
    }
    out
}

/// Tune, count false alarms on the healthy held-out log, measure delays on
/// the changed one; at least `detected` trajectories must flag within
/// `limit` seconds of the change.
fn scenario(
    name: &str,
    tuning: &[&str],
    healthy: &str,
    changed: &str,
    at: f64,
    limit: f64,
    detected: usize,
) {
    let bytes = std::fs::read(demo(name).join("out/model.vvb")).unwrap();
    let model = HostModel::from_bytes(&bytes).unwrap();
    let logs: Vec<Dataset> = tuning.iter().map(|f| load(name, f)).collect();
    let refs: Vec<&Dataset> = logs.iter().collect();
    let t = tune(&model, &refs, FalseAlarm::OnePercent, 50).unwrap();
    let h = monitor_counts(&model, &t.settings, &[&load(name, healthy)]).unwrap();
    let alarms = h.nis_high;
    println!(
        "{name}: tuned (energy line a {:.3e}, b {:.3e}, scale {}, position noise {:?}); healthy held-out {healthy}: {} upper flags (false alarms) and {} lower flags in {} full windows ({:.2} % and {:.2} %), {} rows out of the envelope",
        t.level_line.0,
        t.level_line.1,
        t.scale,
        t.settings.position_noise,
        h.nis_high,
        h.nis_low,
        h.full_windows,
        100.0 * alarms as f64 / h.full_windows as f64,
        100.0 * h.nis_low as f64 / h.full_windows as f64,
        h.out_of_envelope
    );
    let d = delays(&model, &t.settings, &load(name, changed), at);
    let within = d
        .iter()
        .filter(|(f, _)| f.is_some_and(|v| v <= limit))
        .count();
    let found: Vec<f64> = d.iter().filter_map(|(f, _)| *f).collect();
    let mean = found.iter().sum::<f64>() / found.len().max(1) as f64;
    let worst = found.iter().copied().fold(0.0, f64::max);
    println!(
        "{name}: changed {changed} at t = {at} s: delays {:?} s ({within} of {} within {limit} s; mean of the detected {mean:.3} s, worst {worst:.3} s); flags before the change {:?}",
        d.iter().map(|(f, _)| f.map(|v| (v * 1000.0).round() / 1000.0)).collect::<Vec<_>>(),
        d.len(),
        d.iter().map(|(_, e)| *e).collect::<Vec<_>>()
    );
    // The window test's promise at 1 % two-sided: the upper tail's share,
    // 0.5 %, of the full windows at most on a healthy machine.
    assert!(
        (alarms as f64) <= 0.005 * h.full_windows as f64,
        "{name}: {alarms} false alarms in {} windows",
        h.full_windows
    );
    assert!(
        (h.nis_low as f64) <= LOWER_FLAG_BOUND * h.full_windows as f64,
        "{name}: {} lower flags in {} windows",
        h.nis_low,
        h.full_windows
    );
    assert!(
        within >= detected,
        "{name}: {within} of {} trajectories flagged within {limit} s",
        d.len()
    );
}

#[test]
#[cfg_attr(
    debug_assertions,
    ignore = "runs the observer over long logs: seconds in release, minutes in debug; run with --release"
)]
fn crane_rope_paid_out_is_detected_without_false_alarms() {
    // Limit: two swing periods of the longer rope (2 x 2 pi sqrt(8.8 / 9.81)
    // = 11.9 s), a requirement of ours.
    scenario(
        "crane-sway",
        &["train.csv", "val.csv"],
        "observe-healthy.csv",
        "observe-rope.csv",
        30.0,
        11.9,
        5,
    );
}

#[test]
#[cfg_attr(
    debug_assertions,
    ignore = "runs the observer over long logs: seconds in release, minutes in debug; run with --release"
)]
fn cracked_flexure_is_detected_without_false_alarms() {
    // Limit: half a second (about 1.6 periods), a requirement of ours.
    // Every trajectory must be flagged, the smallest swing (0.7 mm,
    // trajectory 3) too: the process noise grows with the energy, so the
    // filter no longer absorbs the crack there (with one constant level,
    // tuned for the largest swings, it did).
    scenario(
        "flexure-sensor",
        &["observe-commission.csv"],
        "observe-healthy.csv",
        "observe-crack.csv",
        1.0,
        0.5,
        6,
    );
}
