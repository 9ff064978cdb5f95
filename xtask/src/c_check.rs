//! `cargo xtask c-check`: the C interface used from C. On the host: builds
//! the static library (`visviva-c`, `panic = "abort"`), compiles
//! `runtime/c-api/examples/rollout.c` with the host's C compiler as C11
//! with warnings as errors, compares every state it prints, bit for bit,
//! with `visviva rollout --bits` for the core blobs (`c_cores::CASES`),
//! checks the library's CRC-32 of "123456789" against the CRC catalogue's
//! check value 0xCBF43926, and runs the refusal drills through the C
//! interface. Then the C firmware on the five cores (`c_cores`), which
//! `cargo xtask device` also runs; the test command runs the host part
//! here and the cores in the device check.

use std::path::{Path, PathBuf};
use std::process::Command;

use anyhow::{bail, Context, Result};

use crate::c_cores::{self, CoreCase, CRC_CHECK_VALUE};
use crate::c_firmware;
use crate::host_rollout::VisvivaCommand;
use crate::target_report::{self, TargetResult};

/// Compile the C example against the library; returns the executable.
fn compile_example(root: &Path, work: &Path, lib: &Path) -> Result<PathBuf> {
    let api = root.join("runtime/c-api");
    let exe = work.join("rollout");
    let status = Command::new("cc")
        .args(["-std=c11", "-Wall", "-Wextra", "-Werror", "-O2", "-I"])
        .arg(api.join("include"))
        .arg(api.join("examples/rollout.c"))
        .arg(lib)
        .arg("-o")
        .arg(&exe)
        .status()
        .context("starting cc (the host's C compiler)")?;
    if !status.success() {
        bail!("compiling runtime/c-api/examples/rollout.c failed ({status})");
    }
    Ok(exe)
}

/// The C example's output: its states ("k 0x.. 0x..") and CRC line.
fn example_output(exe: &Path, case: &CoreCase) -> Result<c_firmware::CLog> {
    let q = &case.plan.initial_states[0][..case.plan.dof];
    let out = Command::new(exe)
        .arg(&case.blob)
        .arg(case.plan.steps.to_string())
        .args(q.iter().map(|v| format!("{v:?}")))
        .output()
        .with_context(|| format!("starting {}", exe.display()))?;
    if !out.status.success() {
        bail!(
            "{} {} failed: {}",
            exe.display(),
            case.blob.display(),
            String::from_utf8_lossy(&out.stderr).trim()
        );
    }
    Ok(c_firmware::parse(&String::from_utf8(out.stdout)?))
}

/// Every refusal drill's blob through the host C example: exit 1 and the
/// status named on stderr.
fn host_drills(exe: &Path, work: &Path) -> Result<bool> {
    let mut ok = true;
    for (name, blob, status) in c_cores::drill_blobs(work)? {
        let out = Command::new(exe).arg(&blob).args(["1", "0"]).output()?;
        let stderr = String::from_utf8_lossy(&out.stderr);
        let refused = out.status.code() == Some(1) && stderr.contains(status);
        println!(
            "  refusal drill on host-c: {name}: {}",
            if refused {
                format!("refused (exit 1), logged `{}`", stderr.trim())
            } else {
                format!("NOT REFUSED with {status} ({})", out.status)
            }
        );
        ok &= refused;
    }
    Ok(ok)
}

/// The host C example on the core blobs; returns its result and whether
/// the CRC and the refusal drills passed.
pub fn run_host_target(
    root: &Path,
    work: &Path,
    cases: &[CoreCase],
) -> Result<(TargetResult, bool)> {
    std::fs::create_dir_all(work)?;
    let lib = c_firmware::build_library(root, None)?;
    let exe = compile_example(root, work, &lib)?;
    let mut result = TargetResult {
        name: "host-c".into(),
        same: 0,
        total: 0,
        size: None,
        stack_used: None,
        instructions_per_step: Vec::new(),
    };
    let mut crc_ok = true;
    for case in cases {
        let log = example_output(&exe, case)?;
        let same = c_cores::count_same(&log.states, &case.reference);
        println!(
            "  host-c {}: {same} of {} states bit-identical with visviva rollout",
            case.name,
            case.reference.len()
        );
        crc_ok &= log.crc == Some(CRC_CHECK_VALUE);
        result.same += same;
        result.total += case.reference.len();
    }
    println!(
        "  CRC-32 of \"123456789\" through the C interface on the host: {}",
        if crc_ok {
            "0xCBF43926 (the CRC catalogue's check value)"
        } else {
            "WRONG"
        }
    );
    let drills_ok = host_drills(&exe, work)?;
    Ok((result, crc_ok && drills_ok))
}

fn work_dir(root: &Path) -> PathBuf {
    c_firmware::target_dir(root).join("c-check")
}

/// The host part alone (the test command's stage; the cores run in the
/// device check). Ok(false) on any difference or failed drill.
pub fn run_host() -> Result<bool> {
    let root = crate::workspace_root();
    let work = work_dir(&root);
    std::fs::create_dir_all(&work)?;
    let host = VisvivaCommand::build(&root, &work)?;
    let cases = c_cores::cases(&root, &host)?;
    let (result, ok) = run_host_target(&root, &work, &cases)?;
    let (same, total) = target_report::print_lines(std::slice::from_ref(&result));
    println!("c check: {same} of {total} states bit-identical on 1 target");
    Ok(ok && same == total && total > 0)
}

/// The host and the five cores. Ok(false) on any difference or failed
/// check.
pub fn run() -> Result<bool> {
    let root = crate::workspace_root();
    let work = work_dir(&root);
    std::fs::create_dir_all(&work)?;
    c_firmware::ensure_tools()?;
    let host = VisvivaCommand::build(&root, &work)?;
    let cases = c_cores::cases(&root, &host)?;
    let (host_result, host_ok) = run_host_target(&root, &work, &cases)?;
    let (cores, cores_ok) = c_cores::run(&root, &work, &cases)?;
    let mut targets = vec![host_result];
    targets.extend(cores);
    let names: Vec<String> = cases.iter().map(|c| c.name.clone()).collect();
    target_report::print_resources(&targets, &names);
    let (same, total) = target_report::print_lines(&targets);
    println!(
        "c check: {same} of {total} states bit-identical on {} targets",
        targets.len()
    );
    Ok(host_ok && cores_ok && same == total && total > 0)
}
