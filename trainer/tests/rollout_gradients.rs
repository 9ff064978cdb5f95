//! The gradient of the trajectory-matching loss through the integrator
//! steps (the discrete adjoint in `learn::rollout_loss`), for every method
//! trajectory matching supports (Stormer-Verlet and Yoshida-4), checked two
//! ways along random directions in parameters and window initial states:
//! * against forward-mode automatic differentiation with the general-purpose
//!   `num-dual` crate: the rollout re-implemented here in f64 over dual
//!   numbers (hyper-dual inside the potential, eps1 along an input
//!   coordinate for dV/dz, eps2 along the direction);
//! * against central finite differences of the trainer's own loss.
//!
//! Also: the training-side rollout agrees with `visviva-runtime`'s step of
//! the exported blob (the arithmetic every check and device uses).

#![allow(clippy::needless_range_loop)]

#[allow(dead_code)]
mod common;

use common::{directional_error, mlp_generic};
use ndarray::Array2;
use num_dual::{Dual64, DualNum, HyperDual64};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use visviva_runtime::{Integrator, Method, Model, State};
use visviva_trainer::deploy::blob::WeightKind;
use visviva_trainer::deploy::fitted_blob::energy_blob;
use visviva_trainer::learn::hnn::{tri_index, EnergyArch, EnergyModel, KineticArch, Normalization};
use visviva_trainer::learn::net::{Activation, MlpShape};
use visviva_trainer::learn::rollout_loss::{
    substep_fractions, RolloutGradient, RolloutLoss, WindowBatch,
};

const N: usize = 2;
const STEPS: usize = 5;
const ROWS: usize = 3;

struct Setup {
    shape: MlpShape,
    arch: EnergyArch,
    norm: Normalization,
    sigma: Vec<f64>,
    params: Vec<f32>,
    batch: WindowBatch,
    dt: f64,
}

fn setup(rng: &mut ChaCha8Rng, act: Activation) -> Setup {
    let shape = MlpShape::new(N, &[6, 5], 1, act);
    let arch = EnergyArch::Separable {
        potential: shape.clone(),
        kinetic: KineticArch::Quadratic,
    };
    let mut params = arch.init(N, rng.random());
    for v in params.iter_mut() {
        *v += rng.random_range(-0.3f32..0.3);
    }
    let norm = Normalization {
        offset: vec![0.1, -0.2, 0.0, 0.0],
        scale: vec![0.7, 1.3, 0.9, 1.1],
        rate_scale: vec![1.0; 2 * N],
        energy_scale: 1.4,
    };
    let y = (0..=STEPS)
        .map(|_| Array2::from_shape_fn((ROWS, N), |_| rng.random_range(-1.0..1.0)))
        .collect();
    let x0 = Array2::from_shape_fn((ROWS, 2 * N), |_| rng.random_range(-1.0..1.0));
    Setup {
        shape,
        arch,
        norm,
        sigma: vec![0.3, 0.5],
        params,
        batch: WindowBatch { y, x0 },
        dt: 0.05,
    }
}

fn loss_of(s: &Setup, method: Method, params: &[f32], x0: &Array2<f64>) -> f64 {
    let l = RolloutLoss::new(N, &s.arch, &s.norm, method, s.dt, s.sigma.clone()).unwrap();
    let batch = WindowBatch {
        y: s.batch.y.clone(),
        x0: x0.clone(),
    };
    l.loss(params, &batch, None)
}

fn analytic(s: &Setup, method: Method) -> RolloutGradient {
    let l = RolloutLoss::new(N, &s.arch, &s.norm, method, s.dt, s.sigma.clone()).unwrap();
    let mut g = RolloutGradient {
        params: Vec::new(),
        x0: Array2::zeros((0, 0)),
    };
    l.loss(&s.params, &s.batch, Some(&mut g));
    g
}

