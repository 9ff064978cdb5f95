//! A rigid linkage whose mass matrix depends on the angles: the double
//! pendulum (point masses m1, m2 on links l1, l2, absolute angles from the
//! downward vertical). A mechanical energy model
//! H = 1/2 p^T M(q)^-1 p + V(q), M^-1 = L(q) L(q)^T + eps I, is fitted to
//! simulated logs by the derivative loss, exported, and read back through
//! visviva-runtime:
//! * its mass matrix M(q) (from the runtime's dH/dp = M^-1 p at unit
//!   momenta; p is logged in its physical unit, so there is no free scale)
//!   matches the closed form
//!   [[(m1 + m2) l1^2, m2 l1 l2 cos(q1 - q2)], [m2 l1 l2 cos(q1 - q2), m2 l2^2]]
//!   (Landau & Lifshitz, Mechanics, 3rd ed., section 5, problem 1; from
//!   memory) within 2 % at every position of a held-out log;
//! * its small-oscillation frequencies about the hanging rest (w^2 the
//!   eigenvalues of M^-1 K, K = d2V/dq2) match the linearized double
//!   pendulum's closed form (Goldstein, Classical Mechanics, 3rd ed., ch. 6;
//!   from memory) within 1 %.

#[path = "shared/mechanical_fit.rs"]
mod mechanical_fit;

use std::sync::OnceLock;

use mechanical_fit::{fit_mechanical, fitted_mass_matrix, training_log};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};
use visviva_runtime::monitor::FalseAlarm;
use visviva_runtime::{Hamiltonian, State};
use visviva_tests::{hessian_by_gradient_differences, real_2x2_eigenvalues};
use visviva_trainer::data::dataset::Dataset;
use visviva_trainer::deploy::blob::HostModel;
use visviva_trainer::deploy::observe::ObserverRun;
use visviva_trainer::deploy::observer_tuning::{position_rows, tune};
use visviva_trainer::evidence::cv_filter::{central_differences, cv_velocities};
use visviva_trainer::reference::linkage::DoublePendulum;
use visviva_trainer::reference::params::ParamValues;

fn system() -> DoublePendulum {
    let params = ParamValues::new(
        "double-pendulum",
        visviva_trainer::reference::linkage::DOUBLE_PENDULUM_PARAMS,
        &[],
    )
    .unwrap();
    // Built through the catalog's constructor, then read back as the type.
    let boxed = DoublePendulum::build(params.clone()).unwrap();
    assert_eq!(boxed.name(), "double-pendulum");
    DoublePendulum::from_params(params)
}

/// The fit both tests read (seed 21), made once per test binary.
fn fitted() -> &'static (Dataset, Vec<u8>) {
    static FIT: OnceLock<(Dataset, Vec<u8>)> = OnceLock::new();
    FIT.get_or_init(|| fit_mechanical(&system(), 21))
}

#[test]
fn fitted_mechanical_model_has_the_double_pendulum_mass_matrix_and_modes() {
    let sys = system();
    let (val, blob) = fitted();
    let model = HostModel::from_bytes(blob).unwrap();
    assert!(!model.is_separable());

    // M(q) at every position of the held-out log.
    let mut worst = 0.0f64;
    let mut count = 0;
    for t in val.trajectories.iter() {
        for row in t.x.rows() {
            let q = [row[0], row[1]];
            let exact = sys.mass_matrix(&q);
            let got = fitted_mass_matrix(&model, [q[0] as f32, q[1] as f32]);
            let (mut diff, mut norm) = (0.0f64, 0.0f64);
            for i in 0..2 {
                for j in 0..2 {
                    diff += (got[i][j] - exact[i][j]).powi(2);
                    norm += exact[i][j].powi(2);
                }
            }
            worst = worst.max((diff / norm).sqrt());
            count += 1;
        }
    }
    println!(
        "M(q): worst relative (Frobenius) error {worst:.3e} over {count} held-out positions \
         (bound 2e-2)"
    );
    assert!(worst <= 0.02, "M(q) off by {:.2} %", 100.0 * worst);

    // Small oscillations about the fitted model's own rest position (two
    // Newton steps from q = 0 on dV/dq = 0, the Hessian by differences of
    // the runtime's gradient at p = 0, where H_qp = 0 and H_pp = M^-1).
    let steps = [1e-3, 1e-3, 1e-3, 1e-3];
    let mut q = [0.0f64; 2];
    for _ in 0..2 {
        let s = State::<16>::new(&[q[0] as f32, q[1] as f32], &[0.0, 0.0]).unwrap();
        let (mut gq, mut gp) = ([0.0f32; 16], [0.0f32; 16]);
        model.gradient(&s, &mut gq, &mut gp).unwrap();
        let qf = [q[0] as f32, q[1] as f32];
        let h = hessian_by_gradient_differences(&model, &qf, &[0.0, 0.0], &steps).unwrap();
        let det = h[0][0] * h[1][1] - h[0][1] * h[1][0];
        let (g0, g1) = (gq[0] as f64, gq[1] as f64);
        q[0] -= (h[1][1] * g0 - h[0][1] * g1) / det;
        q[1] -= (-h[1][0] * g0 + h[0][0] * g1) / det;
    }
    let qf = [q[0] as f32, q[1] as f32];
    let h = hessian_by_gradient_differences(&model, &qf, &[0.0, 0.0], &steps).unwrap();
    let stiff = [[h[0][0], h[0][1]], [h[1][0], h[1][1]]];
    let inv_mass = [[h[2][2], h[2][3]], [h[3][2], h[3][3]]];
    let a = |i: usize, j: usize| inv_mass[i][0] * stiff[0][j] + inv_mass[i][1] * stiff[1][j];
    let (slow_sq, fast_sq) = real_2x2_eigenvalues(a(0, 0), a(0, 1), a(1, 0), a(1, 1));
    let (slow, fast) = (slow_sq.sqrt(), fast_sq.sqrt());
    let (slow_exact, fast_exact) = sys.normal_mode_frequencies();
    let (e_slow, e_fast) = (slow / slow_exact - 1.0, fast / fast_exact - 1.0);
    println!(
        "rest at q = ({:.2e}, {:.2e}) rad; normal modes: fitted {slow:.4}, {fast:.4} rad/s, \
         closed form {slow_exact:.4}, {fast_exact:.4} rad/s, relative errors {e_slow:+.3e}, \
         {e_fast:+.3e} (bound 1e-2)",
        q[0], q[1]
    );
    assert!(e_slow.abs() <= 0.01, "slow mode off by {e_slow:+.3e}");
    assert!(e_fast.abs() <= 0.01, "fast mode off by {e_fast:+.3e}");
}

