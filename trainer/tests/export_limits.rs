//! Exports that hold where the user goes (issue 18, item 6), through the
//! `visviva` binary: the implicit step's convergence proof over the training
//! range and the iteration limit it says is needed (on the command line and
//! as `[[export]] max_iterations`), budget advice that proposes only
//! changes that lower the failing figure, and a rollout that stops
//! part-way keeping what it computed. Each refusal is checked for its exit
//! status, its message and the folder's state.

mod cli_support;

use std::path::Path;

use cli_support::{
    assert_ok, assert_refused, assert_unchanged, simulate_flexure, snapshot, text, visviva_in,
};

/// The committed demo model of `demo` (a fitted blob) copied into `d`.
fn demo_model(d: &Path, demo: &str) -> &'static str {
    let src = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../models-demo")
        .join(demo)
        .join("out/model.vvb");
    std::fs::copy(src, d.join("model.vvb")).unwrap();
    "model.vvb"
}

/// The number after `before` in `s` (up to the next space, comma or ')').
fn number_after(s: &str, before: &str) -> u64 {
    let rest = s
        .split(before)
        .nth(1)
        .unwrap_or_else(|| panic!("no '{before}' in {s}"));
    let digits: String = rest.chars().take_while(char::is_ascii_digit).collect();
    digits
        .parse()
        .unwrap_or_else(|_| panic!("no number after '{before}' in {s}"))
}

/// The state a refusal names, as `rollout --init` takes it.
fn named_state(msg: &str) -> String {
    let rest = msg.split("from the state ").nth(1).unwrap();
    rest.split(" (").next().unwrap().to_string()
}

/// MAC per step of one substep at iteration limit k and `g` MAC per
/// gradient, counted from the method (runtime/src/integrate.rs): implicit
/// midpoint evaluates the field once for the explicit Euler guess and once
/// per iteration; the discrete-gradient method a gradient and an energy
/// (half a gradient) for the start and per iteration.
fn macs(method: &str, k: u64, g: u64) -> u64 {
    match method {
        "midpoint" => (1 + k) * g,
        _ => (3 * (1 + k)).div_ceil(2) * g,
    }
}

/// `visviva export` of `model` (500 check steps), with `--max-iterations`
/// when given.
fn export(d: &Path, model: &str, limit: Option<u64>, out: &str) -> std::process::Output {
    let limit = limit.map(|l| l.to_string());
    let mut args = vec![
        "export",
        "--model",
        model,
        "--check-steps",
        "500",
        "--out",
        out,
    ];
    if let Some(l) = &limit {
        args.extend(["--max-iterations", l.as_str()]);
    }
    visviva_in(d, &args)
}

/// One step of `visviva rollout` from `init` with `method` and iteration
/// limit `limit` into `r.csv` (`extra`: the input file of a driven model).
fn one_step(
    d: &Path,
    model: &str,
    method: &str,
    limit: u64,
    init: &str,
    extra: &[&str],
) -> std::process::Output {
    let limit = limit.to_string();
    let mut args = vec![
        "rollout",
        "--model",
        model,
        "--integrator",
        method,
        "--max-iterations",
        &limit,
        "--init",
        init,
        "--steps",
        "1",
        "--out",
        "r.csv",
    ];
    args.extend(extra);
    visviva_in(d, &args)
}

/// The export printed by `o` proved convergence with `needed` iterations
/// (`port_macs`: the port terms' MACs per gradient call, beside the
/// printed MAC/gradient of the energy):
/// that limit exports and costs what the method's count says; one less is
/// refused naming a state (nothing written), and one step of `visviva
/// rollout` from that state fails with the lower limit (keeping the
/// initial state, marked partial) and succeeds with the needed one.
fn the_needed_limit_holds(
    d: &Path,
    model: &str,
    method: &str,
    o: &std::process::Output,
    extra: &[&str],
    port_macs: u64,
) {
    let out = text(o).0;
    assert!(out.contains(&format!("integrator {method}")), "{out}");
    let needed = number_after(&out, "needed at most ");
    assert_eq!(number_after(&out, "iterations (limit "), 50, "{out}");
    assert!((2..50).contains(&needed), "{needed} iterations needed");
    let gradient = number_after(&out, "substeps; ");
    assert_eq!(
        number_after(&out, "MAC/gradient, "),
        macs(method, 50, gradient + port_macs),
        "{out}"
    );

    let o = export(d, model, Some(needed), "needed.vvb");
    assert_ok(&o);
    let out = text(&o).0;
    assert_eq!(
        number_after(&out, "MAC/gradient, "),
        macs(method, needed, gradient + port_macs),
        "{out}"
    );
    let o = visviva_in(d, &["inspect", "needed.vvb"]);
    assert_ok(&o);
    let shown = text(&o).0;
    assert!(
        shown.contains(&format!("<= {needed} iterations")),
        "{shown}"
    );

    let before = snapshot(d);
    let o = export(d, model, Some(needed - 1), "below.vvb");
    let err = assert_refused(
        &o,
        1,
        &[
            &format!("needs {needed} iterations to converge"),
            &format!("more than the limit of {}", needed - 1),
            &format!("set --max-iterations to at least {needed}"),
            "nothing was written",
        ],
    );
    assert_unchanged(&before, d, "export below the needed limit");
    let init = named_state(&err);
    let o = one_step(d, model, method, needed - 1, &init, extra);
    assert_refused(
        &o,
        1,
        &[
            "stopped part-way at step 1 of 1",
            "did not converge",
            "r.partial.csv",
        ],
    );
    assert!(!d.join("r.csv").exists());
    let partial = std::fs::read_to_string(d.join("r.partial.csv")).unwrap();
    assert_eq!(partial.lines().count(), 2, "{partial}");
    assert_ok(&one_step(d, model, method, needed, &init, extra));
    assert_eq!(
        std::fs::read_to_string(d.join("r.csv"))
            .unwrap()
            .lines()
            .count(),
        3
    );
}

