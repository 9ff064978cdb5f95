//! `cargo xtask c-check`: the C interface used from C on the host. Builds
//! the static library (`visviva-c`, `panic = "abort"`), compiles
//! `runtime/c-api/examples/rollout.c` with the host's C compiler as C11
//! with warnings as errors, and compares every state it prints, bit for
//! bit, with `visviva rollout --bits` for the undriven demo blobs; checks
//! the library's CRC-32 of "123456789" against the CRC catalogue's check
//! value 0xCBF43926.

use std::path::{Path, PathBuf};
use std::process::Command;

use anyhow::{bail, Context, Result};

use crate::tools::cargo;

/// Undriven demo blobs and the initial coordinates their rollouts start from
/// (inside each demo's logged range).
const CASES: &[(&str, &[&str])] = &[
    ("crane-sway/out/crane-f32-verlet.vvb", &["0.3"]),
    ("crane-sway/out/crane-int8-verlet.vvb", &["0.3"]),
    ("flexure-sensor/out/flexure-f32-midpoint.vvb", &["0.002"]),
    (
        "isolation-mount/out/mount-int8-yoshida4.vvb",
        &["0.001", "-0.0005"],
    ),
];

const STEPS: usize = 2000;

fn target_dir(root: &Path) -> PathBuf {
    std::env::var_os("CARGO_TARGET_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(|| root.join("target"))
}

/// Build the static library; returns its path.
fn build_library(root: &Path) -> Result<PathBuf> {
    let status = Command::new(cargo())
        .args(["rustc", "--quiet", "-p", "visviva-c", "--profile", "c-lib"])
        .args(["--features", "panic-halt", "--crate-type", "staticlib"])
        .current_dir(root)
        .status()
        .context("starting cargo rustc -p visviva-c")?;
    if !status.success() {
        bail!("building the C static library failed ({status})");
    }
    Ok(target_dir(root).join("c-lib").join("libvisviva_c.a"))
}

/// Compile the C example against the library; returns the executable.
fn compile_example(root: &Path, lib: &Path) -> Result<PathBuf> {
    let api = root.join("runtime/c-api");
    let exe = target_dir(root).join("c-check").join("rollout");
    std::fs::create_dir_all(exe.parent().unwrap_or(root))?;
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

fn stdout_of(cmd: &mut Command) -> Result<String> {
    let out = cmd.output().with_context(|| format!("starting {cmd:?}"))?;
    if !out.status.success() {
        bail!(
            "{cmd:?} failed: {}",
            String::from_utf8_lossy(&out.stderr).trim()
        );
    }
    Ok(String::from_utf8(out.stdout)?)
}

/// The state columns (bit patterns) of each data row of either output.
fn state_rows(text: &str, skip_header: bool) -> Vec<Vec<String>> {
    text.lines()
        .filter(|l| !l.starts_with('#'))
        .skip(usize::from(skip_header))
        .map(|l| {
            l.split([',', ' '])
                .skip(1)
                .map(|v| v.trim().to_lowercase())
                .collect()
        })
        .collect()
}

/// Run the check; Ok(false) on any difference.
pub fn run() -> Result<bool> {
    let root = crate::workspace_root();
    let visviva = crate::tools::build_visviva(&root)?;
    let lib = build_library(&root)?;
    let exe = compile_example(&root, &lib)?;
    let (mut same, mut total) = (0usize, 0usize);
    let mut crc_ok = true;
    for (blob, q) in CASES {
        let path = root.join("models-demo").join(blob);
        let c_out = stdout_of(
            Command::new(&exe)
                .arg(&path)
                .arg(STEPS.to_string())
                .args(*q),
        )?;
        crc_ok &= c_out.lines().next() == Some("# crc32 0xcbf43926");
        let init: Vec<String> = (0..q.len())
            .map(|i| format!("q{}={}", i + 1, q[i]))
            .chain((0..q.len()).map(|i| format!("p{}=0", i + 1)))
            .collect();
        let host = stdout_of(
            Command::new(&visviva)
                .args(["rollout", "--bits", "--model"])
                .arg(&path)
                .args(["--init", &init.join(","), "--steps", &STEPS.to_string()]),
        )?;
        let (a, b) = (state_rows(&c_out, false), state_rows(&host, true));
        let equal = a.iter().zip(&b).filter(|(x, y)| x == y).count();
        let count = a.len().max(b.len());
        println!(
            "  {blob}: {equal} of {count} states bit-identical (C example vs visviva rollout)"
        );
        same += equal;
        total += count;
    }
    println!(
        "  CRC-32 of \"123456789\" through the C interface: {}",
        if crc_ok {
            "0xCBF43926 (catalogue check value)"
        } else {
            "WRONG"
        }
    );
    println!("c interface (host): {same} of {total} states bit-identical");
    Ok(crc_ok && same == total && total > 0)
}
