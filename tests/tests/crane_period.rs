//! Gantry-crane payload sway (a rigid pendulum, q = angle, p = m L^2 dq/dt)
//! at large amplitude: an energy model fitted on simulated logs with sway
//! amplitudes up to 100 degrees, exported and stepped by visviva-runtime, swings
//! with the exact large-amplitude period T = 4 sqrt(L/g) K(sin(a/2)).

use visviva_runtime::{Integrator, Method, State};
use visviva_tests::{elliptic_k, momentum_sign_changes, pendulum_period, period_from_crossings};
use visviva_trainer::deploy::blob::{HostModel, WeightKind};
use visviva_trainer::deploy::fitted_blob::energy_blob;
use visviva_trainer::learn::fit::{fit_model, ArchChoice, FitSettings};
use visviva_trainer::reference::build_system;
use visviva_trainer::reference::simulate::{simulate, SimulationSpec};

#[test]
fn elliptic_period_formula_reduces_to_small_amplitude_period() {
    // K(0) = pi/2 (A&S 17.3.11), so T(a -> 0) = 2 pi sqrt(L/g) (textbook
    // small-amplitude pendulum).
    let small = pendulum_period(8.0, 9.81, 1e-8);
    let linear = 2.0 * std::f64::consts::PI * (8.0f64 / 9.81).sqrt();
    assert!((small / linear - 1.0).abs() < 1e-12);
    // At 90 degrees the period is 1.18034 times the small-amplitude period
    // (K(sin 45 deg) = 1.8540747, A&S Table 17.1, from memory).
    let ratio = pendulum_period(8.0, 9.81, 90f64.to_radians()) / linear;
    assert!((ratio - 1.180_34).abs() < 1e-5, "{ratio}");
    assert!((elliptic_k(45f64.to_radians().sin()) - 1.854_074_7).abs() < 1e-7);
}

#[test]
fn fitted_crane_model_has_the_large_amplitude_pendulum_period() {
    let overrides = [("max_angle_deg".to_string(), 100.0)];
    let system = build_system("crane", &overrides).unwrap();
    let (l, g) = (system.params().get("l"), system.params().get("g"));
    let t0 = system.small_amplitude_period().expect("closed form");
    // Logs as `visviva simulate --system crane --param max_angle_deg=100`
    // would write them, but noise-free and with exact derivatives.
    let spec = |trajectories, seed| SimulationSpec {
        trajectories,
        duration: 7.0,
        rate: 10.0,
        seed,
    };
    let train = simulate(system.as_ref(), &spec(40, 11)).unwrap();
    let val = simulate(system.as_ref(), &spec(8, 12)).unwrap();
    let arch = ArchChoice {
        hidden: vec![32, 32],
        ..ArchChoice::default()
    };
    let settings = FitSettings {
        epochs: 600,
        batch: 64,
        early_stop: false,
        quiet: true,
        seed: 5,
        ..FitSettings::default()
    };
    let fitted = fit_model(
        &train,
        Some(&val),
        &arch.build(1).unwrap(),
        &Default::default(),
        &settings,
    )
    .unwrap();
    println!(
        "fit: val loss {:.3e} after {} steps",
        fitted.report.best_val, fitted.report.steps
    );

    // Yoshida-4 at 400 steps per small-amplitude period: the integrator's
    // own period error is O((w h)^4), far below 1e-3 (common practice).
    let dt = (t0 / 400.0) as f32;
    let integrator = Integrator::new(Method::Yoshida4, dt);
    let blob = energy_blob(&fitted.model, integrator, WeightKind::F32).unwrap();
    let model = HostModel::from_bytes(&blob).unwrap();

    let mut worst = 0.0f64;
    for degrees in [30.0f64, 60.0, 90.0] {
        let a = degrees.to_radians();
        let exact = pendulum_period(l, g, a);
        // Released at rest at the amplitude: p changes sign at every turning
        // point, twice per period. Five periods of rollout.
        let x0 = State::new(&[a as f32], &[0.0]).unwrap();
        let steps = (5.0 * exact / dt as f64) as usize;
        let crossings = momentum_sign_changes(&model, &integrator, x0, 0, steps).unwrap();
        let measured = period_from_crossings(&crossings).expect("model did not oscillate");
        let error = measured / exact - 1.0;
        println!(
            "amplitude {degrees} deg: period by rollout {measured:.5} s, exact {exact:.5} s \
             (small-amplitude {t0:.5} s), relative error {error:+.3e} ({} sign changes)",
            crossings.len()
        );
        worst = worst.max(error.abs());
        // T = 4 sqrt(L/g) K(sin(a/2)) (Abramowitz & Stegun ch. 17, K by the
        // arithmetic-geometric mean, A&S 17.6); the bound is 1 %.
        assert!(
            error.abs() <= 0.01,
            "period at {degrees} deg off by {:.3} %",
            100.0 * error
        );
    }
    println!("worst relative period error {worst:.3e} (bound 1e-2)");
}
