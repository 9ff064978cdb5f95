//! `visviva fit --arch auto` on built-in systems whose right structure is
//! known from their closed-form energies: the double pendulum's kinetic
//! energy T = 1/2 v^T M(phi) v has a mass matrix that depends on the angles
//! (any mechanics text, e.g. Goldstein, *Classical Mechanics*, ch. 1), so a
//! separable H = T(p) + V(q) cannot hold it and the mechanical (or general)
//! structure must win; the flexure is a mass on a spring, H = p^2/(2m) +
//! k q^2/2 (textbook), which the separable structure holds exactly. Each
//! printed figure must equal the one `check` reports for the same short fit,
//! and the model written must be the one `--arch <chosen>` writes; `run`
//! with `arch = "auto"` prints the same lines and puts them in report.json
//! and on the page, every number tagged. Auto is the default (a project or a
//! `fit` that names no structure gets it); without held-out trajectories it
//! scores on the training ones and says so; when the settings permit one
//! structure only, nothing is fitted to choose.

mod cli_support;
mod page_numbers;

use std::path::Path;

use cli_support::{assert_ok, text, visviva_in};

/// Simulate `system`: `n` trajectories of `duration` s at `rate` Hz.
fn simulate(dir: &Path, system: &str, n: &str, duration: &str, rate: &str, seed: &str, out: &str) {
    assert_ok(&visviva_in(
        dir,
        &[
            "simulate",
            "--system",
            system,
            "--trajectories",
            n,
            "--duration",
            duration,
            "--rate",
            rate,
            "--seed",
            seed,
            "--out",
            out,
        ],
    ));
}

/// `visviva fit` of train.csv (validation val.csv) with `arch` and `epochs`
/// into `out`; returns standard output.
fn fit(dir: &Path, arch: &str, epochs: &str, out: &str, extra: &[&str]) -> String {
    let mut args = vec![
        "fit",
        "--train",
        "train.csv",
        "--validation",
        "val.csv",
        "--arch",
        arch,
        "--hidden",
        "32",
        "--batch",
        "64",
        "--epochs",
        epochs,
        "--quiet",
        "--out",
        out,
    ];
    args.extend_from_slice(extra);
    let o = visviva_in(dir, &args);
    assert_ok(&o);
    text(&o).0
}

/// The figure `visviva check` reports for `model` on val.csv.
fn checked_figure(dir: &Path, model: &str) -> f64 {
    let report = format!("{model}.check.json");
    assert_ok(&visviva_in(
        dir,
        &[
            "check",
            "--model",
            model,
            "--validation",
            "val.csv",
            "--report",
            &report,
        ],
    ));
    let r: serde_json::Value =
        serde_json::from_slice(&std::fs::read(dir.join(&report)).unwrap()).unwrap();
    r["check"]["median_model"]["state_rel_rmse"]
        .as_f64()
        .or_else(|| r["median_model"]["state_rel_rmse"].as_f64())
        .expect("the check report holds the median state error")
}

/// Each candidate's printed figure (`None` when skipped) and the choice.
fn parse(out: &str) -> (Vec<(String, Option<String>)>, String) {
    parse_figure(out, "held-out state error")
}

/// [`parse`] with the figure's printed name.
fn parse_figure(out: &str, figure_name: &str) -> (Vec<(String, Option<String>)>, String) {
    let mut figures = Vec::new();
    for name in ["separable", "mechanical", "general"] {
        let line = out
            .lines()
            .find(|l| {
                let l = l.trim_start();
                l.starts_with(name)
                    && (l.contains(figure_name)
                        || l.contains("skipped")
                        || l.contains("the only structure permitted"))
            })
            .unwrap_or_else(|| panic!("no line for {name}:\n{out}"));
        let figure = line
            .split(&format!("{figure_name} "))
            .nth(1)
            .map(|f| f.trim().to_string());
        figures.push((name.to_string(), figure));
    }
    let chosen = out
        .lines()
        .find_map(|l| l.strip_prefix("chosen: "))
        .and_then(|l| l.split_whitespace().next())
        .unwrap_or_else(|| panic!("no choice printed:\n{out}"))
        .to_string();
    (figures, chosen)
}

