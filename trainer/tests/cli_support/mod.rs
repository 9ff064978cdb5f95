//! Shared by the tests that drive the `visviva` binary: running a command,
//! small simulated logs, and snapshots of a folder to prove that a refused
//! command changed no file and left none behind.

#![allow(dead_code)]

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

/// Run `visviva ARGS` in `cwd`.
pub fn visviva_in(cwd: &Path, args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_visviva"))
        .args(args)
        .current_dir(cwd)
        .output()
        .expect("the visviva binary starts")
}

/// Standard output and error of a finished command, for messages.
pub fn text(o: &Output) -> (String, String) {
    (
        String::from_utf8_lossy(&o.stdout).into_owned(),
        String::from_utf8_lossy(&o.stderr).into_owned(),
    )
}

/// Assert that the command succeeded.
pub fn assert_ok(o: &Output) {
    let (out, err) = text(o);
    assert!(o.status.success(), "stdout:\n{out}\nstderr:\n{err}");
}

/// Assert exit code `code` and that standard error contains every one of
/// `needles`; returns standard error.
pub fn assert_refused(o: &Output, code: i32, needles: &[&str]) -> String {
    let (out, err) = text(o);
    assert_eq!(
        o.status.code(),
        Some(code),
        "exit status\nstdout:\n{out}\nstderr:\n{err}"
    );
    for n in needles {
        assert!(
            err.contains(n),
            "stderr lacks {n:?}:\n{err}\nstdout:\n{out}"
        );
    }
    err
}

/// `visviva simulate --system flexure` into `out`: `n` trajectories of 0.4 s
/// at 100 Hz (small enough for fits of a second in a debug build).
pub fn simulate_flexure(cwd: &Path, out: &str, seed: &str, n: &str) {
    assert_ok(&visviva_in(
        cwd,
        &[
            "simulate",
            "--system",
            "flexure",
            "--trajectories",
            n,
            "--duration",
            "0.4",
            "--rate",
            "100",
            "--seed",
            seed,
            "--out",
            out,
        ],
    ));
}

/// A quick `visviva fit` of `log` into `out` (separable, 8 hidden units,
/// 3 epochs).
pub fn quick_fit(cwd: &Path, log: &str, out: &str) {
    assert_ok(&visviva_in(
        cwd,
        &[
            "fit",
            "--train",
            log,
            "--out",
            out,
            "--arch",
            "separable",
            "--hidden",
            "8",
            "--epochs",
            "3",
            "--quiet",
        ],
    ));
}

/// Every file under `dir` (recursively) with its bytes.
#[derive(Debug, PartialEq, Eq)]
pub struct Snapshot(BTreeMap<PathBuf, Vec<u8>>);

/// Take a snapshot of `dir`.
pub fn snapshot(dir: &Path) -> Snapshot {
    fn walk(root: &Path, dir: &Path, into: &mut BTreeMap<PathBuf, Vec<u8>>) {
        let Ok(entries) = std::fs::read_dir(dir) else {
            return;
        };
        for e in entries.flatten() {
            let p = e.path();
            if p.is_dir() {
                walk(root, &p, into);
            } else {
                let rel = p.strip_prefix(root).unwrap().to_path_buf();
                into.insert(rel, std::fs::read(&p).unwrap_or_default());
            }
        }
    }
    let mut files = BTreeMap::new();
    walk(dir, dir, &mut files);
    Snapshot(files)
}

/// Assert that `dir` holds exactly the files of `before`, byte for byte:
/// nothing changed, nothing added (no output, no temporary file).
pub fn assert_unchanged(before: &Snapshot, dir: &Path, what: &str) {
    let now = snapshot(dir);
    let added: Vec<_> = now
        .0
        .keys()
        .filter(|k| !before.0.contains_key(*k))
        .collect();
    let gone: Vec<_> = before
        .0
        .keys()
        .filter(|k| !now.0.contains_key(*k))
        .collect();
    let changed: Vec<_> = before
        .0
        .iter()
        .filter(|(k, v)| now.0.get(*k).is_some_and(|n| n != *v))
        .map(|(k, _)| k)
        .collect();
    assert!(
        added.is_empty() && gone.is_empty() && changed.is_empty(),
        "{what}: added {added:?}, removed {gone:?}, changed {changed:?}"
    );
}

/// The files under `dir` (recursively), as sorted relative paths.
pub fn snapshot_names(dir: &Path) -> Vec<String> {
    snapshot(dir)
        .0
        .keys()
        .map(|k| k.display().to_string())
        .collect()
}
