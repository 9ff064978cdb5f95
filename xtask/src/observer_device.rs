//! The observer on the device (part of `cargo xtask device`): for each case
//! a demo blob, its observer settings tuned by the release
//! `visviva tune-observer` from the project's own logs (as a user makes
//! them), and a recorded measurement sequence with missed samples
//! (`observer_sequence`). The host reference is `visviva observe` with
//! that settings file over that sequence; the firmware harness built with
//! the `observe` feature runs the runtime's `Observer` and `Monitor` over
//! the same sequence and settings (`observer_plan`), and every logged
//! value of every update (q, p, v, NIS, measurement count, window NIS sum
//! and count, energy residual, flags) is compared bit for bit. Prints
//! `device observer <name>: M of N estimates bit-identical, X instr/update,
//! stack Y B` per case.

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::process::Command;

use anyhow::{bail, Context, Result};

use crate::device_check::{instructions_from_ticks, FIRMWARE_MAX_DOF, FIRMWARE_MAX_WIDTH};
use crate::device_log;
use crate::elf_size::{self, ElfSize};
use crate::observer_plan::{self, Settings};
use crate::observer_sequence::{self, Gaps, SeqSource};
use crate::qemu_run;

/// One observer case: a demo project's blob, the logs its settings are
/// tuned from, the measurement sequence, and an energy threshold added to
/// the tuned settings (tuning leaves it out).
pub struct ObserverCase {
    /// Project folder under `models-demo/`.
    pub project: &'static str,
    /// Blob stem in the project's `out/`.
    pub blob: &'static str,
    /// Tuning logs, relative to the project: `--train`, then
    /// `--validation` if given.
    pub tuning: &'static [&'static str],
    pub sequence: SeqSource,
    pub energy_threshold: Option<f64>,
}

/// The cases: the crane demo (conservative, Stormer-Verlet, positions
/// only, two trajectories) and the flexure sensor (implicit midpoint, whose
/// Jacobian comes from the implicit function theorem; positions and
/// velocities, momenta started from the first velocity), each tuned from
/// logs the project's observer tests tune from; and the two damped, driven
/// demos (discrete-gradient method: the Jacobian through the port terms,
/// inputs held between rows), tuned from their noise-free logs: the servo
/// drivetrain (two joints) and the trolley crane (the rope angle, the
/// trolley's acceleration as the input).
pub const CASES: &[ObserverCase] = &[
    ObserverCase {
        project: "crane-sway",
        blob: "crane-f32-verlet",
        tuning: &["data/train.csv", "data/val.csv"],
        sequence: SeqSource {
            log: "models-demo/crane-sway/data/observe-healthy.csv",
            take: &[("0", 200), ("1", 100)],
            velocity_prefix: None,
            gaps: Gaps {
                q_every: (9, 4),
                v_every: (0, 0),
                run: (60, 65),
            },
        },
        energy_threshold: None,
    },
    ObserverCase {
        project: "flexure-sensor",
        blob: "flexure-f32-midpoint",
        tuning: &["data/observe-commission.csv"],
        sequence: SeqSource {
            log: "models-demo/flexure-sensor/data/val.csv",
            take: &[("0", 121), ("1", 121)],
            velocity_prefix: Some("dq"),
            gaps: Gaps {
                q_every: (7, 3),
                v_every: (5, 2),
                run: (100, 104),
            },
        },
        energy_threshold: None,
    },
    ObserverCase {
        project: "servo-drivetrain",
        blob: "servo-f32-dgrad",
        tuning: &["data/train.csv"],
        sequence: SeqSource {
            log: "models-demo/servo-drivetrain/data/val.csv",
            take: &[("0", 150), ("1", 100)],
            velocity_prefix: None,
            gaps: Gaps {
                q_every: (8, 5),
                v_every: (0, 0),
                run: (40, 44),
            },
        },
        energy_threshold: None,
    },
    ObserverCase {
        project: "trolley-crane",
        blob: "trolley-f32-dgrad",
        tuning: &["data/train.csv", "data/val.csv"],
        sequence: SeqSource {
            log: "models-demo/trolley-crane/data/val.csv",
            take: &[("0", 150), ("1", 100)],
            velocity_prefix: None,
            gaps: Gaps {
                q_every: (6, 1),
                v_every: (0, 0),
                run: (70, 75),
            },
        },
        energy_threshold: None,
    },
];

