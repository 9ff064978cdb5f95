//! Tool checks and installs for the device check: the Rust target, QEMU and
//! `defmt-print`. Each is looked for first and installed only when missing.

use std::process::{Command, Stdio};

use anyhow::{bail, Context, Result};

/// The firmware's target triple.
pub const TARGET: &str = "thumbv7em-none-eabihf";
/// `defmt-print` version installed when missing; decodes defmt 1.x frames
/// (the firmware uses defmt 1).
pub const DEFMT_PRINT_VERSION: &str = "1.2.0";
/// The QEMU board the firmware is linked for.
pub const QEMU_MACHINE: &str = "mps2-an386";

/// The cargo executable that started us (or `cargo`).
pub fn cargo() -> String {
    std::env::var("CARGO").unwrap_or_else(|_| "cargo".into())
}

/// stdout of a command that succeeded, or None when it failed or is missing.
fn output_of(program: &str, args: &[&str]) -> Option<String> {
    let out = Command::new(program)
        .args(args)
        .stdin(Stdio::null())
        .output()
        .ok()?;
    out.status
        .success()
        .then(|| String::from_utf8_lossy(&out.stdout).into_owned())
}

fn run_visible(what: &str, cmd: &mut Command) -> Result<()> {
    println!("xtask: {what}");
    let status = cmd
        .status()
        .with_context(|| format!("could not start: {what}"))?;
    if !status.success() {
        bail!("failed ({status}): {what}");
    }
    Ok(())
}

/// `rustup target add TARGET` unless installed.
pub fn ensure_rust_target(target: &str) -> Result<()> {
    let installed = output_of("rustup", &["target", "list", "--installed"]).unwrap_or_default();
    if installed.lines().any(|l| l.trim() == target) {
        return Ok(());
    }
    run_visible(
        &format!("rustup target add {target}"),
        Command::new("rustup").args(["target", "add", target]),
    )
}

/// `rustup target add thumbv7em-none-eabihf` unless installed.
pub fn ensure_target() -> Result<()> {
    ensure_rust_target(TARGET)
}

fn is_root() -> bool {
    output_of("id", &["-u"]).is_some_and(|s| s.trim() == "0")
}

/// `qemu-system-arm` with the mps2-an386 board; installed with apt-get when
/// running as root, otherwise the exact command to run is reported.
pub fn ensure_qemu() -> Result<()> {
    if output_of("qemu-system-arm", &["--version"]).is_none() {
        let install = "apt-get update && apt-get install -y qemu-system-arm";
        if !is_root() {
            bail!(
                "qemu-system-arm is missing and this is not root; install it with:\n    sudo sh -c '{install}'"
            );
        }
        run_visible(
            install,
            Command::new("sh")
                .args(["-c", install])
                .env("DEBIAN_FRONTEND", "noninteractive"),
        )?;
    }
    let version = output_of("qemu-system-arm", &["--version"])
        .context("qemu-system-arm still not runnable after installing")?;
    let machines = output_of("qemu-system-arm", &["-machine", "help"]).unwrap_or_default();
    if !machines.lines().any(|l| l.starts_with(QEMU_MACHINE)) {
        bail!(
            "{} does not emulate the {QEMU_MACHINE} board; QEMU 6.0 or newer is needed",
            version.lines().next().unwrap_or("qemu-system-arm")
        );
    }
    Ok(())
}

/// `binary` from the distribution's package `package`, installed with
/// apt-get when missing (as root; otherwise the command to run is named).
pub fn ensure_package(binary: &str, package: &str) -> Result<()> {
    if Command::new("sh")
        .args(["-c", &format!("command -v {binary}")])
        .output()
        .is_ok_and(|o| o.status.success())
    {
        return Ok(());
    }
    let install = format!("apt-get update && apt-get install -y {package}");
    if !is_root() {
        bail!("{binary} is missing and this is not root; install it with:\n    sudo sh -c '{install}'");
    }
    run_visible(
        &install,
        Command::new("sh")
            .args(["-c", &install])
            .env("DEBIAN_FRONTEND", "noninteractive"),
    )
}

/// `defmt-print` 1.x, installed with `cargo install --locked` when missing.
pub fn ensure_defmt_print() -> Result<()> {
    let found = output_of("defmt-print", &["-V"]).unwrap_or_default();
    if found
        .split_whitespace()
        .nth(1)
        .is_some_and(|v| v.starts_with("1."))
    {
        return Ok(());
    }
    run_visible(
        &format!("cargo install defmt-print --locked --version {DEFMT_PRINT_VERSION}"),
        Command::new(cargo())
            .args([
                "install",
                "defmt-print",
                "--locked",
                "--version",
                DEFMT_PRINT_VERSION,
            ])
            .env_remove("CARGO_TARGET_DIR"),
    )?;
    if output_of("defmt-print", &["-V"]).is_none() {
        bail!("defmt-print installed but not on PATH (add ~/.cargo/bin to PATH)");
    }
    Ok(())
}

/// Build the `visviva` command in release and return its path.
pub fn build_visviva(root: &std::path::Path) -> Result<std::path::PathBuf> {
    let status = Command::new(cargo())
        .args([
            "build",
            "--release",
            "--quiet",
            "-p",
            "visviva-trainer",
            "--bin",
            "visviva",
        ])
        .current_dir(root)
        .status()
        .context("starting cargo build -p visviva-trainer")?;
    if !status.success() {
        bail!("building visviva failed ({status})");
    }
    let target = std::env::var_os("CARGO_TARGET_DIR")
        .map(std::path::PathBuf::from)
        .unwrap_or_else(|| root.join("target"));
    Ok(target.join("release").join("visviva"))
}

/// Everything the device check needs.
pub fn ensure_all() -> Result<()> {
    ensure_target()?;
    ensure_qemu()?;
    ensure_defmt_print()
}
