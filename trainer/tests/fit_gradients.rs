//! Parameter gradients of the Hamiltonian-network loss (double
//! backpropagation) and of the baseline loss, checked two ways:
//! * against forward-mode automatic differentiation with the general-purpose
//!   `num-dual` crate: the energy is re-implemented here in f64 over
//!   hyper-dual numbers (eps1 along one input coordinate, eps2 along a random
//!   parameter direction), so eps1 gives dE/dz_i and eps1eps2 its directional
//!   derivative in parameter space; the loss is then formed in dual numbers
//!   and its derivative must equal gradient . direction;
//! * against central finite differences of the trainer's own loss.
//!
//! The architectures: general, separable (quadratic and network kinetic
//! term) and mechanical (M(q)^-1 = L(q) L(q)^T + eps I from a network).

mod common;

use common::{central_difference, directional_error, energy_generic, loss_gradient, mlp_generic};
use ndarray::Array2;
use num_dual::{Dual64, HyperDual64};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use visviva_trainer::learn::hnn::{BaselineObjective, EnergyArch, HnnObjective, KineticArch};
use visviva_trainer::learn::net::{Activation, MlpShape};

/// d/ds of the loss at p + s d, by hyper-dual forward mode (num-dual).
fn loss_directional_dual(
    obj: &HnnObjective,
    p: &[f32],
    d: &[f64],
    z: &Array2<f32>,
    t: &Array2<f32>,
) -> f64 {
    let n = obj.dof;
    let dim = 2 * n;
    let ph: Vec<HyperDual64> = p
        .iter()
        .zip(d)
        .map(|(&v, &dv)| HyperDual64::new(v as f64, 0.0, dv, 0.0))
        .collect();
    let mut loss = Dual64::from(0.0);
    for b in 0..z.nrows() {
        // u_i = dE/dz_i with its parameter-direction derivative.
        let mut u = Vec::with_capacity(dim);
        for i in 0..dim {
            let zh: Vec<HyperDual64> = (0..dim)
                .map(|j| {
                    HyperDual64::new(z[[b, j]] as f64, if i == j { 1.0 } else { 0.0 }, 0.0, 0.0)
                })
                .collect();
            let e = energy_generic(&obj.arch, n, &ph, &zh);
            u.push(Dual64::new(e.eps1, e.eps1eps2));
        }
        let mut row = Dual64::from(0.0);
        for i in 0..dim {
            let src = if i < n { n + i } else { i - n };
            let e = u[src] * obj.gains[i] as f64 - t[[b, i]] as f64;
            row += e * e;
        }
        loss += row / dim as f64;
    }
    loss.eps
}

struct Case {
    name: &'static str,
    dof: usize,
    arch: EnergyArch,
}

fn cases() -> Vec<Case> {
    let mut v = Vec::new();
    for act in [Activation::Tanh, Activation::Softplus] {
        for dof in [1usize, 2] {
            let h = [7usize, 5];
            v.push(Case {
                name: "general",
                dof,
                arch: EnergyArch::General(MlpShape::new(2 * dof, &h, 1, act)),
            });
            v.push(Case {
                name: "separable-quadratic",
                dof,
                arch: EnergyArch::Separable {
                    potential: MlpShape::new(dof, &h, 1, act),
                    kinetic: KineticArch::Quadratic,
                },
            });
            v.push(Case {
                name: "separable-network",
                dof,
                arch: EnergyArch::Separable {
                    potential: MlpShape::new(dof, &[6, 4, 3], 1, act),
                    kinetic: KineticArch::Network(MlpShape::new(dof, &[5], 1, act)),
                },
            });
            v.push(Case {
                name: "mechanical",
                dof,
                arch: EnergyArch::Mechanical {
                    potential: MlpShape::new(dof, &h, 1, act),
                    factor: MlpShape::new(dof, &[6, 4], dof * (dof + 1) / 2, act),
                },
            });
        }
        // Three degrees of freedom: L has off-diagonal entries below the
        // first column too.
        v.push(Case {
            name: "mechanical",
            dof: 3,
            arch: EnergyArch::Mechanical {
                potential: MlpShape::new(3, &[5], 1, act),
                factor: MlpShape::new(3, &[7], 6, act),
            },
        });
    }
    v
}

fn random_setup(
    rng: &mut ChaCha8Rng,
    dof: usize,
    arch: &EnergyArch,
) -> (HnnObjective, Vec<f32>, Array2<f32>, Array2<f32>) {
    let rows = 6;
    let dim = 2 * dof;
    let z = Array2::from_shape_fn((rows, dim), |_| rng.random_range(-1.5f32..1.5));
    let t = Array2::from_shape_fn((rows, dim), |_| rng.random_range(-1.5f32..1.5));
    let gains: Vec<f32> = (0..dim)
        .map(|i| {
            let g = rng.random_range(0.5f32..2.0);
            if i < dof {
                g
            } else {
                -g
            }
        })
        .collect();
    let obj = HnnObjective {
        dof,
        arch: arch.clone(),
        gains,
    };
    // Glorot init plus a perturbation so biases and L are generic too.
    let mut p = arch.init(dof, rng.random());
    for v in p.iter_mut() {
        *v += rng.random_range(-0.3f32..0.3);
    }
    (obj, p, z, t)
}

