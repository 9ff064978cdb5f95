//! `cargo xtask device`: for every device blob (the generated fixtures plus
//! any demo blob exported by `visviva run` with golden rollouts, or the blobs
//! given with `--blob`), build the example firmware
//! with it, run it in QEMU, and compare every logged state bit for bit with
//! the host rollout; check that defective blobs and faults end the firmware
//! with a logged error and a non-zero exit; print a resource report and the
//! runtime's own footprint (one `footprint <config>: ...` line per
//! configuration, see `footprint.rs`). By default it also runs the core
//! blobs (`c_cores::CASES`) on the Rust firmware and the C firmware on five
//! cores (`c_cores`) and the observer cases (`observer_device`: the
//! runtime's observer and health monitor over a recorded measurement
//! sequence, every estimate compared bit for bit with `visviva observe`),
//! then prints the resource table per target, one
//! `device observer <name>: ...` line per observer case, one
//! `target <name>: M of N states bit-identical` line per target and ends
//! with exactly one line
//! `device check: <M> of <N> states bit-identical on <K> targets`, where
//! the states are every rollout state logged by any target plus every
//! observer estimate (one per update: q, p, v, NIS, window sum and count,
//! energy residual and flags), counted on the Rust firmware's target.

use std::path::{Path, PathBuf};
use std::time::Instant;

use anyhow::{Context, Result};

use crate::c_cores::{self, CoreCase};
use crate::device_log::{self, DeviceLog};
use crate::elf_size::{self, ElfSize};
use crate::fixtures;
use crate::golden_csv;
use crate::host_rollout::{self, HostRollout, Trajectories, VisvivaCommand};
use crate::model_swap;
use crate::qemu_run::{self, ICOUNT_SHIFT, SYSTICK_NS};
use crate::run_plan::RunPlan;
use crate::target_report::{self, TargetResult};
use crate::tools;

/// The Rust firmware's target name in the per-target lines.
const RUST_TARGET: &str = "cortex-m4f-rust";
/// Prefix of the Rust firmware's runs of the core blobs.
const CORE_PREFIX: &str = "cores-";

/// `MAX_DOF` in firmware-example/src/main.rs (the firmware logs its bounds
/// and the check fails if they differ).
pub const FIRMWARE_MAX_DOF: usize = 4;
/// `MAX_WIDTH` in firmware-example/src/main.rs.
pub const FIRMWARE_MAX_WIDTH: usize = 64;
/// Steps per rollout in the check.
pub const STEPS: u32 = 10_000;

/// One blob to run on the device, with its run plan.
struct DeviceCase {
    name: String,
    blob: PathBuf,
    plan: RunPlan,
    /// Golden rollouts from `visviva run`, when the blob has them.
    golden: Option<Trajectories>,
}

/// One row of the resource report.
struct ReportRow {
    name: String,
    size: ElfSize,
    stack_used: Option<u32>,
    instructions_per_step: Option<f64>,
    macs_per_step: Option<u32>,
    seconds: f64,
    /// Device states equal to the golden CSVs (equal, total), if any.
    golden: Option<(usize, usize)>,
}

/// The fixture blobs with fixed initial states, written into `work`.
fn fixture_cases(work: &Path) -> Result<Vec<DeviceCase>> {
    let mut cases = Vec::new();
    for blob in fixtures::good_fixtures()? {
        let path = work.join(format!("{}.vvb", blob.name));
        std::fs::write(&path, &blob.bytes)?;
        let initial_states = if blob.name.contains("separable") {
            vec![vec![0.3, -0.2, 0.0, 0.1], vec![-0.5, 0.4, 0.2, -0.1]]
        } else {
            vec![vec![0.4, 0.0], vec![-0.3, 0.25]]
        };
        let dof = initial_states[0].len() / 2;
        // A driven fixture (one input, 0.01 s step) gets the two-tone input,
        // the same for both initial states.
        let inputs = if blob.name.contains("driven") {
            crate::run_plan::two_tone_inputs(STEPS, 1, 0.01)
        } else {
            Vec::new()
        };
        cases.push(DeviceCase {
            name: blob.name,
            blob: path,
            plan: RunPlan {
                dof,
                steps: STEPS,
                initial_states,
                inputs,
            },
            golden: None,
        });
    }
    Ok(cases)
}

