//! Parameter gradients of the port-Hamiltonian loss (learned energy plus
//! R = L L^T on the momenta and G, each constant or a network of q),
//! checked two ways like the conservative loss in `fit_gradients.rs`:
//! * against forward-mode automatic differentiation with the general-purpose
//!   `num-dual` crate: energy, field (J - R) dH/dx + G u and loss are
//!   re-implemented here in f64 over (hyper-)dual numbers, and the loss's
//!   derivative along a random parameter direction must equal
//!   gradient . direction;
//! * against central finite differences of the trainer's own loss.

mod common;

use common::{central_difference, directional_error, energy_generic, loss_gradient, mlp_generic};
use ndarray::Array2;
use num_dual::{Dual64, HyperDual64};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use visviva_trainer::learn::hnn::{
    tri_index, EnergyArch, HnnObjective, KineticArch, Objective, PortArch, PortObjective,
};
use visviva_trainer::learn::net::{Activation, MlpShape};

/// d/ds of the port loss at p + s d, by forward mode (num-dual).
fn loss_directional_dual(
    obj: &PortObjective,
    p: &[f32],
    d: &[f64],
    z: &Array2<f32>,
    t: &Array2<f32>,
) -> f64 {
    let n = obj.hnn.dof;
    let dim = 2 * n;
    let m = obj.port.inputs;
    let ne = obj.hnn.param_count();
    let ph: Vec<HyperDual64> = p[..ne]
        .iter()
        .zip(d)
        .map(|(&v, &dv)| HyperDual64::new(v as f64, 0.0, dv, 0.0))
        .collect();
    let pp: Vec<Dual64> = p[ne..]
        .iter()
        .zip(&d[ne..])
        .map(|(&v, &dv)| Dual64::new(v as f64, dv))
        .collect();
    let lc = obj.port.l_count(n);
    let (pl, pg) = pp.split_at(lc);
    let mut loss = Dual64::from(0.0);
    for b in 0..z.nrows() {
        // L and G at this row: the constants, or the networks of z_q.
        let zq: Vec<Dual64> = (0..n).map(|i| Dual64::from(z[[b, i]] as f64)).collect();
        let l_row = match obj.port.dissipation_net(n) {
            Some(shape) => mlp_generic(&shape, pl, &zq, false),
            None => pl.to_vec(),
        };
        let g_row = match obj.port.input_net(n) {
            Some(shape) => mlp_generic(&shape, pg, &zq, false),
            None => pg.to_vec(),
        };
        let mut u = Vec::with_capacity(dim);
        for i in 0..dim {
            let zh: Vec<HyperDual64> = (0..dim)
                .map(|j| {
                    HyperDual64::new(z[[b, j]] as f64, if i == j { 1.0 } else { 0.0 }, 0.0, 0.0)
                })
                .collect();
            let e = energy_generic(&obj.hnn.arch, n, &ph, &zh);
            u.push(Dual64::new(e.eps1, e.eps1eps2));
        }
        let mut pred: Vec<Dual64> = (0..dim)
            .map(|i| {
                let src = if i < n { n + i } else { i - n };
                u[src] * obj.hnn.gains[i] as f64
            })
            .collect();
        if obj.port.dissipation {
            // Dense R_n = L L^T, then pred_p -= C R_n C^-1 u_p.
            let l = |i: usize, j: usize| {
                if j <= i {
                    l_row[tri_index(i, j)]
                } else {
                    Dual64::from(0.0)
                }
            };
            for i in 0..n {
                let mut acc = Dual64::from(0.0);
                for j in 0..n {
                    let mut r = Dual64::from(0.0);
                    for k in 0..n {
                        r += l(i, k) * l(j, k);
                    }
                    acc += r * u[n + j] / obj.c[n + j] as f64;
                }
                pred[n + i] -= acc * obj.c[n + i] as f64;
            }
        }
        for (i, value) in pred.iter_mut().enumerate() {
            for k in 0..m {
                *value += g_row[i * m + k] * z[[b, dim + k]] as f64;
            }
        }
        let mut row = Dual64::from(0.0);
        for i in 0..dim {
            let e = pred[i] - t[[b, i]] as f64;
            row += e * e;
        }
        loss += row / dim as f64;
    }
    loss.eps
}

