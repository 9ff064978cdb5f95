//! Building the example firmware for one blob and running it in QEMU with
//! semihosting and a deterministic instruction clock, then decoding its defmt
//! log with `defmt-print`.

use std::fs::File;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use anyhow::{bail, Context, Result};

use crate::tools::{cargo, QEMU_MACHINE, TARGET};

/// QEMU `-icount shift=N`: every instruction advances virtual time 2^N ns.
pub const ICOUNT_SHIFT: u32 = 6;
/// SysTick period on mps2-an386: the 25 MHz processor clock, 40 ns.
pub const SYSTICK_NS: f64 = 40.0;
/// A run longer than this is treated as a hang and killed.
pub const RUN_TIMEOUT: Duration = Duration::from_secs(300);

/// What one emulator run produced.
pub struct RunOutcome {
    /// Exit status of QEMU (None when killed).
    pub exit_code: Option<i32>,
    /// Killed after [`RUN_TIMEOUT`].
    pub timed_out: bool,
    /// The defmt log as decoded text, one message per line.
    pub log: String,
    /// Wall time of the emulator run.
    pub seconds: f64,
    /// Bytes of raw defmt output.
    pub raw_bytes: u64,
}

/// Build the firmware with `blob`, `plan` and an optional fault drill; copy
/// the ELF to `work/<name>.elf` and return that path.
pub fn build_firmware(
    root: &Path,
    work: &Path,
    name: &str,
    blob: &Path,
    plan: &Path,
    drill: Option<&str>,
) -> Result<PathBuf> {
    let plan = std::path::absolute(plan)?;
    let target_dir = root.join("firmware-example").join("target");
    let mut cmd = firmware_cargo(root, blob, &[])?;
    cmd.env("VISVIVA_RUN_PLAN", &plan)
        .env_remove("VISVIVA_OBSERVER_PLAN");
    match drill {
        Some(d) => cmd.env("VISVIVA_DRILL", d),
        None => cmd.env_remove("VISVIVA_DRILL"),
    };
    let status = cmd.status().context("starting cargo for the firmware")?;
    if !status.success() {
        bail!("firmware build for {name} failed ({status})");
    }
    let built = target_dir
        .join(TARGET)
        .join("release")
        .join("visviva-firmware-example");
    let elf = work.join(format!("{name}.elf"));
    std::fs::copy(&built, &elf)
        .with_context(|| format!("copying {} to {}", built.display(), elf.display()))?;
    Ok(elf)
}

/// Build the harness with the `observe` feature: `blob` and the observer
/// plan `plan` (no run plan, no drill); copy the ELF to `work/<name>.elf`.
pub fn build_observer_firmware(
    root: &Path,
    work: &Path,
    name: &str,
    blob: &Path,
    plan: &Path,
) -> Result<PathBuf> {
    let plan = std::path::absolute(plan)?;
    let mut cmd = firmware_cargo(root, blob, &["--features", "observe"])?;
    cmd.env("VISVIVA_OBSERVER_PLAN", &plan)
        .env_remove("VISVIVA_RUN_PLAN")
        .env_remove("VISVIVA_DRILL");
    let status = cmd.status().context("starting cargo for the firmware")?;
    if !status.success() {
        bail!("observer firmware build for {name} failed ({status})");
    }
    let built = root
        .join("firmware-example/target")
        .join(TARGET)
        .join("release")
        .join("visviva-firmware-example");
    let elf = work.join(format!("{name}.elf"));
    std::fs::copy(&built, &elf)
        .with_context(|| format!("copying {} to {}", built.display(), elf.display()))?;
    Ok(elf)
}

/// Build `firmware-example/examples/minimal.rs` with `blob` and nothing
/// else (no run plan, no drill); copy the ELF to `work/minimal.elf`.
pub fn build_minimal_example(root: &Path, work: &Path, blob: &Path) -> Result<PathBuf> {
    build_example(root, work, blob, "minimal", "release", &[], "minimal")
}

/// Build `firmware-example/examples/footprint.rs` with `blob` in the
/// `footprint` profile with only the firmware feature `feature` (which
/// selects the runtime's features); copy the ELF to `work/<name>.elf`.
pub fn build_footprint(
    root: &Path,
    work: &Path,
    blob: &Path,
    feature: &str,
    name: &str,
) -> Result<PathBuf> {
    let features = ["--no-default-features", "--features", feature];
    build_example(root, work, blob, "footprint", "footprint", &features, name)
}

