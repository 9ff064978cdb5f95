//! Hostile but realistic use of the `visviva` binary, one test per class of
//! the failures found by trying bad and absurd inputs on every command:
//! results that cannot be trusted (class 3), outputs that would destroy an
//! input (class 4), project settings checked late (class 7) and weak
//! messages (class 8). Each refusal is checked for its exit status, its
//! message (naming the flag, key or line), and that no file changed and
//! none was left behind.

mod cli_support;

use std::io::{BufRead, BufReader};
use std::path::Path;
use std::process::{Command, Stdio};

use cli_support::{
    assert_ok, assert_refused, assert_unchanged, quick_fit, simulate_flexure, snapshot, text,
    visviva_in,
};

/// A folder with a training log, a validation log and a quickly fitted
/// model `m.vvb`.
fn workspace() -> tempfile::TempDir {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    simulate_flexure(d, "train.csv", "1", "4");
    simulate_flexure(d, "val.csv", "2", "2");
    quick_fit(d, "train.csv", "m.vvb");
    dir
}

/// A small project (flexure logs, 8 hidden units, few epochs, short
/// checks) with `extra` appended to its file.
fn project(d: &Path, extra: &str) {
    std::fs::create_dir_all(d.join("data")).unwrap();
    simulate_flexure(d, "data/train.csv", "1", "6");
    simulate_flexure(d, "data/val.csv", "2", "2");
    let text = format!(
        "[data]\ntrain = \"data/train.csv\"\nvalidation = \"data/val.csv\"\n[model]\n\
         arch = \"separable\"\nhidden = [8]\n[fit]\nepochs = 5\nbaseline = false\n[check]\nhorizon_steps = 200\n\
         golden_steps = 20\n{extra}"
    );
    std::fs::write(d.join("visviva.toml"), text).unwrap();
}

#[test]
fn class3_untrusted_results_exit_non_zero_with_the_reason() {
    let dir = workspace();
    let d = dir.path();
    let before = snapshot(d);
    let fit = |extra: &[&str]| {
        let mut args = vec![
            "fit",
            "--train",
            "train.csv",
            "--out",
            "new.vvb",
            "--arch",
            "separable",
            "--hidden",
            "8",
            "--quiet",
        ];
        args.extend_from_slice(extra);
        visviva_in(d, &args)
    };
    // A learning rate that makes the loss NaN from the first update: the
    // untrained start must not be written as a model.
    let err = assert_refused(
        &fit(&["--epochs", "3", "--lr", "1e30"]),
        1,
        &["NaN or infinite", "nothing was written"],
    );
    assert!(err.contains("energy model"), "{err}");
    assert_unchanged(&before, d, "fit --lr 1e30");
    // Settings out of range, refused before any work, naming the flag.
    for (flags, needle) in [
        (vec!["--epochs", "0"], "--epochs = 0"),
        (vec!["--optimizer-steps", "0"], "--optimizer-steps = 0"),
        (vec!["--threads", "0"], "--threads = 0"),
        (vec!["--masses", "1e-40"], "--masses: mass 1 = 1e-40"),
        (vec!["--dt=-0.01"], "--dt = -0.01"),
        (vec!["--lr=-1"], "--lr = -1"),
    ] {
        let o = fit(&flags);
        assert_refused(&o, 1, &[needle]);
        assert!(!text(&o).0.contains("fitting"), "{flags:?} started a fit");
        assert_unchanged(&before, d, needle);
    }
    // A time step no blob can hold is refused before any work, naming the
    // flag and the range.
    let o = visviva_in(
        d,
        &[
            "export", "--model", "m.vvb", "--dt", "1e9", "--out", "e.vvb",
        ],
    );
    assert_refused(
        &o,
        1,
        &["--dt = 1000000000 s", "must lie in [1e-12, 1e6] s"],
    );
    assert_unchanged(&before, d, "--dt 1e9");
    // An export whose time step a blob can hold but whose check rollouts
    // show it cannot be meant.
    let o = visviva_in(
        d,
        &[
            "export", "--model", "m.vvb", "--dt", "1e5", "--out", "e.vvb",
        ],
    );
    assert_refused(&o, 1, &["dt = 100000 s", "nothing was written"]);
    for (flag, value, needle) in [
        ("--substeps", "0", "--substeps = 0"),
        ("--tolerance", "0", "--tolerance = 0"),
        ("--check-steps", "0", "--check-steps"),
    ] {
        let o = visviva_in(
            d,
            &["export", "--model", "m.vvb", flag, value, "--out", "e.vvb"],
        );
        assert_refused(&o, 1, &[needle]);
    }
    assert_unchanged(&before, d, "export");
    // Two empty files prove nothing: unreadable input, exit 2.
    std::fs::write(d.join("a.csv"), "").unwrap();
    std::fs::write(d.join("b.csv"), "t,q1\n").unwrap();
    let before = snapshot(d);
    for pair in [["a.csv", "a.csv"], ["b.csv", "b.csv"]] {
        let o = visviva_in(d, &["compare", pair[0], pair[1]]);
        assert_refused(&o, 2, &["nothing to compare"]);
    }
    assert_unchanged(&before, d, "compare");
}

