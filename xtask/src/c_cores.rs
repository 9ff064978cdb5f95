//! The C firmware on every core of [`c_firmware::BOARDS`] (Cortex-M4F, M7,
//! M33, a soft-float Cortex-M3, a soft-float 32-bit RISC-V), each linked
//! with the static library built from the same runtime source for that
//! core: every state compared bit for bit with the host rollout of the same
//! blob and initial state, the library's CRC-32 of "123456789" against the
//! CRC catalogue's check value 0xCBF43926, the instruction clock checked
//! against the board's timer frequency, the stack high-water mark inside
//! its region, and the refusal drills (corrupted blob, too many degrees of
//! freedom, a layer too wide for the build, a newer format version) each
//! refused with its status named in the log.

use std::collections::HashMap;
use std::path::{Path, PathBuf};

use anyhow::Result;

use crate::c_firmware::{self, Board, BOARDS};
use crate::host_rollout::HostRollout;
use crate::run_plan::RunPlan;
use crate::target_report::TargetResult;

/// Undriven demo blobs every core runs, with the initial coordinates of
/// their rollouts (inside each demo's logged range; momenta 0).
pub const CASES: &[(&str, &[f32])] = &[
    ("crane-sway/out/crane-f32-verlet.vvb", &[0.3]),
    ("crane-sway/out/crane-int8-verlet.vvb", &[0.3]),
    ("flexure-sensor/out/flexure-f32-midpoint.vvb", &[0.002]),
    (
        "isolation-mount/out/mount-int8-yoshida4.vvb",
        &[0.001, -0.0005],
    ),
];

/// Steps per rollout on the cores.
pub const STEPS: u32 = 2000;

/// CRC-32/ISO-HDLC of "123456789": the CRC catalogue's check value
/// (reveng.sourceforge.io, "CRC-32"; from memory).
pub const CRC_CHECK_VALUE: u32 = 0xCBF4_3926;

/// One core blob with its run plan and the host's reference states.
pub struct CoreCase {
    pub name: String,
    pub blob: PathBuf,
    pub plan: RunPlan,
    /// Bit patterns of states 0..=STEPS from the host rollout.
    pub reference: Vec<Vec<u32>>,
}

/// The run plan of a core case: one initial state, momenta 0.
pub fn plan(q: &[f32]) -> RunPlan {
    let mut init = q.to_vec();
    init.extend(std::iter::repeat_n(0.0, q.len()));
    RunPlan {
        dof: q.len(),
        steps: STEPS,
        initial_states: vec![init],
        inputs: Vec::new(),
    }
}

/// The core cases with their host reference rollouts.
pub fn cases(root: &Path, host: &dyn HostRollout) -> Result<Vec<CoreCase>> {
    CASES
        .iter()
        .map(|(path, q)| {
            let blob = root.join("models-demo").join(path);
            let plan = plan(q);
            let reference = host.rollout(&blob, &plan)?.swap_remove(0);
            let name = blob
                .file_stem()
                .map_or("blob".into(), |s| s.to_string_lossy().into_owned());
            Ok(CoreCase {
                name,
                blob,
                plan,
                reference,
            })
        })
        .collect()
}

/// The C interface's status for a blob the runtime refuses with
/// `runtime_error` (a `BlobError` variant name).
pub fn c_status_for(runtime_error: &str) -> &'static str {
    match runtime_error {
        "DofOutOfRange" => "VV_STATUS_BLOB_TOO_MANY_DOF",
        "TooWide" => "VV_STATUS_BLOB_TOO_WIDE",
        "CrcMismatch" => "VV_STATUS_BLOB_CRC_MISMATCH",
        "UnsupportedVersion" => "VV_STATUS_BLOB_UNSUPPORTED_VERSION",
        _ => "VV_STATUS_BLOB_INVALID",
    }
}