/// What one case gave.
pub struct ObserverResult {
    pub name: String,
    /// Estimates equal to the host's, and estimates expected.
    pub same: usize,
    pub total: usize,
    pub size: Option<ElfSize>,
    pub stack_used: Option<u32>,
    pub updates: u32,
    pub predicts: u32,
    /// Emulated instructions per update: its predictions, the update and
    /// the monitor.
    pub instructions_per_update: Option<f64>,
    pub instructions_per_predict: Option<f64>,
    pub seconds: f64,
}

/// Names of the words of one estimate for `n` coordinates, in log order.
pub fn field_names(n: usize) -> Vec<String> {
    let mut names = Vec::new();
    for prefix in ["q", "p", "v"] {
        names.extend((1..=n).map(|k| format!("{prefix}{k}")));
    }
    for name in [
        "nis",
        "measurements",
        "nis_window",
        "window_measurements",
        "energy_residual",
        "flags",
    ] {
        names.push(name.to_string());
    }
    names
}

/// The estimates of `visviva observe`'s CSV as the firmware logs them:
/// f32 columns as bit patterns (Rust prints the shortest decimal that
/// reads back to the same `f32`), counts as integers, the four flags as one
/// word (bit 0 NIS high, 1 NIS low, 2 out of the envelope, 3 energy).
pub fn read_host_estimates(path: &Path, n: usize) -> Result<Vec<Vec<u32>>> {
    let text =
        std::fs::read_to_string(path).with_context(|| format!("reading {}", path.display()))?;
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap_or_default().split(',').collect();
    let col = |name: &str| {
        header
            .iter()
            .position(|h| *h == name)
            .with_context(|| format!("{}: no column `{name}`", path.display()))
    };
    let names = field_names(n);
    let value_cols = names[..3 * n + 5]
        .iter()
        .map(|c| col(c))
        .collect::<Result<Vec<usize>>>()?;
    let flag_cols = ["nis_high", "nis_low", "out_of_envelope", "energy_flag"]
        .iter()
        .map(|c| col(c))
        .collect::<Result<Vec<usize>>>()?;
    let counts = [col("measurements")?, col("window_measurements")?];
    let mut out = Vec::new();
    for (i, line) in lines.enumerate() {
        let fields: Vec<&str> = line.split(',').collect();
        let at = |c: usize| {
            fields
                .get(c)
                .copied()
                .with_context(|| format!("{}: line {}: too few fields", path.display(), i + 2))
        };
        let mut words = Vec::with_capacity(names.len());
        for &c in &value_cols {
            let text = at(c)?;
            let word = if counts.contains(&c) {
                text.parse::<u32>().ok()
            } else {
                text.parse::<f32>().ok().map(f32::to_bits)
            };
            words.push(word.with_context(|| {
                format!(
                    "{}: line {}, column `{}`: `{text}`",
                    path.display(),
                    i + 2,
                    header[c]
                )
            })?);
        }
        let mut flags = 0u32;
        for (bit, &c) in flag_cols.iter().enumerate() {
            if at(c)? == "1" {
                flags |= 1 << bit;
            }
        }
        words.push(flags);
        out.push(words);
    }
    Ok(out)
}

/// Count device estimates equal to the host's; print the first difference
/// with the field's name.
pub fn compare(name: &str, n: usize, host: &[Vec<u32>], device: &HashMap<u32, Vec<u32>>) -> usize {
    let names = field_names(n);
    let mut same = 0;
    let mut reported = false;
    for (r, want) in host.iter().enumerate() {
        let got = device.get(&(r as u32));
        if got == Some(want) {
            same += 1;
            continue;
        }
        if reported {
            continue;
        }
        reported = true;
        let detail = match got {
            None => "missing on the device".to_string(),
            Some(g) if g.len() != want.len() => {
                format!(
                    "{} words on the device, {} on the host",
                    g.len(),
                    want.len()
                )
            }
            Some(g) => {
                let k = (0..want.len()).find(|&k| g[k] != want[k]).unwrap_or(0);
                format!(
                    "{}: host {:#010x} ({}) device {:#010x} ({})",
                    names.get(k).map_or("?", String::as_str),
                    want[k],
                    f32::from_bits(want[k]),
                    g[k],
                    f32::from_bits(g[k])
                )
            }
        };
        println!("  observer {name}: first difference at update {r}: {detail}");
    }
    same
}