/// Samples skipped at the start of every trajectory by every estimator.
const SKIP: usize = 10;

/// The log with N(0, sigma^2) added to every angle.
fn with_noise(clean: &Dataset, sigma: f64, seed: u64) -> Dataset {
    let mut noisy = clean.clone();
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    for t in &mut noisy.trajectories {
        for i in 0..clean.dof {
            for v in t.x.column_mut(i) {
                let e: f64 = StandardNormal.sample(&mut rng);
                *v += sigma * e;
            }
        }
    }
    noisy
}

fn rms(errors: &[f64]) -> f64 {
    (errors.iter().map(|e| e * e).sum::<f64>() / errors.len() as f64).sqrt()
}

/// Errors of `estimate(noisy angles of one link)` against the simulator's
/// dq/dt.
fn estimator_errors(
    noisy: &Dataset,
    clean: &Dataset,
    estimate: &mut dyn FnMut(&[f64]) -> Vec<f64>,
) -> Vec<f64> {
    let mut out = Vec::new();
    for (tn, tc) in noisy.trajectories.iter().zip(&clean.trajectories) {
        for i in 0..clean.dof {
            let z: Vec<f64> = tn.x.column(i).to_vec();
            for (j, vj) in estimate(&z).iter().enumerate().skip(SKIP) {
                out.push(vj - tc.dx[[j, i]]);
            }
        }
    }
    out
}

/// The observer (EKF on the fitted mechanical model, its step Jacobian
/// through the mechanical energy's Hessian-vector products) estimates the
/// joint rates of the held-out runs from their angles with 1 mrad noise
/// (an encoder-grade sigma; our own choice), tuned on the noisy training
/// runs. Yardsticks: central finite differences, whose white-noise error
/// is sigma / (sqrt(2) T) (textbook numerical differentiation), and the
/// constant-velocity Kalman filter (Bar-Shalom, Li and Kirubarajan,
/// *Estimation with Applications to Tracking and Navigation*, 2001), its
/// intensity picked by grid search against the true rates of the training
/// runs (its best case).
#[test]
#[cfg_attr(
    debug_assertions,
    ignore = "fits a model and runs the observer: run with --release"
)]
fn the_observer_estimates_the_joint_rates_from_noisy_angles() {
    let sys = system();
    let (val, blob) = fitted();
    let model = HostModel::from_bytes(blob).unwrap();
    let train = training_log(&sys, 21);
    let (sigma, dt) = (1e-3, 0.04);
    let (noisy_train, noisy_val) = (with_noise(&train, sigma, 11), with_noise(val, sigma, 22));
    let tuning = tune(&model, &[&noisy_train], FalseAlarm::OnePercent, 50).unwrap();
    let mut run = ObserverRun::new(&model, tuning.settings.clone()).unwrap();
    let mut observer = Vec::new();
    for (tn, tc) in noisy_val.trajectories.iter().zip(&val.trajectories) {
        for (j, row) in position_rows(tn, val.dof).enumerate() {
            let e = run.push(&row).unwrap();
            if j >= SKIP {
                for i in 0..val.dof {
                    observer.push(e.v[i] as f64 - tc.dx[[j, i]]);
                }
            }
        }
    }
    let fd = rms(&estimator_errors(&noisy_val, val, &mut |z| {
        central_differences(z, dt)
    }));
    let r = sigma * sigma;
    let cv_on = |data: &Dataset, clean: &Dataset, s: f64| {
        rms(&estimator_errors(data, clean, &mut |z| {
            cv_velocities(z, dt, r, s)
        }))
    };
    let best = (-12..=16)
        .map(|e| 10f64.powf(e as f64 / 2.0))
        .min_by(|a, b| cv_on(&noisy_train, &train, *a).total_cmp(&cv_on(&noisy_train, &train, *b)))
        .unwrap();
    let cv = cv_on(&noisy_val, val, best);
    let obs = rms(&observer);
    println!(
        "double pendulum, angles with sigma {sigma:.0e} rad at {:.0} Hz: joint-rate RMS error over {} samples: observer {obs:.3e} rad/s, central differences {fd:.3e} (ratio {:.2}), constant-velocity filter {cv:.3e} (intensity {best:.1e}; ratio {:.2}); tuned noise {:?}",
        1.0 / dt,
        observer.len(),
        fd / obs,
        cv / obs,
        tuning.settings.position_noise,
    );
    assert!(obs < fd, "observer {obs} vs central differences {fd}");
    assert!(obs < cv, "observer {obs} vs constant-velocity filter {cv}");
}
