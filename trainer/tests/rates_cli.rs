//! Joint-rate logs without masses through the binary: `visviva fit` reads
//! `t,traj,q1,v1` without `--masses`, says the momenta come from a learned
//! mass matrix and how it is normalized; `visviva check` and `visviva
//! tune-observer` turn a rates log into momenta with the model's own mass
//! matrix; a model without one (a general energy H(q, p)) is refused
//! naming the log; masses with the mechanical structure are refused naming
//! the flag. The log: a mass on a spring, q = A cos(w t + phi), v = -A w sin(w t + phi)
//! (the harmonic oscillator's closed form, any mechanics text).

mod cli_support;

use std::fmt::Write as _;
use std::path::Path;

use cli_support::{assert_ok, assert_refused, text, visviva_in};

/// `runs` runs of 2 s at 100 Hz, w = 2 pi rad/s, amplitudes and phases
/// varying from run to run.
fn rates_log(dir: &Path, name: &str, runs: usize, offset: f64) {
    let w = std::f64::consts::TAU;
    let mut csv = String::from("t,traj,q1,v1\n");
    for r in 0..runs {
        let (a, phi) = (0.2 + 0.05 * (r as f64 + offset), 0.7 * (r as f64 + offset));
        for k in 0..200 {
            let t = k as f64 * 0.01;
            writeln!(
                csv,
                "{t},{r},{},{}",
                a * (w * t + phi).cos(),
                -a * w * (w * t + phi).sin()
            )
            .unwrap();
        }
    }
    std::fs::write(dir.join(name), csv).unwrap();
}

fn fit(dir: &Path, arch: &str, out: &str) -> String {
    let o = visviva_in(
        dir,
        &[
            "fit",
            "--train",
            "train.csv",
            "--validation",
            "val.csv",
            "--arch",
            arch,
            "--hidden",
            "16",
            "--epochs",
            "20",
            "--quiet",
            "--out",
            out,
        ],
    );
    assert_ok(&o);
    text(&o).0
}

#[test]
fn rates_without_masses_fit_check_and_refuse_a_model_without_mass_matrix() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    rates_log(d, "train.csv", 6, 0.0);
    rates_log(d, "val.csv", 2, 0.5);
    let out = fit(d, "separable", "m.vvb");
    assert!(
        out.contains("joint rates without masses: momenta p = M(q) v"),
        "{out}"
    );
    assert!(out.contains("normalized so the mean M11 is 1"), "{out}");
    let o = visviva_in(d, &["check", "--model", "m.vvb", "--validation", "val.csv"]);
    assert_ok(&o);
    let check = text(&o).0;
    assert!(
        check.contains("momenta p = M(q) v from the model's own mass matrix"),
        "{check}"
    );
    // The observer's tuning reads the same logs the same way.
    let o = visviva_in(
        d,
        &[
            "tune-observer",
            "--model",
            "m.vvb",
            "--train",
            "train.csv",
            "--out",
            "m.observer.toml",
        ],
    );
    assert_ok(&o);
    let err = text(&o).1;
    assert!(
        err.contains("momenta p = M(q) v from the model's own mass matrix"),
        "{err}"
    );
    assert!(d.join("m.observer.toml").exists());
    fit(d, "general", "g.vvb");
    let o = visviva_in(d, &["check", "--model", "g.vvb", "--validation", "val.csv"]);
    assert_refused(&o, 1, &["val.csv", "no mass matrix"]);
    // Masses with the mechanical structure: p = m v would not be its
    // momenta; refused naming the flag, and skipped by the automatic choice.
    let o = visviva_in(
        d,
        &[
            "fit",
            "--train",
            "train.csv",
            "--arch",
            "mechanical",
            "--masses",
            "2",
            "--quiet",
            "--out",
            "x.vvb",
        ],
    );
    assert_refused(&o, 1, &["--masses", "depends on the positions"]);
    assert!(!d.join("x.vvb").exists());
    let o = visviva_in(
        d,
        &[
            "fit",
            "--train",
            "train.csv",
            "--validation",
            "val.csv",
            "--masses",
            "2",
            "--hidden",
            "16",
            "--epochs",
            "10",
            "--quiet",
            "--out",
            "a.vvb",
        ],
    );
    assert_ok(&o);
    let out = text(&o).0;
    assert!(
        out.contains("mechanical skipped: --masses form the momenta"),
        "{out}"
    );
}