/// Run `cmd` (a `visviva` command), failing with its stderr.
fn run_visviva(cmd: &mut Command, what: &str) -> Result<()> {
    let o = cmd.output().with_context(|| format!("starting {what}"))?;
    if !o.status.success() {
        bail!(
            "{what} failed: {}",
            String::from_utf8_lossy(&o.stderr).trim()
        );
    }
    Ok(())
}

/// The settings file of a case: `visviva tune-observer` on the project's
/// logs, plus the case's energy threshold.
fn tune(root: &Path, work: &Path, exe: &Path, case: &ObserverCase) -> Result<PathBuf> {
    let project = root.join("models-demo").join(case.project);
    let out = work.join(format!("observer-{}.observer.toml", case.blob));
    let mut cmd = Command::new(exe);
    cmd.arg("tune-observer")
        .arg("--model")
        .arg(blob_path(root, case));
    for (flag, log) in ["--train", "--validation"].iter().zip(case.tuning) {
        cmd.arg(flag).arg(project.join(log));
    }
    cmd.arg("--out").arg(&out);
    run_visviva(
        &mut cmd,
        &format!("visviva tune-observer for {}", case.blob),
    )?;
    if let Some(t) = case.energy_threshold {
        let mut text = std::fs::read_to_string(&out)?;
        text.push_str(&format!("energy_threshold = {t:e}\n"));
        std::fs::write(&out, text)?;
    }
    Ok(out)
}

fn blob_path(root: &Path, case: &ObserverCase) -> PathBuf {
    root.join("models-demo")
        .join(case.project)
        .join("out")
        .join(format!("{}.vvb", case.blob))
}

/// The host side of one case: settings, sequence, `visviva observe`'s
/// estimates and the firmware's observer plan. Returns (dof, host
/// estimates, plan path).
fn host_side(
    root: &Path,
    work: &Path,
    exe: &Path,
    case: &ObserverCase,
) -> Result<(usize, Vec<Vec<u32>>, PathBuf, usize)> {
    let blob = blob_path(root, case);
    let bytes = std::fs::read(&blob).with_context(|| format!("reading {}", blob.display()))?;
    let model = visviva_runtime::Model::<FIRMWARE_MAX_DOF, FIRMWARE_MAX_WIDTH>::from_bytes(&bytes)
        .map_err(|e| anyhow::anyhow!("{}: {e}", blob.display()))?;
    let n = model.dof();
    let settings_path = tune(root, work, exe, case)?;
    let rows = observer_sequence::build(root, &case.sequence)?;
    let missed = rows
        .iter()
        .filter(|r| r.q.iter().chain(&r.v).all(Option::is_none))
        .count();
    let csv = work.join(format!("observer-{}.measurements.csv", case.blob));
    observer_sequence::write_csv(&rows, &csv)?;
    let host_csv = work.join(format!("observer-{}.host.csv", case.blob));
    run_visviva(
        Command::new(exe)
            .arg("observe")
            .arg("--model")
            .arg(&blob)
            .arg("--data")
            .arg(&csv)
            .arg("--settings")
            .arg(&settings_path)
            .arg("--out")
            .arg(&host_csv),
        &format!("visviva observe for {}", case.blob),
    )?;
    let host = read_host_estimates(&host_csv, n)?;
    if host.len() != rows.len() {
        bail!(
            "{}: {} estimates for {} rows",
            host_csv.display(),
            host.len(),
            rows.len()
        );
    }
    let settings = Settings::read(&settings_path, n)?;
    let plan = observer_plan::to_bytes(&settings, &rows, model.integrator().dt, model.inputs())?;
    let plan_path = work.join(format!("observer-{}.vobs", case.blob));
    std::fs::write(&plan_path, plan).with_context(|| format!("writing {}", plan_path.display()))?;
    Ok((n, host, plan_path, missed))
}

