//! The observer's step Jacobian (tangent propagation with analytic
//! Hessian-vector products) checked against forward-mode automatic
//! differentiation with the general-purpose `num-dual` crate: an
//! independent f64 re-implementation of each model's energy and of each
//! integrator's formula, written once over generic dual numbers; the
//! gradient inside the step is itself a nested dual derivative, and the
//! Jacobian column j is the step's dual part for the seed e_j. Every
//! integrator, f32 and int8 weights, conservative and port models, and the
//! mechanical energy (M(q)^-1 = L(q) L(q)^T + eps I) with the methods it
//! takes.

mod common;

use common::*;
use num_dual::{Dual, Dual64, DualNum};
use visviva_runtime::format::Activation;
use visviva_runtime::jacobian::step_with_jacobian;
use visviva_runtime::{Integrator, Method, Model, State};

fn c<T: DualNum<Primitive = f64> + Copy>(v: f32) -> T {
    T::from(v as f64)
}

fn act<T: DualNum<Primitive = f64> + Copy>(a: Activation, x: T) -> T {
    match a {
        Activation::Tanh => x.tanh(),
        // softplus = ln(1 + e^x)
        Activation::Softplus => x.exp().ln_1p(),
        Activation::Relu => unreachable!("not used in fixtures"),
    }
}

/// Every output of a network (weights as the runtime evaluates them).
fn mlp_ref<T: DualNum<Primitive = f64> + Copy>(m: &OwnedMlp, x: &[T]) -> Vec<T> {
    let mut cur: Vec<T> = x.to_vec();
    let last = m.layers.len() - 1;
    for (k, l) in m.layers.iter().enumerate() {
        let mut next = Vec::with_capacity(l.outputs);
        for j in 0..l.outputs {
            let mut acc: T = c(l.b[j]);
            for i in 0..l.inputs {
                acc += cur[i] * c::<T>(l.w[j * l.inputs + i]);
            }
            next.push(if k == last {
                acc
            } else {
                act(m.activation, acc)
            });
        }
        cur = next;
    }
    cur
}

fn floats(b: &[u8]) -> Vec<f32> {
    b.chunks_exact(4)
        .map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]]))
        .collect()
}

