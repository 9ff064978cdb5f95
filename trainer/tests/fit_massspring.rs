//! End to end on an ideal mass-spring (a sensor mass on a flexure, m = k = 1,
//! H = p^2/2 + q^2/2, period 2 pi) with exact derivatives: the fitted energy
//! model, exported and stepped by visviva-runtime with Stormer-Verlet, keeps the
//! true energy over 100 periods, while the baseline vector field rolled out
//! with RK4 drifts far more. Greydanus, Dzamba & Yosinski (2019, Table 1)
//! report the energy error of the Hamiltonian network orders of magnitude
//! below the baseline's on this system (from memory).

use std::f64::consts::PI;

use ndarray::Array2;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use visviva_runtime::{Hamiltonian, Integrator, Method, Model, State};
use visviva_trainer::data::dataset::{Dataset, DerivativeSource, Trajectory};
use visviva_trainer::deploy::blob::WeightKind;
use visviva_trainer::deploy::fitted_blob::energy_blob;
use visviva_trainer::learn::fit::{fit_baseline, fit_model, ArchChoice, FitSettings, StopReason};
use visviva_trainer::learn::net::Activation;

/// Exact solution q = A cos(t + phi), p = -A sin(t + phi) (textbook), with
/// dq/dt = p, dp/dt = -q.
fn mass_spring(trajectories: usize, samples: usize, seed: u64) -> Dataset {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut out = Vec::new();
    for k in 0..trajectories {
        let amp = rng.random_range(0.4..1.2);
        let phase = rng.random_range(0.0..2.0 * PI);
        let dt = 2.0 * PI / samples as f64;
        let t: Vec<f64> = (0..samples).map(|i| i as f64 * dt).collect();
        let mut x = Array2::zeros((samples, 2));
        let mut dx = Array2::zeros((samples, 2));
        for (i, &ti) in t.iter().enumerate() {
            let (q, p) = (amp * (ti + phase).cos(), -amp * (ti + phase).sin());
            x[[i, 0]] = q;
            x[[i, 1]] = p;
            dx[[i, 0]] = p;
            dx[[i, 1]] = -q;
        }
        out.push(Trajectory {
            id: format!("run{k}"),
            t,
            x,
            dx,
            u: Array2::zeros((samples, 0)),
        });
    }
    Dataset {
        dof: 1,
        inputs: 0,
        trajectories: out,
        derivatives: DerivativeSource::Given,
    }
}

fn true_energy(q: f32, p: f32) -> f64 {
    0.5 * (q as f64).powi(2) + 0.5 * (p as f64).powi(2)
}

fn settings() -> FitSettings {
    FitSettings {
        epochs: 150,
        batch: 64,
        quiet: true,
        seed: 3,
        ..FitSettings::default()
    }
}