/// A general model with implicit midpoint (the flexure demo): the export
/// says how many iterations the training range needs, and that limit holds.
#[test]
fn an_implicit_export_proves_convergence_and_names_the_limit_it_needs() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let model = demo_model(d, "flexure-sensor");
    let o = export(d, model, None, "default.vvb");
    assert_ok(&o);
    the_needed_limit_holds(d, model, "midpoint", &o, &[], 0);
}

/// A damped, driven model with the discrete-gradient method (the servo
/// demo; inputs zero as in the proof): either the proof passes and the
/// needed limit holds as above, or the export is refused naming a state
/// from which the step converges within no limit, and one step of
/// `visviva rollout` from it with the largest limit a blob can hold fails
/// the same way. Which one happens is printed.
#[test]
fn a_discrete_gradient_export_holds_from_every_state_it_names() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let model = demo_model(d, "servo-drivetrain");
    std::fs::write(d.join("u.csv"), "t,u1\n0,0\n").unwrap();
    let inputs = ["--inputs", "u.csv"];
    let before = snapshot(d);
    let o = export(d, model, None, "default.vvb");
    if o.status.success() {
        println!("proved: {}", text(&o).0);
        // Each full gradient call also applies the port terms: R = L L^T
        // (2n (2n + 1) MACs) and G u (2n m), n = 2, m = 1: 24 MACs
        // (the runtime's `Model::cost`).
        the_needed_limit_holds(d, model, "discrete-gradient", &o, &inputs, 24);
        return;
    }
    let err = assert_refused(
        &o,
        1,
        &[
            "does not converge within 1000 iterations",
            "nothing was written",
        ],
    );
    println!("refused: {err}");
    assert_unchanged(&before, d, "refused discrete-gradient export");
    let init = named_state(&err);
    let o = one_step(d, model, "discrete-gradient", 1000, &init, &inputs);
    assert_refused(
        &o,
        1,
        &[
            "stopped part-way at step 1 of 1",
            "did not converge in 1000 iterations",
        ],
    );
    // When the message names a looser tolerance, the step from that state
    // converges with it.
    if let Some(rest) = err.split("converge with --tolerance = ").nth(1) {
        let tolerance = rest.split(';').next().unwrap();
        let mut extra = inputs.to_vec();
        extra.extend(["--tolerance", tolerance]);
        assert_ok(&one_step(d, model, "discrete-gradient", 50, &init, &extra));
    }
}