fn cases() -> Vec<(EnergyArch, usize, PortArch)> {
    let mut v = Vec::new();
    for dof in [1usize, 2] {
        let h = [6usize, 5];
        let archs = [
            EnergyArch::General(MlpShape::new(2 * dof, &h, 1, Activation::Tanh)),
            EnergyArch::Separable {
                potential: MlpShape::new(dof, &h, 1, Activation::Softplus),
                kinetic: KineticArch::Quadratic,
            },
        ];
        for arch in archs {
            for (dissipation, inputs) in [(true, 0), (false, 2), (true, 1), (true, 3)] {
                let constant = PortArch {
                    dissipation,
                    inputs,
                    ..PortArch::default()
                };
                v.push((arch.clone(), dof, constant.clone()));
                // The same terms as networks of q (and one of each kind).
                v.push((
                    arch.clone(),
                    dof,
                    PortArch {
                        dissipation_hidden: if dissipation { vec![4] } else { vec![] },
                        input_hidden: if inputs > 0 { vec![3, 4] } else { vec![] },
                        ..constant.clone()
                    },
                ));
                if dissipation && inputs > 0 {
                    v.push((
                        arch.clone(),
                        dof,
                        PortArch {
                            input_hidden: vec![5],
                            ..constant
                        },
                    ));
                }
            }
        }
    }
    v
}

fn random_setup(
    rng: &mut ChaCha8Rng,
    dof: usize,
    arch: &EnergyArch,
    port: &PortArch,
) -> (PortObjective, Vec<f32>, Array2<f32>, Array2<f32>) {
    let rows = 5;
    let dim = 2 * dof;
    let z = Array2::from_shape_fn((rows, dim + port.inputs), |_| {
        rng.random_range(-1.5f32..1.5)
    });
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
    let c: Vec<f32> = (0..dim).map(|_| rng.random_range(0.5f32..2.0)).collect();
    let obj = PortObjective {
        hnn: HnnObjective {
            dof,
            arch: arch.clone(),
            gains,
        },
        port: port.clone(),
        c,
    };
    let mut p = arch.init(dof, rng.random());
    p.extend(port.init(dof, rng.random()));
    for v in p.iter_mut() {
        *v += rng.random_range(-0.3f32..0.3);
    }
    (obj, p, z, t)
}

#[test]
fn port_gradient_matches_num_dual_forward_mode() {
    let mut rng = ChaCha8Rng::seed_from_u64(21);
    let mut worst = 0.0f64;
    for (arch, dof, port) in cases() {
        let (obj, p, z, t) = random_setup(&mut rng, dof, &arch, &port);
        let grad = loss_gradient(&obj, &p, &z, &t);
        for _ in 0..3 {
            let d: Vec<f64> = (0..p.len()).map(|_| rng.random_range(-1.0..1.0)).collect();
            let reference = loss_directional_dual(&obj, &p, &d, &z, &t);
            let products = grad.iter().zip(&d).map(|(g, dv)| *g as f64 * dv);
            let (analytic, rel) = directional_error(products, reference);
            worst = worst.max(rel);
            // Same bound as the conservative loss: f32 roundings only.
            assert!(
                rel < 1e-4,
                "dof {dof} {port:?}: analytic {analytic} vs num-dual {reference} (rel {rel:e})"
            );
        }
        // The port parameters alone (R and G blocks), so their share is
        // not hidden by the network's.
        let ne = obj.hnn.param_count();
        let d: Vec<f64> = (0..p.len())
            .map(|k| {
                if k >= ne {
                    rng.random_range(-1.0..1.0)
                } else {
                    0.0
                }
            })
            .collect();
        let analytic: f64 = grad.iter().zip(&d).map(|(g, dv)| *g as f64 * dv).sum();
        let reference = loss_directional_dual(&obj, &p, &d, &z, &t);
        let rel = (analytic - reference).abs() / reference.abs().max(1e-9);
        assert!(
            rel < 1e-4,
            "port block dof {dof} {port:?}: {analytic} vs {reference}"
        );
    }
    println!("worst relative difference vs num-dual: {worst:e}");
}

#[test]
fn port_gradient_matches_central_differences() {
    let mut rng = ChaCha8Rng::seed_from_u64(22);
    let mut worst = 0.0f64;
    for (arch, dof, port) in cases() {
        let (obj, p, z, t) = random_setup(&mut rng, dof, &arch, &port);
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
                "dof {dof} {port:?}: analytic {analytic} vs central difference {fd} (rel {rel:e})"
            );
        }
    }
    println!("worst relative difference vs central differences: {worst:e}");
}
