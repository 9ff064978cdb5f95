//! Two-stage vibration-isolation mount with equal masses m and equal
//! stiffnesses k (the `mount` system's defaults): the fitted energy model's
//! two natural frequencies, from the Hessian of its learned H at rest (central
//! differences of visviva-runtime's own gradient), match the textbook result
//! w = sqrt(k/m) (sqrt(5) -+ 1)/2.

use visviva_runtime::{Integrator, Method};
use visviva_tests::{
    hessian_by_gradient_differences, real_2x2_eigenvalues, symmetric_2x2_eigenvalues,
};
use visviva_trainer::deploy::blob::{HostModel, WeightKind};
use visviva_trainer::deploy::fitted_blob::energy_blob;
use visviva_trainer::learn::fit::{fit_model, ArchChoice, FitSettings};
use visviva_trainer::reference::build_system;
use visviva_trainer::reference::simulate::{simulate, SimulationSpec};

/// Two equal masses in series on two equal springs from a fixed base:
/// w = sqrt(k/m) (sqrt 5 -+ 1)/2 (textbook two-degree-of-freedom result,
/// e.g. Thomson, Theory of Vibration with Applications; from memory).
fn closed_form_omegas(k: f64, m: f64) -> (f64, f64) {
    let w = (k / m).sqrt();
    let r5 = 5f64.sqrt();
    (w * (r5 - 1.0) / 2.0, w * (r5 + 1.0) / 2.0)
}

#[test]
fn closed_form_matches_direct_eigenvalues_of_the_true_system() {
    let system = build_system("mount", &[]).unwrap();
    let p = system.params();
    let (m, k) = (p.get("m1"), p.get("k1"));
    assert_eq!((p.get("m2"), p.get("k2")), (m, k), "defaults are equal");
    // M^-1 K with K = [[2k, -k], [-k, k]], M = m I (Newton's second law for
    // the two masses), symmetric here because the masses are equal; its
    // eigenvalues by one Jacobi rotation (Golub & Van Loan).
    let (slow_sq, fast_sq) = symmetric_2x2_eigenvalues(2.0 * k / m, -k / m, k / m);
    let (slow, fast) = closed_form_omegas(k, m);
    println!(
        "true system: w = {:.6}, {:.6} rad/s (Jacobi); closed form {slow:.6}, {fast:.6} rad/s",
        slow_sq.sqrt(),
        fast_sq.sqrt()
    );
    assert!((slow_sq.sqrt() / slow - 1.0).abs() < 1e-12);
    assert!((fast_sq.sqrt() / fast - 1.0).abs() < 1e-12);
    // The system's own mode routine agrees as well.
    let period = system.small_amplitude_period().expect("closed form");
    assert!((period * slow / (2.0 * std::f64::consts::PI) - 1.0).abs() < 1e-12);
}

#[test]
fn fitted_mount_model_has_the_two_natural_frequencies() {
    let system = build_system("mount", &[]).unwrap();
    let p = system.params();
    let (m, k, amp) = (p.get("m1"), p.get("k1"), p.get("amp"));
    let slow_period = system.small_amplitude_period().expect("closed form");
    // Two slow periods per trajectory, 60 samples per slow period, exact
    // derivatives, no noise.
    let spec = |trajectories, seed| SimulationSpec {
        trajectories,
        duration: 2.0 * slow_period,
        rate: 60.0 / slow_period,
        seed,
    };
    let train = simulate(system.as_ref(), &spec(30, 21)).unwrap();
    let val = simulate(system.as_ref(), &spec(6, 22)).unwrap();
    let arch = ArchChoice {
        hidden: vec![32, 32],
        ..ArchChoice::default()
    };
    let settings = FitSettings {
        epochs: 400,
        batch: 64,
        early_stop: false,
        quiet: true,
        seed: 3,
        ..FitSettings::default()
    };
    let fitted = fit_model(
        &train,
        Some(&val),
        &arch.build(2).unwrap(),
        &Default::default(),
        &settings,
    )
    .unwrap();
    println!(
        "fit: val loss {:.3e} after {} steps",
        fitted.report.best_val, fitted.report.steps
    );
    let blob = energy_blob(
        &fitted.model,
        Integrator::new(Method::StormerVerlet, 1e-4),
        WeightKind::F32,
    )
    .unwrap();
    let model = HostModel::from_bytes(&blob).unwrap();

    // Hessian at rest (q = 0, p = 0) from central differences of the
    // runtime's analytic gradient; steps of 10 % of the amplitude in q and of
    // the matching momentum in p, where the learned energy is close to
    // quadratic and f32 rounding of the gradient is far below the change.
    let slow_speed = 2.0 * std::f64::consts::PI / slow_period * amp;
    let steps = [
        0.1 * amp,
        0.1 * amp,
        0.1 * m * slow_speed,
        0.1 * m * slow_speed,
    ];
    let hess = hessian_by_gradient_differences(&model, &[0.0, 0.0], &[0.0, 0.0], &steps).unwrap();
    // Separable H = T(p) + V(q): stiffness K = d2V/dq2, inverse mass
    // M^-1 = d2T/dp2; the q-p block must vanish.
    let stiff = [[hess[0][0], hess[0][1]], [hess[1][0], hess[1][1]]];
    let inv_mass = [[hess[2][2], hess[2][3]], [hess[3][2], hess[3][3]]];
    let cross = (0..2)
        .flat_map(|i| (2..4).map(move |j| (i, j)))
        .map(|(i, j)| hess[i][j].abs())
        .fold(0.0, f64::max);
    println!(
        "learned stiffness {stiff:?} N/m (true [[{}, {}], [{}, {k}]])",
        2.0 * k,
        -k,
        -k
    );
    println!(
        "learned inverse mass {inv_mass:?} 1/kg (true 1/m = {})",
        1.0 / m
    );
    assert_eq!(cross, 0.0, "separable model has no q-p coupling");
    // Small oscillations: w^2 are the eigenvalues of M^-1 K (textbook
    // normal-mode analysis).
    let a = [
        [
            inv_mass[0][0] * stiff[0][0] + inv_mass[0][1] * stiff[1][0],
            inv_mass[0][0] * stiff[0][1] + inv_mass[0][1] * stiff[1][1],
        ],
        [
            inv_mass[1][0] * stiff[0][0] + inv_mass[1][1] * stiff[1][0],
            inv_mass[1][0] * stiff[0][1] + inv_mass[1][1] * stiff[1][1],
        ],
    ];
    let (slow_sq, fast_sq) = real_2x2_eigenvalues(a[0][0], a[0][1], a[1][0], a[1][1]);
    let (slow, fast) = (slow_sq.sqrt(), fast_sq.sqrt());
    let (slow_exact, fast_exact) = closed_form_omegas(k, m);
    let slow_error = slow / slow_exact - 1.0;
    let fast_error = fast / fast_exact - 1.0;
    println!(
        "natural frequencies: learned {slow:.4}, {fast:.4} rad/s; closed form \
         {slow_exact:.4}, {fast_exact:.4} rad/s; relative errors {slow_error:+.3e}, \
         {fast_error:+.3e} (bound 2e-2)"
    );
    // Closed form w = sqrt(k/m) (sqrt 5 -+ 1)/2 (Thomson, Theory of
    // Vibration with Applications; from memory); the bound is 2 %.
    assert!(
        slow_error.abs() <= 0.02,
        "slow mode off by {slow_error:+.3e}"
    );
    assert!(
        fast_error.abs() <= 0.02,
        "fast mode off by {fast_error:+.3e}"
    );
}
