//! Hostile but realistic inputs on the `visviva` binary, one test per class:
//! sizes no machine can hold (refused before work, naming the flag or key),
//! Ctrl-C and failures in the middle of a write (no temporary file left,
//! the old output intact), and blobs whose values no model can mean (refused
//! with the section named). Each test checks the exit code, the message and
//! that the folder holds exactly what it held before. The memory bound of
//! long rollouts is `rollout_memory.rs` (its own process, so its peak
//! resident size is its own).

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::time::{Duration, Instant};

use visviva_blob_support::{
    OwnedEnergy, OwnedKinetic, OwnedLayer, OwnedMlp, OwnedModel, Precision,
};
use visviva_runtime::format::Activation;
use visviva_runtime::{Integrator, Method};

fn visviva() -> Command {
    Command::new(env!("CARGO_BIN_EXE_visviva"))
}

/// Every file under `dir` (relative name -> bytes), hidden ones included.
fn snapshot(dir: &Path) -> BTreeMap<PathBuf, Vec<u8>> {
    let mut out = BTreeMap::new();
    let mut todo = vec![dir.to_path_buf()];
    while let Some(d) = todo.pop() {
        for e in std::fs::read_dir(&d).unwrap() {
            let p = e.unwrap().path();
            if p.is_dir() {
                todo.push(p);
            } else {
                out.insert(
                    p.strip_prefix(dir).unwrap().to_path_buf(),
                    std::fs::read(&p).unwrap(),
                );
            }
        }
    }
    out
}

fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

/// A one-degree-of-freedom separable model: V(q) is one linear layer of
/// weight `w` (V = w q), T = p^2 / 2, stepped by Stormer-Verlet with `dt`.
fn linear_blob(w: f32, dt: f32) -> OwnedModel {
    let potential = OwnedMlp {
        activation: Activation::Tanh,
        layers: vec![OwnedLayer::new(1, 1, &[w], &[0.0], Precision::F32)],
    };
    OwnedModel::new(
        1,
        vec![0.0, 0.0],
        vec![1.0, 1.0],
        1.0,
        OwnedEnergy::Separable {
            potential,
            kinetic: OwnedKinetic::quadratic(vec![1.0]),
        },
        Integrator::new(Method::StormerVerlet, dt),
    )
}

/// A folder with a valid blob `m.vvb` and an old output `o.csv`.
fn workspace() -> (tempfile::TempDir, PathBuf, PathBuf) {
    let dir = tempfile::tempdir().unwrap();
    let blob = dir.path().join("m.vvb");
    std::fs::write(&blob, linear_blob(0.5, 0.01).blob().unwrap()).unwrap();
    let out = dir.path().join("o.csv");
    std::fs::write(&out, "old output\n").unwrap();
    (dir, blob, out)
}

/// A small training log of the flexure written by `visviva simulate`.
fn small_log(dir: &Path) -> PathBuf {
    let log = dir.join("log.csv");
    let o = visviva()
        .args(["simulate", "--system", "flexure", "--trajectories", "3"])
        .args(["--duration", "2", "--rate", "50", "--out"])
        .arg(&log)
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", stderr(&o));
    log
}

/// Run `cmd` and check: exit status 1 (a refusal, not a panic's 101 or an
/// abort's signal), every piece of `wanted` in the message, and `dir`
/// holding exactly what it held before.
fn refused(mut cmd: Command, dir: &Path, wanted: &[&str]) {
    let before = snapshot(dir);
    let o = cmd.output().unwrap();
    let err = stderr(&o);
    assert_eq!(o.status.code(), Some(1), "{cmd:?}: {err}");
    for w in wanted {
        assert!(err.contains(w), "{cmd:?}: message lacks '{w}': {err}");
    }
    assert_eq!(snapshot(dir), before, "{cmd:?} changed the folder: {err}");
}

