//! Cross-crate checks live in `tests/tests/`; this library holds shared
//! helpers: textbook reference values (complete elliptic integral, pendulum
//! period, symmetric 2x2 eigenvalues) and measurements taken on any
//! `visviva-runtime` Hamiltonian (periods from rollouts, Hessians from the
//! runtime's own gradient).

use visviva_runtime::{Hamiltonian, Integrator, State, StepError};

/// Complete elliptic integral of the first kind K(k) (modulus k, 0 <= k < 1)
/// by the arithmetic-geometric mean: K(k) = pi / (2 AGM(1, sqrt(1 - k^2)))
/// (Abramowitz & Stegun 17.6.1-17.6.4).
pub fn elliptic_k(k: f64) -> f64 {
    assert!((0.0..1.0).contains(&k), "modulus {k} outside [0, 1)");
    let mut a = 1.0f64;
    let mut b = (1.0 - k * k).sqrt();
    // Quadratic convergence: a handful of iterations reach f64 precision.
    for _ in 0..64 {
        if (a - b).abs() <= 1e-16 * a {
            break;
        }
        let next = 0.5 * (a + b);
        b = (a * b).sqrt();
        a = next;
    }
    std::f64::consts::PI / (2.0 * a)
}

/// Period of a rigid pendulum of length `l` under gravity `g` swinging with
/// amplitude `amplitude` (rad): T = 4 sqrt(L/g) K(sin(a/2)) (Abramowitz &
/// Stegun ch. 17; textbook large-amplitude pendulum).
pub fn pendulum_period(l: f64, g: f64, amplitude: f64) -> f64 {
    4.0 * (l / g).sqrt() * elliptic_k((0.5 * amplitude).sin())
}

/// Eigenvalues (smaller, larger) of the symmetric matrix [[a, b], [b, d]] by
/// one Jacobi rotation (Golub & Van Loan, symmetric Schur decomposition):
/// the rotation angle theta with tan(2 theta) = 2b / (a - d) zeroes the
/// off-diagonal entry, and the diagonal then holds the eigenvalues.
pub fn symmetric_2x2_eigenvalues(a: f64, b: f64, d: f64) -> (f64, f64) {
    let theta = 0.5 * (2.0 * b).atan2(a - d);
    let (s, c) = theta.sin_cos();
    let e1 = c * c * a + 2.0 * s * c * b + s * s * d;
    let e2 = s * s * a - 2.0 * s * c * b + c * c * d;
    (e1.min(e2), e1.max(e2))
}

/// Eigenvalues (smaller, larger) of a general real 2x2 matrix
/// [[a, b], [c, d]] known to have real eigenvalues, from its trace and
/// determinant (characteristic polynomial l^2 - tr l + det = 0).
pub fn real_2x2_eigenvalues(a: f64, b: f64, c: f64, d: f64) -> (f64, f64) {
    let half_trace = 0.5 * (a + d);
    let det = a * d - b * c;
    let disc = (half_trace * half_trace - det).max(0.0).sqrt();
    let large = half_trace + disc;
    // Smaller root as det / larger, which avoids cancellation.
    (det / large, large)
}

