//! Project automation (`cargo xtask <task>`):
//!
//! * `cargo xtask test`: the one command that checks everything, in order
//!   (format, clippy, workspace tests, no_std build for the Cortex-M4F, device
//!   check), stopping at the first failure.
//! * `cargo xtask demos [--verify] [--data]`: rerun the demo projects
//!   (`--data` also rewrites their logs; `--verify` checks that logs and
//!   blobs reproduce bit for bit).
//! * `cargo xtask c-check`: the C interface used from C on the host (static
//!   library, `runtime/c-api/examples/rollout.c`, bit-identical states,
//!   refusal drills) and the C firmware on five cores (`--host`: the host
//!   part alone, as the test command runs it).
//! * `cargo xtask fleet`: the demo fleet locally (`--jobs 2`) and as a job
//!   array on a throwaway single-node Slurm cluster (a stage of `test`).
//! * `cargo xtask browser [--save-screenshot]`: the crane demo's report in
//!   headless Chromium over WebDriver (overflow at 1280 px, drawn charts,
//!   every number against report.json, A4 print); a stage of `test`.
//! * `cargo xtask claims`: every percentage or tolerance figure in README.md
//!   with the test that asserts it (or "one run"); fails on an unlisted one.
//! * `cargo xtask bench [--rounds N] [--steps N]`: training throughput of
//!   Visviva against PyTorch and JAX references (see `bench/README.md`).
//! * `cargo xtask device [--blob FILE.vvb]...`: installs missing tools, runs
//!   the example firmware in QEMU for every device blob and compares every
//!   state bit for bit with the host rollout, measures the runtime's own
//!   footprint, and (without `--blob`) runs the observer cases and the C
//!   firmware on five cores (`--observer`: the observer cases alone).
//! * `cargo xtask footprint`: that footprint alone (flash, static RAM and
//!   stack of the minimal firmware per configuration).

mod bench;
mod bench_large;
mod browser_check;
mod c_check;
mod c_cores;
mod c_firmware;
mod claims;
mod demo_modes;
mod demos;
mod device_check;
mod device_log;
mod elf_size;
mod fixtures;
mod fleet_check;
mod footprint;
mod golden_csv;
mod host_rollout;
mod model_swap;
mod observer_device;
mod observer_plan;
mod observer_sequence;
mod qemu_run;
mod run_plan;
mod slurm_cluster;
mod target_report;
mod test_pipeline;
mod tools;
mod webdriver;

use std::path::PathBuf;
use std::process::ExitCode;

const USAGE: &str = "usage: cargo xtask <task>
  test                      format, clippy, tests, Cortex-M4F build, device check
  fleet                     demo fleet locally and on a throwaway single-node Slurm
  claims                    README figures and the tests that assert them
  browser [--save-screenshot]
                            the demo report in headless Chromium (WebDriver):
                            overflow, charts, numbers, A4 print
  c-check [--host]          the C interface from C: static library, C example,
                            C firmware on five cores, states bit-identical to
                            visviva rollout (--host: the host C example alone)
  demos [--verify] [--data] rerun the demo projects (reproducibility check)
  device [--blob FILE]...   firmware-in-QEMU check against the host rollout
                            (default: the generated fixture and demo blobs on
                            the Rust firmware, the observer cases, the C
                            firmware on five cores)
  device --observer         the observer cases alone (observer and monitor
                            over a recorded sequence, bit-identical to
                            visviva observe)
  footprint                 the runtime's own flash, static RAM and stack
  bench [--rounds N] [--steps N] [--only visviva,torch,jax] [--large-samples N]
                            training throughput against PyTorch and JAX (CPU),
                            thread scaling, a 10^7-sample log (N per trajectory,
                            0 = skip)
  peak-rss PROGRAM [ARGS..] run a program, print its peak resident size";

fn main() -> ExitCode {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let result = match args.first().map(String::as_str) {
        Some("test") if args.len() == 1 => test_pipeline::run(),
        Some("claims") if args.len() == 1 => claims::run(),
        Some("c-check") if args.len() == 1 => c_check::run(),
        Some("c-check") if args.len() == 2 && args[1] == "--host" => c_check::run_host(),
        Some("fleet") if args.len() == 1 => fleet_check::run(),
        Some("browser") if args.len() == 1 => browser_check::run(false),
        Some("browser") if args.len() == 2 && args[1] == "--save-screenshot" => {
            browser_check::run(true)
        }
        Some("bench") => bench::run(&args[1..]),
        Some("peak-rss") => bench_large::peak_rss(&args[1..]),
        Some("demos") => {
            let verify = args.iter().any(|a| a == "--verify");
            let data = args.iter().any(|a| a == "--data");
            if args[1..].iter().any(|a| a != "--verify" && a != "--data") {
                eprintln!("{USAGE}");
                return ExitCode::from(2);
            }
            demos::run(verify, data)
        }
        Some("device") if args.len() == 2 && args[1] == "--observer" => {
            device_check::run_observer_only()
        }
        Some("device") => parse_blob_args(&args[1..]).and_then(device_check::run),
        Some("footprint") if args.len() == 1 => footprint::run_alone(),
        Some("-h" | "--help" | "help") => {
            println!("{USAGE}");
            return ExitCode::SUCCESS;
        }
        _ => {
            eprintln!("{USAGE}");
            return ExitCode::from(2);
        }
    };
    match result {
        Ok(true) => ExitCode::SUCCESS,
        Ok(false) => ExitCode::FAILURE,
        Err(e) => {
            eprintln!("xtask error: {e:#}");
            ExitCode::FAILURE
        }
    }
}

fn parse_blob_args(args: &[String]) -> anyhow::Result<Vec<PathBuf>> {
    let mut blobs = Vec::new();
    let mut it = args.iter();
    while let Some(a) = it.next() {
        match a.as_str() {
            "--blob" => match it.next() {
                Some(p) => blobs.push(PathBuf::from(p)),
                None => anyhow::bail!("--blob needs a file path\n{USAGE}"),
            },
            other => anyhow::bail!("unknown argument `{other}`\n{USAGE}"),
        }
    }
    Ok(blobs)
}

/// The workspace root (the parent of this crate's directory).
pub fn workspace_root() -> PathBuf {
    let here = PathBuf::from(env!("CARGO_MANIFEST_DIR"));
    here.parent().map(PathBuf::from).unwrap_or(here)
}
