//! Checks of the reference-data generator (`visviva simulate`) against outside
//! sources: an independent general-purpose ODE solver, exact energy
//! conservation, and the closed-form large-amplitude pendulum period.

use ode_solvers::{DVector, Dop853, OutputType};
use std::path::Path;
use visviva_trainer::cli::simulate;
use visviva_trainer::data::dataset::DerivativeSource;
use visviva_trainer::data::log::{load_csv, LoadOptions};
use visviva_trainer::reference::simulate::{
    add_noise, integrate, max_relative_energy_drift, simulate, SimulationSpec,
};
use visviva_trainer::reference::{build_system, ReferenceSystem, CATALOG};

/// Every built-in system without port terms (energy conserved exactly).
fn conservative_systems() -> Vec<Box<dyn ReferenceSystem>> {
    CATALOG
        .iter()
        .map(|e| build_system(e.name, &[]).unwrap())
        .filter(|s| !s.has_port_terms())
        .collect()
}

/// Adapter so the `ode_solvers` crate integrates our vector field.
struct Reference<'a>(&'a dyn ReferenceSystem);

impl ode_solvers::System<f64, DVector<f64>> for Reference<'_> {
    fn system(&self, _t: f64, y: &DVector<f64>, dy: &mut DVector<f64>) {
        self.0.vector_field(y.as_slice(), dy.as_mut_slice());
    }
}

/// Duration of about `periods` small-amplitude periods, sampled at about
/// 20 samples per period.
fn spec_for(system: &dyn ReferenceSystem, periods: f64, trajectories: usize) -> SimulationSpec {
    let period = system.small_amplitude_period().expect("closed form");
    SimulationSpec {
        trajectories,
        duration: periods * period,
        rate: 20.0 / period,
        seed: 42,
    }
}

#[test]
fn agrees_with_ode_solvers_dop853() {
    // Outside reference: the general-purpose `ode_solvers` crate's Dop853
    // (8th-order Dormand-Prince) at rtol 1e-13, restarted at every sample
    // time from its own previous end state (its dense-output interpolation is
    // less accurate than its steps, about 1e-7 relative here, so it is not
    // used). Over 10 periods every sample agrees to 1e-10 of each
    // coordinate's peak magnitude.
    for system in conservative_systems() {
        let spec = spec_for(system.as_ref(), 10.0, 3);
        let ds = simulate(system.as_ref(), &spec).unwrap();
        let mut worst = 0.0f64;
        for traj in &ds.trajectories {
            let dim = traj.x.ncols();
            let peak: Vec<f64> = (0..dim)
                .map(|c| traj.x.column(c).iter().fold(0.0f64, |m, v| m.max(v.abs())))
                .collect();
            let mut y = DVector::from_row_slice(traj.x.row(0).as_slice().unwrap());
            for k in 1..traj.t.len() {
                let mut solver = Dop853::new(
                    Reference(system.as_ref()),
                    traj.t[k - 1],
                    traj.t[k],
                    traj.t[k] - traj.t[k - 1],
                    y.clone(),
                    1e-13,
                    1e-16,
                );
                solver.set_output(OutputType::Sparse);
                solver.integrate().unwrap();
                let (ts, ys) = solver.results().get();
                assert!((ts.last().unwrap() - traj.t[k]).abs() < 1e-12);
                y = ys.last().unwrap().clone();
                for c in 0..dim {
                    let diff = (traj.x[[k, c]] - y[c]).abs();
                    worst = worst.max(diff / peak[c]);
                    assert!(
                        diff <= 1e-10 * peak[c],
                        "{} traj {} t={} coord {c}: {} vs {} (diff {diff:.2e})",
                        system.name(),
                        traj.id,
                        traj.t[k],
                        traj.x[[k, c]],
                        y[c]
                    );
                }
            }
        }
        eprintln!(
            "{}: largest deviation from Dop853 {worst:.1e} of peak",
            system.name()
        );
    }
}

#[test]
fn flexure_matches_closed_form_solution() {
    // Textbook harmonic oscillator: q(t) = q0 cos(w t) + p0/(m w) sin(w t),
    // w = sqrt(k/m). Over 50 periods the generator stays within 1e-11 of
    // the amplitude.
    let system = build_system("flexure", &[]).unwrap();
    let ds = simulate(system.as_ref(), &spec_for(system.as_ref(), 50.0, 3)).unwrap();
    let (m, k) = (0.05f64, 20.0f64);
    let w = (k / m).sqrt();
    for traj in &ds.trajectories {
        let (q0, p0) = (traj.x[[0, 0]], traj.x[[0, 1]]);
        let amp = (q0 * q0 + (p0 / (m * w)).powi(2)).sqrt();
        for (i, t) in traj.t.iter().enumerate() {
            let q = q0 * (w * t).cos() + p0 / (m * w) * (w * t).sin();
            let p = -m * w * q0 * (w * t).sin() + p0 * (w * t).cos();
            assert!((traj.x[[i, 0]] - q).abs() < 1e-11 * amp, "t={t}");
            assert!((traj.x[[i, 1]] - p).abs() < 1e-11 * amp * m * w, "t={t}");
        }
    }
}