/// Hessian of H at the state `(q, p)` by central differences of the
/// analytic gradient that `h` provides (the runtime's own dH/dx), with step
/// `steps[i]` in coordinate i (q's then p's). Row i holds d(dH/dx)/dx_i;
/// the result is symmetrized and returned as 2n rows of 2n entries.
pub fn hessian_by_gradient_differences<const D: usize, H: Hamiltonian<D>>(
    h: &H,
    q: &[f32],
    p: &[f32],
    steps: &[f64],
) -> Result<Vec<Vec<f64>>, StepError> {
    let n = q.len();
    let d = 2 * n;
    let gradient = |x: &[f64]| -> Result<Vec<f64>, StepError> {
        let qs: Vec<f32> = x[..n].iter().map(|v| *v as f32).collect();
        let ps: Vec<f32> = x[n..].iter().map(|v| *v as f32).collect();
        let s = State::<D>::new(&qs, &ps)?;
        let mut gq = [0.0f32; D];
        let mut gp = [0.0f32; D];
        h.gradient(&s, &mut gq, &mut gp)?;
        Ok(gq[..n].iter().chain(&gp[..n]).map(|v| *v as f64).collect())
    };
    let base: Vec<f64> = q.iter().chain(p).map(|v| *v as f64).collect();
    let mut rows = vec![vec![0.0f64; d]; d];
    for i in 0..d {
        let mut plus = base.clone();
        let mut minus = base.clone();
        plus[i] += steps[i];
        minus[i] -= steps[i];
        // Use the steps actually representable in f32.
        let span = (plus[i] as f32 as f64) - (minus[i] as f32 as f64);
        let gp = gradient(&plus)?;
        let gm = gradient(&minus)?;
        for j in 0..d {
            rows[i][j] = (gp[j] - gm[j]) / span;
        }
    }
    let mut sym = rows.clone();
    for i in 0..d {
        for j in 0..d {
            sym[i][j] = 0.5 * (rows[i][j] + rows[j][i]);
        }
    }
    Ok(sym)
}

/// Times at which the momentum `p[coordinate]` changes sign along a rollout
/// of `steps` steps of `integrator` from `x0`, each located by linear
/// interpolation between the two states that bracket it. The sample times
/// are k * integrator.dt (f64).
pub fn momentum_sign_changes<const D: usize, H: Hamiltonian<D>>(
    h: &H,
    integrator: &Integrator,
    x0: State<D>,
    coordinate: usize,
    steps: usize,
) -> Result<Vec<f64>, StepError> {
    let dt = integrator.dt as f64;
    let mut x = x0;
    let mut prev = x.p[coordinate] as f64;
    let mut crossings = Vec::new();
    for k in 0..steps {
        integrator.step(h, &mut x)?;
        let now = x.p[coordinate] as f64;
        // A crossing strictly inside the step, or landing exactly on zero
        // coming from a non-zero value.
        if (prev < 0.0 && now >= 0.0) || (prev > 0.0 && now <= 0.0) {
            let frac = prev / (prev - now);
            crossings.push((k as f64 + frac) * dt);
        }
        prev = now;
    }
    Ok(crossings)
}

/// Mean period from successive momentum sign changes (two per period):
/// twice the mean spacing between the first and last crossing.
pub fn period_from_crossings(crossings: &[f64]) -> Option<f64> {
    if crossings.len() < 3 {
        return None;
    }
    let intervals = (crossings.len() - 1) as f64;
    Some(2.0 * (crossings[crossings.len() - 1] - crossings[0]) / intervals)
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::f64::consts::PI;

    #[test]
    fn elliptic_k_matches_tabulated_values() {
        // K(0) = pi/2 (A&S 17.3.11).
        assert!((elliptic_k(0.0) - PI / 2.0).abs() < 1e-15);
        // K at modulus sin 45 deg = 1.8540746773 (A&S Table 17.1, m = 0.5;
        // from memory).
        assert!((elliptic_k((0.5f64).sqrt()) - 1.854_074_677_3).abs() < 1e-9);
    }

    #[test]
    fn symmetric_eigenvalues_match_characteristic_polynomial() {
        // [[2, 1], [1, 2]] has eigenvalues 1 and 3 (textbook).
        let (a, b) = symmetric_2x2_eigenvalues(2.0, 1.0, 2.0);
        assert!((a - 1.0).abs() < 1e-14 && (b - 3.0).abs() < 1e-14);
        let (a, b) = real_2x2_eigenvalues(2.0, 1.0, 1.0, 2.0);
        assert!((a - 1.0).abs() < 1e-14 && (b - 3.0).abs() < 1e-14);
    }

    #[test]
    fn crossing_period_of_a_linear_interpolant() {
        // Crossings of sin(2 pi t / 4) every 2 s: period 4.
        assert_eq!(period_from_crossings(&[1.0, 3.0, 5.0, 7.0]), Some(4.0));
        assert_eq!(period_from_crossings(&[1.0, 3.0]), None);
    }
}
