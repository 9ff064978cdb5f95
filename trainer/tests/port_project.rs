//! Damped and driven models through `visviva fit` and `visviva run`:
//! * `visviva fit --dissipation --baseline --json` on driven data writes the
//!   run summary and a baseline that takes the input; a driven baseline learns
//!   the drivetrain's input matrix G = (0, 0, 1, 0)^T (the motor torque is
//!   the rate of the motor's angular momentum, Newton's second law for a
//!   rotating body: dp1/dt = ... + u, so d(dp1/dt)/du = 1 and
//!   d(dp2/dt)/du = 0);
//! * `visviva run` on a driven project: the report shows exactly the numbers
//!   of report.json (damping per mode, response to held-out inputs), the
//!   golden rollouts replay the held-out trajectory's logged inputs, and
//!   `visviva rollout --inputs` on the golden input file reproduces them bit
//!   for bit (what the device check does);
//! * a port model with Stormer-Verlet is refused before anything is written;
//! * the reference modes of the built-in systems equal their closed forms:
//!   an undamped two-inertia chain oscillates at
//!   sqrt(k (1/Jm + 1/Jl)) (any vibration text, e.g. Thomson & Dahleh,
//!   "Theory of Vibration with Applications", two-degree-of-freedom
//!   systems; from memory), and a damped oscillator
//!   m x'' + c x' + k x = 0 has |lambda| = sqrt(k / m) and damping ratio
//!   -Re(lambda) / |lambda| = zeta exactly (textbook closed form).

mod page_numbers;

use std::path::Path;
use std::process::Command;

use clap::Parser;
use visviva_trainer::cli::fit;
use visviva_trainer::evidence::check::reference_modes;
use visviva_trainer::learn::fit::{fit_baseline, ArchChoice, FitSettings};
use visviva_trainer::learn::hnn::PortArch;
use visviva_trainer::learn::net::Activation;
use visviva_trainer::reference::build_system;
use visviva_trainer::reference::simulate::{simulate as simulate_system, SimulationSpec};

fn visviva(args: &[&str]) -> std::process::Output {
    Command::new(env!("CARGO_BIN_EXE_visviva"))
        .args(args)
        .output()
        .unwrap()
}