#[test]
fn energy_is_conserved() {
    // Outside reference: H is exactly conserved by the true flow of a
    // conservative system (Hamilton's equations, textbook). Over 50
    // small-amplitude periods the generator's relative energy drift stays
    // below 1e-9.
    for system in conservative_systems() {
        let ds = simulate(system.as_ref(), &spec_for(system.as_ref(), 50.0, 4)).unwrap();
        let drift = max_relative_energy_drift(system.as_ref(), &ds);
        eprintln!("{}: relative energy drift {drift:.1e}", system.name());
        assert!(
            drift < 1e-9,
            "{}: relative energy drift {drift:.2e}",
            system.name()
        );
    }
}

/// Complete elliptic integral of the first kind K(k) by the arithmetic-
/// geometric mean: K = pi / (2 AGM(1, sqrt(1 - k^2))) (Abramowitz & Stegun
/// 17.6, from memory).
fn elliptic_k(k: f64) -> f64 {
    let (mut a, mut b) = (1.0f64, (1.0 - k * k).sqrt());
    for _ in 0..30 {
        let (a2, b2) = (0.5 * (a + b), (a * b).sqrt());
        a = a2;
        b = b2;
    }
    std::f64::consts::PI / (2.0 * a)
}

#[test]
fn crane_large_swing_period_matches_elliptic_integral() {
    // Textbook pendulum result: the period at amplitude theta0 is
    // T = 4 sqrt(L/g) K(sin(theta0/2)). Released from rest at theta0, the
    // payload is at -theta0 after T/2 and back at theta0 after T.
    let system = build_system("crane", &[]).unwrap();
    for degrees in [10.0f64, 60.0, 120.0] {
        let theta0 = degrees.to_radians();
        let period = 4.0 * (8.0f64 / 9.81).sqrt() * elliptic_k((0.5 * theta0).sin());
        let x = integrate(
            system.as_ref(),
            &[theta0, 0.0],
            &[0.0, 0.5 * period, period],
        )
        .unwrap();
        assert!(
            (x[[1, 0]] + theta0).abs() < 1e-9,
            "{degrees} deg: half period q {}",
            x[[1, 0]]
        );
        assert!(
            (x[[2, 0]] - theta0).abs() < 1e-9,
            "{degrees} deg: period q {}",
            x[[2, 0]]
        );
        // p returns to zero; scale by the largest momentum on this orbit.
        let p_max = 500.0 * 64.0 * (2.0 * 9.81 / 8.0 * (1.0 - theta0.cos())).sqrt();
        assert!(x[[2, 1]].abs() < 1e-9 * p_max);
    }
}

fn run_cli(out: &Path, system: &str, noise: f64, keep: bool, seed: u64) -> anyhow::Result<()> {
    simulate::run(simulate::Args {
        system: system.into(),
        params: vec![("k".into(), 25.0)],
        trajectories: 3,
        duration: 2.0,
        rate: 50.0,
        noise,
        position_noise: 0.0,
        keep_derivatives: keep,
        change: Vec::new(),
        change_at: None,
        seed,
        out: out.to_path_buf(),
    })
}

#[test]
fn same_seed_gives_identical_bytes() {
    let dir = tempfile::tempdir().unwrap();
    let (a, b, c) = (
        dir.path().join("a.csv"),
        dir.path().join("b.csv"),
        dir.path().join("c.csv"),
    );
    run_cli(&a, "flexure", 0.01, false, 7).unwrap();
    run_cli(&b, "flexure", 0.01, false, 7).unwrap();
    run_cli(&c, "flexure", 0.01, false, 8).unwrap();
    let bytes_a = std::fs::read(&a).unwrap();
    assert!(!bytes_a.is_empty());
    assert_eq!(bytes_a, std::fs::read(&b).unwrap());
    assert_ne!(bytes_a, std::fs::read(&c).unwrap());
}