#[test]
fn class3_a_project_with_an_absurd_export_is_not_a_pass() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    // Out-of-range device settings are refused before the first stage.
    for (extra, needle) in [
        (
            "[device]\nclock_hz = 1000000\ncontrol_period_s = -0.001\n",
            "[device] control_period_s = -0.001",
        ),
        (
            "[device]\ncycles_per_mac = -4.0\n",
            "[device] cycles_per_mac = -4",
        ),
    ] {
        project(d, extra);
        let before = snapshot(d);
        let o = visviva_in(d, &["run", "--quiet", "."]);
        assert_refused(&o, 1, &[needle]);
        assert_unchanged(&before, d, needle);
    }
    // dt = 1e5 s lies in the range a blob can hold, so it passes the
    // file's checks; the export's own rollouts then show it cannot be meant.
    project(
        d,
        "[[export]]\nname = \"huge-step\"\ndt = 1e5\n[device]\nflash_bytes = 1000000\n",
    );
    let o = visviva_in(d, &["run", "--quiet", "."]);
    let err = assert_refused(&o, 1, &["[[export]] 'huge-step'", "nothing was written"]);
    let out = text(&o).0;
    assert!(
        !out.contains("PASS") && !out.contains("budget pass"),
        "{out}\n{err}"
    );
    assert!(!d.join("out/huge-step.vvb").exists());
    assert!(!d.join("out/report.json").exists());
}

/// Start `visviva ARGS` in `d`, wait for a line of output containing
/// `ready`, press Ctrl-C (SIGINT) and return the finished process's output.
fn interrupt_after(d: &Path, args: &[&str], ready: &str) -> std::process::Output {
    let mut child = Command::new(env!("CARGO_BIN_EXE_visviva"))
        .args(args)
        .current_dir(d)
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let mut lines = BufReader::new(child.stdout.take().unwrap()).lines();
    let mut seen = String::new();
    for line in lines.by_ref() {
        let line = line.unwrap();
        seen.push_str(&line);
        seen.push('\n');
        if line.contains(ready) {
            break;
        }
    }
    assert!(seen.contains(ready), "never saw {ready:?}:\n{seen}");
    let st = Command::new("kill")
        .args(["-s", "INT", &child.id().to_string()])
        .status()
        .unwrap();
    assert!(st.success());
    let rest: Vec<String> = lines.map_while(Result::ok).collect();
    let mut o = child.wait_with_output().unwrap();
    o.stdout = format!("{seen}{}", rest.join("\n")).into_bytes();
    o
}

