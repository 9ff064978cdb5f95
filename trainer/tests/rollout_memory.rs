//! Memory bounded by the model, not by the horizon: a 10^7-step
//! `visviva rollout` of the release binary and an export whose accuracy
//! check takes 2 * 10^6 steps per rollout, with the peak resident size of
//! each printed. Release only (`cargo xtask test` runs it in its release
//! stage): a debug binary takes minutes. The peak comes from getrusage
//! (RUSAGE_CHILDREN: the largest ru_maxrss of the waited-for children, in
//! kilobytes on Linux), so this file holds the one test that starts
//! children, and each figure is a bound on the commands run so far.
#![cfg(unix)]

use std::io::{BufRead, BufReader};
use std::path::Path;
use std::process::Command;

use nix::sys::resource::{getrusage, UsageWho};
use visviva_blob_support::{
    OwnedEnergy, OwnedKinetic, OwnedMlp, OwnedModel, Precision, SplitMix64,
};
use visviva_runtime::format::Activation;
use visviva_runtime::{Integrator, Method};

/// Bound on the peak resident size (the "a few MB", with room for
/// the binary and the allocator's arenas).
const LIMIT_MB: f64 = 64.0;

fn visviva() -> Command {
    Command::new(env!("CARGO_BIN_EXE_visviva"))
}

/// Largest peak resident size of the children waited for so far, in MB.
fn children_peak_mb() -> f64 {
    let kb = getrusage(UsageWho::RUSAGE_CHILDREN).unwrap().max_rss();
    kb as f64 / 1024.0
}

/// A 2-degree-of-freedom separable model with a 2-32-32-1 tanh potential
/// (seeded weights, not a trained model), stepped by Stormer-Verlet.
fn blob(dir: &Path) -> std::path::PathBuf {
    let mut rng = SplitMix64(15);
    let potential = OwnedMlp::random(&mut rng, &[2, 32, 32, 1], Activation::Tanh, Precision::F32);
    let model = OwnedModel::new(
        2,
        vec![0.0; 4],
        vec![1.0; 4],
        1.0,
        OwnedEnergy::Separable {
            potential,
            kinetic: OwnedKinetic::quadratic(vec![1.0, 0.0, 1.0]),
        },
        Integrator::new(Method::StormerVerlet, 0.01),
    );
    let path = dir.join("m.vvb");
    std::fs::write(&path, model.blob().unwrap()).unwrap();
    path
}

/// Lines of a file, read one at a time.
fn count_lines(path: &Path) -> usize {
    BufReader::new(std::fs::File::open(path).unwrap())
        .lines()
        .count()
}

#[test]
#[cfg_attr(
    debug_assertions,
    ignore = "10^7 steps take seconds in release but minutes in debug; run with --release"
)]
fn long_rollouts_and_export_checks_stay_within_a_few_megabytes() {
    let steps: usize = 10_000_000;
    let dir = tempfile::tempdir().unwrap();
    let model = blob(dir.path());
    let out = dir.path().join("long.csv");
    let o = visviva()
        .args(["rollout", "--model"])
        .arg(&model)
        .args(["--init", "q1=0.3,q2=-0.2,p1=0,p2=0.1", "--bits", "--out"])
        .arg(&out)
        .args(["--steps", &steps.to_string()])
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let rollout_mb = children_peak_mb();
    let bytes = std::fs::metadata(&out).unwrap().len();
    // Header plus the initial state plus one row per step, all written.
    assert_eq!(count_lines(&out), steps + 2);
    println!(
        "rollout of {steps} steps: {:.1} MB of CSV written, peak resident size {rollout_mb:.1} MB",
        bytes as f64 / 1e6
    );
    assert!(rollout_mb < LIMIT_MB, "{rollout_mb} MB");

    let check_steps = 2_000_000;
    let o = visviva()
        .args(["export", "--model"])
        .arg(&model)
        .args(["--weights", "int8", "--check-states", "2", "--out"])
        .arg(dir.path().join("e.vvb"))
        .args(["--check-steps", &check_steps.to_string()])
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(
        text.contains(&format!("over {check_steps} steps from 2 states")),
        "{text}"
    );
    let peak = children_peak_mb();
    println!("export check of 2 x 2 x {check_steps} steps: peak resident size so far {peak:.1} MB");
    assert!(peak < LIMIT_MB, "{peak} MB");
    // Only the outputs remain beside the model: no temporary file.
    let mut names: Vec<String> = std::fs::read_dir(dir.path())
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    names.sort();
    assert_eq!(names, ["e.vvb", "long.csv", "m.vvb"]);
}
