//! The runtime's own footprint (`cargo xtask footprint`, also run by
//! `cargo xtask device`): builds `firmware-example/examples/footprint.rs`
//! once per configuration with only the runtime features it needs, reads
//! flash and static RAM from the ELF, runs it in QEMU for the painted-stack
//! high-water mark and its final state (compared bit for bit with the host
//! rollout), prints one line per configuration
//! `footprint <config>: flash <bytes> B, static RAM <bytes> B, stack <bytes> B`
//! and compares the numbers with the table committed in
//! `trainer/src/deploy/footprint.csv` (what `visviva inspect` and the report
//! quote).

use std::path::Path;

use anyhow::{bail, Context, Result};

use crate::elf_size;
use crate::fixtures;
use crate::host_rollout::{HostRollout, VisvivaCommand};
use crate::qemu_run;
use crate::run_plan::RunPlan;

/// One footprint configuration: its name (as in the committed table), the
/// fixture blob it runs and the firmware feature that selects it.
pub struct Config {
    /// Name in the output line and the committed table.
    pub name: &'static str,
    /// Fixture blob (see `fixtures::good_fixtures`), D <= 2, W <= 32.
    pub fixture: &'static str,
    /// Feature of `firmware-example` (forwards the runtime's features).
    pub feature: &'static str,
}

/// The measured configurations.
pub const CONFIGS: [Config; 4] = [
    Config {
        name: "conservative-verlet-f32",
        fixture: "fixture-separable-verlet-f32",
        feature: "fp-verlet-f32",
    },
    Config {
        name: "conservative-verlet-int8",
        fixture: "fixture-separable-verlet-int8",
        feature: "fp-verlet-int8",
    },
    Config {
        name: "general-midpoint-f32",
        fixture: "fixture-general-midpoint-f32",
        feature: "fp-midpoint-f32",
    },
    Config {
        name: "damped-driven-dgrad-f32",
        fixture: "fixture-driven-dgrad-f32",
        feature: "fp-dgrad-f32",
    },
];

/// Steps, initial state and input of `examples/footprint.rs` (keep in step
/// with its `STEPS`, start state and `INPUT`).
const STEPS: u32 = 100;
const START_Q: f32 = 0.3;
const START_P: f32 = -0.2;
const INPUT: f32 = 0.25;

/// The committed table may differ from a measurement by this fraction
/// (a compiler update moves code size by a few percent) or by
/// [`MARGIN_BYTES`], whichever is larger, before the check fails.
pub const MARGIN_FRACTION: f64 = 0.05;
/// See [`MARGIN_FRACTION`].
pub const MARGIN_BYTES: u64 = 256;
/// The committed table, relative to the workspace root.
pub const TABLE: &str = "trainer/src/deploy/footprint.csv";

/// One measured configuration.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Footprint {
    /// Flash: vector table, code, constants, `.data` image (blob excluded).
    pub flash: u64,
    /// `.data` + `.bss` + `.uninit`.
    pub static_ram: u64,
    /// Painted-stack high-water mark.
    pub stack: u64,
}

/// Measure every configuration, print the lines, compare with the host and
/// with the committed table. Ok(true) when every configuration ran, its
/// state matched the host and the table is within the margin.
pub fn run(root: &Path, work: &Path, host: &dyn HostRollout) -> Result<bool> {
    let fixtures = fixtures::good_fixtures()?;
    let committed = read_table(&root.join(TABLE))?;
    let mut ok = true;
    let mut lines = Vec::new();
    for config in &CONFIGS {
        let blob = fixtures
            .iter()
            .find(|b| b.name == config.fixture)
            .with_context(|| format!("fixture {} missing", config.fixture))?;
        let path = work.join(format!("{}.vvb", blob.name));
        std::fs::write(&path, &blob.bytes)?;
        match measure(root, work, config, &path, host) {
            Ok(fp) => {
                lines.push(format!(
                    "footprint {}: flash {} B, static RAM {} B, stack {} B",
                    config.name, fp.flash, fp.static_ram, fp.stack
                ));
                ok &= compare_table(config.name, &fp, &committed);
            }
            Err(e) => {
                println!("  footprint of {}: FAILED: {e:#}", config.name);
                ok = false;
            }
        }
    }
    for line in lines {
        println!("{line}");
    }
    Ok(ok)
}

/// Build, size and run one configuration.
fn measure(
    root: &Path,
    work: &Path,
    config: &Config,
    blob: &Path,
    host: &dyn HostRollout,
) -> Result<Footprint> {
    let name = format!("footprint-{}", config.name);
    let elf = qemu_run::build_footprint(root, work, blob, config.feature, &name)?;
    let size = elf_size::read(&elf)?;
    let outcome = qemu_run::run_raw(&elf, work, &name, &format!("{name}.stdout.txt"))?;
    let text = std::fs::read_to_string(&outcome.stdout).unwrap_or_default();
    if outcome.exit_code != Some(0) || outcome.timed_out {
        bail!(
            "QEMU exit {:?}{}: {}",
            outcome.exit_code,
            if outcome.timed_out {
                " (timed out)"
            } else {
                ""
            },
            text.trim()
        );
    }
    let (stack, state) = parse_report(&text)?;
    let bytes = std::fs::read(blob)?;
    let desc = visviva_runtime::format::decode(&bytes).map_err(|e| anyhow::anyhow!("{e}"))?;
    let n = desc.dof as usize;
    let m = match desc.input {
        visviva_runtime::format::InputDesc::Constant { inputs, .. }
        | visviva_runtime::format::InputDesc::Network { inputs, .. } => inputs as usize,
        visviva_runtime::format::InputDesc::None => 0,
    };
    let mut init = vec![START_Q; n];
    init.extend(vec![START_P; n]);
    let plan = RunPlan {
        dof: n,
        steps: STEPS,
        initial_states: vec![init],
        inputs: if m > 0 {
            vec![vec![INPUT; m]; STEPS as usize]
        } else {
            Vec::new()
        },
    };
    let reference = host.rollout(blob, &plan)?;
    let want = reference
        .first()
        .and_then(|t| t.last())
        .context("host rollout is empty")?;
    if *want != state {
        bail!("device state after {STEPS} steps {state:08x?} differs from the host's {want:08x?}");
    }
    println!(
        "  {}: state after {STEPS} steps bit-identical to `visviva rollout`; {} B of blob in .vv_model",
        config.name, size.model_region
    );
    Ok(Footprint {
        flash: size.flash(),
        static_ram: size.static_ram(),
        stack: u64::from(stack),
    })
}