#[test]
fn energy_model_conserves_energy_and_baseline_drifts() {
    let train = mass_spring(16, 40, 1);
    let val = mass_spring(4, 40, 2);
    let arch = ArchChoice {
        hidden: vec![32, 32],
        ..ArchChoice::default()
    };
    let s = settings();
    let fitted = fit_model(
        &train,
        Some(&val),
        &arch.build(1).unwrap(),
        &Default::default(),
        &s,
    )
    .unwrap();
    let base = fit_baseline(&train, Some(&val), &arch.hidden, Activation::Tanh, &s).unwrap();
    println!(
        "energy model: val loss {:.3e}, {} steps, {:.0} samples/s; baseline: val loss {:.3e}",
        fitted.report.best_val,
        fitted.report.steps,
        fitted.report.samples_per_second(),
        base.report.best_val
    );

    let steps_per_period = 100;
    let dt = (2.0 * PI / steps_per_period as f64) as f32;
    let blob = energy_blob(
        &fitted.model,
        Integrator::new(Method::StormerVerlet, dt),
        WeightKind::F32,
    )
    .unwrap();
    let model = Model::<8, 128>::from_bytes(&blob).unwrap();

    let (q0, p0) = (0.8f32, 0.0f32);
    let e0 = true_energy(q0, p0);
    let mut x = State::<8>::new(&[q0], &[p0]).unwrap();
    let mut xb = [q0, p0];
    let mut hnn_worst = 0.0f64;
    let mut base_worst = 0.0f64;
    for _ in 0..100 * steps_per_period {
        model.step(&mut x).unwrap();
        base.model.step_rk4(&mut xb, dt);
        hnn_worst = hnn_worst.max((true_energy(x.q[0], x.p[0]) - e0).abs() / e0);
        base_worst = base_worst.max((true_energy(xb[0], xb[1]) - e0).abs() / e0);
    }
    let hnn_end = (true_energy(x.q[0], x.p[0]) - e0).abs() / e0;
    let base_end = (true_energy(xb[0], xb[1]) - e0).abs() / e0;
    println!(
        "100 periods: energy model (Stormer-Verlet) max rel. energy error {hnn_worst:.3e}, \
         at end {hnn_end:.3e}; baseline (RK4) max {base_worst:.3e}, at end {base_end:.3e}"
    );
    // Model error bounds the energy error of a symplectic rollout instead of
    // letting it grow with time. Measured in the debug build with the fit
    // seed 3, 4, 5, 6 (training-data seed shifted alike, by a temporary
    // edit): model drift 7.0e-3, 3.0e-3, 3.0e-3, 5.4e-3; the baseline's 26,
    // 193, 67 and 187 times larger. Asserted: 2e-2 and 10 times. This short
    // fit is the debug-build smoke test; the 1e-3 bound of the README is
    // asserted by the release check `tests/tests/massspring_energy.rs`.
    assert!(hnn_worst < 0.02, "energy model drift {hnn_worst}");
    assert!(
        base_worst > 10.0 * hnn_worst,
        "baseline {base_worst} not clearly worse than energy model {hnn_worst}"
    );
    // The runtime's own energy stays near its start (symplectic, bounded).
    let h0 = model
        .energy(&State::<8>::new(&[q0], &[p0]).unwrap())
        .unwrap();
    let h_end = model.energy(&x).unwrap();
    assert!(((h_end - h0) / h0).abs() < 0.01);
}

#[test]
fn same_seed_same_threads_gives_identical_parameters() {
    let train = mass_spring(6, 30, 5);
    let arch = ArchChoice {
        hidden: vec![16, 16],
        ..ArchChoice::default()
    }
    .build(1)
    .unwrap();
    for threads in [1usize, 2] {
        let s = FitSettings {
            epochs: 5,
            batch: 32,
            threads,
            quiet: true,
            seed: 9,
            ..FitSettings::default()
        };
        let a = fit_model(&train, None, &arch, &Default::default(), &s).unwrap();
        let b = fit_model(&train, None, &arch, &Default::default(), &s).unwrap();
        assert_eq!(a.model.params, b.model.params, "threads {threads}");
        assert_eq!(a.report.history, b.report.history);
    }
}

#[test]
fn non_finite_loss_stops_and_keeps_finite_parameters() {
    let train = mass_spring(4, 30, 6);
    let arch = ArchChoice {
        hidden: vec![8],
        ..ArchChoice::default()
    }
    .build(1)
    .unwrap();
    let s = FitSettings {
        epochs: 50,
        batch: 16,
        lr: 1e30,
        clip: f32::INFINITY,
        early_stop: false,
        quiet: true,
        ..FitSettings::default()
    };
    let fitted = fit_model(&train, None, &arch, &Default::default(), &s).unwrap();
    assert!(
        matches!(fitted.report.stop, StopReason::NonFinite { .. }),
        "{:?}",
        fitted.report.stop
    );
    assert!(fitted.model.params.iter().all(|v| v.is_finite()));
}

#[test]
fn interrupt_flag_stops_training() {
    use std::sync::atomic::AtomicBool;
    use std::sync::Arc;
    let train = mass_spring(4, 30, 7);
    let arch = ArchChoice {
        hidden: vec![8],
        ..ArchChoice::default()
    }
    .build(1)
    .unwrap();
    let s = FitSettings {
        epochs: 50,
        quiet: true,
        interrupt: Some(Arc::new(AtomicBool::new(true))),
        ..FitSettings::default()
    };
    let fitted = fit_model(&train, None, &arch, &Default::default(), &s).unwrap();
    assert_eq!(fitted.report.stop, StopReason::Interrupted);
    assert_eq!(fitted.report.steps, 0);
    // Nothing trained yet: the seeded initial parameters are kept.
    assert_eq!(fitted.model.params, arch.init(1, s.seed));
}