#[test]
fn output_round_trips_through_the_loader() {
    let dir = tempfile::tempdir().unwrap();
    let clean = dir.path().join("clean.csv");
    run_cli(&clean, "flexure", 0.0, false, 1).unwrap();
    let text = std::fs::read_to_string(&clean).unwrap();
    assert_eq!(text.lines().next().unwrap(), "traj,t,q1,p1,dq1,dp1");
    let ds = load_csv(&clean, &LoadOptions::default()).unwrap();
    assert_eq!(ds.derivatives, DerivativeSource::Given);
    assert_eq!(ds.trajectories.len(), 3);
    assert_eq!(ds.trajectories[0].t.len(), 101);
    // Same as generating in memory (shortest round-trip number formatting).
    let system = build_system("flexure", &[("k".into(), 25.0)]).unwrap();
    let spec = SimulationSpec {
        trajectories: 3,
        duration: 2.0,
        rate: 50.0,
        seed: 1,
    };
    assert_eq!(simulate(system.as_ref(), &spec).unwrap(), ds);

    // Noise drops the derivative columns unless asked to keep them.
    let noisy = dir.path().join("noisy.csv");
    run_cli(&noisy, "flexure", 0.05, false, 1).unwrap();
    let header = std::fs::read_to_string(&noisy).unwrap();
    assert_eq!(header.lines().next().unwrap(), "traj,t,q1,p1");
    let kept = dir.path().join("kept.csv");
    run_cli(&kept, "flexure", 0.05, true, 1).unwrap();
    let header = std::fs::read_to_string(&kept).unwrap();
    assert_eq!(header.lines().next().unwrap(), "traj,t,q1,p1,dq1,dp1");
}

#[test]
fn noise_has_the_requested_relative_size() {
    // Sample statistics: with N = 2 x 10 x 2001 draws the measured noise
    // RMS matches sigma * coordinate RMS to within a few percent.
    let system = build_system("mount", &[]).unwrap();
    let spec = SimulationSpec {
        trajectories: 10,
        duration: 2.0,
        rate: 1000.0,
        seed: 5,
    };
    let clean = simulate(system.as_ref(), &spec).unwrap();
    let mut noisy = clean.clone();
    add_noise(&mut noisy, 0.02, 5).unwrap();
    for c in 0..4 {
        let (mut signal, mut noise, mut count) = (0.0, 0.0, 0.0);
        for (a, b) in clean.trajectories.iter().zip(&noisy.trajectories) {
            for (x, y) in a.x.column(c).iter().zip(b.x.column(c)) {
                signal += x * x;
                noise += (y - x) * (y - x);
                count += 1.0;
            }
            assert_eq!(a.t, b.t);
            assert_eq!(a.dx, b.dx);
        }
        let ratio = (noise / count).sqrt() / (signal / count).sqrt();
        assert!(
            (ratio - 0.02).abs() < 0.02 * 0.05,
            "coord {c}: ratio {ratio}"
        );
    }
}

#[test]
fn bad_parameter_fails_without_output() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("out.csv");
    let err = run_cli(&out, "crane", 0.0, false, 1).unwrap_err();
    assert!(
        err.to_string()
            .contains("valid keys: m, l, g, max_angle_deg"),
        "{err}"
    );
    assert!(!out.exists());
    let err = run_cli(&out, "bogus", 0.0, false, 1).unwrap_err();
    assert!(err.to_string().contains("flexure, crane, mount"), "{err}");
    assert!(!out.exists());
}

#[test]
fn command_line_exit_status_and_summary() {
    // Through the real binary: bad input exits non-zero with the reason on
    // stderr and no output file; good input prints a one-line summary.
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("run.csv");
    let visviva = env!("CARGO_BIN_EXE_visviva");
    let base = ["simulate", "--system", "flexure", "--trajectories", "2"];
    let rest = ["--duration", "1", "--rate", "20", "--out"];
    let bad = std::process::Command::new(visviva)
        .args(base)
        .args(["--param", "mass=1"])
        .args(rest)
        .arg(&out)
        .output()
        .unwrap();
    assert!(!bad.status.success());
    let stderr = String::from_utf8_lossy(&bad.stderr);
    assert!(stderr.contains("valid keys: m, k, amp"), "{stderr}");
    assert!(!out.exists());
    let good = std::process::Command::new(visviva)
        .args(base)
        .args(rest)
        .arg(&out)
        .output()
        .unwrap();
    assert!(good.status.success());
    let stdout = String::from_utf8_lossy(&good.stdout);
    assert_eq!(stdout.lines().count(), 1, "{stdout}");
    assert!(stdout.contains("2 trajectories x 21 samples"), "{stdout}");
    assert_eq!(
        std::fs::read_to_string(&out).unwrap().lines().count(),
        1 + 2 * 21
    );
}