#[test]
fn sizes_no_machine_can_hold_are_refused_before_work_naming_the_flag() {
    let (dir, blob, out) = workspace();
    let d = dir.path();
    // Rollout steps stream, so only the output file limits them: 10^18
    // rows cannot fit on any disk.
    let mut c = visviva();
    c.args(["rollout", "--model"]).arg(&blob);
    c.args([
        "--init",
        "q1=0.1,p1=0",
        "--steps",
        "1000000000000000000",
        "--out",
    ])
    .arg(&out);
    refused(c, d, &["--steps", "o.csv", "free"]);
    // Check states are held at once.
    let mut c = visviva();
    c.args(["export", "--model"]).arg(&blob);
    c.args(["--check-states", "1000000000000000000", "--out"])
        .arg(d.join("e.vvb"));
    refused(c, d, &["--check-states", "memory"]);
    // Simulated logs are held whole before they are written.
    for (n, duration, rate) in [
        ("1000000000000000", "10", "100"),
        ("1", "1e300", "1e300"),
        ("3", "1e9", "1e9"),
    ] {
        let mut c = visviva();
        c.args(["simulate", "--system", "flexure", "--trajectories", n])
            .args(["--duration", duration, "--rate", rate, "--out"])
            .arg(d.join("s.csv"));
        refused(c, d, &["--trajectories x --duration x --rate"]);
    }
    // A step count beyond 64 bits is a parse error naming the flag (clap's
    // exit status 2), not a crash.
    let o = visviva()
        .args(["rollout", "--model"])
        .arg(&blob)
        .args(["--init", "q1=0,p1=0", "--steps", "100000000000000000000"])
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(stderr(&o).contains("--steps"));
}

#[test]
fn fit_threads_and_project_sizes_are_refused_before_work() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let log = small_log(d);
    let mut c = visviva();
    c.args(["fit", "--data"]).arg(&log);
    c.args(["--threads", "100000", "--epochs", "1", "--out"])
        .arg(d.join("m.vvb"));
    refused(c, d, &["--threads", "100000"]);

    // A project whose golden rollouts could never be held or stored: the
    // refusal names the table and key, and no out/ folder appears.
    let project = d.join("p");
    std::fs::create_dir(&project).unwrap();
    std::fs::copy(&log, project.join("log.csv")).unwrap();
    for (key, value, wanted) in [
        (
            "golden_states",
            "1000000000000000000",
            "[check] golden_states",
        ),
        (
            "golden_steps",
            "1000000000000000000",
            "[check] golden_steps",
        ),
    ] {
        std::fs::write(
            project.join("visviva.toml"),
            format!(
                "[data]\ntrain = \"log.csv\"\n[model]\narch = \"separable\"\n\n[check]\n\
                 {key} = {value}\n"
            ),
        )
        .unwrap();
        let mut c = visviva();
        c.arg("run").arg(&project);
        refused(c, d, &[wanted, "visviva.toml"]);
        assert!(!project.join("out").exists());
    }
}

/// Wait until `dir` holds a file not in `names`: the writer's temporary file.
fn wait_for_new_file(dir: &Path, names: &[&str], limit: Duration) -> bool {
    let start = Instant::now();
    while start.elapsed() < limit {
        let extra = std::fs::read_dir(dir)
            .unwrap()
            .filter_map(|e| e.ok())
            .any(|e| !names.contains(&e.file_name().to_string_lossy().as_ref()));
        if extra {
            return true;
        }
        std::thread::sleep(Duration::from_millis(20));
    }
    false
}