/// One case on the device.
fn run_case(root: &Path, work: &Path, exe: &Path, case: &ObserverCase) -> Result<ObserverResult> {
    let (n, host, plan, missed) = host_side(root, work, exe, case)?;
    let name = format!("observer-{}", case.blob);
    let elf = qemu_run::build_observer_firmware(root, work, &name, &blob_path(root, case), &plan)?;
    let outcome = qemu_run::run(&elf, work, &name)?;
    let log = device_log::parse(&outcome.log)?;
    for e in &log.errors {
        println!("  {name}: device: {e}");
    }
    let finished = outcome.exit_code == Some(0) && log.done && !outcome.timed_out;
    let same = if finished {
        compare(case.blob, n, &host, &log.estimates)
    } else {
        println!(
            "  {name}: firmware did not finish cleanly (qemu exit {:?}{})",
            outcome.exit_code,
            if outcome.timed_out { ", TIMED OUT" } else { "" }
        );
        0
    };
    let timing = log.observer_timing;
    let per = |ticks: u64, count: u32| {
        (count > 0).then(|| instructions_from_ticks(ticks as f64) / f64::from(count))
    };
    let result = ObserverResult {
        name: case.blob.to_string(),
        same,
        total: host.len(),
        size: Some(elf_size::read(&elf)?),
        stack_used: log.stack.map(|s| s.0),
        updates: timing.map_or(0, |t| t.updates),
        predicts: timing.map_or(0, |t| t.predicts),
        instructions_per_update: timing
            .and_then(|t| per(t.predict_ticks + t.update_ticks, t.updates)),
        instructions_per_predict: timing.and_then(|t| per(t.predict_ticks, t.predicts)),
        seconds: outcome.seconds,
    };
    println!(
        "  {name}: {} updates ({} without any measurement), {} predictions; {:.1} s in QEMU; {} instructions per prediction",
        result.updates,
        missed,
        result.predicts,
        result.seconds,
        result.instructions_per_predict.map_or("?".into(), |v| format!("{v:.0}"))
    );
    Ok(result)
}

/// The result line of one case.
pub fn line(r: &ObserverResult) -> String {
    format!(
        "device observer {}: {} of {} estimates bit-identical, {} instr/update, stack {} B",
        r.name,
        r.same,
        r.total,
        r.instructions_per_update
            .map_or("?".into(), |v| format!("{v:.0}")),
        r.stack_used.map_or("?".into(), |s| s.to_string())
    )
}

/// Every case; Ok(false) in the flag when one failed to run.
pub fn run(root: &Path, work: &Path, exe: &Path) -> (Vec<ObserverResult>, bool) {
    println!();
    println!("device check: the observer and health monitor (firmware-example --features observe)");
    let mut results = Vec::new();
    let mut ran = true;
    for case in CASES {
        match run_case(root, work, exe, case) {
            Ok(r) => {
                println!("{}", line(&r));
                results.push(r);
            }
            Err(e) => {
                println!("  observer-{}: FAILED: {e:#}", case.blob);
                ran = false;
            }
        }
    }
    (results, ran)
}

/// The observer rows of the resource report.
pub fn print_report(results: &[ObserverResult]) {
    println!();
    println!("observer resource report (firmware-example --features observe, thumbv7em-none-eabihf, release)");
    println!(
        "  {:<24} {:>9} {:>8} {:>9} {:>8} {:>9} {:>14} {:>14} {:>7}",
        "blob",
        "flash B",
        "RAM B",
        "stack B",
        "updates",
        "predicts",
        "instr/update",
        "instr/predict",
        "wall s"
    );
    for r in results {
        let opt = |v: Option<f64>| v.map_or("?".into(), |v| format!("{v:.0}"));
        println!(
            "  {:<24} {:>9} {:>8} {:>9} {:>8} {:>9} {:>14} {:>14} {:>7.1}",
            r.name,
            r.size.map_or("?".into(), |s| s.flash().to_string()),
            r.size.map_or("?".into(), |s| s.static_ram().to_string()),
            r.stack_used.map_or("?".into(), |s| s.to_string()),
            r.updates,
            r.predicts,
            opt(r.instructions_per_update),
            opt(r.instructions_per_predict),
            r.seconds
        );
    }
    println!(
        "  instr/update = QEMU-emulated instructions per measurement row: its predictions (each the\n  \
         model's step and its exact Jacobian), the update and the health monitor, averaged over the\n  \
         rows (a missed sample only predicts); not CPU cycles. stack = high-water mark of the run."
    );
}