/// Build one example of the firmware crate in `profile` with `blob` (no run
/// plan, no drill) and copy its ELF to `work/<name>.elf`.
fn build_example(
    root: &Path,
    work: &Path,
    blob: &Path,
    example: &str,
    profile: &str,
    extra: &[&str],
    name: &str,
) -> Result<PathBuf> {
    let mut args = vec!["--profile", profile, "--example", example];
    args.extend_from_slice(extra);
    let mut cmd = firmware_cargo(root, blob, &args)?;
    cmd.env_remove("VISVIVA_RUN_PLAN")
        .env_remove("VISVIVA_OBSERVER_PLAN")
        .env_remove("VISVIVA_DRILL");
    let status = cmd
        .status()
        .with_context(|| format!("starting cargo for the {example} example"))?;
    if !status.success() {
        bail!("building the {example} example ({name}) failed ({status})");
    }
    let built = root
        .join("firmware-example/target")
        .join(TARGET)
        .join(profile)
        .join("examples")
        .join(example);
    let elf = work.join(format!("{name}.elf"));
    std::fs::copy(&built, &elf)
        .with_context(|| format!("copying {} to {}", built.display(), elf.display()))?;
    Ok(elf)
}

/// `cargo build` of the firmware crate with `blob` embedded, in its own
/// directory and target folder, free of the caller's target settings.
/// `extra` names the profile (`--release` when it does not).
fn firmware_cargo(root: &Path, blob: &Path, extra: &[&str]) -> Result<Command> {
    // The firmware's build runs in its own directory: pass absolute paths.
    let blob = std::path::absolute(blob)?;
    let dir = root.join("firmware-example");
    let mut cmd = Command::new(cargo());
    cmd.current_dir(&dir)
        .args(["build", "--quiet", "--target", TARGET]);
    if !extra.contains(&"--profile") {
        cmd.arg("--release");
    }
    cmd.args(extra)
        .arg("--target-dir")
        .arg(dir.join("target"))
        .env("VISVIVA_BLOB", &blob)
        .env_remove("CARGO_TARGET_DIR")
        .env_remove("RUSTFLAGS")
        .env_remove("CARGO_ENCODED_RUSTFLAGS")
        .env_remove("CARGO_BUILD_TARGET");
    Ok(cmd)
}

/// What QEMU wrote to stdout, undecoded.
pub struct RawOutcome {
    /// Exit status of QEMU (None when killed).
    pub exit_code: Option<i32>,
    /// Killed after [`RUN_TIMEOUT`].
    pub timed_out: bool,
    /// The file holding QEMU's stdout.
    pub stdout: PathBuf,
    /// Wall time of the emulator run.
    pub seconds: f64,
}

/// Run `elf` in QEMU with stdout into `work/<stdout_file>` (raw bytes).
pub fn run_raw(elf: &Path, work: &Path, name: &str, stdout_file: &str) -> Result<RawOutcome> {
    let raw_path = work.join(stdout_file);
    let err_path = work.join(format!("{name}.qemu-stderr.txt"));
    let raw =
        File::create(&raw_path).with_context(|| format!("creating {}", raw_path.display()))?;
    let err = File::create(&err_path)?;
    let started = Instant::now();
    let mut child = Command::new("qemu-system-arm")
        .args(["-machine", QEMU_MACHINE, "-cpu", "cortex-m4"])
        .args(["-nographic", "-serial", "null", "-monitor", "none"])
        .args(["-semihosting-config", "enable=on,target=native"])
        .args(["-icount", &format!("shift={ICOUNT_SHIFT}")])
        .arg("-kernel")
        .arg(elf)
        .stdin(Stdio::null())
        .stdout(raw)
        .stderr(err)
        .spawn()
        .context("starting qemu-system-arm")?;
    let mut timed_out = false;
    let status = loop {
        if let Some(status) = child.try_wait()? {
            break Some(status);
        }
        if started.elapsed() > RUN_TIMEOUT {
            timed_out = true;
            child.kill().ok();
            child.wait().ok();
            break None;
        }
        std::thread::sleep(Duration::from_millis(20));
    };
    let seconds = started.elapsed().as_secs_f64();
    let stderr = std::fs::read_to_string(&err_path).unwrap_or_default();
    if !stderr.trim().is_empty() {
        eprintln!("qemu ({name}) stderr: {}", stderr.trim());
    }
    Ok(RawOutcome {
        exit_code: status.and_then(|s| s.code()),
        timed_out,
        stdout: raw_path,
        seconds,
    })
}

/// Run `elf` in QEMU (stdout = raw defmt frames) and decode the log.
pub fn run(elf: &Path, work: &Path, name: &str) -> Result<RunOutcome> {
    let raw = run_raw(elf, work, name, &format!("{name}.defmt"))?;
    let raw_bytes = std::fs::metadata(&raw.stdout).map(|m| m.len()).unwrap_or(0);
    let decoded = Command::new("defmt-print")
        .arg("-e")
        .arg(elf)
        .args(["--log-format", "{s}"])
        .stdin(File::open(&raw.stdout)?)
        .stderr(Stdio::inherit())
        .output()
        .context("starting defmt-print")?;
    let log = String::from_utf8_lossy(&decoded.stdout).into_owned();
    std::fs::write(work.join(format!("{name}.log.txt")), &log)?;
    Ok(RunOutcome {
        exit_code: raw.exit_code,
        timed_out: raw.timed_out,
        log,
        seconds: raw.seconds,
        raw_bytes,
    })
}
