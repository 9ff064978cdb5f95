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

use mechanical_fit::{fit_mechanical, fitted_mass_matrix};
use visviva_runtime::{Hamiltonian, State};
use visviva_tests::{hessian_by_gradient_differences, real_2x2_eigenvalues};
use visviva_trainer::deploy::blob::HostModel;
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

#[test]
fn fitted_mechanical_model_has_the_double_pendulum_mass_matrix_and_modes() {
    let sys = system();
    let (val, blob) = fit_mechanical(&sys, 21);
    let model = HostModel::from_bytes(&blob).unwrap();
    assert!(!model.is_separable());

    // M(q) at every position of the held-out log.
    let mut worst = 0.0f64;
    let mut count = 0;
    for t in &val.trajectories {
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
