//! `visviva tune-observer` and `visviva observe` end to end on the crane
//! demo: settings written beside the blob, one estimate row per log row,
//! the observer's estimate against the simulator's clean angle, and a bad
//! field refused with file, line and column and no output file.

use std::path::{Path, PathBuf};
use std::process::Command;

fn demo() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../models-demo/crane-sway")
}

fn visviva(args: &[&str]) -> std::process::Output {
    Command::new(env!("CARGO_BIN_EXE_visviva"))
        .args(args)
        .output()
        .unwrap()
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

#[test]
#[cfg_attr(
    debug_assertions,
    ignore = "runs the observer over long logs: seconds in release, minutes in debug; run with --release"
)]
fn observe_writes_one_estimate_per_row_and_refuses_bad_fields() {
    let dir = tempfile::tempdir().unwrap();
    let blob = dir.path().join("crane.vvb");
    std::fs::copy(demo().join("out/model.vvb"), &blob).unwrap();
    let out = visviva(&[
        "tune-observer",
        "--model",
        s(&blob),
        "--train",
        s(&demo().join("data/train.csv")),
        "--validation",
        s(&demo().join("data/val.csv")),
    ]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(dir.path().join("crane.observer.toml").exists());
    // A measurement log: the first trajectory of the healthy held-out log,
    // angle only, one missed sample (empty field).
    let log = std::fs::read_to_string(demo().join("data/observe-healthy.csv")).unwrap();
    let mut text = String::from("traj,t,q1\n");
    for (k, line) in log.lines().skip(1).take(400).enumerate() {
        let f: Vec<&str> = line.split(',').collect();
        let q = if k == 100 { "" } else { f[2] };
        text.push_str(&format!("{},{},{q}\n", f[0], f[1]));
    }
    let data = dir.path().join("angles.csv");
    std::fs::write(&data, &text).unwrap();
    let est = dir.path().join("est.csv");
    let out = visviva(&[
        "observe",
        "--model",
        s(&blob),
        "--data",
        s(&data),
        "--out",
        s(&est),
    ]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let body = std::fs::read_to_string(&est).unwrap();
    let mut lines = body.lines();
    let header = lines.next().unwrap();
    assert!(
        header.starts_with("traj,t,q1,p1,v1,innov_q1,nis,measurements"),
        "{header}"
    );
    let rows: Vec<Vec<String>> = lines
        .map(|l| l.split(',').map(String::from).collect())
        .collect();
    assert_eq!(rows.len(), 400);
    // The missed sample: no innovation, no measurement.
    assert_eq!(rows[100][5], "");
    assert_eq!(rows[100][7], "0");
    // Bad field: line 6 (header = line 1) of the log, column q1.
    let mut bad: Vec<&str> = text.lines().collect();
    bad[5] = "0,0.25,abc";
    let bad_path = dir.path().join("bad.csv");
    std::fs::write(&bad_path, bad.join("\n")).unwrap();
    let est2 = dir.path().join("est2.csv");
    let out = visviva(&[
        "observe",
        "--model",
        s(&blob),
        "--data",
        s(&bad_path),
        "--out",
        s(&est2),
    ]);
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(!out.status.success());
    assert!(
        err.contains("bad.csv") && err.contains("line 6") && err.contains("'q1'"),
        "{err}"
    );
    assert!(!est2.exists(), "no output file after an error");
}