fn simulate(out: &Path, seed: &str, trajectories: &str, duration: &str) {
    let o = visviva(&[
        "simulate",
        "--system",
        "drivetrain",
        "--trajectories",
        trajectories,
        "--duration",
        duration,
        "--rate",
        "200",
        "--seed",
        seed,
        "--out",
        out.to_str().unwrap(),
    ]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
}

#[derive(Parser)]
struct Cli {
    #[command(flatten)]
    args: fit::Args,
}

#[test]
fn fit_writes_the_summary_and_a_baseline_that_takes_the_input() {
    let dir = tempfile::tempdir().unwrap();
    let p = dir.path();
    simulate(&p.join("train.csv"), "5", "6", "2");
    let out = p.join("m.vvb");
    let json = p.join("m.json");
    let args = Cli::try_parse_from([
        "visviva-fit",
        "--data",
        p.join("train.csv").to_str().unwrap(),
        "--dissipation",
        "--baseline",
        "--arch",
        "separable",
        "--hidden",
        "16,16",
        "--epochs",
        "5",
        "--quiet",
        "--json",
        json.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
    ])
    .unwrap()
    .args;
    fit::run(args).unwrap();

    let summary: serde_json::Value =
        serde_json::from_slice(&std::fs::read(&json).unwrap()).unwrap();
    let arch = ArchChoice {
        hidden: vec![16, 16],
        ..ArchChoice::default()
    }
    .build(2)
    .unwrap();
    let port = PortArch {
        dissipation: true,
        inputs: 1,
        ..PortArch::default()
    };
    assert_eq!(
        summary["parameters"].as_u64().unwrap() as usize,
        arch.param_count(2) + port.param_count(2)
    );
    let loss = summary["final_train_loss"].as_f64().unwrap();
    assert!(loss.is_finite() && loss > 0.0, "{summary}");
    assert!(summary["steps"].as_u64().unwrap() > 0);

    let base =
        visviva_trainer::deploy::fitted_blob::read_baseline(&fit::baseline_path(&out)).unwrap();
    assert_eq!(base.inputs(), 1);
    assert_eq!(base.shape.inputs(), 5);
    assert_eq!(base.shape.outputs(), 4);

    // `visviva check` finds the baseline beside the model and rolls it out
    // with the logged inputs next to the model: its JSON numbers are those
    // of the library's driven baseline rollout.
    let report = p.join("check.json");
    let o = visviva(&[
        "check",
        "--model",
        out.to_str().unwrap(),
        "--data",
        p.join("train.csv").to_str().unwrap(),
        "--report",
        report.to_str().unwrap(),
    ]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let stdout = String::from_utf8_lossy(&o.stdout);
    assert!(stdout.contains("baseline"), "{stdout}");
    let r: serde_json::Value = serde_json::from_slice(&std::fs::read(&report).unwrap()).unwrap();
    let ds = visviva_trainer::data::log::load_csv(
        &p.join("train.csv"),
        &visviva_trainer::data::log::LoadOptions::default(),
    )
    .unwrap();
    let expected = visviva_trainer::evidence::check::driven_baseline(&base, &ds);
    let got = r["baseline_rollouts"].as_array().unwrap();
    assert_eq!(got.len(), ds.trajectories.len());
    assert_eq!(r["rollouts"].as_array().unwrap().len(), got.len());
    for (g, e) in got.iter().zip(&expected) {
        assert_eq!(g["id"].as_str().unwrap(), e.id);
        if e.failure.is_none() {
            // serde_json's default float parser may land one ulp off (its
            // `float_roundtrip` feature is off), hence the ulp-level bound.
            let v = g["state_rel_rmse"].as_f64().unwrap();
            assert!((v - e.state_rel_rmse).abs() <= 2.0 * f64::EPSILON * v.abs());
        }
    }
}

#[test]
#[cfg_attr(
    debug_assertions,
    ignore = "trains for about 2 s in release but minutes in debug; run with --release"
)]
fn the_driven_baseline_learns_the_input_matrix_of_the_drivetrain() {
    let system = build_system("drivetrain", &[]).unwrap();
    let spec = SimulationSpec {
        trajectories: 10,
        duration: 4.0,
        rate: 200.0,
        seed: 41,
    };
    let ds = simulate_system(system.as_ref(), &spec).unwrap();
    let settings = FitSettings {
        epochs: 150,
        quiet: true,
        ..FitSettings::default()
    };
    let base = fit_baseline(&ds, None, &[32, 32], Activation::Tanh, &settings)
        .unwrap()
        .model;
    // d(dx/dt)/du by central differences (step: the input's RMS) at logged
    // states and inputs, averaged.
    let h = base.input_scale[0];
    let (mut g1, mut g2, mut count) = (0.0f64, 0.0f64, 0usize);
    for t in &ds.trajectories {
        let ut = &t.u;
        for r in (0..t.t.len()).step_by(40) {
            let x: Vec<f32> = t.x.row(r).iter().map(|v| *v as f32).collect();
            let u0 = ut[[r, 0]] as f32;
            let plus = base.vector_field_driven(&x, &[u0 + h]);
            let minus = base.vector_field_driven(&x, &[u0 - h]);
            g1 += ((plus[2] - minus[2]) / (2.0 * h)) as f64;
            g2 += ((plus[3] - minus[3]) / (2.0 * h)) as f64;
            count += 1;
        }
    }
    let (g1, g2) = (g1 / count as f64, g2 / count as f64);
    println!(
        "baseline input gains over {count} states: d(dp1/dt)/du {g1:.4}, d(dp2/dt)/du {g2:.4}"
    );
    assert!((g1 - 1.0).abs() < 0.1, "d(dp1/dt)/du = {g1}, closed form 1");
    assert!(g2.abs() < 0.1, "d(dp2/dt)/du = {g2}, closed form 0");

    // Held constant over an RK4 step, the input moves p1 by about u dt
    // from rest (dp1/dt = u at zero twist and speed; exact to first order).
    let mut x = vec![0.0f32; 4];
    let (tau, dt) = (0.01f32, 1e-3f32);
    base.step_rk4_driven(&mut x, &[tau], dt);
    let mut x0 = vec![0.0f32; 4];
    base.step_rk4_driven(&mut x0, &[0.0], dt);
    let dp1 = (x[2] - x0[2]) as f64;
    let want = (tau * dt) as f64;
    println!(
        "p1 after one step with u = {tau}: {dp1:.4e} beyond the unforced step (u dt = {want:.4e})"
    );
    assert!((dp1 - want).abs() / want < 0.1, "{dp1} vs {want}");
}

const PROJECT: &str = r#"
name = "tiny drivetrain"
[data]
train = "data/train.csv"
validation = "data/val.csv"
[model]
arch = "separable"
hidden = [8]
dissipation = true
[fit]
epochs = 15
[check]
horizon_steps = 200
golden_steps = 120
reference_system = "drivetrain"
horizons = [0.25, 0.5, 5.0]
[[export]]
name = "tiny-dgrad"
[[export]]
name = "tiny-midpoint"
integrator = "midpoint"
"#;