/// The same proof in a project: `[[export]] max_iterations` is taken, and
/// the budget's step-time advice for a general model with implicit
/// midpoint proposes the limit the proof needed (with the MAC count it
/// gives), never int8 weights (which leave the MAC count as it is) nor
/// Stormer-Verlet (refused for a general model).
#[test]
fn a_project_takes_the_limit_and_the_budget_proposes_only_what_lowers_the_step_time() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    std::fs::create_dir_all(d.join("data")).unwrap();
    simulate_flexure(d, "data/train.csv", "1", "6");
    simulate_flexure(d, "data/val.csv", "2", "2");
    let project = |export: &str| {
        let text = format!(
            "[data]\ntrain = \"data/train.csv\"\nvalidation = \"data/val.csv\"\n[model]\n\
             arch = \"general\"\nhidden = [8]\n[fit]\nepochs = 5\nbaseline = false\n[check]\n\
             horizon_steps = 200\ngolden_steps = 20\n[[export]]\nname = \"g\"\n{export}\
             [device]\nclock_hz = 1000000\ncontrol_period_s = 1e-6\n"
        );
        std::fs::write(d.join("visviva.toml"), text).unwrap();
        let o = visviva_in(d, &["run", "."]);
        assert_ok(&o);
        let json: serde_json::Value =
            serde_json::from_slice(&std::fs::read(d.join("out/report.json")).unwrap()).unwrap();
        json["devices"][0].clone()
    };
    let dev = project("");
    let proof = &dev["export"]["convergence"];
    let needed = proof["iterations_needed"].as_u64().unwrap();
    assert_eq!(proof["max_iterations"], 50);
    assert!(needed < 50, "{proof}");
    let gradient = dev["export"]["macs_per_gradient"].as_u64().unwrap();
    assert_eq!(
        dev["export"]["macs_per_step"].as_u64().unwrap(),
        51 * gradient
    );
    let advice: Vec<String> = dev["budget"]["advice"]
        .as_array()
        .unwrap()
        .iter()
        .map(|a| a.as_str().unwrap().to_string())
        .collect();
    let time = advice
        .iter()
        .find(|a| a.contains("control period"))
        .unwrap();
    let at_needed = (1 + needed) * gradient;
    assert!(
        time.contains(&format!("max_iterations = {needed} "))
            && time.contains(&format!("{at_needed} MAC/step")),
        "{time}"
    );
    for never in ["int8", "verlet"] {
        assert!(!time.contains(never), "{time}");
    }
    // The key, as the advice put it: the blob carries it and costs that.
    let dev = project(&format!("max_iterations = {needed}\n"));
    assert_eq!(dev["export"]["convergence"]["max_iterations"], needed);
    assert_eq!(dev["export"]["macs_per_step"].as_u64().unwrap(), at_needed);
    // A limit below what the training range needs stops the run at the
    // export, naming the table and the key.
    if needed > 1 {
        let text = std::fs::read_to_string(d.join("visviva.toml")).unwrap();
        let below = text.replace(
            &format!("max_iterations = {needed}"),
            &format!("max_iterations = {}", needed - 1),
        );
        std::fs::write(d.join("visviva.toml"), below).unwrap();
        let o = visviva_in(d, &["run", "."]);
        assert_refused(&o, 1, &["[[export]] 'g'", "set max_iterations to at least"]);
    }
}

/// A separable model stepped by Stormer-Verlet over both budgets: the
/// flash advice proposes int8 weights with the size `visviva export
/// --weights int8` writes; the step-time advice proposes neither int8 nor
/// another integrator (nothing lowers the MAC count but narrower layers).
#[test]
fn budget_advice_for_a_separable_model_names_only_changes_of_the_failing_figure() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    std::fs::create_dir_all(d.join("data")).unwrap();
    simulate_flexure(d, "data/train.csv", "1", "6");
    simulate_flexure(d, "data/val.csv", "2", "2");
    std::fs::write(
        d.join("visviva.toml"),
        "[data]\ntrain = \"data/train.csv\"\nvalidation = \"data/val.csv\"\n[model]\n\
         arch = \"separable\"\nhidden = [8]\n[fit]\nepochs = 5\nbaseline = false\n[check]\n\
         horizon_steps = 200\ngolden_steps = 20\n[device]\nflash_bytes = 100\nclock_hz = 1000000\n\
         control_period_s = 1e-6\n",
    )
    .unwrap();
    assert_ok(&visviva_in(d, &["run", "."]));
    let json: serde_json::Value =
        serde_json::from_slice(&std::fs::read(d.join("out/report.json")).unwrap()).unwrap();
    let dev = &json["devices"][0];
    assert_eq!(dev["export"]["integrator"], "verlet");
    assert!(dev["export"]["convergence"].is_null());
    let advice: Vec<&str> = dev["budget"]["advice"]
        .as_array()
        .unwrap()
        .iter()
        .map(|a| a.as_str().unwrap())
        .collect();
    let flash = advice.iter().find(|a| a.contains("flash budget")).unwrap();
    let time = advice
        .iter()
        .find(|a| a.contains("control period"))
        .unwrap();
    assert_ok(&visviva_in(
        d,
        &[
            "export",
            "--model",
            "out/model.vvb",
            "--weights",
            "int8",
            "--out",
            "i8.vvb",
        ],
    ));
    let int8 = std::fs::metadata(d.join("i8.vvb")).unwrap().len();
    assert!(
        flash.contains(&format!("weights = \"int8\" (blob {int8} bytes)")),
        "{flash}"
    );
    for never in ["int8", "verlet", "max_iterations", "substeps"] {
        assert!(!time.contains(never), "{time}");
    }
    assert!(time.contains("narrower hidden layers"), "{time}");
}