/// dV/dq (SI) at q, with its derivative along the direction, by
/// hyper-dual numbers through an independent network implementation.
fn potential_gradient_dual(s: &Setup, th: &[Dual64], q: &[Dual64]) -> Vec<Dual64> {
    let np = s.shape.param_count();
    let thh: Vec<HyperDual64> = th[..np]
        .iter()
        .map(|t| HyperDual64::new(t.re, 0.0, t.eps, 0.0))
        .collect();
    let soft = s.shape.activation == Activation::Softplus;
    let es = s.norm.energy_scale as f64;
    (0..N)
        .map(|i| {
            let z: Vec<HyperDual64> = (0..N)
                .map(|j| {
                    let sc = s.norm.scale[j] as f64;
                    let off = s.norm.offset[j] as f64;
                    let seed = if i == j { 1.0 } else { 0.0 };
                    HyperDual64::new((q[j].re - off) / sc, seed, q[j].eps / sc, 0.0)
                })
                .collect();
            let e = mlp_generic(&s.shape, &thh, &z, soft)[0];
            Dual64::new(e.eps1, e.eps1eps2) * (es / s.norm.scale[i] as f64)
        })
        .collect()
}

/// M^-1 = es A L L^T A over dual numbers.
fn inverse_mass_dual(s: &Setup, th: &[Dual64]) -> Vec<Vec<Dual64>> {
    let raw = &th[s.shape.param_count()..];
    let l = |i: usize, j: usize| -> Dual64 {
        if j > i {
            Dual64::from(0.0)
        } else if i == j {
            raw[tri_index(i, j)].exp()
        } else {
            raw[tri_index(i, j)]
        }
    };
    let es = s.norm.energy_scale as f64;
    (0..N)
        .map(|i| {
            (0..N)
                .map(|j| {
                    let mut acc = Dual64::from(0.0);
                    for k in 0..N {
                        acc += l(i, k) * l(j, k);
                    }
                    let si = s.norm.scale[N + i] as f64;
                    let sj = s.norm.scale[N + j] as f64;
                    acc * (es / (si * sj))
                })
                .collect()
        })
        .collect()
}

/// The loss along direction (dp, dx) by forward mode (num-dual).
fn directional_dual(s: &Setup, method: Method, dp: &[f64], dx: &Array2<f64>) -> f64 {
    let th: Vec<Dual64> = s
        .params
        .iter()
        .zip(dp)
        .map(|(v, d)| Dual64::new(*v as f64, *d))
        .collect();
    let minv = inverse_mass_dual(s, &th);
    let hs: Vec<f64> = substep_fractions(method)
        .unwrap()
        .iter()
        .map(|c| c * s.dt)
        .collect();
    let count = (ROWS * (STEPS + 1) * N) as f64;
    let mut loss = Dual64::from(0.0);
    for b in 0..ROWS {
        let x = |i: usize| Dual64::new(s.batch.x0[[b, i]], dx[[b, i]]);
        let mut q: Vec<Dual64> = (0..N).map(x).collect();
        let mut p: Vec<Dual64> = (N..2 * N).map(x).collect();
        for k in 0..=STEPS {
            if k > 0 {
                for &h in &hs {
                    let g = potential_gradient_dual(s, &th, &q);
                    let ph: Vec<Dual64> = (0..N).map(|i| p[i] - g[i] * (0.5 * h)).collect();
                    for i in 0..N {
                        let mut v = Dual64::from(0.0);
                        for j in 0..N {
                            v += minv[i][j] * ph[j];
                        }
                        q[i] += v * h;
                    }
                    let g = potential_gradient_dual(s, &th, &q);
                    p = (0..N).map(|i| ph[i] - g[i] * (0.5 * h)).collect();
                }
            }
            for i in 0..N {
                let e = (q[i] - s.batch.y[k][[b, i]]) / s.sigma[i];
                loss += e * e;
            }
        }
    }
    (loss / count).eps
}

fn directions(rng: &mut ChaCha8Rng, s: &Setup) -> (Vec<f64>, Array2<f64>) {
    let dp = (0..s.params.len())
        .map(|_| rng.random_range(-1.0..1.0))
        .collect();
    let dx = Array2::from_shape_fn((ROWS, 2 * N), |_| rng.random_range(-1.0..1.0));
    (dp, dx)
}

fn products<'a>(
    g: &'a RolloutGradient,
    dp: &'a [f64],
    dx: &'a Array2<f64>,
) -> impl Iterator<Item = f64> + 'a {
    g.params
        .iter()
        .zip(dp)
        .map(|(a, b)| a * b)
        .chain(g.x0.iter().zip(dx.iter()).map(|(a, b)| a * b))
}