/// A golden CSV's rows as bit patterns, and the input file's rows.
fn read_rows(path: &Path) -> Vec<Vec<String>> {
    std::fs::read_to_string(path)
        .unwrap()
        .lines()
        .skip(1)
        .map(|l| l.split(',').map(str::to_string).collect())
        .collect()
}

#[test]
fn run_reports_damping_and_replays_the_held_out_inputs() {
    let dir = tempfile::tempdir().unwrap();
    let p = dir.path();
    std::fs::create_dir_all(p.join("data")).unwrap();
    simulate(&p.join("data/train.csv"), "1", "4", "1");
    simulate(&p.join("data/val.csv"), "2", "2", "1");
    std::fs::write(p.join("visviva.toml"), PROJECT).unwrap();

    let o = visviva(&["run", "--quiet", p.to_str().unwrap()]);
    let stdout = String::from_utf8_lossy(&o.stdout);
    assert!(
        o.status.success(),
        "{stdout}\n{}",
        String::from_utf8_lossy(&o.stderr)
    );
    assert!(stdout.contains("not a safety function"), "{stdout}");

    let json: serde_json::Value =
        serde_json::from_slice(&std::fs::read(p.join("out/report.json")).unwrap()).unwrap();
    assert!(json.get("check").is_none(), "no conservative drift check");
    assert_eq!(json["data"]["inputs"], 1);
    let port = &json["port"];
    assert_eq!(port["inputs"], 1);
    assert_eq!(port["dissipation"], true);
    assert_eq!(port["driven"].as_array().unwrap().len(), 2);
    assert!(port["median_baseline_state_rel_rmse"].as_f64().is_some());
    // The reference system's shaft mode: near the undamped two-inertia
    // frequency sqrt(k (1/Jm + 1/Jl)) / (2 pi) = 12.33 Hz (defaults
    // k = 1 N m/rad, Jm = 2e-4, Jl = 1e-3 kg m^2); the shaft damper and the
    // friction move |lambda| by 0.1 % here, so 1 % is asserted.
    let f_undamped = (1.0f64 * (1.0 / 2e-4 + 1.0 / 1e-3)).sqrt() / (2.0 * std::f64::consts::PI);
    let reference = port["reference_modes"].as_array().unwrap();
    let shaft = reference
        .iter()
        .find(|m| m["imag"].as_f64().unwrap() > 0.0)
        .unwrap();
    let f = shaft["natural_hz"].as_f64().unwrap();
    assert!(
        (f - f_undamped).abs() / f_undamped < 0.01,
        "{f} vs {f_undamped}"
    );

    let html = std::fs::read_to_string(p.join("out/report.html")).unwrap();
    let tags = page_numbers::spans(&html);
    assert!(tags.len() > 40, "only {} tagged numbers", tags.len());
    assert_eq!(
        page_numbers::disagreements(&html, &json),
        vec![],
        "page text, read back as numbers, disagrees with report.json (key, page, report)"
    );
    assert!(tags.iter().any(|(k, _)| k == "port/modes/0/damping_ratio"));
    // The driven state errors at [check] horizons: the 1 s held-out
    // trajectories reach 0.25 s and 0.5 s, not 5 s (reported, not clipped).
    let h = port["horizons"].as_array().unwrap();
    let reached: Vec<u64> = h.iter().map(|x| x["reached"].as_u64().unwrap()).collect();
    assert_eq!(reached, [2, 2, 0]);
    for d in port["driven"].as_array().unwrap() {
        let e = &d["horizons"];
        assert!(e[0]["model"].as_f64().unwrap() >= 0.0);
        assert!(e[1]["baseline"].as_f64().unwrap() >= 0.0);
        assert_eq!(e[2]["reached"], false);
        assert!(e[2]["model"].is_null());
    }
    assert!(tags
        .iter()
        .any(|(k, _)| k == "port/horizons/1/median_model"));
    let cells =
        page_numbers::cells_without_untagged_digits(&html, "State error at chosen horizons");
    assert_eq!(
        cells,
        3 * 3 * 5,
        "3 horizons x (2 trajectories + median) x 5 columns"
    );
    assert!(tags
        .iter()
        .any(|(k, _)| k == "port/driven/0/baseline_state_rel_rmse"));
    assert!(html.contains("Damping per mode") && html.contains("held-out input"));
    assert!(html.matches("<svg").count() >= 4, "inputs, p1, p2, loss");

    // The golden input file is the first held-out trajectory's logged u1,
    // one row per step.
    let val = read_rows(&p.join("data/val.csv"));
    let inputs = read_rows(&p.join("out/golden/tiny-dgrad-inputs.csv"));
    assert_eq!(inputs.len(), 120);
    let first = json["port"]["golden_input_trajectory"].as_str().unwrap();
    let logged: Vec<f32> = val
        .iter()
        .filter(|r| r[0] == first)
        .map(|r| r.last().unwrap().parse::<f64>().unwrap() as f32)
        .take(120)
        .collect();
    let golden: Vec<f32> = inputs.iter().map(|r| r[1].parse().unwrap()).collect();
    assert_eq!(golden, logged);

    // Replaying the golden inputs with `visviva rollout` gives the golden
    // states bit for bit, for both exported methods.
    for name in ["tiny-dgrad", "tiny-midpoint"] {
        let golden = read_rows(&p.join(format!("out/golden/{name}-0.csv")));
        assert_eq!(golden.len(), 121);
        let x0: Vec<f32> = golden[0][1..]
            .iter()
            .map(|h| f32::from_bits(u32::from_str_radix(&h[2..], 16).unwrap()))
            .collect();
        let init = format!("q1={},q2={},p1={},p2={}", x0[0], x0[1], x0[2], x0[3]);
        let host = p.join(format!("{name}-host.csv"));
        let o = visviva(&[
            "rollout",
            "--model",
            p.join(format!("out/{name}.vvb")).to_str().unwrap(),
            "--init",
            &init,
            "--steps",
            "120",
            "--inputs",
            p.join(format!("out/golden/{name}-inputs.csv"))
                .to_str()
                .unwrap(),
            "--bits",
            "--out",
            host.to_str().unwrap(),
        ]);
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        let replay = read_rows(&host);
        // The golden files hold t,q1,q2,p1,p2; the rollout adds v1,v2.
        assert_eq!(replay[0].len(), 7, "{name}");
        assert_eq!(golden[0].len(), 5, "{name}");
        let states = |rows: &[Vec<String>]| -> Vec<Vec<String>> {
            rows.iter().map(|r| r[1..5].to_vec()).collect()
        };
        assert_eq!(states(&replay), states(&golden), "{name}");
    }
}