/// A rollout to standard output that stops part-way: the rows computed
/// are printed, then the command exits non-zero naming the step.
#[test]
fn a_rollout_to_standard_output_that_stops_part_way_exits_non_zero() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let model = demo_model(d, "flexure-sensor");
    // Implicit midpoint with a step of 10 s from a state far outside the
    // training data: the fixed-point iteration cannot converge.
    let o = visviva_in(
        d,
        &[
            "rollout",
            "--model",
            model,
            "--init",
            "q1=0.004,p1=0",
            "--steps",
            "10",
            "--dt",
            "10",
        ],
    );
    let err = assert_refused(
        &o,
        1,
        &["stopped part-way at step ", "standard output holds them"],
    );
    let step = number_after(&err, "at step ") as usize;
    let out = text(&o).0;
    assert_eq!(out.lines().count(), step + 1, "{out}");
    assert!(out.starts_with("t,q1,p1,v1\n"), "{out}");
}

/// Adapter so the `ode_solvers` crate integrates the baseline's vector
/// field (evaluated in f32, as the rollout does).
struct BaselineField(visviva_trainer::learn::hnn::BaselineModel);

impl ode_solvers::System<f64, ode_solvers::DVector<f64>> for BaselineField {
    fn system(&self, _t: f64, y: &ode_solvers::DVector<f64>, dy: &mut ode_solvers::DVector<f64>) {
        let x: Vec<f32> = y.iter().map(|v| *v as f32).collect();
        for (d, f) in dy.iter_mut().zip(self.0.vector_field(&x)) {
            *d = f as f64;
        }
    }
}

/// `visviva rollout` of a baseline file (issue 18, item 5): from any state,
/// by RK4 at --dt, against the `ode_solvers` crate's own classical RK4 on
/// the same vector field with the same step, in f64: the two differ only by
/// the rollout's f32 rounding, about one epsilon (6e-8) per step over 160
/// steps, so 1e-4 of the state's scale bounds it with a margin. Flags that
/// mean nothing for a baseline are refused, and --dt is required.
#[test]
fn a_baseline_file_rolls_out_from_any_state_by_rk4() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    simulate_flexure(d, "train.csv", "1", "4");
    assert_ok(&visviva_in(
        d,
        &[
            "fit",
            "--train",
            "train.csv",
            "--out",
            "m.vvb",
            "--arch",
            "separable",
            "--hidden",
            "16",
            "--epochs",
            "60",
            "--baseline",
            "--quiet",
        ],
    ));
    let init = "q1=0.004,p1=0";
    let o = visviva_in(
        d,
        &[
            "rollout",
            "--model",
            "m.baseline.json",
            "--init",
            init,
            "--steps",
            "160",
            "--dt",
            "0.005",
            "--out",
            "b.csv",
        ],
    );
    assert_ok(&o);
    let rows: Vec<Vec<f64>> = std::fs::read_to_string(d.join("b.csv"))
        .unwrap()
        .lines()
        .skip(1)
        .map(|l| l.split(',').map(|v| v.parse().unwrap()).collect())
        .collect();
    assert_eq!(rows.len(), 161);
    let base =
        visviva_trainer::deploy::fitted_blob::read_baseline(&d.join("m.baseline.json")).unwrap();
    let mut solver = ode_solvers::Rk4::new(
        BaselineField(base),
        0.0,
        ode_solvers::DVector::from_vec(vec![0.004, 0.0]),
        0.8,
        0.005,
    );
    solver.integrate().unwrap();
    let (ts, ys) = solver.results().get();
    let scale: Vec<f64> = (0..2)
        .map(|c| rows.iter().map(|r| r[1 + c].abs()).fold(0.0, f64::max))
        .collect();
    let mut worst = 0.0f64;
    for (t, y) in ts.iter().zip(ys) {
        let k = (t / 0.005).round() as usize;
        for c in 0..2 {
            worst = worst.max((rows[k][1 + c] - y[c]).abs() / scale[c]);
        }
    }
    println!(
        "baseline rollout vs ode_solvers' RK4: largest difference {worst:.2e} of the state's scale over {} steps",
        ts.len() - 1
    );
    assert!(worst <= 1e-4, "{worst:.3e}");
    // A baseline has no time step or integrator of its own.
    let refused = |extra: &[&str], needle: &str| {
        let mut args = vec![
            "rollout",
            "--model",
            "m.baseline.json",
            "--init",
            init,
            "--steps",
            "3",
        ];
        args.extend(extra);
        assert_refused(&visviva_in(d, &args), 1, &[needle]);
    };
    refused(&[], "pass --dt");
    refused(
        &["--dt", "0.01", "--integrator", "verlet"],
        "apply to blobs",
    );
}