/// `footprint stack <hex> state <hex>...` -> (stack bytes, state bits).
fn parse_report(text: &str) -> Result<(u32, Vec<u32>)> {
    let line = text
        .lines()
        .find(|l| l.starts_with("footprint stack "))
        .with_context(|| format!("no report line in {text:?}"))?;
    let words: Vec<&str> = line.split_whitespace().collect();
    let hex = |w: &str| u32::from_str_radix(w, 16).with_context(|| format!("bad hex {w:?}"));
    match words.as_slice() {
        ["footprint", "stack", stack, "state", rest @ ..] if !rest.is_empty() => {
            let state = rest.iter().map(|w| hex(w)).collect::<Result<Vec<_>>>()?;
            Ok((hex(stack)?, state))
        }
        _ => bail!("malformed report line {line:?}"),
    }
}

/// The committed table: `config,flash,static_ram,stack` rows after `#`
/// comments and a header.
pub fn read_table(path: &Path) -> Result<Vec<(String, Footprint)>> {
    let text =
        std::fs::read_to_string(path).with_context(|| format!("reading {}", path.display()))?;
    let mut rows = Vec::new();
    for (i, line) in text.lines().enumerate() {
        let line = line.trim();
        if line.is_empty() || line.starts_with('#') || line.starts_with("config,") {
            continue;
        }
        let f: Vec<&str> = line.split(',').map(str::trim).collect();
        let num = |k: usize| -> Result<u64> {
            f.get(k).and_then(|v| v.parse().ok()).with_context(|| {
                format!(
                    "{}:{}: field {} is not a byte count",
                    path.display(),
                    i + 1,
                    k + 1
                )
            })
        };
        if f.len() != 4 {
            bail!(
                "{}:{}: expected 4 fields, found {}",
                path.display(),
                i + 1,
                f.len()
            );
        }
        rows.push((
            f[0].to_string(),
            Footprint {
                flash: num(1)?,
                static_ram: num(2)?,
                stack: num(3)?,
            },
        ));
    }
    Ok(rows)
}

/// Whether `measured` is within the margin of `name`'s committed row.
fn compare_table(name: &str, measured: &Footprint, committed: &[(String, Footprint)]) -> bool {
    let Some((_, row)) = committed.iter().find(|(n, _)| n == name) else {
        println!("  {name}: not in {TABLE}; add the line above to it");
        return false;
    };
    let mut ok = true;
    for (what, have, want) in [
        ("flash", measured.flash, row.flash),
        ("static RAM", measured.static_ram, row.static_ram),
        ("stack", measured.stack, row.stack),
    ] {
        if !within_margin(have, want) {
            println!(
                "  {name}: measured {what} {have} B, {TABLE} says {want} B (margin {:.0} % or {MARGIN_BYTES} B): update the table",
                MARGIN_FRACTION * 100.0
            );
            ok = false;
        }
    }
    ok
}

/// |have - want| <= max(MARGIN_FRACTION * want, MARGIN_BYTES).
pub fn within_margin(have: u64, want: u64) -> bool {
    let allowed = (MARGIN_FRACTION * want as f64).max(MARGIN_BYTES as f64);
    (have as f64 - want as f64).abs() <= allowed
}

/// `cargo xtask footprint`: the footprint lines alone.
pub fn run_alone() -> Result<bool> {
    crate::tools::ensure_all()?;
    let root = crate::workspace_root();
    let work = root.join("firmware-example/target/visviva-device");
    std::fs::create_dir_all(&work).with_context(|| format!("creating {}", work.display()))?;
    let host = VisvivaCommand::build(&root, &work)?;
    run(&root, &work, &host)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn committed_table_names_every_configuration_once() {
        let rows = read_table(&crate::workspace_root().join(TABLE)).expect("table parses");
        for c in &CONFIGS {
            assert_eq!(
                rows.iter().filter(|(n, _)| n == c.name).count(),
                1,
                "{}",
                c.name
            );
        }
        assert_eq!(rows.len(), CONFIGS.len());
    }

    #[test]
    fn margin_is_the_larger_of_fraction_and_bytes() {
        assert!(within_margin(10_000 + 500, 10_000));
        assert!(!within_margin(10_000 + 501, 10_000));
        assert!(within_margin(1000 + 256, 1000));
        assert!(!within_margin(1000 + 257, 1000));
    }
}