#[test]
fn hnn_gradient_matches_num_dual_forward_mode() {
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    let mut worst = 0.0f64;
    for case in cases() {
        let (obj, p, z, t) = random_setup(&mut rng, case.dof, &case.arch);
        let grad = loss_gradient(&obj, &p, &z, &t);
        for _ in 0..3 {
            let d: Vec<f64> = (0..p.len()).map(|_| rng.random_range(-1.0..1.0)).collect();
            let reference = loss_directional_dual(&obj, &p, &d, &z, &t);
            let products = grad.iter().zip(&d).map(|(g, dv)| *g as f64 * dv);
            let (analytic, rel) = directional_error(products, reference);
            worst = worst.max(rel);
            // f32 arithmetic in the trainer: a few hundred roundings of
            // relative size 6e-8 each bound the error well below 1e-4.
            assert!(
                rel < 1e-4,
                "{} dof {}: analytic {analytic} vs num-dual {reference} (rel {rel:e})",
                case.name,
                case.dof
            );
        }
    }
    println!("worst relative difference vs num-dual: {worst:e}");
}

#[test]
fn hnn_gradient_matches_central_differences() {
    let mut rng = ChaCha8Rng::seed_from_u64(12);
    let mut worst = 0.0f64;
    for case in cases() {
        let (obj, p, z, t) = random_setup(&mut rng, case.dof, &case.arch);
        let grad = loss_gradient(&obj, &p, &z, &t);
        for _ in 0..3 {
            let d: Vec<f32> = (0..p.len())
                .map(|_| rng.random_range(-1.0f32..1.0))
                .collect();
            let fd = central_difference(&obj, &p, &d, &z, &t);
            let products = grad.iter().zip(&d).map(|(g, dv)| (*g * dv) as f64);
            let (analytic, rel) = directional_error(products, fd);
            worst = worst.max(rel);
            assert!(
                rel < 5e-3,
                "{} dof {}: analytic {analytic} vs central difference {fd} (rel {rel:e})",
                case.name,
                case.dof
            );
        }
    }
    println!("worst relative difference vs central differences: {worst:e}");
}

#[test]
fn baseline_gradient_matches_num_dual_and_central_differences() {
    let mut rng = ChaCha8Rng::seed_from_u64(13);
    for act in [Activation::Tanh, Activation::Softplus] {
        let shape = MlpShape::new(4, &[8, 6], 4, act);
        let obj = BaselineObjective {
            shape: shape.clone(),
        };
        let mut p = Vec::new();
        shape.init(&mut rng, &mut p);
        for v in p.iter_mut() {
            *v += rng.random_range(-0.3f32..0.3);
        }
        let z = Array2::from_shape_fn((5, 4), |_| rng.random_range(-1.5f32..1.5));
        let t = Array2::from_shape_fn((5, 4), |_| rng.random_range(-1.5f32..1.5));
        let grad = loss_gradient(&obj, &p, &z, &t);
        let d: Vec<f64> = (0..p.len()).map(|_| rng.random_range(-1.0..1.0)).collect();
        let analytic: f64 = grad.iter().zip(&d).map(|(g, dv)| *g as f64 * dv).sum();
        let magnitude: f64 = grad
            .iter()
            .zip(&d)
            .map(|(g, dv)| (*g as f64 * dv).abs())
            .sum();
        // num-dual forward mode along d.
        let pd: Vec<Dual64> = p
            .iter()
            .zip(&d)
            .map(|(&v, &dv)| Dual64::new(v as f64, dv))
            .collect();
        let mut loss = Dual64::from(0.0);
        for b in 0..5 {
            let x: Vec<Dual64> = (0..4).map(|j| Dual64::from(z[[b, j]] as f64)).collect();
            let y = mlp_generic(&shape, &pd, &x, act == Activation::Softplus);
            for i in 0..4 {
                let e = y[i] - t[[b, i]] as f64;
                loss += e * e / 4.0;
            }
        }
        let rel = (analytic - loss.eps).abs() / magnitude;
        assert!(
            rel < 1e-4,
            "baseline {act:?}: {analytic} vs num-dual {} ",
            loss.eps
        );
        let d32: Vec<f32> = d.iter().map(|v| *v as f32).collect();
        let fd = central_difference(&obj, &p, &d32, &z, &t);
        let rel_fd = (analytic - fd).abs() / magnitude;
        assert!(
            rel_fd < 5e-3,
            "baseline {act:?}: {analytic} vs central difference {fd}"
        );
    }
}