/// Blobs given on the command line (e.g. `visviva export` outputs), with
/// initial states spread over each model's normalization range.
fn file_cases(blobs: &[PathBuf]) -> Result<Vec<DeviceCase>> {
    blobs
        .iter()
        .map(|path| {
            let bytes =
                std::fs::read(path).with_context(|| format!("reading {}", path.display()))?;
            let golden_files = golden_csv::files_for(path);
            let (plan, golden) = if golden_files.is_empty() {
                let plan = host_rollout::default_plan(&bytes, STEPS)
                    .with_context(|| format!("{}: cannot derive initial states", path.display()))?;
                (plan, None)
            } else {
                let inputs = golden_csv::inputs_file_for(path);
                let (plan, golden) = golden_csv::read(&golden_files, inputs.as_deref())?;
                (plan, Some(golden))
            };
            let name = path
                .file_stem()
                .map(|s| s.to_string_lossy().into_owned())
                .unwrap_or_else(|| "blob".into());
            Ok(DeviceCase {
                name,
                blob: path.clone(),
                plan,
                golden,
            })
        })
        .collect()
}

/// Blobs exported by `visviva run` in the demo projects
/// (`models-demo/*/out/*.vvb` that have golden rollout files), sorted.
fn exported_demo_blobs(root: &Path) -> Vec<PathBuf> {
    let mut found = Vec::new();
    let Ok(projects) = std::fs::read_dir(root.join("models-demo")) else {
        return found;
    };
    for project in projects.flatten() {
        let Ok(outputs) = std::fs::read_dir(project.path().join("out")) else {
            continue;
        };
        for entry in outputs.flatten() {
            let path = entry.path();
            if path.extension().is_some_and(|e| e == "vvb")
                && !golden_csv::files_for(&path).is_empty()
            {
                found.push(path);
            }
        }
    }
    found.sort();
    found
}

/// Count device states equal to the host's; print the first difference.
fn compare(name: &str, host: &Trajectories, device: &DeviceLog) -> usize {
    let mut same = 0;
    let mut reported = false;
    for (s, traj) in host.iter().enumerate() {
        for (k, want) in traj.iter().enumerate() {
            match device.states.get(&(s as u32, k as u32)) {
                Some(got) if got == want => same += 1,
                other => {
                    if !reported {
                        reported = true;
                        let show = |v: &[u32]| {
                            v.iter()
                                .map(|b| format!("{b:#010x}({})", f32::from_bits(*b)))
                                .collect::<Vec<_>>()
                                .join(" ")
                        };
                        println!(
                            "  {name}: first difference at state {s} step {k}: host {} device {}",
                            show(want),
                            other.map_or("(missing)".into(), |g| show(g))
                        );
                    }
                }
            }
        }
    }
    same
}

/// Emulated instructions for SysTick `ticks` under `-icount`.
pub fn instructions_from_ticks(ticks: f64) -> f64 {
    ticks * SYSTICK_NS / f64::from(1u32 << ICOUNT_SHIFT)
}