#[test]
fn rollout_gradient_matches_num_dual_for_every_supported_method() {
    let mut rng = ChaCha8Rng::seed_from_u64(21);
    let mut worst = 0.0f64;
    for method in [Method::StormerVerlet, Method::Yoshida4] {
        for act in [Activation::Tanh, Activation::Softplus] {
            let s = setup(&mut rng, act);
            let g = analytic(&s, method);
            for _ in 0..3 {
                let (dp, dx) = directions(&mut rng, &s);
                let reference = directional_dual(&s, method, &dp, &dx);
                let (value, rel) = directional_error(products(&g, &dp, &dx), reference);
                worst = worst.max(rel);
                // The trainer's network runs in f32: a few thousand
                // roundings of relative size 6e-8 stay well below 1e-4.
                assert!(
                    rel < 1e-4,
                    "{method:?} {act:?}: adjoint {value} vs num-dual {reference} (rel {rel:e})"
                );
            }
        }
    }
    println!("worst relative difference vs num-dual: {worst:e}");
}

#[test]
fn rollout_gradient_matches_central_differences_for_every_supported_method() {
    let mut rng = ChaCha8Rng::seed_from_u64(22);
    let mut worst = 0.0f64;
    for method in [Method::StormerVerlet, Method::Yoshida4] {
        for act in [Activation::Tanh, Activation::Softplus] {
            let s = setup(&mut rng, act);
            let g = analytic(&s, method);
            for _ in 0..3 {
                let (dp, dx) = directions(&mut rng, &s);
                // Central difference, step 1e-3: error O(h^2) (textbook),
                // balanced against the f32 rounding of the parameters.
                let h = 1e-3;
                let at = |sign: f64| {
                    let p: Vec<f32> = s
                        .params
                        .iter()
                        .zip(&dp)
                        .map(|(v, d)| v + (sign * h * d) as f32)
                        .collect();
                    let x = &s.batch.x0 + &(&dx * (sign * h));
                    loss_of(&s, method, &p, &x)
                };
                let fd = (at(1.0) - at(-1.0)) / (2.0 * h);
                let (value, rel) = directional_error(products(&g, &dp, &dx), fd);
                worst = worst.max(rel);
                assert!(
                    rel < 5e-3,
                    "{method:?} {act:?}: adjoint {value} vs central difference {fd} (rel {rel:e})"
                );
            }
        }
    }
    println!("worst relative difference vs central differences: {worst:e}");
}

#[test]
fn training_rollout_is_the_runtime_step() {
    // The trainer's differentiable rollout against visviva-runtime's step of
    // the exported blob, same initial state, same method and step.
    let mut rng = ChaCha8Rng::seed_from_u64(23);
    for method in [Method::StormerVerlet, Method::Yoshida4] {
        let s = setup(&mut rng, Activation::Tanh);
        let model = EnergyModel {
            dof: N,
            arch: s.arch.clone(),
            norm: s.norm.clone(),
            params: s.params.clone(),
            port: None,
        };
        let blob = energy_blob(
            &model,
            Integrator::new(method, s.dt as f32),
            WeightKind::F32,
        )
        .unwrap();
        let device = Model::<8, 128>::from_bytes(&blob).unwrap();
        let x0 = s.batch.x0.row(0).to_owned();
        let q0: Vec<f32> = (0..N).map(|i| x0[i] as f32).collect();
        let p0: Vec<f32> = (N..2 * N).map(|i| x0[i] as f32).collect();
        let mut state = State::<8>::new(&q0, &p0).unwrap();
        let integrator = Integrator::new(method, s.dt as f32);
        for _ in 0..STEPS {
            integrator.step(&device, &mut state).unwrap();
        }
        let l = RolloutLoss::new(N, &s.arch, &s.norm, method, s.dt, vec![1.0; N]).unwrap();
        let x0b = x0.clone().into_shape_with_order((1, 2 * N)).unwrap();
        let q = l.positions(&s.params, &x0b, STEPS);
        let mismatch = (0..N)
            .map(|i| (q[STEPS][[0, i]] - state.q[i] as f64).abs())
            .fold(0.0f64, f64::max);
        // The runtime steps in f32, the trainer's states in f64 (network in
        // f32): agreement to a few f32 roundings of the unit-size states.
        assert!(
            mismatch < 1e-5,
            "{method:?}: distance to the runtime's rollout {mismatch:e}"
        );
        println!("{method:?}: largest distance to the runtime's rollout {mismatch:e}");
    }
}
