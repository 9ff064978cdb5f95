//! `visviva check --horizons` through the binary on a hand-computable case:
//! a free particle (V = 0, T = p^2 / (2 m), m = 4) rolled out from
//! q = 0.3, p = 0.4 moves as q(t) = 0.3 + (p / m) t = 0.3 + 0.1 t (Newton's
//! first law; Stormer-Verlet is exact for it up to rounding), while the
//! "held-out log" holds q = 0.3, p = 0.4 still. The relative state error at
//! t is then RMS(0.1 t, 0) / RMS(0.3, 0.4) = 0.1 t / 0.5 = 0.2 t. A horizon
//! longer than a trajectory is reported as not reached, never clipped; bad
//! horizons are refused naming the flag.

mod cli_support;

use cli_support::{assert_ok, assert_refused, visviva_in};
use visviva_runtime::format::Activation;
use visviva_runtime::{Integrator, Method};
use visviva_trainer::deploy::blob::{BlobModel, Energy, Kinetic, Layer, Mlp, Weights};

/// V(q) = 0: a network with all weights and biases zero.
fn zero_potential() -> Mlp {
    let layer = |i: usize, o: usize| Layer {
        inputs: i,
        outputs: o,
        weights: Weights::F32(vec![0.0; i * o]),
        bias: vec![0.0; o],
    };
    Mlp {
        activation: Activation::Tanh,
        layers: vec![layer(1, 4), layer(4, 1)],
    }
}

/// Two still trajectories at 100 Hz: "a" lasting 2 s, "b" 0.8 s.
fn still_log() -> String {
    let mut s = String::from("traj,t,q1,p1,dq1,dp1\n");
    for (id, samples) in [("a", 201), ("b", 81)] {
        for k in 0..samples {
            s.push_str(&format!("{id},{},0.3,0.4,0,0\n", k as f64 * 0.01));
        }
    }
    s
}

#[test]
fn state_errors_at_horizons_match_the_free_particle_and_long_horizons_are_not_reached() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let m = BlobModel {
        dof: 1,
        offset: vec![0.0; 2],
        scale: vec![1.0; 2],
        energy_scale: 1.0,
        energy: Energy::Separable {
            potential: zero_potential(),
            kinetic: Kinetic::Quadratic(vec![0.5]),
        },
        integrator: Integrator::new(Method::StormerVerlet, 0.01),
        dissipation: None,
        input: None,
        envelope: None,
    };
    std::fs::write(d.join("free.vvb"), m.to_bytes().unwrap()).unwrap();
    std::fs::write(d.join("log.csv"), still_log()).unwrap();
    let o = visviva_in(
        d,
        &[
            "check",
            "--model",
            "free.vvb",
            "--validation",
            "log.csv",
            "--horizons",
            "0.5,1,3",
            "--horizon-steps",
            "10",
            "--report",
            "r.json",
        ],
    );
    assert_ok(&o);
    let stdout = String::from_utf8_lossy(&o.stdout).into_owned();
    assert!(stdout.contains("3 s: median - / - over 0 of 2"), "{stdout}");
    let r: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(d.join("r.json")).unwrap()).unwrap();
    let at = |traj: usize, j: usize, f: &str| r["trajectories"][traj]["horizons"][j][f].clone();
    let mut worst = 0.0f64;
    for (traj, j, t) in [(0, 0, 0.5), (0, 1, 1.0), (1, 0, 0.5)] {
        assert_eq!(at(traj, j, "reached"), true);
        let e = at(traj, j, "model").as_f64().unwrap();
        let exact = 0.2 * t;
        worst = worst.max((e - exact).abs() / exact);
        assert!(
            (e - exact).abs() < 1e-4 * exact,
            "traj {traj} at {t} s: {e} vs {exact}"
        );
        assert!((at(traj, j, "at_s").as_f64().unwrap() - t).abs() < 1e-9);
        assert!(at(traj, j, "baseline").is_null(), "no baseline given");
    }
    println!("free particle horizon errors: worst relative deviation {worst:.2e}");
    // "b" lasts 0.8 s: 1 s and 3 s are not reached there; nobody reaches 3 s.
    for (traj, j) in [(1, 1), (0, 2), (1, 2)] {
        assert_eq!(at(traj, j, "reached"), false, "traj {traj} horizon {j}");
        assert!(at(traj, j, "model").is_null());
    }
    let s = &r["horizons"];
    assert_eq!(s[0]["reached"], 2);
    assert_eq!(s[1]["reached"], 1);
    assert_eq!(s[2]["reached"], 0);
    assert!(s[2]["median_model"].is_null());
    let med = s[1]["median_model"].as_f64().unwrap();
    assert!((med - 0.2).abs() < 1e-4 * 0.2, "{med}");
    // Horizons out of range are refused before any work, naming the flag.
    for bad in ["0,1", "1,-2", "1,1", "nan"] {
        let o = visviva_in(
            d,
            &[
                "check",
                "--model",
                "free.vvb",
                "--validation",
                "log.csv",
                "--horizons",
                bad,
                "--report",
                "bad.json",
            ],
        );
        assert_refused(&o, 1, &["--horizons"]);
        assert!(!d.join("bad.json").exists());
    }
}