/// Run one good case; returns (states equal, states expected, report row).
fn run_good_case(
    root: &Path,
    work: &Path,
    case: &DeviceCase,
    host: &dyn HostRollout,
) -> Result<(usize, ReportRow)> {
    let plan_path = work.join(format!("{}.plan", case.name));
    case.plan.write(&plan_path)?;
    let reference = host.rollout(&case.blob, &case.plan)?;
    let max_abs = reference
        .iter()
        .flatten()
        .flatten()
        .map(|b| f32::from_bits(*b).abs())
        .fold(0.0f32, f32::max);
    let elf = qemu_run::build_firmware(root, work, &case.name, &case.blob, &plan_path, None)?;
    let outcome = qemu_run::run(&elf, work, &case.name)?;
    let log = device_log::parse(&outcome.log)?;
    if let Some((d, w)) = log.bounds {
        anyhow::ensure!(
            (d as usize, w as usize) == (FIRMWARE_MAX_DOF, FIRMWARE_MAX_WIDTH),
            "firmware bounds D={d} W={w} differ from xtask's {FIRMWARE_MAX_DOF}/{FIRMWARE_MAX_WIDTH}"
        );
    }
    for e in &log.errors {
        println!("  {}: device: {e}", case.name);
    }
    let same = compare(&case.name, &reference, &log);
    let expected = case.plan.state_count();
    println!(
        "  {}: {} of {} states bit-identical; qemu exit {:?}{}, {:.1} s, {} KiB defmt, max |x| {max_abs:.3}, fpu {}",
        case.name,
        same,
        expected,
        outcome.exit_code,
        if outcome.timed_out { " (TIMED OUT)" } else { "" },
        outcome.seconds,
        outcome.raw_bytes / 1024,
        match log.fpu_enabled {
            Some(true) => "enabled (CPACR CP10/CP11 full access)",
            Some(false) => "NOT enabled",
            None => "unknown",
        }
    );
    if let Some((instr, ticks, overhead)) = log.calibration {
        let expect = f64::from(instr) * f64::from(1u32 << ICOUNT_SHIFT) / SYSTICK_NS;
        println!(
            "  {}: SysTick calibration: {instr} loop instructions -> {ticks} ticks (expected {expect:.0} = instructions * 2^{ICOUNT_SHIFT} / 40; read overhead {overhead} ticks)",
            case.name
        );
        // A few ticks of slack for the loop's set-up instructions.
        anyhow::ensure!(
            (f64::from(ticks) - expect).abs() <= 4.0 + 1e-4 * expect,
            "SysTick calibration off: {ticks} ticks for {instr} instructions, expected {expect:.0}; \
             instruction counts would be wrong"
        );
    }
    let golden = case.golden.as_ref().map(|g| {
        let label = format!("{} vs golden CSV", case.name);
        let same = compare(&label, g, &log);
        let total = g.iter().map(Vec::len).sum::<usize>();
        println!("  {label}: {same} of {total} device states equal the golden rollout files");
        (same, total)
    });
    let ok_exit = outcome.exit_code == Some(0) && log.done;
    let same = if ok_exit {
        same
    } else {
        println!("  {}: firmware did not finish cleanly", case.name);
        0
    };
    let row = ReportRow {
        name: case.name.clone(),
        size: elf_size::read(&elf)?,
        stack_used: log.stack.map(|s| s.0),
        instructions_per_step: log
            .timing
            .filter(|t| t.0 > 0)
            .map(|(steps, ticks)| instructions_from_ticks(ticks as f64) / f64::from(steps)),
        macs_per_step: log.macs_per_step,
        seconds: outcome.seconds,
        golden,
    };
    Ok((same, row))
}

/// For a blob exported by `visviva run` (in `<project>/out/`), write what the
/// emulator measured to `<project>/out/device/<blob>.json`, where the next
/// `visviva run` picks it up for its report.
fn record_measurement(case: &DeviceCase, row: &ReportRow) {
    if case.golden.is_none() || row.name != case.name {
        return;
    }
    let Some(dir) = case.blob.parent().map(|d| d.join("device")) else {
        return;
    };
    let json = format!(
        "{{\n  \"instructions_per_step\": {},\n  \"macs_per_step\": {},\n  \"stack_bytes\": {},\n  \"firmware_flash_bytes\": {},\n  \"firmware_static_ram_bytes\": {},\n  \"note\": \"QEMU-emulated instructions under -icount, not CPU cycles\"\n}}\n",
        row.instructions_per_step.map_or("null".into(), |v| format!("{v:.1}")),
        row.macs_per_step.map_or("null".into(), |v| v.to_string()),
        row.stack_used.map_or("null".into(), |v| v.to_string()),
        row.size.flash(),
        row.size.static_ram(),
    );
    if std::fs::create_dir_all(&dir).is_ok() {
        let _ = std::fs::write(dir.join(format!("{}.json", case.name)), json);
    }
}