/// Run auto on `system`, check the choice's figure against `check` and the
/// written model against an explicit fit; returns the figures and choice.
fn auto_on(system: &str, duration: &str, rate: &str) -> (Vec<(String, f64)>, String) {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    simulate(d, system, "10", duration, rate, "1", "train.csv");
    simulate(d, system, "3", duration, rate, "2", "val.csv");
    let out = fit(d, "auto", "1000", "auto.vvb", &[]);
    println!("{system}:\n{out}");
    assert!(
        out.contains("fitted for 200 epochs (1/5 of the budget"),
        "{out}"
    );
    let (printed, chosen) = parse(&out);
    let mut figures = Vec::new();
    for (name, figure) in printed {
        let figure = figure.unwrap_or_else(|| panic!("{name} was skipped:\n{out}"));
        // The same short fit, written and checked: its figure is the one printed.
        let short = format!("{name}.vvb");
        fit(d, &name, "200", &short, &[]);
        let checked = checked_figure(d, &short);
        assert_eq!(figure, format!("{checked:.4e}"), "{name}");
        figures.push((name, checked));
    }
    let best = figures.iter().min_by(|a, b| a.1.total_cmp(&b.1)).unwrap();
    assert_eq!(best.0, chosen, "{figures:?}");
    // The winner is fitted with the full budget: the same model as asking for it.
    fit(d, &chosen, "1000", "explicit.vvb", &[]);
    assert_eq!(
        std::fs::read(d.join("auto.vvb")).unwrap(),
        std::fs::read(d.join("explicit.vvb")).unwrap()
    );
    (figures, chosen)
}

fn figure(figures: &[(String, f64)], name: &str) -> f64 {
    figures.iter().find(|f| f.0 == name).unwrap().1
}

#[test]
#[cfg_attr(debug_assertions, ignore = "release only (cargo xtask test runs it)")]
fn double_pendulum_picks_a_structure_with_an_angle_dependent_mass_matrix() {
    let (figures, chosen) = auto_on("double-pendulum", "2", "50");
    assert_ne!(chosen, "separable", "{figures:?}");
    assert!(
        figure(&figures, "separable") > figure(&figures, &chosen),
        "{figures:?}"
    );
}

#[test]
#[cfg_attr(debug_assertions, ignore = "release only (cargo xtask test runs it)")]
fn flexure_picks_the_separable_structure() {
    let (figures, chosen) = auto_on("flexure", "0.5", "200");
    assert_eq!(chosen, "separable", "{figures:?}");
}

#[test]
fn a_structure_the_integrator_refuses_is_skipped_with_its_reason() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    simulate(d, "flexure", "4", "0.2", "100", "1", "train.csv");
    simulate(d, "flexure", "2", "0.2", "100", "2", "val.csv");
    let out = fit(d, "auto", "5", "auto.vvb", &["--integrator", "verlet"]);
    let (figures, chosen) = parse(&out);
    // One structure left: it is chosen without a short fit.
    assert!(figures.iter().all(|f| f.1.is_none()), "{out}");
    assert!(
        out.contains("separable  the only structure permitted (not fitted to choose)"),
        "{out}"
    );
    assert!(
        out.contains("mechanical skipped: --integrator = \"verlet\" needs a separable energy"),
        "{out}"
    );
    assert!(
        out.contains("general    skipped: --integrator = \"verlet\" needs a separable energy"),
        "{out}"
    );
    assert!(out.contains("chosen: separable (the only structure permitted"));
    assert_eq!(chosen, "separable");
    // The model written is the one the explicit structure writes.
    fit(
        d,
        "separable",
        "5",
        "explicit.vvb",
        &["--integrator", "verlet"],
    );
    assert_eq!(
        std::fs::read(d.join("auto.vvb")).unwrap(),
        std::fs::read(d.join("explicit.vvb")).unwrap()
    );
}

/// `visviva fit` of train.csv alone (no held-out log) with `extra` flags
/// and no `--arch`; returns standard output.
fn fit_alone(dir: &Path, extra: &[&str], out: &str) -> String {
    let mut args = vec![
        "fit",
        "--train",
        "train.csv",
        "--hidden",
        "8",
        "--batch",
        "32",
        "--quiet",
        "--out",
        out,
    ];
    args.extend_from_slice(extra);
    let o = visviva_in(dir, &args);
    assert_ok(&o);
    text(&o).0
}