#[test]
fn ctrl_c_and_failures_in_the_middle_of_a_write_leave_no_temporary_file() {
    let (dir, blob, out) = workspace();
    let d = dir.path();
    let before = snapshot(d);
    // Ctrl-C (SIGINT) while a long rollout streams into its temporary file.
    let child = visviva()
        .args(["rollout", "--model"])
        .arg(&blob)
        .args(["--init", "q1=0.1,p1=0", "--steps", "100000000", "--out"])
        .arg(&out)
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    assert!(
        wait_for_new_file(d, &["m.vvb", "o.csv"], Duration::from_secs(60)),
        "no temporary file appeared"
    );
    std::thread::sleep(Duration::from_millis(200));
    let st = Command::new("kill")
        .args(["-INT", &child.id().to_string()])
        .status()
        .unwrap();
    assert!(st.success());
    let o = child.wait_with_output().unwrap();
    let err = stderr(&o);
    assert_eq!(o.status.code(), Some(1), "{err}");
    assert!(
        err.contains("interrupted by Ctrl-C") && err.contains("nothing written"),
        "{err}"
    );
    assert_eq!(snapshot(d), before, "{err}");

    // A rollout that leaves the range of f32 after several kilobytes of
    // output: V = 1e33 q drives |q| past 3.4e38 after about 800 steps of
    // dt = 1 (q_k = -1e33 k^2 / 2). What it computed is kept, marked
    // partial by its name (o.partial.csv); o.csv keeps its old content and
    // no temporary file is left.
    let wild = d.join("wild.vvb");
    std::fs::write(&wild, linear_blob(1e33, 1.0).blob().unwrap()).unwrap();
    let before = snapshot(d);
    let o = visviva()
        .args(["rollout", "--model"])
        .arg(&wild)
        .args(["--init", "q1=0,p1=0", "--steps", "5000", "--out"])
        .arg(&out)
        .output()
        .unwrap();
    let err = stderr(&o);
    assert_eq!(o.status.code(), Some(1), "{err}");
    for w in [
        "stopped part-way at step ",
        "of 5000",
        "NaN or infinity",
        "o.partial.csv",
        "o.csv was not written",
    ] {
        assert!(err.contains(w), "message lacks '{w}': {err}");
    }
    let mut after = snapshot(d);
    let partial = after
        .remove(Path::new("o.partial.csv"))
        .expect("o.partial.csv written");
    assert_eq!(after, before, "{err}");
    // The rows are the states before the failed step: header, then t = 0..k-1
    // for a failure at step k (counted from 1), every value finite.
    let step: usize = err
        .split("at step ")
        .nth(1)
        .unwrap()
        .split(' ')
        .next()
        .unwrap()
        .parse()
        .unwrap();
    let text = String::from_utf8(partial).unwrap();
    let rows: Vec<&str> = text.lines().collect();
    assert_eq!(rows[0], "t,q1,p1,v1");
    assert_eq!(rows.len(), step + 1, "{err}");
    assert!((600..1000).contains(&step), "failed at step {step}");
    for r in &rows[1..] {
        assert!(
            r.split(',').all(|v| v.parse::<f32>().unwrap().is_finite()),
            "{r}"
        );
    }
}

#[test]
fn blobs_whose_values_no_model_can_mean_are_refused_naming_the_section() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let good = linear_blob(0.5, 0.01);
    let mut cases: Vec<(&str, OwnedModel, &str)> = Vec::new();
    let mut m = good.clone();
    m.scale_bytes[0..4].copy_from_slice(&1e-40f32.to_le_bytes());
    cases.push(("subnormal-scale", m, "Normalization"));
    let mut m = good.clone();
    m.energy_scale = 1e-39;
    cases.push(("subnormal-energy-scale", m, "EnergyScale"));
    let mut m = good.clone();
    m.energy = OwnedEnergy::Separable {
        potential: OwnedMlp {
            activation: Activation::Tanh,
            layers: vec![OwnedLayer::new(1, 1, &[0.5], &[0.0], Precision::F32)],
        },
        kinetic: OwnedKinetic::quadratic(vec![1e-41]),
    };
    cases.push(("subnormal-inverse-mass", m, "InverseMass"));
    let mut m = good.clone();
    m.integrator.dt = 1e-42;
    cases.push(("subnormal-dt", m, "time step must lie in"));
    let mut m = good.clone();
    m.integrator.dt = 1e9;
    cases.push(("huge-dt", m, "time step must lie in"));
    for (name, model, wanted) in cases {
        let blob = d.join(format!("{name}.vvb"));
        std::fs::write(&blob, model.blob().unwrap()).unwrap();
        let mut c = visviva();
        c.args(["rollout", "--model"]).arg(&blob);
        c.args(["--init", "q1=0.1,p1=0", "--steps", "10", "--out"])
            .arg(d.join("r.csv"));
        refused(c, d, &[name, wanted]);
        let mut c = visviva();
        c.args(["export", "--model"])
            .arg(&blob)
            .arg("--out")
            .arg(d.join("e.vvb"));
        refused(c, d, &[name, wanted]);
    }
    // The same model with ordinary values steps.
    let blob = d.join("good.vvb");
    std::fs::write(&blob, good.blob().unwrap()).unwrap();
    let o = visviva()
        .args(["rollout", "--model"])
        .arg(&blob)
        .args(["--init", "q1=0.1,p1=0", "--steps", "10"])
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", stderr(&o));
    assert_eq!(String::from_utf8_lossy(&o.stdout).lines().count(), 12);
}