/// Re-flash check: take the first case's built ELF, write the blob of a
/// later case with the same run plan into its `.vv_model` section (no
/// rebuild), run it and compare with the host rollout of that blob. Ok(true)
/// also when no pair of cases qualifies (reported).
fn swap_check(work: &Path, cases: &[DeviceCase], host: &dyn HostRollout) -> Result<bool> {
    let Some((first, rest)) = cases.split_first() else {
        return Ok(true);
    };
    let same_plan = |c: &&DeviceCase| {
        c.plan.dof == first.plan.dof
            && c.plan.steps == first.plan.steps
            && c.plan.initial_states == first.plan.initial_states
            && c.plan.inputs == first.plan.inputs
    };
    let Some(other) = rest.iter().find(same_plan) else {
        println!("  model swap: skipped (no second blob with the same initial states)");
        return Ok(true);
    };
    let name = format!("swap-{}-into-{}", other.name, first.name);
    let elf = work.join(format!("{}.elf", first.name));
    let patched = work.join(format!("{name}.elf"));
    let blob = std::fs::read(&other.blob)?;
    model_swap::patch_model_section(&elf, &blob, &patched)?;
    let reference = host.rollout(&other.blob, &other.plan)?;
    let outcome = qemu_run::run(&patched, work, &name)?;
    let log = device_log::parse(&outcome.log)?;
    let same = compare(&name, &reference, &log);
    let expected = other.plan.state_count();
    let ok = same == expected && outcome.exit_code == Some(0) && log.done;
    println!(
        "  model swap (no rebuild): {} written into the .vv_model section of {}.elf: {same} of {expected} states bit-identical{}",
        other.name,
        first.name,
        if ok { "" } else { " - FAILED" }
    );
    Ok(ok)
}

/// Build and run a firmware that must stop with a logged error containing
/// `expected` and a non-zero exit.
fn expect_refusal(
    root: &Path,
    work: &Path,
    name: &str,
    blob: &Path,
    plan: &Path,
    drill: Option<&str>,
    expected: &str,
) -> Result<bool> {
    let elf = qemu_run::build_firmware(root, work, name, blob, plan, drill)?;
    let outcome = qemu_run::run(&elf, work, name)?;
    let log = device_log::parse(&outcome.log)?;
    let logged = log.errors.iter().find(|e| e.contains(expected));
    let nonzero = matches!(outcome.exit_code, Some(c) if c != 0);
    let pass = nonzero && logged.is_some() && !outcome.timed_out;
    println!(
        "  {name}: {} (qemu exit {:?}{}; logged: {})",
        if pass {
            "refused as expected"
        } else {
            "FAILED"
        },
        outcome.exit_code,
        if outcome.timed_out { ", TIMED OUT" } else { "" },
        logged.map_or("no matching error", String::as_str)
    );
    Ok(pass)
}

/// Every bad fixture must be refused by name, and both fault drills must
/// exit non-zero with their message.
fn refusals_and_drills(root: &Path, work: &Path, cases: &[DeviceCase]) -> Result<bool> {
    println!("device check: refusals and fault drills");
    let mut refusals_ok = true;
    let probe_plan = work.join("refusal.plan");
    RunPlan {
        dof: 1,
        steps: 1,
        initial_states: vec![vec![0.0, 0.0]],
        inputs: Vec::new(),
    }
    .write(&probe_plan)?;
    for bad in fixtures::bad_fixtures(FIRMWARE_MAX_DOF, FIRMWARE_MAX_WIDTH)? {
        let path = work.join(format!("{}.vvb", bad.blob.name));
        std::fs::write(&path, &bad.blob.bytes)?;
        let host_view = visviva_runtime::Model::<FIRMWARE_MAX_DOF, FIRMWARE_MAX_WIDTH>::from_bytes(
            &bad.blob.bytes,
        )
        .err()
        .map(|e| format!("{e:?}"));
        if !host_view
            .as_deref()
            .is_some_and(|e| e.contains(bad.expected_error))
        {
            println!(
                "  {}: host runtime gives {:?}, expected {}",
                bad.blob.name, host_view, bad.expected_error
            );
            refusals_ok = false;
        }
        refusals_ok &= expect_refusal(
            root,
            work,
            &bad.blob.name,
            &path,
            &probe_plan,
            None,
            bad.expected_error,
        )
        .unwrap_or_else(|e| {
            println!("  {}: FAILED: {e:#}", bad.blob.name);
            false
        });
    }
    if let Some(first) = cases.first() {
        let plan = work.join(format!("{}.plan", first.name));
        for (drill, expected) in [("panic", "panic"), ("hardfault", "hard fault")] {
            let name = format!("drill-{drill}");
            refusals_ok &=
                expect_refusal(root, work, &name, &first.blob, &plan, Some(drill), expected)
                    .unwrap_or_else(|e| {
                        println!("  {name}: FAILED: {e:#}");
                        false
                    });
        }
    }

    Ok(refusals_ok)
}