/// Physical energy H(x).
fn energy_ref<T: DualNum<Primitive = f64> + Copy>(m: &OwnedModel, x: &[T]) -> T {
    let n = m.dof;
    let z: Vec<T> = (0..2 * n)
        .map(|i| (x[i] - c::<T>(m.offset[i])) / c::<T>(m.scale[i]))
        .collect();
    let e = match &m.energy {
        OwnedEnergy::General(net) => mlp_ref(net, &z)[0],
        OwnedEnergy::Separable { potential, kinetic } => {
            let v = mlp_ref(potential, &z[..n])[0];
            let t = match kinetic {
                OwnedKinetic::Network(net) => mlp_ref(net, &z[n..])[0],
                OwnedKinetic::Quadratic(l, _) => {
                    let zp = &z[n..];
                    let mut t: T = c(0.0);
                    for j in 0..n {
                        let mut u: T = c(0.0);
                        for i in j..n {
                            u += zp[i] * c::<T>(l[i * (i + 1) / 2 + j]);
                        }
                        t += u * u;
                    }
                    t * c::<T>(0.5)
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
    e * c::<T>(m.energy_scale)
}

/// E = 1/2 z_p^T (L L^T + eps I) z_p + V(z_q), L from the factor network
/// (softplus on the diagonal), as `runtime/src/energy/mechanical.rs`
/// defines it.
fn mechanical_ref<T: DualNum<Primitive = f64> + Copy>(
    factor: &OwnedMlp,
    floor: f32,
    potential: &OwnedMlp,
    zq: &[T],
    zp: &[T],
) -> T {
    let n = zq.len();
    let raw = mlp_ref(factor, zq);
    let l = |i: usize, j: usize| {
        let r = raw[i * (i + 1) / 2 + j];
        if i == j {
            r.exp().ln_1p()
        } else {
            r
        }
    };
    let mut t: T = c(0.0);
    for j in 0..n {
        let mut u: T = c(0.0);
        for i in j..n {
            u += zp[i] * l(i, j);
        }
        t += u * u;
    }
    for z in zp {
        t += *z * *z * c::<T>(floor);
    }
    t * c::<T>(0.5) + mlp_ref(potential, zq)[0]
}

/// dH/dx by a nested dual pass per coordinate.
fn grad_ref<T: DualNum<Primitive = f64> + Copy>(m: &OwnedModel, x: &[T]) -> Vec<T> {
    (0..x.len())
        .map(|i| {
            let xd: Vec<Dual<T>> = x
                .iter()
                .enumerate()
                .map(|(k, v)| Dual::new(*v, if k == i { T::one() } else { T::zero() }))
                .collect();
            energy_ref(m, &xd).eps
        })
        .collect()
}

/// The port field (J - R(q)) g + G(q) u.
fn field_ref<T: DualNum<Primitive = f64> + Copy>(
    m: &OwnedModel,
    q: &[T],
    g: &[T],
    u: &[f32],
) -> Vec<T> {
    let n = m.dof;
    let n2 = 2 * n;
    let mut f: Vec<T> = (0..n2)
        .map(|i| if i < n { g[n + i] } else { -g[i - n] })
        .collect();
    let zq: Vec<T> = (0..n)
        .map(|i| (q[i] - c::<T>(m.offset[i])) / c::<T>(m.scale[i]))
        .collect();
    let l: Option<Vec<T>> = match (&m.dissipation_net, &m.dissipation) {
        (Some(net), _) => Some(mlp_ref(net, &zq)),
        (None, Some(b)) => Some(floats(b).into_iter().map(c::<T>).collect()),
        _ => None,
    };
    if let Some(l) = l {
        let at = |i: usize, j: usize| l[i * (i + 1) / 2 + j];
        for i in 0..n2 {
            let mut rg: T = c(0.0);
            for k in 0..n2 {
                let mut r: T = c(0.0);
                for j in 0..=i.min(k) {
                    r += at(i, j) * at(k, j);
                }
                rg += r * g[k];
            }
            f[i] -= rg;
        }
    }
    let gm: Option<(usize, Vec<T>)> = match (&m.input_net, &m.input) {
        (Some((k, net)), _) => Some((*k as usize, mlp_ref(net, &zq))),
        (None, Some((k, b))) => Some((*k as usize, floats(b).into_iter().map(c::<T>).collect())),
        _ => None,
    };
    if let Some((mm, gmat)) = gm {
        for i in 0..n2 {
            for k in 0..mm {
                f[i] += gmat[i * mm + k] * c::<T>(u[k]);
            }
        }
    }
    f
}

/// The Yoshida (1990) triple-jump weights as the runtime stores them (f32).
const W1: f32 = 1.351_207_2;
const W0: f32 = -1.702_414_4;

fn verlet_ref<T: DualNum<Primitive = f64> + Copy>(m: &OwnedModel, x: &mut [T], h: f64) {
    let n = m.dof;
    let half = T::from(0.5 * h);
    let g = grad_ref(m, x);
    for i in 0..n {
        x[n + i] -= half * g[i];
    }
    let g = grad_ref(m, x);
    for i in 0..n {
        x[i] += T::from(h) * g[n + i];
    }
    let g = grad_ref(m, x);
    for i in 0..n {
        x[n + i] -= half * g[i];
    }
}

fn field_at<T: DualNum<Primitive = f64> + Copy>(m: &OwnedModel, x: &[T], u: &[f32]) -> Vec<T> {
    field_ref(m, &x[..m.dof], &grad_ref(m, x), u)
}

/// One reference step of `method` with step `h` (f64 formulas).
fn step_ref<T: DualNum<Primitive = f64> + Copy>(
    m: &OwnedModel,
    method: Method,
    x0: &[T],
    u: &[f32],
    h: f64,
) -> Vec<T> {
    let k = x0.len();
    let mut x = x0.to_vec();
    let th = T::from(h);
    match method {
        Method::StormerVerlet => verlet_ref(m, &mut x, h),
        Method::Yoshida4 => {
            for w in [W1, W0, W1] {
                verlet_ref(m, &mut x, w as f64 * h);
            }
        }
        Method::Rk4 => {
            let k1 = field_at(m, &x, u);
            let s: Vec<T> = (0..k).map(|i| x0[i] + th * T::from(0.5) * k1[i]).collect();
            let k2 = field_at(m, &s, u);
            let s: Vec<T> = (0..k).map(|i| x0[i] + th * T::from(0.5) * k2[i]).collect();
            let k3 = field_at(m, &s, u);
            let s: Vec<T> = (0..k).map(|i| x0[i] + th * k3[i]).collect();
            let k4 = field_at(m, &s, u);
            for i in 0..k {
                x[i] = x0[i]
                    + th / T::from(6.0)
                        * (k1[i] + k2[i] * T::from(2.0) + k3[i] * T::from(2.0) + k4[i]);
            }
        }
        Method::ImplicitMidpoint | Method::DiscreteGradient => {
            let f0 = field_at(m, x0, u);
            let mut x1: Vec<T> = (0..k).map(|i| x0[i] + th * f0[i]).collect();
            let h0 = energy_ref(m, x0);
            for _ in 0..200 {
                let mid: Vec<T> = (0..k).map(|i| (x0[i] + x1[i]) * T::from(0.5)).collect();
                let mut g = grad_ref(m, &mid);
                if method == Method::DiscreteGradient {
                    let d: Vec<T> = (0..k).map(|i| x1[i] - x0[i]).collect();
                    let w: Vec<T> = m
                        .scale
                        .iter()
                        .map(|s| T::from(1.0 / (*s as f64 * *s as f64)))
                        .collect();
                    let mut gd = T::zero();
                    let mut dwd = T::zero();
                    for i in 0..k {
                        gd += g[i] * d[i];
                        dwd += w[i] * d[i] * d[i];
                    }
                    let h1 = energy_ref(m, &x1);
                    let resid = h1 - h0 - gd;
                    let cc = faded(m, resid, (h0, h1), &mid, &g) / dwd;
                    for i in 0..k {
                        g[i] += cc * w[i] * d[i];
                    }
                }
                let f = field_ref(m, &mid[..m.dof], &g, u);
                x1 = (0..k).map(|i| x0[i] + th * f[i]).collect();
            }
            x = x1;
        }
    }
    x
}

/// The share of the residual the runtime's discrete gradient keeps, times
/// the residual, as `integrate.rs` defines it (none at or below the level
/// 8 eps (|H0| + |H1| + 2 E_t + 2 sum |m_i g_i|), all from twice it, linear
/// between), mirrored over dual numbers with the level in f64.
fn faded<T: DualNum<Primitive = f64> + Copy>(
    m: &OwnedModel,
    resid: T,
    (h0, h1): (T, T),
    mid: &[T],
    g: &[T],
) -> T {
    let abs = |v: T| if v < 0.0 { v * T::from(-1.0) } else { v };
    let mut sens = T::zero();
    for (a, b) in mid.iter().zip(g) {
        sens += abs(*a * *b);
    }
    let terms = T::from(2.0 * m.energy_scale.abs() as f64);
    let noise =
        (abs(h0) + abs(h1) + terms + sens * T::from(2.0)) * T::from(8.0 * f32::EPSILON as f64);
    let r = abs(resid);
    if r <= noise {
        T::zero()
    } else if r >= noise * T::from(2.0) {
        resid
    } else {
        resid * (r - noise) / noise
    }
}

/// Largest |J - J_ref| / max(1, |J_ref|) over `states` random states.
fn worst_error(owned: &OwnedModel, rng: &mut XorShift64Star, substeps: u16, states: usize) -> f64 {
    let blob = owned.blob().unwrap();
    let model: Model<'_, 8, 128> = Model::from_bytes(&blob).expect("fixture parses");
    let n = owned.dof;
    let k = 2 * n;
    let it = Integrator {
        substeps,
        ..owned.integrator
    };
    let hs = (it.dt / substeps as f32) as f64;
    let m = owned
        .input
        .as_ref()
        .map(|v| v.0)
        .or(owned.input_net.as_ref().map(|v| v.0))
        .unwrap_or(0);
    let mut worst = 0.0f64;
    for _ in 0..states {
        let xs: Vec<f32> = (0..k).map(|_| rng.uniform(-1.0, 1.0) as f32).collect();
        let u: Vec<f32> = (0..m).map(|_| rng.uniform(-1.0, 1.0) as f32).collect();
        let mut x = State::<8>::new(&xs[..n], &xs[n..]).unwrap();
        let mut direct = x;
        let jac: [[f32; 16]; 16] = step_with_jacobian(&model, &it, &mut x, &u).expect("steps");
        // The observer's state is the integrator's own step, bit for bit.
        it.step_driven(&model, &mut direct, &u).unwrap();
        assert_eq!(x, direct, "state differs from Integrator::step_driven");
        for j in 0..k {
            let mut xd: Vec<Dual64> = xs.iter().map(|v| Dual64::from(*v as f64)).collect();
            xd[j].eps = 1.0;
            for _ in 0..substeps {
                xd = step_ref(owned, it.method, &xd, &u, hs);
            }
            for i in 0..k {
                let r = xd[i].eps;
                worst = worst.max((jac[i][j] as f64 - r).abs() / r.abs().max(1.0));
            }
        }
    }
    worst
}

const KINDS: [(Precision, Activation); 2] = [
    (Precision::F32, Activation::Tanh),
    (Precision::Int8, Activation::Softplus),
];

fn report(label: &str, worst: f64, limit: f64) {
    println!("{label}: max rel. Jacobian error vs num-dual {worst:.2e}");
    assert!(
        worst < limit,
        "{label}: Jacobian differs from num-dual by {worst:e}"
    );
}

// Tolerances: measured worst 2.4e-7 (explicit methods: f32 through two
// network passes) and 3.7e-6 (implicit methods: plus the fixed-point
// tolerance 1e-6 in x1 and the discrete gradient's correction, whose f32
// residual carries eps |H| / |d|^2 round-off); limits about 5x above. With
// the reference fading the correction as the runtime does (`faded`), the
// discrete gradient's worst is 5.9e-7.
const EXPLICIT: f64 = 2e-6;
const IMPLICIT: f64 = 2e-5;

#[test]
fn separable_models_every_method() {
    let mut rng = XorShift64Star(0x0b5e_0001);
    for (precision, act) in KINDS {
        for method in [
            Method::StormerVerlet,
            Method::Yoshida4,
            Method::Rk4,
            Method::ImplicitMidpoint,
            Method::DiscreteGradient,
        ] {
            let owned = separable(&mut rng, 2, &[8, 8], act, precision, method, 0.05);
            let limit = if method.needs_separable() || method == Method::Rk4 {
                EXPLICIT
            } else {
                IMPLICIT
            };
            let label = format!("separable {precision:?} {act:?} {method:?}");
            report(&label, worst_error(&owned, &mut rng, 1, 4), limit);
        }
    }
}

#[test]
fn network_kinetic_and_substeps() {
    let mut rng = XorShift64Star(0x0b5e_0002);
    for (precision, act) in KINDS {
        for method in [Method::StormerVerlet, Method::Yoshida4] {
            let potential = OwnedMlp::random(&mut rng, &[2, 8, 1], act, precision);
            let kinetic =
                OwnedKinetic::Network(OwnedMlp::random(&mut rng, &[2, 8, 1], act, precision));
            let owned = random_model(
                2,
                OwnedEnergy::Separable { potential, kinetic },
                Integrator::new(method, 0.05),
                &mut rng,
            );
            let label = format!("network kinetic {precision:?} {act:?} {method:?}, 3 substeps");
            report(&label, worst_error(&owned, &mut rng, 3, 3), EXPLICIT);
        }
    }
}

#[test]
fn general_models_every_method() {
    let mut rng = XorShift64Star(0x0b5e_0003);
    for (precision, act) in KINDS {
        for method in [
            Method::Rk4,
            Method::ImplicitMidpoint,
            Method::DiscreteGradient,
        ] {
            let owned = general(&mut rng, 2, &[8, 8], act, precision, method, 0.05);
            let limit = if method == Method::Rk4 {
                EXPLICIT
            } else {
                IMPLICIT
            };
            let label = format!("general {precision:?} {act:?} {method:?}");
            report(&label, worst_error(&owned, &mut rng, 1, 4), limit);
        }
    }
}

#[test]
fn port_models_constant_and_network_terms() {
    let mut rng = XorShift64Star(0x0b5e_0004);
    for (precision, act) in KINDS {
        for method in [
            Method::Rk4,
            Method::ImplicitMidpoint,
            Method::DiscreteGradient,
        ] {
            let limit = if method == Method::Rk4 {
                EXPLICIT
            } else {
                IMPLICIT
            };
            let owned = separable(&mut rng, 2, &[8], act, precision, method, 0.05)
                .with_port(&mut rng, 0.3, 1);
            let label = format!("constant R, G {precision:?} {act:?} {method:?}");
            report(&label, worst_error(&owned, &mut rng, 1, 4), limit);
            let owned = general(&mut rng, 2, &[8], act, precision, method, 0.05)
                .with_port_networks(&mut rng, 0.5, 1, 6, precision);
            let label = format!("network R(q), G(q) {precision:?} {act:?} {method:?}");
            report(&label, worst_error(&owned, &mut rng, 1, 4), limit);
        }
    }
}

#[test]
fn mechanical_models_every_method_they_take() {
    let mut rng = XorShift64Star(0x0b5e_0006);
    for (precision, act) in KINDS {
        for method in [
            Method::Rk4,
            Method::ImplicitMidpoint,
            Method::DiscreteGradient,
        ] {
            let limit = if method == Method::Rk4 {
                EXPLICIT
            } else {
                IMPLICIT
            };
            for floor in [0.0, 0.05] {
                let owned = mechanical(&mut rng, 2, &[8], act, precision, method, 0.05, floor);
                let label = format!("mechanical {precision:?} {act:?} {method:?} eps {floor}");
                report(&label, worst_error(&owned, &mut rng, 1, 4), limit);
            }
        }
    }
}
