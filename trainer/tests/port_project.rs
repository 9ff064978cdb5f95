//! Damped and driven models through `keel fit`:
//! * `keel fit --dissipation --baseline --json` on driven data writes the
//!   run summary and a baseline that takes the input; a driven baseline learns
//!   the drivetrain's input matrix G = (0, 0, 1, 0)^T (the motor torque is
//!   the rate of the motor's angular momentum, Newton's second law for a
//!   rotating body: dp1/dt = ... + u, so d(dp1/dt)/du = 1 and
//!   d(dp2/dt)/du = 0).

use std::path::Path;
use std::process::Command;

use clap::Parser;
use keel_trainer::cmd_fit;
use keel_trainer::fit::{fit_baseline_driven, ArchChoice, FitSettings};
use keel_trainer::hnn::PortArch;
use keel_trainer::net::Activation;
use keel_trainer::simulate::{simulate_port, SimulationSpec};
use keel_trainer::systems::build_port_system;

fn keel(args: &[&str]) -> std::process::Output {
    Command::new(env!("CARGO_BIN_EXE_keel"))
        .args(args)
        .output()
        .unwrap()
}

fn simulate(out: &Path, seed: &str, trajectories: &str, duration: &str) {
    let o = keel(&[
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
    args: cmd_fit::Args,
}

#[test]
fn fit_writes_the_summary_and_a_baseline_that_takes_the_input() {
    let dir = tempfile::tempdir().unwrap();
    let p = dir.path();
    simulate(&p.join("train.csv"), "5", "6", "2");
    let out = p.join("m.keel");
    let json = p.join("m.json");
    let args = Cli::try_parse_from([
        "keel-fit",
        "--data",
        p.join("train.csv").to_str().unwrap(),
        "--dissipation",
        "--baseline",
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
    cmd_fit::run(args).unwrap();

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
    };
    assert_eq!(
        summary["parameters"].as_u64().unwrap() as usize,
        arch.param_count(2) + port.param_count(2)
    );
    let loss = summary["final_train_loss"].as_f64().unwrap();
    assert!(loss.is_finite() && loss > 0.0, "{summary}");
    assert!(summary["steps"].as_u64().unwrap() > 0);

    let base = keel_trainer::export::read_baseline(&cmd_fit::baseline_path(&out)).unwrap();
    assert_eq!(base.inputs(), 1);
    assert_eq!(base.shape.inputs(), 5);
    assert_eq!(base.shape.outputs(), 4);
}

#[test]
#[cfg_attr(
    debug_assertions,
    ignore = "trains for about 2 s in release but minutes in debug; run with --release"
)]
fn the_driven_baseline_learns_the_input_matrix_of_the_drivetrain() {
    let system = build_port_system("drivetrain", &[]).unwrap().unwrap();
    let spec = SimulationSpec {
        trajectories: 10,
        duration: 4.0,
        rate: 200.0,
        seed: 41,
    };
    let (ds, u) = simulate_port(system.as_ref(), &spec).unwrap();
    let u = u.unwrap();
    let settings = FitSettings {
        epochs: 150,
        quiet: true,
        ..FitSettings::default()
    };
    let base = fit_baseline_driven(&ds, Some(&u), None, &[32, 32], Activation::Tanh, &settings)
        .unwrap()
        .model;
    // d(dx/dt)/du by central differences (step: the input's RMS) at logged
    // states and inputs, averaged.
    let h = base.input_scale[0];
    let (mut g1, mut g2, mut count) = (0.0f64, 0.0f64, 0usize);
    for (t, ut) in ds.trajectories.iter().zip(&u.per_trajectory) {
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
