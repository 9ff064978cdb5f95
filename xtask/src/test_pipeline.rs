//! `cargo xtask test`: the project's one test command. Runs each stage in
//! order with a header and stops at the first failure.

use std::process::Command;

use anyhow::{Context, Result};

use crate::tools::{self, cargo, TARGET};

fn cargo_stage(args: &[&str]) -> Result<bool> {
    let status = Command::new(cargo())
        .args(args)
        .current_dir(crate::workspace_root())
        .status()
        .with_context(|| format!("starting cargo {}", args.join(" ")))?;
    Ok(status.success())
}

/// Run all stages; Ok(false) at the first failing one.
pub fn run() -> Result<bool> {
    let stages: [(&str, &dyn Fn() -> Result<bool>); 11] = [
        (
            "cargo fmt --all -- --check (workspace and firmware-example)",
            &|| {
                Ok(cargo_stage(&["fmt", "--all", "--", "--check"])?
                    && cargo_stage(&[
                        "fmt",
                        "--manifest-path",
                        "firmware-example/Cargo.toml",
                        "--",
                        "--check",
                    ])?)
            },
        ),
        (
            "cargo clippy --workspace --all-targets -- -D warnings",
            &|| {
                cargo_stage(&[
                    "clippy",
                    "--workspace",
                    "--all-targets",
                    "--",
                    "-D",
                    "warnings",
                ])
            },
        ),
        (
            "cargo xtask claims (every README figure with the test that asserts it)",
            &crate::claims::run,
        ),
        (
            "cargo test --workspace --exclude visviva-tests (visviva-tests run in release below)",
            &|| cargo_stage(&["test", "--workspace", "--exclude", "visviva-tests"]),
        ),
        (
            "cargo build -p visviva-runtime --target thumbv7em-none-eabihf",
            &|| {
                tools::ensure_target()?;
                cargo_stage(&["build", "-p", "visviva-runtime", "--target", TARGET])
            },
        ),
        (
            "cargo xtask demos --verify (every demo project, reproducibility)",
            &|| crate::demos::run(true, false),
        ),
        (
            "cargo test --release: visviva-tests (incl. rig_logs), the trainer's port checks and observer checks (outside references), host-input fuzzing, arch = auto's choice on the double pendulum and the flexure and the 10^7-step rollout's peak memory",
            &|| {
                Ok(cargo_stage(&["test", "-p", "visviva-tests", "--release"])?
                    && cargo_stage(&[
                        "test",
                        "-p",
                        "visviva-trainer",
                        "--release",
                        "--test",
                        "port_checks",
                        "--test",
                        "port_project",
                        "--test",
                        "fuzz_host",
                        "--test",
                        "observer_crane",
                        "--test",
                        "observer_damped",
                        "--test",
                        "observer_faults",
                        "--test",
                        "observe_cli",
                        "--test",
                        "auto_arch",
                    ])?
                    && cargo_stage(&[
                        "test",
                        "-p",
                        "visviva-trainer",
                        "--release",
                        "--test",
                        "rollout_memory",
                        "--",
                        "--nocapture",
                    ])?)
            },
        ),
        (
            "cargo xtask browser (the demo report in headless Chromium over WebDriver)",
            &|| crate::browser_check::run(false),
        ),
        (
            "cargo xtask c-check --host (the C interface from C on the host; the cores run in the device check)",
            &crate::c_check::run_host,
        ),
        (
            "cargo xtask fleet (demo fleet: --jobs 2 locally, then a Slurm job array)",
            &crate::fleet_check::run,
        ),
        ("cargo xtask device", &|| {
            crate::device_check::run(Vec::new())
        }),
    ];
    let count = stages.len();
    for (i, (title, stage)) in stages.iter().enumerate() {
        println!("\n==> [{}/{count}] {title}", i + 1);
        match stage() {
            Ok(true) => println!("==> [{}/{count}] passed: {title}", i + 1),
            Ok(false) => {
                println!("==> [{}/{count}] FAILED: {title}", i + 1);
                return Ok(false);
            }
            Err(e) => {
                println!("==> [{}/{count}] FAILED: {title}: {e:#}", i + 1);
                return Ok(false);
            }
        }
    }
    println!("\n==> all {count} stages passed");
    Ok(true)
}