#[test]
fn a_port_project_with_verlet_is_refused_before_anything_is_written() {
    let dir = tempfile::tempdir().unwrap();
    let p = dir.path();
    std::fs::create_dir_all(p.join("data")).unwrap();
    simulate(&p.join("data/train.csv"), "1", "3", "0.5");
    std::fs::write(
        p.join("visviva.toml"),
        "[model]\ndissipation = true\nintegrator = \"verlet\"\n",
    )
    .unwrap();
    let o = visviva(&["run", p.to_str().unwrap()]);
    assert!(!o.status.success());
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("\"verlet\"") && err.contains("discrete-gradient") && err.contains("midpoint"),
        "{err}"
    );
    assert!(!p.join("out").exists());

    // The same for an export target.
    std::fs::write(
        p.join("visviva.toml"),
        "[model]\ndissipation = true\n[[export]]\nname = \"x\"\nintegrator = \"yoshida4\"\n",
    )
    .unwrap();
    let o = visviva(&["run", p.to_str().unwrap()]);
    assert!(!o.status.success());
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("[[export]] x") && err.contains("\"yoshida4\""),
        "{err}"
    );
    assert!(!p.join("out").exists());
}

#[test]
fn reference_modes_equal_the_closed_forms() {
    // Undamped two-inertia chain (c = b = 0): one oscillatory mode at
    // sqrt(k (1/Jm + 1/Jl)), damping ratio 0; the rigid rotation is left
    // out.
    // (The catalog takes positive values only: 1e-12 is zero to the
    // asserted digits.)
    let params = vec![("c".to_string(), 1e-12), ("b".to_string(), 1e-12)];
    let system = build_system("drivetrain", &params).unwrap();
    let modes = reference_modes(system.as_ref());
    assert_eq!(modes.len(), 1, "{modes:?}");
    let w = (1.0f64 * (1.0 / 2e-4 + 1.0 / 1e-3)).sqrt();
    let f = w / (2.0 * std::f64::consts::PI);
    assert!(
        (modes[0].natural_hz - f).abs() / f < 1e-6,
        "{modes:?} vs {f}"
    );
    assert!(modes[0].damping_ratio.abs() < 1e-6, "{modes:?}");

    // Damped flexure (defaults k = 20 N/m, m = 0.05 kg) with zeta = 0.05.
    let params = vec![("zeta".to_string(), 0.05)];
    let system = build_system("flexure-damped", &params).unwrap();
    let modes = reference_modes(system.as_ref());
    assert_eq!(modes.len(), 1, "{modes:?}");
    let f = (20.0f64 / 0.05).sqrt() / (2.0 * std::f64::consts::PI);
    assert!(
        (modes[0].natural_hz - f).abs() / f < 1e-6,
        "{modes:?} vs {f}"
    );
    assert!((modes[0].damping_ratio - 0.05).abs() < 1e-6, "{modes:?}");
}
