//! Logs of driven systems (input columns u1..um) and the damped, driven
//! reference simulations:
//! * inputs survive a write/read round trip exactly (Rust's shortest
//!   round-trip float formatting), and bad input fields are reported with
//!   file, line and column like every other column;
//! * the damped flexure follows the closed-form free decay of a viscously
//!   damped oscillator, x(t) = e^(-zeta w t) (x0 cos(wd t) + (v0 + zeta w
//!   x0) / wd sin(wd t)), wd = w sqrt(1 - zeta^2) (any vibration textbook,
//!   e.g. Thomson & Dahleh, "Theory of Vibration with Applications"; from
//!   memory);
//! * the driven drivetrain's logged derivatives satisfy the energy balance
//!   dH/dt = -g^T R g + g^T G u (the port-Hamiltonian power balance,
//!   van der Schaft & Jeltsema 2014; from memory), checked against the
//!   change of H between samples by the trapezoidal rule;
//! * the crane payload under an accelerating trolley follows the textbook
//!   equation of a pendulum whose pivot accelerates horizontally,
//!   l q'' = -g sin q - a cos q (Lagrange's equations with a moving
//!   support; any analytical-mechanics text, from memory), plus the
//!   viscous term -c q' / (m l), on every logged sample.

use visviva_trainer::data::log::{load_csv, write_csv, LoadOptions};
use visviva_trainer::reference::build_system;
use visviva_trainer::reference::simulate::{simulate, SimulationSpec};

fn spec(trajectories: usize, duration: f64, rate: f64, seed: u64) -> SimulationSpec {
    SimulationSpec {
        trajectories,
        duration,
        rate,
        seed,
    }
}

#[test]
fn inputs_round_trip_through_csv() {
    let system = build_system("drivetrain", &[]).unwrap();
    let ds = simulate(system.as_ref(), &spec(3, 0.5, 200.0, 4)).unwrap();
    assert!(ds.driven());
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("drive.csv");
    write_csv(&path, &ds, true).unwrap();
    let text = std::fs::read_to_string(&path).unwrap();
    assert!(text.starts_with("traj,t,q1,q2,p1,p2,dq1,dq2,dp1,dp2,u1\n"));
    let back = load_csv(&path, &LoadOptions::default()).unwrap();
    assert_eq!(back.inputs, 1);
    assert_eq!(back, ds);
}

#[test]
fn bad_input_fields_name_file_line_and_column() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("bad.csv");
    let mut text = String::from("traj,t,q1,p1,u1,u2\n");
    for k in 0..12 {
        let u2 = if k == 6 {
            "fast".to_string()
        } else {
            "0.5".into()
        };
        text.push_str(&format!("a,{},0.1,0.2,0.3,{u2}\n", k as f64 * 0.01));
    }
    std::fs::write(&path, text).unwrap();
    let err = load_csv(&path, &LoadOptions::default()).unwrap_err();
    assert_eq!(err.line, 8);
    assert_eq!(err.column.as_deref(), Some("u2"));
    let message = err.to_string();
    assert!(message.contains("bad.csv") && message.contains("line 8") && message.contains("'u2'"));

    // A gap in the numbering (u1, u3) is refused, naming the stray column.
    let gap = dir.path().join("gap.csv");
    std::fs::write(&gap, "traj,t,q1,p1,u1,u3\na,0,0,0,0,0\n").unwrap();
    let err = load_csv(&gap, &LoadOptions::default()).unwrap_err();
    assert_eq!((err.line, err.column.as_deref()), (1, Some("u3")));
}

#[test]
fn damped_flexure_matches_the_closed_form_free_decay() {
    let (m, k, zeta) = (0.05f64, 20.0f64, 0.05f64);
    let system = build_system("flexure-damped", &[]).unwrap();
    let ds = simulate(system.as_ref(), &spec(3, 3.0, 200.0, 2)).unwrap();
    assert!(!ds.driven());
    let w = (k / m).sqrt();
    let wd = w * (1.0 - zeta * zeta).sqrt();
    let mut worst = 0.0f64;
    for traj in &ds.trajectories {
        let (x0, v0) = (traj.x[[0, 0]], traj.x[[0, 1]] / m);
        let amp = (x0 * x0 + (v0 / w) * (v0 / w)).sqrt();
        for (i, t) in traj.t.iter().enumerate() {
            let exact = (-zeta * w * t).exp()
                * (x0 * (wd * t).cos() + (v0 + zeta * w * x0) / wd * (wd * t).sin());
            worst = worst.max((traj.x[[i, 0]] - exact).abs() / amp);
        }
    }
    println!("damped flexure vs closed form: worst error {worst:.2e} of the amplitude");
    assert!(worst < 1e-9, "{worst}");
}

