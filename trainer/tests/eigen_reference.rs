//! The trainer's eigenvalue routine (`check::eigenvalues`: characteristic
//! polynomial by Faddeev-LeVerrier, roots by Durand-Kerner), which gives
//! every learned mode's frequency and damping ratio, against a
//! general-purpose linear-algebra crate (`nalgebra`'s real Schur
//! decomposition, `complex_eigenvalues`) on coupled, damped matrices of the
//! port-Hamiltonian form A = (J - R) Q the modes come from.

use nalgebra::DMatrix;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use visviva_trainer::evidence::check::eigenvalues;

/// Eigenvalues of `a` from nalgebra, as (real, imaginary) pairs.
fn reference(a: &[Vec<f64>]) -> Vec<(f64, f64)> {
    let d = a.len();
    let m = DMatrix::from_fn(d, d, |i, j| a[i][j]);
    m.complex_eigenvalues()
        .iter()
        .map(|z| (z.re, z.im))
        .collect()
}

/// Largest distance from an eigenvalue of one list to the nearest unused
/// one of the other, over the largest modulus.
fn worst_mismatch(ours: &[(f64, f64)], theirs: &[(f64, f64)]) -> f64 {
    assert_eq!(ours.len(), theirs.len());
    let scale = theirs.iter().map(|(r, i)| r.hypot(*i)).fold(0.0, f64::max);
    let mut used = vec![false; theirs.len()];
    let mut worst = 0.0f64;
    for (r, i) in ours {
        let (k, dist) = theirs
            .iter()
            .enumerate()
            .filter(|(k, _)| !used[*k])
            .map(|(k, (tr, ti))| (k, (r - tr).hypot(i - ti)))
            .min_by(|a, b| a.1.total_cmp(&b.1))
            .unwrap();
        used[k] = true;
        worst = worst.max(dist / scale);
    }
    worst
}

/// A random coupled, damped A = (J - R) Q with n degrees of freedom:
/// Q = B B^T + 0.1 I (symmetric positive definite, all entries coupled),
/// R = [[0, 0], [0, L L^T]] (damping on the momenta), J the canonical
/// symplectic matrix.
fn port_matrix(n: usize, rng: &mut ChaCha8Rng) -> Vec<Vec<f64>> {
    let d = 2 * n;
    let b: Vec<Vec<f64>> = (0..d)
        .map(|_| (0..d).map(|_| rng.random_range(-1.0..1.0)).collect())
        .collect();
    let l: Vec<Vec<f64>> = (0..n)
        .map(|_| (0..n).map(|_| rng.random_range(-0.5..0.5)).collect())
        .collect();
    let q = |i: usize, j: usize| {
        (0..d).map(|k| b[i][k] * b[j][k]).sum::<f64>() + if i == j { 0.1 } else { 0.0 }
    };
    let jr = |i: usize, k: usize| {
        let j = if i < n && k == i + n {
            1.0
        } else if i >= n && k + n == i {
            -1.0
        } else {
            0.0
        };
        let r = if i >= n && k >= n {
            (0..n).map(|m| l[i - n][m] * l[k - n][m]).sum::<f64>()
        } else {
            0.0
        };
        j - r
    };
    (0..d)
        .map(|i| {
            (0..d)
                .map(|j| (0..d).map(|k| jr(i, k) * q(k, j)).sum())
                .collect()
        })
        .collect()
}

#[test]
fn eigenvalues_agree_with_nalgebra_on_coupled_damped_matrices() {
    // Measured: worst 2.3e-14 of the largest modulus (150 matrices); the
    // limit 1e-11 leaves a margin of about 400.
    let mut rng = ChaCha8Rng::seed_from_u64(20);
    let mut worst = 0.0f64;
    for n in 1..=3 {
        for _ in 0..50 {
            let a = port_matrix(n, &mut rng);
            let w = worst_mismatch(&eigenvalues(&a), &reference(&a));
            assert!(w < 1e-11, "{n} dof: mismatch {w:e} for {a:?}");
            worst = worst.max(w);
        }
    }
    println!("150 matrices (1 to 3 dof): worst mismatch {worst:.2e} of the largest |lambda|");
}

#[test]
fn eigenvalues_agree_with_nalgebra_on_the_drivetrain() {
    // Measured: 7.4e-14 of the largest modulus; asserted 1e-11.
    // The drivetrain's exact linearization (defaults Jm = 2e-4, Jl = 1e-3
    // kg m^2, k = 1 N m/rad, c = 2e-3, b = 1e-2 N m s/rad): a rigid-body
    // zero, a slow real friction mode and the lightly damped shaft mode,
    // moduli from 0 to 77 rad/s.
    let (jm, jl, k, c, b) = (2e-4f64, 1e-3f64, 1.0f64, 2e-3f64, 1e-2f64);
    let a = vec![
        vec![0.0, 0.0, 1.0 / jm, 0.0],
        vec![0.0, 0.0, 0.0, 1.0 / jl],
        vec![-k, k, -c / jm, c / jl],
        vec![k, -k, c / jm, -(c + b) / jl],
    ];
    let w = worst_mismatch(&eigenvalues(&a), &reference(&a));
    println!("drivetrain: mismatch {w:.2e} of the largest |lambda|");
    assert!(w < 1e-11, "mismatch {w:e}");
}