/// Build `firmware-example/examples/minimal.rs` with `blob` alone (no run
/// plan), run it in QEMU and expect exit 0 and its state line.
fn minimal_example_check(root: &Path, work: &Path, blob: &Path) -> Result<bool> {
    println!("device check: minimal example (firmware-example/examples/minimal.rs)");
    let elf = qemu_run::build_minimal_example(root, work, blob)?;
    let outcome = qemu_run::run(&elf, work, "minimal")?;
    let line = outcome
        .log
        .lines()
        .find(|l| l.starts_with("after 1000 steps: q = "));
    let pass = outcome.exit_code == Some(0) && !outcome.timed_out && line.is_some();
    println!(
        "  minimal: {} (qemu exit {:?}; logged: {})",
        if pass { "ran and exited" } else { "FAILED" },
        outcome.exit_code,
        line.unwrap_or("no state line")
    );
    Ok(pass)
}

/// Emulated instructions per multiply-accumulate, per blob.
fn print_instructions_per_mac(rows: &[ReportRow]) {
    for r in rows {
        if let (Some(i), Some(m)) = (r.instructions_per_step, r.macs_per_step) {
            println!(
                "device {}: {i:.0} instructions/step, {m} MAC/step, {:.2} instr/MAC",
                r.name,
                i / f64::from(m.max(1))
            );
        }
    }
    println!(
        "  (instr/MAC: emulated instructions per multiply-accumulate; for the implicit methods\n   MAC/step is the bound at the iteration limit, so their ratio understates the real cost)"
    );
}

fn print_report(rows: &[ReportRow]) {
    println!();
    println!("resource report (firmware-example, thumbv7em-none-eabihf, release)");
    println!(
        "  {:<32} {:>9} {:>8} {:>9} {:>9} {:>12} {:>10} {:>7}",
        "blob", "flash B", "RAM B", "model B", "stack B", "instr/step", "MACs/step", "wall s"
    );
    for r in rows {
        println!(
            "  {:<32} {:>9} {:>8} {:>9} {:>9} {:>12} {:>10} {:>7.1}",
            r.name,
            r.size.flash(),
            r.size.static_ram(),
            r.size.model_region,
            r.stack_used.map_or("?".into(), |s| s.to_string()),
            r.instructions_per_step
                .map_or("?".into(), |v| format!("{v:.0}")),
            r.macs_per_step.map_or("?".into(), |v| v.to_string()),
            r.seconds
        );
    }
    println!("  flash = .vector_table + .text + .rodata + .data image (the blob is separate, in .vv_model);");
    println!(
        "  RAM = .data + .bss + .uninit (static); stack = high-water mark of the painted stack."
    );
    println!("  instr/step = QEMU-emulated instructions per `Model::step` (SysTick under -icount shift={ICOUNT_SHIFT}),");
    println!(
        "  NOT CPU cycles: QEMU models no pipeline timing and no DWT cycle counter. MACs/step is"
    );
    println!(
        "  Model::cost().macs_per_step (for implicit midpoint: the bound at the iteration limit)."
    );
    println!(
        "  caution: a learned model is not a safety function; validate it on the real machine, keep\n  \
         independent limits and interlocks, and follow the applicable functional-safety standards,\n  \
         local codes and licensed practice."
    );
}

/// The core blobs as Rust firmware cases (`cores-<blob>`), on the same
/// initial states as the C firmware.
fn core_device_cases(core_cases: &[CoreCase]) -> Vec<DeviceCase> {
    core_cases
        .iter()
        .map(|c| DeviceCase {
            name: format!("{CORE_PREFIX}{}", c.name),
            blob: c.blob.clone(),
            plan: c.plan.clone(),
            golden: None,
        })
        .collect()
}