/// The refusal drills' blobs for the C build's bounds, written into
/// `work`: (name, path, expected status name).
pub fn drill_blobs(work: &Path) -> Result<Vec<(String, PathBuf, &'static str)>> {
    let bad = crate::fixtures::bad_fixtures(visviva_c::VV_MAX_DOF, visviva_c::VV_MAX_WIDTH)?;
    bad.into_iter()
        .map(|b| {
            let path = work.join(format!("{}.vvb", b.blob.name));
            std::fs::write(&path, &b.blob.bytes)?;
            Ok((b.blob.name, path, c_status_for(b.expected_error)))
        })
        .collect()
}

/// States of `log` equal to `reference` (by step index).
pub fn count_same(states: &[(u32, Vec<u32>)], reference: &[Vec<u32>]) -> usize {
    let by_step: HashMap<u32, &Vec<u32>> = states.iter().map(|(k, v)| (*k, v)).collect();
    reference
        .iter()
        .enumerate()
        .filter(|(k, want)| by_step.get(&(*k as u32)) == Some(want))
        .count()
}

/// The instruction clock's calibration against the board's timer
/// frequency; false (printed) when it is off.
fn calibration_ok(board: &Board, log: &c_firmware::CLog) -> bool {
    let Some((instr, ticks, overhead)) = log.calibration else {
        println!("  {}: no calibration line", board.name);
        return false;
    };
    let expect = c_firmware::expected_calibration_ticks(board, instr);
    let ok = (f64::from(ticks) - expect).abs() <= 4.0 + 1e-4 * expect;
    println!(
        "  {}: instruction clock: {instr} loop instructions -> {ticks} ticks (expected {expect:.0} at {} MHz; read overhead {overhead}){}",
        board.name,
        board.timer_hz / 1e6,
        if ok { "" } else { " - OFF" }
    );
    ok
}