#[test]
fn class3_an_interrupted_fit_exits_non_zero_and_records_nothing() {
    let dir = workspace();
    let d = dir.path();
    let before = snapshot(d);
    // The Ctrl-C handler is in place before the first line is printed.
    let o = interrupt_after(
        d,
        &[
            "fit",
            "--train",
            "train.csv",
            "--out",
            "long.vvb",
            "--arch",
            "separable",
            "--hidden",
            "8",
            "--epochs",
            "1000000",
            "--no-early-stop",
            "--quiet",
        ],
        "fitting",
    );
    assert_refused(&o, 1, &["interrupted (Ctrl-C)", "nothing was"]);
    assert_unchanged(&before, d, "interrupted fit");

    let p = tempfile::tempdir().unwrap();
    let p = p.path();
    project(p, "");
    let toml = std::fs::read_to_string(p.join("visviva.toml")).unwrap();
    std::fs::write(
        p.join("visviva.toml"),
        toml.replace("epochs = 5", "epochs = 1000000"),
    )
    .unwrap();
    let o = interrupt_after(p, &["run", "--quiet", "."], "[1/5] data");
    assert_refused(&o, 1, &["interrupted (Ctrl-C)"]);
    // No fit hash (a rerun must fit again), no model.
    assert!(!p.join("out/fit.sha256").exists());
    assert!(!p.join("out/model.vvb").exists());
}

#[test]
fn class4_an_output_that_is_an_input_is_refused_before_work() {
    let dir = workspace();
    let d = dir.path();
    std::fs::hard_link(d.join("train.csv"), d.join("link.csv")).unwrap();
    std::fs::create_dir(d.join("sub")).unwrap();
    std::fs::write(d.join("sub/keep.txt"), "a file").unwrap();
    let before = snapshot(d);
    let cases: [(&[&str], &[&str]); 10] = [
        (
            &["fit", "--train", "train.csv", "--out", "./sub/../train.csv"],
            &["--out ./sub/../train.csv", "same file as --train train.csv"],
        ),
        (
            &["fit", "--train", "train.csv", "--out", "link.csv"],
            &["--out link.csv", "--train"],
        ),
        (
            &[
                "fit",
                "--train",
                "train.csv",
                "--validation",
                "val.csv",
                "--out",
                "val.csv",
            ],
            &["--out val.csv", "--validation"],
        ),
        (
            &[
                "fit",
                "--train",
                "train.csv",
                "--out",
                "n.vvb",
                "--history",
                "n.vvb",
            ],
            &["--out n.vvb and --history n.vvb name the same file"],
        ),
        (
            &[
                "fit",
                "--train",
                "train.csv",
                "--out",
                "n.vvb",
                "--baseline",
                "--json",
                "n.baseline.json",
            ],
            &["--json n.baseline.json", "same file"],
        ),
        (
            &[
                "rollout",
                "--model",
                "m.vvb",
                "--init",
                "q1=0.001,p1=0",
                "--steps",
                "5",
                "--out",
                "sub/../m.vvb",
            ],
            &["--out sub/../m.vvb", "--model m.vvb"],
        ),
        (
            &["export", "--model", "m.vvb", "--out", "m.vvb"],
            &["--out m.vvb", "--model m.vvb"],
        ),
        (
            &[
                "check",
                "--model",
                "m.vvb",
                "--validation",
                "val.csv",
                "--report",
                "val.csv",
            ],
            &["--report val.csv", "--validation val.csv"],
        ),
        // A missing or impossible output folder is found before the fit.
        (
            &["fit", "--train", "train.csv", "--out", "missing/n.vvb"],
            &["--out missing/n.vvb", "missing does not exist"],
        ),
        (
            &["fit", "--train", "train.csv", "--out", "train.csv/n.vvb"],
            &["train.csv is not a folder"],
        ),
    ];
    for (args, needles) in cases {
        let o = visviva_in(d, args);
        assert_refused(&o, 1, needles);
        assert!(!text(&o).0.contains("fitting"), "{args:?} started a fit");
        assert_unchanged(&before, d, &args.join(" "));
    }
    // visviva run rewrites out/: a log kept there is refused.
    let p = tempfile::tempdir().unwrap();
    let p = p.path();
    project(p, "");
    std::fs::create_dir(p.join("out")).unwrap();
    std::fs::rename(p.join("data/val.csv"), p.join("out/val.csv")).unwrap();
    let toml = std::fs::read_to_string(p.join("visviva.toml")).unwrap();
    std::fs::write(
        p.join("visviva.toml"),
        toml.replace("data/val.csv", "out/val.csv"),
    )
    .unwrap();
    let before = snapshot(p);
    let o = visviva_in(p, &["run", "--quiet", "."]);
    assert_refused(&o, 1, &["[data] validation", "lies in out/"]);
    assert_unchanged(&before, p, "run with a log in out/");
}