#[cfg(test)]
mod tests {
    use super::*;

    fn record(n: usize, seed: u32) -> Vec<u32> {
        (0..field_names(n).len() as u32)
            .map(|k| 0x3F80_0000 + seed * 64 + k)
            .collect()
    }

    #[test]
    fn a_single_flipped_bit_in_a_logged_estimate_is_a_mismatch() {
        let n = 2;
        let host: Vec<Vec<u32>> = (0..4).map(|r| record(n, r)).collect();
        let mut device: HashMap<u32, Vec<u32>> = host
            .iter()
            .enumerate()
            .map(|(r, w)| (r as u32, w.clone()))
            .collect();
        assert_eq!(compare("t", n, &host, &device), 4);
        // One bit of one word: the lowest mantissa bit of update 2's NIS.
        let nis = field_names(n).iter().position(|f| f == "nis").unwrap();
        device.get_mut(&2).unwrap()[nis] ^= 1;
        assert_eq!(compare("t", n, &host, &device), 3);
        // The sign bit of a flag word and a missing update count too.
        device.get_mut(&0).unwrap()[3 * n + 5] ^= 1 << 31;
        device.remove(&3);
        assert_eq!(compare("t", n, &host, &device), 1);
        // A record cut short is no match.
        device.get_mut(&1).unwrap().pop();
        assert_eq!(compare("t", n, &host, &device), 0);
    }

    #[test]
    fn shortest_decimals_read_back_to_the_same_f32_bits() {
        // The host CSV prints f32 with `{}`, Rust's shortest decimal that
        // reads back to the same value (documented for `Display` of
        // floats; from memory): checked over a stride through all bit
        // patterns, with zeros of both signs, subnormals and extremes.
        let mut checked = 0;
        let specials = [0u32, 0x8000_0000, 1, 0x007F_FFFF, 0x7F7F_FFFF, 0xFF7F_FFFF];
        for bits in (0..=u32::MAX).step_by(65_521).chain(specials) {
            let x = f32::from_bits(bits);
            if !x.is_finite() {
                continue;
            }
            let back: f32 = format!("{x}").parse().unwrap();
            assert_eq!(back.to_bits(), bits, "{x}");
            checked += 1;
        }
        assert!(checked > 60_000);
    }

    #[test]
    fn the_host_csv_becomes_the_firmware_words() {
        let dir = std::env::temp_dir().join(format!("xtask-observer-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let path = dir.join("est.csv");
        // The header `visviva observe` writes for one coordinate without
        // velocities (trainer/src/deploy/observe.rs::header).
        std::fs::write(
            &path,
            "traj,t,q1,p1,v1,innov_q1,nis,measurements,nis_window,window_measurements,nis_high,nis_low,out_of_envelope,energy_residual,energy_flag\n\
             0,0.05,0.5,-2,1.5,,0.25,1,3.5,20,1,0,1,-0,0\n",
        )
        .unwrap();
        let est = read_host_estimates(&path, 1).unwrap();
        std::fs::write(&path, "traj,t,q1,p1,v1,nis\n0,0,1,1,1,1\n").unwrap();
        let missing = format!("{:#}", read_host_estimates(&path, 1).unwrap_err());
        std::fs::remove_dir_all(&dir).ok();
        // IEEE 754 binary32: 0.5 = 0x3F00_0000, -2 = 0xC000_0000,
        // 1.5 = 0x3FC0_0000, 0.25 = 0x3E80_0000, 3.5 = 0x4060_0000,
        // -0 = 0x8000_0000; flags: NIS high (bit 0) and out of the
        // envelope (bit 2).
        assert_eq!(
            est,
            vec![vec![
                0x3F00_0000,
                0xC000_0000,
                0x3FC0_0000,
                0x3E80_0000,
                1,
                0x4060_0000,
                20,
                0x8000_0000,
                0b101
            ]]
        );
        assert!(missing.contains("no column `measurements`"), "{missing}");
    }
}
