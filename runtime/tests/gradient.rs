//! The runtime's analytic energy gradient checked against two references
//! outside the project: forward-mode automatic differentiation with the
//! general-purpose `num-dual` crate (f64 dual numbers through an independent
//! f64 re-implementation of the same network), and fourth-order central
//! differences of the runtime's own energy (standard stencil, e.g. Fornberg,
//! Math. Comp. 51, 1988). Both f32 and int8 weights, tanh and softplus,
//! general, separable (quadratic and network kinetic) and mechanical
//! (M(q)^-1 = L(q) L(q)^T + eps I) models.

mod common;

use common::*;
use num_dual::{Dual64, DualNum};
use visviva_runtime::format::Activation;
use visviva_runtime::{Hamiltonian, Method, Model, State};

/// The reference computes in f64 dual numbers.
type T = Dual64;

fn c(v: f64) -> T {
    Dual64::from_re(v)
}

fn act(a: Activation, x: T) -> T {
    match a {
        Activation::Tanh => x.tanh(),
        // softplus = ln(1 + e^x)
        Activation::Softplus => x.exp().ln_1p(),
        Activation::Relu => unreachable!("not used in energy fixtures"),
    }
}

fn mlp_ref(m: &OwnedMlp, x: &[T]) -> T {
    let mut cur: Vec<T> = x.to_vec();
    let last = m.layers.len() - 1;
    for (k, l) in m.layers.iter().enumerate() {
        let mut next = Vec::with_capacity(l.outputs);
        for j in 0..l.outputs {
            let mut acc = c(l.b[j] as f64);
            for i in 0..l.inputs {
                acc += cur[i] * c(l.w[j * l.inputs + i] as f64);
            }
            next.push(if k == last {
                acc
            } else {
                act(m.activation, acc)
            });
        }
        cur = next;
    }
    cur[0]
}

/// All outputs of a network in dual numbers.
fn mlp_all(m: &OwnedMlp, x: &[T]) -> Vec<T> {
    let mut cur: Vec<T> = x.to_vec();
    let last = m.layers.len() - 1;
    for (k, l) in m.layers.iter().enumerate() {
        cur = (0..l.outputs)
            .map(|j| {
                let mut acc = c(l.b[j] as f64);
                for i in 0..l.inputs {
                    acc += cur[i] * c(l.w[j * l.inputs + i] as f64);
                }
                if k == last {
                    acc
                } else {
                    act(m.activation, acc)
                }
            })
            .collect();
    }
    cur
}

/// The mechanical energy written out as the format defines it:
/// 1/2 z_p^T (L L^T + eps I) z_p + V(z_q), L_ij the factor network's output
/// (row by row), softplus ln(1 + e^x) on the diagonal. M^-1 is formed
/// explicitly here (the runtime never forms it).
fn mechanical_ref(factor: &OwnedMlp, floor: f32, potential: &OwnedMlp, zq: &[T], zp: &[T]) -> T {
    let n = zq.len();
    let raw = mlp_all(factor, zq);
    let l = |i: usize, j: usize| {
        let r = raw[i * (i + 1) / 2 + j];
        if i == j {
            r.exp().ln_1p()
        } else {
            r
        }
    };
    let mut t = c(0.0);
    for a in 0..n {
        for b in 0..n {
            // (L L^T)_ab = sum_k L_ak L_bk over k <= min(a, b).
            let mut minv = if a == b { c(floor as f64) } else { c(0.0) };
            for k in 0..=a.min(b) {
                minv += l(a, k) * l(b, k);
            }
            t += zp[a] * minv * zp[b];
        }
    }
    t * c(0.5) + mlp_ref(potential, zq)
}

/// Reference physical energy H(x) in any dual-number type.
fn energy_ref(m: &OwnedModel, x: &[T]) -> T {
    let n = m.dof;
    let z: Vec<T> = (0..2 * n)
        .map(|i| (x[i] - c(m.offset[i] as f64)) / c(m.scale[i] as f64))
        .collect();
    let e = match &m.energy {
        OwnedEnergy::General(net) => mlp_ref(net, &z),
        OwnedEnergy::Separable { potential, kinetic } => {
            let v = mlp_ref(potential, &z[..n]);
            let t = match kinetic {
                OwnedKinetic::Network(net) => mlp_ref(net, &z[n..]),
                OwnedKinetic::Quadratic(l, _) => {
                    let zp = &z[n..];
                    let mut t = c(0.0);
                    for j in 0..n {
                        let mut u = c(0.0);
                        for i in j..n {
                            u += zp[i] * c(l[i * (i + 1) / 2 + j] as f64);
                        }
                        t += u * u;
                    }
                    t * c(0.5)
                }
            };
            v + t
        }
        OwnedEnergy::Mechanical {
            factor,
            floor,
            potential,
        } => mechanical_ref(factor, *floor, potential, &z[..n], &z[n..]),
    };
    e * c(m.energy_scale as f64)
}