#[test]
fn class7_the_whole_project_file_is_checked_before_the_first_stage() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    for (extra, needles) in [
        (
            "[[export]]\nname = \"a\"\ndt = 0.0\n",
            &["[[export]] 'a' (table 1): dt = 0"][..],
        ),
        (
            "[[export]]\nname = \"a\"\n[[export]]\nname = \"b\"\nsubsteps = 0\n",
            &["[[export]] 'b' (table 2): substeps = 0"][..],
        ),
        (
            "[[export]]\nname = \"model\"\n",
            &["name = \"model\" is taken"][..],
        ),
        (
            "[[export]]\nname = \"a\"\nintegrator = \"verlet\"\n",
            &[][..],
        ),
        // Keys of [check], the project's last table.
        (
            "reference_system = \"no-such-rig\"\n",
            &["[check] reference_system"][..],
        ),
        ("golden_states = 0\n", &["[check] golden_states = 0"][..]),
    ] {
        // The fourth case: a general model cannot be stepped by Verlet.
        let general = extra.contains("verlet");
        project(d, extra);
        if general {
            let t = std::fs::read_to_string(d.join("visviva.toml")).unwrap();
            let t = t.replace("arch = \"separable\"", "arch = \"general\"");
            std::fs::write(d.join("visviva.toml"), t).unwrap();
        }
        let before = snapshot(d);
        let o = visviva_in(d, &["run", "--quiet", "."]);
        let err = assert_refused(&o, 1, needles);
        if general {
            assert!(err.contains("[[export]] a: integrator"), "{err}");
        }
        assert!(!text(&o).0.contains("[2/5]"), "a stage started:\n{err}");
        assert_unchanged(&before, d, extra);
    }
}

#[test]
fn class7_out_never_holds_blobs_of_another_model() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    project(d, "[[export]]\nname = \"old\"\n");
    assert_ok(&visviva_in(d, &["run", "--quiet", "."]));
    for f in ["out/old.vvb", "out/old.export.json", "out/golden/old-0.csv"] {
        assert!(d.join(f).exists(), "{f}");
    }
    // A new seed refits the model; the new export is refused at its stage.
    let t = std::fs::read_to_string(d.join("visviva.toml")).unwrap();
    let t = t.replace("epochs = 5", "epochs = 5\nseed = 7") + "dt = 1e5\n";
    std::fs::write(d.join("visviva.toml"), t).unwrap();
    let o = visviva_in(d, &["run", "--quiet", "."]);
    assert_refused(&o, 1, &["[[export]] 'old'"]);
    assert!(d.join("out/model.vvb").exists());
    let left: Vec<String> = cli_support::snapshot_names(&d.join("out"));
    assert_eq!(
        left,
        ["fit.json", "fit.sha256", "model.params.json", "model.vvb"],
        "out/ after the refused export"
    );
}