/// One core: every case, then the refusal drills.
fn run_board(
    root: &Path,
    work: &Path,
    board: &Board,
    lib: &Path,
    cases: &[CoreCase],
    drills: &[(String, PathBuf, &'static str)],
) -> Result<(TargetResult, bool, bool)> {
    let mut crc_ok = true;
    let mut result = TargetResult {
        name: board.name.to_string(),
        same: 0,
        total: 0,
        size: None,
        stack_used: None,
        instructions_per_step: Vec::new(),
    };
    let mut ok = true;
    for (k, case) in cases.iter().enumerate() {
        let q = &case.plan.initial_states[0][..case.plan.dof];
        let input = (case.blob.as_path(), q, case.plan.steps);
        let elf = c_firmware::build(root, work, board, lib, input, &format!("case{k}"))?;
        let run = c_firmware::run(board, &elf)?;
        let log = c_firmware::parse(&run.text);
        let same = count_same(&log.states, &case.reference);
        let per_step = log.instructions_per_step();
        println!(
            "  {} {}: {same} of {} states bit-identical with visviva rollout; {} instructions/step; stack {} of {} B{}",
            board.name,
            case.name,
            case.reference.len(),
            per_step.map_or("?".into(), |v| format!("{v:.0}")),
            log.stack.map_or("?".into(), |s| s.0.to_string()),
            log.stack.map_or("?".into(), |s| s.1.to_string()),
            log.failure.as_ref().map_or(String::new(), |f| format!("; {f}"))
        );
        for line in &log.other {
            println!("    (output: {line})");
        }
        let finished = run.exit_code == Some(0) && log.failure.is_none();
        let stack_in_region = log.stack.is_some_and(|(used, size)| used < size);
        crc_ok &= log.crc == Some(CRC_CHECK_VALUE);
        ok &= finished && stack_in_region;
        if k == 0 {
            ok &= calibration_ok(board, &log);
            result.size = Some(crate::elf_size::read(&elf)?);
        }
        result.same += if finished { same } else { 0 };
        result.total += case.reference.len();
        result.stack_used = result.stack_used.max(log.stack.map(|s| s.0));
        result.instructions_per_step.push(per_step);
    }
    for (name, blob, status) in drills {
        ok &= refusal_drill(root, work, board, lib, (name, blob, status))?;
    }
    Ok((result, ok && crc_ok, crc_ok))
}

/// A bad blob must stop the firmware with a non-zero exit and its status
/// named in the log.
fn refusal_drill(
    root: &Path,
    work: &Path,
    board: &Board,
    lib: &Path,
    (name, blob, status): (&str, &Path, &str),
) -> Result<bool> {
    let elf = c_firmware::build(root, work, board, lib, (blob, &[0.0], 1), name)?;
    let run = c_firmware::run(board, &elf)?;
    let log = c_firmware::parse(&run.text);
    let logged = log.failure.filter(|f| f.contains(status));
    let refused = matches!(run.exit_code, Some(c) if c != 0) && logged.is_some();
    println!(
        "  refusal drill on {}: {name}: {}",
        board.name,
        match (&logged, run.exit_code) {
            (Some(line), Some(code)) if refused =>
                format!("refused (exit {code}), logged `{line}`"),
            (_, code) => format!(
                "NOT REFUSED with {status} (exit {})",
                code.map_or("none: timed out".into(), |c| c.to_string())
            ),
        }
    );
    Ok(refused)
}

/// Run every core; returns one result per core and whether every CRC,
/// calibration, stack and refusal check passed.
pub fn run(root: &Path, work: &Path, cases: &[CoreCase]) -> Result<(Vec<TargetResult>, bool)> {
    c_firmware::ensure_tools()?;
    std::fs::create_dir_all(work)?;
    let drills = drill_blobs(work)?;
    let mut results = Vec::new();
    let (mut ok, mut crc_ok) = (true, true);
    for board in BOARDS {
        let lib = c_firmware::build_library(root, Some(board.rust_target))?;
        let (result, board_ok, board_crc) = run_board(root, work, board, &lib, cases, &drills)?;
        results.push(result);
        ok &= board_ok;
        crc_ok &= board_crc;
    }
    println!(
        "  CRC-32 of \"123456789\" through the C interface on every core: {}",
        if crc_ok {
            "0xCBF43926 (the CRC catalogue's check value)"
        } else {
            "WRONG on some core"
        }
    );
    // IEEE 754-2019 requires +, -, *, / and sqrt correctly rounded, so the
    // software float of the cores without an FPU must give the host's bits.
    let soft_same = results
        .iter()
        .filter(|r| r.name.contains("softfloat"))
        .all(|r| r.same == r.total && r.total > 0);
    println!(
        "  soft-float cores (no FPU) against the host's hardware float, IEEE 754-2019 correctly rounded +, -, *, /, sqrt: {}",
        if soft_same {
            "every state bit-identical"
        } else {
            "DIFFERENT"
        }
    );
    Ok((results, ok))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn states_are_matched_by_step_index() {
        let reference = vec![vec![1, 2], vec![3, 4], vec![5, 6]];
        let states = vec![(0, vec![1, 2]), (2, vec![5, 7]), (1, vec![3, 4])];
        assert_eq!(count_same(&states, &reference), 2);
        assert_eq!(count_same(&[], &reference), 0);
    }

    #[test]
    fn every_drill_maps_to_a_status_the_library_names() {
        for e in [
            "DofOutOfRange",
            "TooWide",
            "CrcMismatch",
            "UnsupportedVersion",
        ] {
            let status = c_status_for(e);
            let named = [
                visviva_c::VvStatus::BlobTooManyDof,
                visviva_c::VvStatus::BlobTooWide,
                visviva_c::VvStatus::BlobCrcMismatch,
                visviva_c::VvStatus::BlobUnsupportedVersion,
            ]
            .iter()
            .any(|s| format!("{s:?}") == camel(status));
            assert!(named, "{e} -> {status}");
        }
    }

    /// VV_STATUS_BLOB_TOO_WIDE -> BlobTooWide.
    fn camel(c_name: &str) -> String {
        c_name
            .trim_start_matches("VV_STATUS_")
            .split('_')
            .map(|w| w[..1].to_string() + &w[1..].to_lowercase())
            .collect()
    }
}