fn check_model(owned: &OwnedModel, rng: &mut XorShift64Star, label: &str) {
    let blob = owned.blob().unwrap();
    let model: Model<'_, 8, 128> = Model::from_bytes(&blob).expect("fixture parses");
    let n = owned.dof;
    let mut worst_ad = 0.0f64;
    let mut worst_fd = 0.0f64;
    for _ in 0..40 {
        let xs: Vec<f32> = (0..2 * n).map(|_| rng.uniform(-1.5, 1.5) as f32).collect();
        let state = State::<8>::new(&xs[..n], &xs[n..]).unwrap();
        let (mut gq, mut gp) = ([0.0f32; 8], [0.0f32; 8]);
        model.gradient(&state, &mut gq, &mut gp).unwrap();
        let got: Vec<f64> = gq[..n].iter().chain(&gp[..n]).map(|v| *v as f64).collect();
        let scale = got.iter().fold(1.0f64, |a, v| a.max(v.abs()));

        // num-dual: one forward-mode pass per coordinate.
        for i in 0..2 * n {
            let xd: Vec<Dual64> = xs
                .iter()
                .enumerate()
                .map(|(k, v)| Dual64::new(*v as f64, if k == i { 1.0 } else { 0.0 }))
                .collect();
            let d = energy_ref(owned, &xd).eps;
            worst_ad = worst_ad.max((got[i] - d).abs() / scale);
        }

        // Central differences (4th order) of the runtime's own f32 energy.
        let h = 0.03f32;
        for i in 0..2 * n {
            let e_at = |delta: f32| {
                let mut x = xs.clone();
                x[i] += delta;
                let s = State::<8>::new(&x[..n], &x[n..]).unwrap();
                model.energy(&s).unwrap() as f64
            };
            let fd = (-e_at(2.0 * h) + 8.0 * e_at(h) - 8.0 * e_at(-h) + e_at(-2.0 * h))
                / (12.0 * h as f64);
            worst_fd = worst_fd.max((got[i] - fd).abs() / scale);
        }
    }
    println!(
        "{label}: max rel. error vs num-dual {worst_ad:.2e}, vs central differences {worst_fd:.2e}"
    );
    // f32 arithmetic over ~64-term sums: measured below 4e-7 relative; round-off scale.
    assert!(
        worst_ad < 2e-6,
        "{label}: gradient differs from num-dual by {worst_ad:e}"
    );
    // Differences of f32 energies: round-off ~1e-7 / h plus O(h^4) truncation.
    assert!(
        worst_fd < 2e-4,
        "{label}: gradient differs from finite differences by {worst_fd:e}"
    );
}

#[test]
fn general_models_match_autodiff_and_differences() {
    let mut rng = XorShift64Star(0x5eed_0001);
    for kind in [Precision::F32, Precision::Int8] {
        for act in [Activation::Tanh, Activation::Softplus] {
            for dof in [1, 2, 3] {
                let m = general(
                    &mut rng,
                    dof,
                    &[32, 32],
                    act,
                    kind,
                    Method::ImplicitMidpoint,
                    0.01,
                );
                check_model(&m, &mut rng, &format!("general {kind:?} {act:?} n={dof}"));
            }
        }
    }
}

#[test]
fn separable_models_match_autodiff_and_differences() {
    let mut rng = XorShift64Star(0x5eed_0002);
    for kind in [Precision::F32, Precision::Int8] {
        for act in [Activation::Tanh, Activation::Softplus] {
            for dof in [1, 2, 4] {
                let mut m = separable(
                    &mut rng,
                    dof,
                    &[24, 24],
                    act,
                    kind,
                    Method::StormerVerlet,
                    0.01,
                );
                check_model(
                    &m,
                    &mut rng,
                    &format!("separable/quadratic {kind:?} {act:?} n={dof}"),
                );
                if let OwnedEnergy::Separable { kinetic, .. } = &mut m.energy {
                    let sizes = [dof, 16, 1];
                    *kinetic = OwnedKinetic::Network(OwnedMlp::random(&mut rng, &sizes, act, kind));
                }
                check_model(
                    &m,
                    &mut rng,
                    &format!("separable/network {kind:?} {act:?} n={dof}"),
                );
            }
        }
    }
}

#[test]
fn mechanical_models_match_autodiff_and_differences() {
    // H = 1/2 p^T M(q)^-1 p + V(q) with M^-1 = L(q) L(q)^T + eps I: the
    // runtime's analytic dH/dq (the factor network pulled back) against
    // num-dual through the explicitly formed M^-1.
    let mut rng = XorShift64Star(0x5eed_0003);
    for kind in [Precision::F32, Precision::Int8] {
        for act in [Activation::Tanh, Activation::Softplus] {
            for (dof, floor) in [(1, 0.0), (2, 0.05), (3, 1e-3)] {
                let m = mechanical(
                    &mut rng,
                    dof,
                    &[24, 24],
                    act,
                    kind,
                    Method::ImplicitMidpoint,
                    0.01,
                    floor,
                );
                check_model(
                    &m,
                    &mut rng,
                    &format!("mechanical {kind:?} {act:?} n={dof}"),
                );
            }
        }
    }
}

#[test]
fn vector_field_is_symplectic_gradient() {
    // f = J dH/dx: dq/dt = dH/dp, dp/dt = -dH/dq (Hamilton's equations).
    let mut rng = XorShift64Star(7);
    let owned = general(
        &mut rng,
        2,
        &[16],
        Activation::Tanh,
        Precision::F32,
        Method::Rk4,
        0.01,
    );
    let blob = owned.blob().unwrap();
    let model: Model<'_, 4, 32> = Model::from_bytes(&blob).unwrap();
    let s = State::<4>::new(&[0.3, -0.2], &[0.1, 0.4]).unwrap();
    let (mut gq, mut gp, mut fq, mut fp) = ([0.0; 4], [0.0; 4], [0.0; 4], [0.0; 4]);
    model.gradient(&s, &mut gq, &mut gp).unwrap();
    model.vector_field(&s, &mut fq, &mut fp).unwrap();
    for i in 0..2 {
        assert_eq!(fq[i].to_bits(), gp[i].to_bits());
        assert_eq!(fp[i].to_bits(), (-gq[i]).to_bits());
    }
}