/// The Rust firmware as one target: every state it logged, and the
/// resources of its runs of the core blobs.
fn rust_target(
    matched: usize,
    total: usize,
    rows: &[ReportRow],
    cores: &[CoreCase],
) -> TargetResult {
    let core_row = |c: &CoreCase| {
        rows.iter()
            .find(|r| r.name == format!("{CORE_PREFIX}{}", c.name))
    };
    TargetResult {
        name: RUST_TARGET.into(),
        same: matched,
        total,
        size: cores.first().and_then(core_row).map(|r| r.size),
        stack_used: cores
            .iter()
            .filter_map(core_row)
            .filter_map(|r| r.stack_used)
            .max(),
        instructions_per_step: cores
            .iter()
            .map(|c| core_row(c).and_then(|r| r.instructions_per_step))
            .collect(),
    }
}

/// The C firmware on the five cores (default run only); Ok(true) when
/// there is nothing to run.
fn c_targets(root: &Path, work: &Path, cores: &[CoreCase]) -> (Vec<TargetResult>, bool) {
    if cores.is_empty() {
        return (Vec::new(), true);
    }
    println!();
    println!("device check: the C firmware (firmware-example/c) on five cores");
    c_cores::run(root, &work.join("c"), cores).unwrap_or_else(|e| {
        println!("  C firmware on the cores: FAILED: {e:#}");
        (Vec::new(), false)
    })
}

/// Print what failed, by name.
fn print_failures(checks: &[(bool, &str)]) {
    for (ok, what) in checks {
        if !ok {
            println!("device check: {what}");
        }
    }
}

/// The observer cases alone (`cargo xtask device --observer`): Ok(true)
/// when every estimate matched.
pub fn run_observer_only() -> Result<bool> {
    tools::ensure_all()?;
    let root = crate::workspace_root();
    let work = root.join("firmware-example/target/visviva-device");
    std::fs::create_dir_all(&work).with_context(|| format!("creating {}", work.display()))?;
    let host = VisvivaCommand::build(&root, &work)?;
    let (observed, ran) = crate::observer_device::run(&root, &work, host.exe());
    crate::observer_device::print_report(&observed);
    Ok(ran && observed.iter().all(|r| r.same == r.total && r.total > 0))
}

/// The blobs to run: the given files, or (with none given) the fixtures,
/// the exported demo blobs and the C cores' cases; the cores' cases also
/// run on the Rust firmware.
fn gather_cases(
    root: &Path,
    work: &Path,
    host: &VisvivaCommand,
    blobs: &[PathBuf],
) -> Result<(Vec<DeviceCase>, Vec<CoreCase>)> {
    let (mut cases, core_cases) = if blobs.is_empty() {
        let exported = exported_demo_blobs(root);
        for b in &exported {
            println!("device check: found exported demo blob {}", b.display());
        }
        let mut cases = fixture_cases(work)?;
        cases.extend(file_cases(&exported)?);
        (cases, c_cores::cases(root, host)?)
    } else {
        (file_cases(blobs)?, Vec::new())
    };
    cases.extend(core_device_cases(&core_cases));
    Ok((cases, core_cases))
}

/// Every case's rollouts on the emulated Rust firmware: states matched,
/// states expected, and one report row per case that ran.
fn run_good_cases(
    root: &Path,
    work: &Path,
    cases: &[DeviceCase],
    host: &VisvivaCommand,
) -> (usize, usize, Vec<ReportRow>) {
    let mut total = 0usize;
    let mut matched = 0usize;
    let mut rows = Vec::new();
    for case in cases {
        total += case.plan.state_count();
        match run_good_case(root, work, case, host) {
            Ok((same, row)) => {
                matched += same;
                rows.push(row);
            }
            Err(e) => println!("  {}: FAILED: {e:#}", case.name),
        }
    }
    (matched, total, rows)
}