#[test]
fn without_held_out_trajectories_auto_is_the_default_and_says_it_chose_on_the_training_logs() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    // One trajectory: the split holds none out.
    simulate(d, "flexure", "1", "0.3", "100", "1", "train.csv");
    let out = fit_alone(d, &["--epochs", "10"], "auto.vvb");
    assert!(out.contains("arch = auto (the default"), "{out}");
    assert!(
        out.contains("no held-out logs: this favours the more flexible structure"),
        "{out}"
    );
    assert!(
        out.contains("(chosen on the training logs: no held-out logs;"),
        "{out}"
    );
    assert!(!out.contains("held-out state error"), "{out}");
    let (printed, chosen) = parse_figure(&out, "training state error");
    let mut figures = Vec::new();
    for (name, figure) in printed {
        let figure = figure.unwrap_or_else(|| panic!("{name} was skipped:\n{out}"));
        // The same short fit (10 / 5 = 2 epochs), checked on the training log.
        let short = format!("{name}.vvb");
        fit_alone(d, &["--arch", &name, "--epochs", "2"], &short);
        let report = format!("{name}.check.json");
        assert_ok(&visviva_in(
            d,
            &[
                "check",
                "--model",
                &short,
                "--validation",
                "train.csv",
                "--report",
                &report,
            ],
        ));
        let r: serde_json::Value =
            serde_json::from_slice(&std::fs::read(d.join(&report)).unwrap()).unwrap();
        let checked = r["median_model"]["state_rel_rmse"]
            .as_f64()
            .or_else(|| r["check"]["median_model"]["state_rel_rmse"].as_f64())
            .unwrap();
        assert_eq!(figure, format!("{checked:.4e}"), "{name}");
        figures.push((name, checked));
    }
    let best = figures.iter().min_by(|a, b| a.1.total_cmp(&b.1)).unwrap();
    assert_eq!(best.0, chosen, "{figures:?}");
    // --val-fraction 0 with several trajectories: the same rule, said the same way.
    simulate(d, "flexure", "3", "0.3", "100", "1", "train.csv");
    let out = fit_alone(d, &["--epochs", "5", "--val-fraction", "0"], "zero.vvb");
    assert!(
        out.contains("(chosen on the training logs: no held-out logs;"),
        "{out}"
    );
}

const PROJECT: &str = r#"
name = "auto rig"
[data]
train = "train.csv"
validation = "val.csv"
[model]
hidden = [8]
[fit]
epochs = 15
[check]
horizon_steps = 200
golden_steps = 50
[[export]]
name = "tiny-f32"
"#;

#[test]
fn run_without_arch_chooses_automatically_and_reports_the_choice_on_the_page() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    simulate(d, "flexure", "6", "0.4", "100", "1", "train.csv");
    simulate(d, "flexure", "2", "0.4", "100", "2", "val.csv");
    std::fs::write(d.join("visviva.toml"), PROJECT).unwrap();
    let o = visviva_in(d, &["run", "--quiet", "."]);
    assert_ok(&o);
    let out = text(&o).0;
    assert!(
        out.contains("fitted for 3 epochs (1/5 of the budget"),
        "{out}"
    );
    let (printed, chosen) = parse(&out);
    let json: serde_json::Value =
        serde_json::from_slice(&std::fs::read(d.join("out/report.json")).unwrap()).unwrap();
    let s = &json["structure_choice"];
    assert_eq!(s["chosen"], chosen.as_str());
    assert_eq!(s["short_budget"], 3);
    let mut best = (String::new(), f64::INFINITY);
    for (k, (name, figure)) in printed.iter().enumerate() {
        let c = &s["candidates"][k];
        assert_eq!(c["structure"], name.as_str());
        let v = c["state_rel_rmse"].as_f64().unwrap();
        assert_eq!(figure.as_deref(), Some(format!("{v:.4e}").as_str()));
        if v < best.1 {
            best = (name.clone(), v);
        }
    }
    assert_eq!(best.0, chosen);
    // The model written is the chosen structure.
    let architecture = json["architecture"].as_str().unwrap();
    assert!(architecture.starts_with(&chosen), "{architecture}");
    let html = std::fs::read_to_string(d.join("out/report.html")).unwrap();
    assert_eq!(page_numbers::disagreements(&html, &json), vec![]);
    assert_eq!(
        page_numbers::cells_without_untagged_digits(&html, "Structure choice"),
        9
    );
    assert!(html.contains("structure_choice/candidates/0/state_rel_rmse"));
    assert!(
        html.contains("The structure was chosen automatically (arch = \"auto\", the default"),
        "the page says the choice was automatic"
    );
    assert!(out.contains("arch = auto (the default"), "{out}");
    assert_eq!(s["basis"], "held_out");
    // A rerun of the same logs and settings reuses the fit and its choice.
    let again = visviva_in(d, &["run", "--quiet", "."]);
    assert_ok(&again);
    let again = text(&again).0;
    assert!(again.contains("reused from the last fit"), "{again}");
    assert_eq!(parse(&again), (printed, chosen));
}

