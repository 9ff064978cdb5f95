//! The gantry crane with its trolley free on the rail (the cart-pendulum,
//! `visviva simulate --system crane-cart`: trolley mass M, payload m on a
//! rope of length l; q = (x, theta), p = (p_x, p_theta)). The built-in
//! `crane-trolley` prescribes the trolley's acceleration as an input, so its
//! trolley is no coordinate and its mass matrix is the constant m l^2; the
//! coupled 2 x 2 mass matrix exists only when the trolley moves with the
//! payload, as here (undriven, conservative logs). A mechanical energy model
//! H = 1/2 p^T M(q)^-1 p + V(q), M^-1 = L(q) L(q)^T + eps I, is fitted to
//! simulated logs by the derivative loss, exported, and read back through
//! visviva-runtime:
//! * its mass matrix M(q) (from the runtime's dH/dp = M^-1 p at unit
//!   momenta; p is logged in its physical units, so there is no free scale)
//!   matches the cart-pendulum's closed form
//!   [[M + m, m l cos(theta)], [m l cos(theta), m l^2]]
//!   (Goldstein, Classical Mechanics, 3rd ed.; from memory; re-derived from
//!   the Cartesian positions in `trainer/src/reference/cart.rs`'s tests)
//!   within 2 % (relative Frobenius norm, entries in SI units) at every
//!   position of a held-out log;
//! * its swing frequency about the hanging rest (the nonzero eigenvalue
//!   w^2 of M^-1 K, K = d2V/dq2) matches the linearized cart-pendulum's
//!   w^2 = g (M + m) / (M l) (derived in `cart.rs` from det(K - w^2 M(0)))
//!   within 1 %.

#[path = "shared/mechanical_fit.rs"]
mod mechanical_fit;

use mechanical_fit::{fit_mechanical, fitted_mass_matrix};
use visviva_runtime::{Hamiltonian, State};
use visviva_tests::{hessian_by_gradient_differences, real_2x2_eigenvalues};
use visviva_trainer::deploy::blob::HostModel;
use visviva_trainer::reference::cart::{CraneCart, CRANE_CART_PARAMS};
use visviva_trainer::reference::params::ParamValues;

fn system() -> CraneCart {
    let params = ParamValues::new("crane-cart", CRANE_CART_PARAMS, &[]).unwrap();
    // Built through the catalog's constructor, then read back as the type.
    let boxed = CraneCart::build(params.clone()).unwrap();
    assert_eq!(boxed.name(), "crane-cart");
    CraneCart::from_params(params)
}

/// Relative Frobenius error of `got` against `exact`.
fn relative_error(got: &[[f64; 2]; 2], exact: &[[f64; 2]; 2]) -> f64 {
    let (mut diff, mut norm) = (0.0f64, 0.0f64);
    for i in 0..2 {
        for j in 0..2 {
            diff += (got[i][j] - exact[i][j]).powi(2);
            norm += exact[i][j].powi(2);
        }
    }
    (diff / norm).sqrt()
}

/// The fitted model's swing frequency about its own rest: two Newton steps
/// on dV/dtheta = 0 from theta = 0 at x = 0 (x is cyclic: the rail is
/// level), then the nonzero eigenvalue of M^-1 K with the Hessian by
/// differences of the runtime's gradient at p = 0 (H_qp = 0, H_pp = M^-1).
fn fitted_swing_frequency(model: &HostModel<'_>) -> (f64, f64) {
    let steps = [1e-3, 1e-3, 1e-3, 1e-3];
    let mut theta = 0.0f64;
    for _ in 0..2 {
        let q = [0.0f32, theta as f32];
        let s = State::<16>::new(&q, &[0.0, 0.0]).unwrap();
        let (mut gq, mut gp) = ([0.0f32; 16], [0.0f32; 16]);
        model.gradient(&s, &mut gq, &mut gp).unwrap();
        let h = hessian_by_gradient_differences(model, &q, &[0.0, 0.0], &steps).unwrap();
        theta -= gq[1] as f64 / h[1][1];
    }
    let q = [0.0f32, theta as f32];
    let h = hessian_by_gradient_differences(model, &q, &[0.0, 0.0], &steps).unwrap();
    let stiff = [[h[0][0], h[0][1]], [h[1][0], h[1][1]]];
    let inv_mass = [[h[2][2], h[2][3]], [h[3][2], h[3][3]]];
    let a = |i: usize, j: usize| inv_mass[i][0] * stiff[0][j] + inv_mass[i][1] * stiff[1][j];
    let (_rolling, swing_sq) = real_2x2_eigenvalues(a(0, 0), a(0, 1), a(1, 0), a(1, 1));
    (theta, swing_sq.sqrt())
}

#[test]
fn fitted_mechanical_model_has_the_cart_pendulum_mass_matrix_and_swing() {
    let sys = system();
    let (val, blob) = fit_mechanical(&sys, 31);
    let model = HostModel::from_bytes(&blob).unwrap();
    assert!(!model.is_separable());

    // M(q) at every position of the held-out log.
    let (mut worst, mut at) = (0.0f64, [0.0f64; 2]);
    let (mut count, mut x_range, mut theta_range) = (0, [f64::MAX, f64::MIN], 0.0f64);
    for t in &val.trajectories {
        for row in t.x.rows() {
            let q = [row[0], row[1]];
            let exact = sys.mass_matrix(&q);
            let got = fitted_mass_matrix(&model, [q[0] as f32, q[1] as f32]);
            let err = relative_error(&got, &exact);
            if err > worst {
                (worst, at) = (err, q);
            }
            x_range = [x_range[0].min(q[0]), x_range[1].max(q[0])];
            theta_range = theta_range.max(q[1].abs());
            count += 1;
        }
    }
    println!(
        "M(q): worst relative (Frobenius) error {worst:.3e} over {count} held-out positions \
         (x in [{:.2}, {:.2}] m, |theta| <= {:.1} deg), at x = {:.3} m, theta = {:.1} deg \
         (bound 2e-2)",
        x_range[0],
        x_range[1],
        theta_range.to_degrees(),
        at[0],
        at[1].to_degrees()
    );
    assert!(worst <= 0.02, "M(q) off by {:.2} %", 100.0 * worst);

    let (theta, swing) = fitted_swing_frequency(&model);
    let exact = sys.swing_frequency();
    let e = swing / exact - 1.0;
    println!(
        "rest at theta = {theta:.2e} rad; swing: fitted {swing:.4} rad/s, closed form \
         {exact:.4} rad/s, relative error {e:+.3e} (bound 1e-2)"
    );
    assert!(e.abs() <= 0.01, "swing frequency off by {e:+.3e}");
}