/// Run the whole device check. Ok(true) when every state matched and every
/// refusal and fault drill behaved.
pub fn run(blobs: Vec<PathBuf>) -> Result<bool> {
    let started = Instant::now();
    tools::ensure_all()?;
    let root = crate::workspace_root();
    let work = root.join("firmware-example/target/visviva-device");
    std::fs::create_dir_all(&work).with_context(|| format!("creating {}", work.display()))?;
    let host = VisvivaCommand::build(&root, &work)?;
    println!("device check: host reference = {}", host.describe());

    let default_run = blobs.is_empty();
    let (cases, core_cases) = gather_cases(&root, &work, &host, &blobs)?;
    let (matched, total, rows) = run_good_cases(&root, &work, &cases, &host);

    let golden_ok = rows
        .iter()
        .all(|r| r.golden.is_none_or(|(same, total)| same == total));
    let swap_ok = match swap_check(&work, &cases, &host) {
        Ok(ok) => ok,
        Err(e) => {
            println!("  model swap: FAILED: {e:#}");
            false
        }
    };

    let refusals_ok = refusals_and_drills(&root, &work, &cases)?;
    let minimal_ok = match cases.first() {
        Some(first) => minimal_example_check(&root, &work, &first.blob).unwrap_or_else(|e| {
            println!("  minimal example: FAILED: {e:#}");
            false
        }),
        None => false,
    };

    let (observed, observer_ran) = if default_run {
        crate::observer_device::run(&root, &work, host.exe())
    } else {
        (Vec::new(), true)
    };
    let observer_same: usize = observed.iter().map(|r| r.same).sum();
    let observer_total: usize = observed.iter().map(|r| r.total).sum();

    print_report(&rows);
    if !observed.is_empty() {
        crate::observer_device::print_report(&observed);
    }
    print_instructions_per_mac(&rows);
    for (case, row) in cases.iter().zip(&rows) {
        record_measurement(case, row);
    }
    println!();
    println!("runtime footprint (firmware-example/examples/footprint.rs, D = 2, W = 32)");
    let footprint_ok = crate::footprint::run(&root, &work, &host).unwrap_or_else(|e| {
        println!("  footprint: FAILED: {e:#}");
        false
    });
    let (c_results, c_ok) = c_targets(&root, &work, &core_cases);
    // The Rust firmware's count holds every rollout state and every
    // observer estimate.
    let mut targets = vec![rust_target(
        matched + observer_same,
        total + observer_total,
        &rows,
        &core_cases,
    )];
    targets.extend(c_results);
    let names: Vec<String> = core_cases.iter().map(|c| c.name.clone()).collect();
    if !core_cases.is_empty() {
        target_report::print_resources(&targets, &names);
    }
    println!(
        "device check took {:.1} s; artifacts in {}",
        started.elapsed().as_secs_f64(),
        work.display()
    );
    print_failures(&[
        (golden_ok, "the device disagrees with a golden rollout file (see above)"),
        (swap_ok, "the model swap without rebuilding did not reproduce the host rollout"),
        (refusals_ok, "a refusal or fault drill did not behave (see above)"),
        (minimal_ok, "the minimal example did not build, run and exit cleanly"),
        (footprint_ok, "a footprint configuration failed or differs from the committed table"),
        (c_ok, "a C firmware check (CRC, instruction clock, stack or refusal drill) failed (see above)"),
        (observer_ran, "an observer case did not build or run (see above)"),
    ]);
    for r in &observed {
        println!("{}", crate::observer_device::line(r));
    }
    let (same, expected) = target_report::print_lines(&targets);
    println!(
        "device check: {same} of {expected} states bit-identical on {} target{}",
        targets.len(),
        if targets.len() == 1 { "" } else { "s" }
    );
    Ok(same == expected
        && total > 0
        && refusals_ok
        && minimal_ok
        && swap_ok
        && golden_ok
        && footprint_ok
        && c_ok
        && observer_ran)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_single_flipped_bit_in_a_logged_state_is_a_mismatch() {
        // Two rollouts of three states (q1, p1 bit patterns).
        let host: Trajectories = (0..2u32)
            .map(|s| {
                (0..3u32)
                    .map(|k| vec![0x3F80_0000 + s * 8 + k, k])
                    .collect()
            })
            .collect();
        let mut device = DeviceLog::default();
        for (s, traj) in host.iter().enumerate() {
            for (k, x) in traj.iter().enumerate() {
                device.states.insert((s as u32, k as u32), x.clone());
            }
        }
        assert_eq!(compare("t", &host, &device), 6);
        // The lowest mantissa bit of one momentum.
        device.states.get_mut(&(1, 2)).unwrap()[1] ^= 1;
        assert_eq!(compare("t", &host, &device), 5);
        device.states.remove(&(0, 0));
        assert_eq!(compare("t", &host, &device), 4);
    }
}