#[test]
fn class8_messages_name_the_real_problem() {
    let dir = workspace();
    let d = dir.path();
    let log = std::fs::read_to_string(d.join("val.csv")).unwrap();
    // A duplicated column: named as such, with both positions.
    let mut dup = log.lines().map(|l| {
        let first = l.split(',').nth(2).unwrap_or("");
        format!("{l},{first}")
    });
    let header = dup.next().unwrap();
    let repeat = format!(
        "appears twice (columns 3 and {})",
        header.split(',').count()
    );
    let dup_text: Vec<String> = std::iter::once(header).chain(dup).collect();
    std::fs::write(d.join("dup.csv"), dup_text.join("\n")).unwrap();
    // A semicolon-separated export from a spreadsheet.
    std::fs::write(d.join("semi.csv"), log.replace(',', ";")).unwrap();
    // Input columns in a log for a model without inputs.
    let with_u: Vec<String> = log
        .lines()
        .enumerate()
        .map(|(k, l)| {
            if k == 0 {
                format!("{l},u1")
            } else {
                format!("{l},0.5")
            }
        })
        .collect();
    std::fs::write(d.join("driven.csv"), with_u.join("\n")).unwrap();
    // Two files differing only in a NaN's payload.
    std::fs::write(d.join("nan-a.csv"), "t,q1\n0,0x7fc00000\n").unwrap();
    std::fs::write(d.join("nan-b.csv"), "t,q1\n0,0x7fc00001\n").unwrap();
    let before = snapshot(d);

    let check = |log: &str, extra: &[&str]| {
        let mut args = vec![
            "check",
            "--model",
            "m.vvb",
            "--validation",
            log,
            "--horizon-steps",
            "50",
        ];
        args.extend_from_slice(extra);
        visviva_in(d, &args)
    };
    assert_refused(
        &check("dup.csv", &[]),
        1,
        &["dup.csv: line 1, column 'q1'", &repeat],
    );
    assert_refused(
        &check("semi.csv", &[]),
        1,
        &["semi.csv: line 1", "separated by semicolons"],
    );
    let o = check("val.csv", &["--masses", "2"]);
    assert_ok(&o);
    assert!(
        text(&o).1.contains("the masses given are not used"),
        "{}",
        text(&o).1
    );
    let o = check("driven.csv", &[]);
    assert_ok(&o);
    assert!(
        text(&o).1.contains("input columns u1..u1 are ignored"),
        "{}",
        text(&o).1
    );
    // compare: a NaN matches only the same NaN, in both modes.
    for rel in [&[][..], &["--rel", "0.5"][..]] {
        let run = |a: &str, b: &str| {
            let mut args = vec!["compare", a, b];
            args.extend_from_slice(rel);
            visviva_in(d, &args).status.code()
        };
        assert_eq!(run("nan-a.csv", "nan-b.csv"), Some(1), "{rel:?}");
        assert_eq!(run("nan-a.csv", "nan-a.csv"), Some(0), "{rel:?}");
    }
    assert_unchanged(&before, d, "class 8");
}

/// Class 8: a rollout from a state far outside the training data runs, but
/// says so (the threshold, 5 standard deviations of the training states, is
/// common practice for outliers); a state inside the data gets no warning.
#[test]
fn class8_a_state_far_outside_the_training_data_is_warned_about() {
    let dir = workspace();
    let d = dir.path();
    let log = std::fs::read_to_string(d.join("train.csv")).unwrap();
    let mut lines = log.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    let row: Vec<&str> = lines.next().unwrap().split(',').collect();
    let init = |factor: f64| {
        header
            .iter()
            .zip(&row)
            .filter(|(h, _)| h.starts_with('q') || h.starts_with('p'))
            .map(|(h, v)| format!("{h}={}", v.parse::<f64>().unwrap() * factor))
            .collect::<Vec<_>>()
            .join(",")
    };
    let rollout = |spec: &str| {
        visviva_in(
            d,
            &[
                "rollout", "--model", "m.vvb", "--init", spec, "--steps", "20",
            ],
        )
    };
    let inside = rollout(&init(1.0));
    assert_ok(&inside);
    let (_, err) = text(&inside);
    assert!(!err.contains("far outside"), "{err}");
    let far = rollout(&init(1.0e4));
    assert_ok(&far);
    let (out, err) = text(&far);
    assert!(
        err.contains("warning: the initial state lies far outside the training data"),
        "{err}"
    );
    assert!(
        err.contains("standard deviations from the training mean"),
        "{err}"
    );
    assert_eq!(
        out.lines().count(),
        22,
        "header and 21 states still written"
    );
}