#[test]
fn trajectory_matching_skips_the_structures_it_cannot_step() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    simulate(d, "flexure", "4", "0.6", "100", "1", "train.csv");
    simulate(d, "flexure", "2", "0.6", "100", "2", "val.csv");
    let out = fit(
        d,
        "auto",
        "5",
        "auto.vvb",
        &["--fit-mode", "trajectory", "--trajectory-epochs", "10"],
    );
    let (figures, chosen) = parse(&out);
    assert!(figures.iter().all(|f| f.1.is_none()), "{out}");
    assert!(
        out.contains("mechanical skipped: --fit-mode = trajectory needs arch = separable"),
        "{out}"
    );
    assert!(
        out.contains("separable  the only structure permitted (not fitted to choose)"),
        "{out}"
    );
    assert_eq!(chosen, "separable");
}

/// The check's figure for a damped or driven `model` on val.csv: the
/// median (the upper middle, as `check` takes it) of its driven rollouts'
/// state relative RMSE.
fn checked_port_figure(dir: &Path, model: &str) -> f64 {
    let report = format!("{model}.check.json");
    assert_ok(&visviva_in(
        dir,
        &[
            "check",
            "--model",
            model,
            "--validation",
            "val.csv",
            "--report",
            &report,
        ],
    ));
    let r: serde_json::Value =
        serde_json::from_slice(&std::fs::read(dir.join(&report)).unwrap()).unwrap();
    let mut v: Vec<f64> = r["rollouts"]
        .as_array()
        .expect("driven rollouts in the port check report")
        .iter()
        .map(|t| t["state_rel_rmse"].as_f64().unwrap())
        .collect();
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

#[test]
fn a_damped_driven_log_gets_the_default_choice_scored_by_its_driven_rollouts() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    // The servo drivetrain: damped and driven (inputs u1 in the log).
    simulate(d, "drivetrain", "4", "1", "200", "1", "train.csv");
    simulate(d, "drivetrain", "3", "1", "200", "2", "val.csv");
    let common = [
        "fit",
        "--train",
        "train.csv",
        "--validation",
        "val.csv",
        "--dissipation",
        "--hidden",
        "8",
        "--batch",
        "64",
        "--quiet",
    ];
    let with = |extra: &[&str]| {
        let mut args = common.to_vec();
        args.extend_from_slice(extra);
        let o = visviva_in(d, &args);
        assert_ok(&o);
        text(&o).0
    };
    let out = with(&["--epochs", "10", "--out", "auto.vvb"]);
    assert!(out.contains("arch = auto (the default"), "{out}");
    let (printed, chosen) = parse(&out);
    let mut figures = Vec::new();
    for (name, figure) in printed {
        let Some(figure) = figure else {
            // A structure the port terms cannot be planned with says why.
            assert!(out.contains(&format!("{name:<10} skipped: ")), "{out}");
            continue;
        };
        let short = format!("{name}.vvb");
        with(&["--arch", &name, "--epochs", "2", "--out", &short]);
        let checked = checked_port_figure(d, &short);
        assert_eq!(figure, format!("{checked:.4e}"), "{name}");
        figures.push((name, checked));
    }
    assert!(!figures.is_empty(), "{out}");
    let best = figures.iter().min_by(|a, b| a.1.total_cmp(&b.1)).unwrap();
    assert_eq!(best.0, chosen, "{figures:?}");
    with(&["--arch", &chosen, "--epochs", "10", "--out", "explicit.vvb"]);
    assert_eq!(
        std::fs::read(d.join("auto.vvb")).unwrap(),
        std::fs::read(d.join("explicit.vvb")).unwrap()
    );
}