#[test]
fn drivetrain_log_satisfies_the_power_balance() {
    let (jm, jl, kk, c, b) = (2e-4f64, 1e-3f64, 1.0f64, 2e-3f64, 1e-2f64);
    let system = build_system("drivetrain", &[]).unwrap();
    let ds = simulate(system.as_ref(), &spec(2, 2.0, 2000.0, 5)).unwrap();
    assert!(ds.driven());
    let h = |x: &[f64]| {
        let tw = x[0] - x[1];
        x[2] * x[2] / (2.0 * jm) + x[3] * x[3] / (2.0 * jl) + 0.5 * kk * tw * tw
    };
    // Power: -c (wm - wl)^2 - b wl^2 + u wm.
    let power = |x: &[f64], u: f64| {
        let (wm, wl) = (x[2] / jm, x[3] / jl);
        -c * (wm - wl) * (wm - wl) - b * wl * wl + u * wm
    };
    let mut worst = 0.0f64;
    let mut peak = 0.0f64;
    for traj in &ds.trajectories {
        let u = &traj.u;
        for i in 1..traj.t.len() {
            let (a, z) = (traj.x.row(i - 1).to_vec(), traj.x.row(i).to_vec());
            let dt = traj.t[i] - traj.t[i - 1];
            let trapezoid = 0.5 * dt * (power(&a, u[[i - 1, 0]]) + power(&z, u[[i, 0]]));
            worst = worst.max((h(&z) - h(&a) - trapezoid).abs());
            peak = peak.max(power(&a, u[[i - 1, 0]]).abs() * dt);
            // The logged derivative of the motor momentum includes the torque.
            let (wm, wl) = (z[2] / jm, z[3] / jl);
            let dp1 = -kk * (z[0] - z[1]) - c * (wm - wl) + u[[i, 0]];
            assert!((traj.dx[[i, 2]] - dp1).abs() <= 1e-12 * dp1.abs().max(1e-3));
        }
    }
    // Trapezoidal error O(dt^3) per step (textbook); relative to the largest
    // energy exchanged in one step.
    println!("power balance: worst {worst:.2e} J vs largest step exchange {peak:.2e} J");
    assert!(worst < 1e-3 * peak, "{worst} vs {peak}");
}

#[test]
fn crane_trolley_log_follows_the_moving_support_pendulum_equation() {
    let (m, l, g, zeta) = (2.0f64, 1.0f64, 9.81f64, 0.05f64); // defaults
    let c = 2.0 * zeta * m * l * l * (g / l).sqrt();
    let system = build_system("crane-trolley", &[]).unwrap();
    let ds = simulate(system.as_ref(), &spec(4, 6.0, 100.0, 6)).unwrap();
    assert!(ds.driven());
    let mut worst = 0.0f64;
    let mut largest_angle = 0.0f64;
    for traj in &ds.trajectories {
        let u = &traj.u;
        for i in 0..traj.t.len() {
            let (q, p) = (traj.x[[i, 0]], traj.x[[i, 1]]);
            let qdot = p / (m * l * l);
            let a = u[[i, 0]];
            let qddot = (-g * q.sin() - a * q.cos()) / l - c * qdot / (m * l * l);
            // dq/dt and dp/dt = m l^2 q'' as logged.
            assert!((traj.dx[[i, 0]] - qdot).abs() <= 1e-12 * qdot.abs().max(1e-6));
            let err = (traj.dx[[i, 1]] - m * l * l * qddot).abs() / (m * g * l);
            worst = worst.max(err);
            largest_angle = largest_angle.max(q.abs());
        }
    }
    println!(
        "crane-trolley log vs moving-support pendulum: worst {worst:.2e} of m g l, angles up to {:.1} deg",
        largest_angle.to_degrees()
    );
    assert!(worst < 1e-12, "{worst}");
    // The excitation swings the payload well beyond the small-angle range,
    // where cos q in G(q) matters.
    assert!(largest_angle > 20f64.to_radians());
}
