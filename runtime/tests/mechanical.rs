//! The mechanical energy H = 1/2 p^T M(q)^-1 p + V(q), M^-1 = L L^T + eps I
//! with L(q) and V(q) networks (the gradient itself is checked against
//! num-dual in `gradient.rs`):
//! * its blob is format version 5 (the oldest that can express it), a
//!   header claiming an older version is refused, and every other kind
//!   keeps its old version;
//! * the floor eps and the factor's shape are validated with typed errors;
//! * Stormer-Verlet and Yoshida-4 are refused (H is not separable: the
//!   kinetic energy depends on q);
//! * implicit midpoint and the discrete-gradient method converge at order
//!   2 to a fine RK4 reference (both are second-order methods: Hairer,
//!   Lubich & Wanner, Geometric Numerical Integration, 2nd ed., ch. II and
//!   V — from memory), and the discrete-gradient method conserves H up to
//!   round-off (Gonzalez 1996: H(x1) = H(x0) by construction);
//! * the observer steps it exactly as its integrator does.

mod common;

use common::*;
use visviva_runtime::error::Section;
use visviva_runtime::format::{self, Activation};
use visviva_runtime::observer::Observer;
use visviva_runtime::{BlobError, Hamiltonian, Integrator, Method, Model, State};

type M<'a> = Model<'a, 4, 32>;

fn fixture(rng: &mut XorShift64Star, method: Method, floor: f32) -> OwnedModel {
    mechanical(
        rng,
        2,
        &[12],
        Activation::Tanh,
        Precision::F32,
        method,
        0.01,
        floor,
    )
}

fn version(b: &[u8]) -> u16 {
    u16::from_le_bytes([b[4], b[5]])
}

/// Rewrite the header's version and recompute the CRC.
fn claim_version(b: &mut [u8], v: u16) {
    b[4..6].copy_from_slice(&v.to_le_bytes());
    let end = b.len() - 4;
    let crc = format::checksum(&b[4..end]);
    b[end..].copy_from_slice(&crc.to_le_bytes());
}

#[test]
fn mechanical_blobs_are_version_5_and_older_headers_are_refused() {
    let mut rng = XorShift64Star(11);
    // f32 weights are aligned (version 6); int8 weights need no alignment,
    // so an int8 mechanical blob shows the version the energy needs.
    let f32_blob = fixture(&mut rng, Method::ImplicitMidpoint, 0.01)
        .blob()
        .unwrap();
    assert_eq!(version(&f32_blob), format::ALIGNED_VERSION);
    let blob = mechanical(
        &mut rng,
        2,
        &[12],
        Activation::Tanh,
        Precision::Int8,
        Method::ImplicitMidpoint,
        0.01,
        0.01,
    )
    .blob()
    .unwrap();
    assert_eq!(version(&blob), format::MECHANICAL_VERSION);
    assert_eq!(format::MECHANICAL_VERSION, 5);
    assert!(M::from_bytes(&blob).is_ok());
    for older in 1..format::MECHANICAL_VERSION {
        let mut b = blob.clone();
        claim_version(&mut b, older);
        assert_eq!(M::from_bytes(&b).unwrap_err(), BlobError::Malformed);
    }
    // The other kinds keep the oldest version that expresses them.
    let sep = separable(
        &mut rng,
        2,
        &[8],
        Activation::Tanh,
        Precision::Int8,
        Method::StormerVerlet,
        0.01,
    );
    assert_eq!(
        version(&sep.blob().unwrap()),
        format::OLDEST_READABLE_VERSION
    );
}

#[test]
fn floor_and_factor_shape_are_validated() {
    let mut rng = XorShift64Star(12);
    let owned = fixture(&mut rng, Method::ImplicitMidpoint, 0.0);
    let with_floor = |floor: f32| {
        let mut m = owned.clone();
        if let OwnedEnergy::Mechanical { floor: f, .. } = &mut m.energy {
            *f = floor;
        }
        M::from_bytes(&m.blob().unwrap()).map(|_| ())
    };
    let section = Section::MassFactor;
    assert_eq!(with_floor(0.0), Ok(()));
    assert_eq!(with_floor(1e-3), Ok(()));
    assert_eq!(with_floor(-1e-3), Err(BlobError::NotPositive { section }));
    assert_eq!(with_floor(f32::NAN), Err(BlobError::NonFinite { section }));
    assert_eq!(
        with_floor(f32::INFINITY),
        Err(BlobError::NonFinite { section })
    );
    // Subnormal and absurd floors mean no fitted model.
    assert_eq!(with_floor(1e-40), Err(BlobError::OutOfRange { section }));
    assert_eq!(with_floor(1e30), Err(BlobError::OutOfRange { section }));
    // L needs n (n + 1) / 2 = 3 outputs for two degrees of freedom.
    let mut wrong = owned.clone();
    if let OwnedEnergy::Mechanical { factor, .. } = &mut wrong.energy {
        *factor = OwnedMlp::random(&mut rng, &[2, 12, 2], Activation::Tanh, Precision::F32);
    }
    assert!(matches!(
        M::from_bytes(&wrong.blob().unwrap()),
        Err(BlobError::ShapeMismatch {
            section: Section::MassFactor,
            ..
        })
    ));
    // A factor wider than the build's layer bound is TooWide, not a panic.
    let mut wide = owned.clone();
    if let OwnedEnergy::Mechanical { factor, .. } = &mut wide.energy {
        *factor = OwnedMlp::random(&mut rng, &[2, 40, 3], Activation::Tanh, Precision::F32);
    }
    assert!(matches!(
        M::from_bytes(&wide.blob().unwrap()),
        Err(BlobError::TooWide { .. })
    ));
}

#[test]
fn explicit_symplectic_methods_are_refused() {
    let mut rng = XorShift64Star(13);
    for method in [Method::StormerVerlet, Method::Yoshida4] {
        let blob = fixture(&mut rng, method, 0.0).blob().unwrap();
        let err = M::from_bytes(&blob).unwrap_err();
        assert_eq!(err, BlobError::MethodNeedsSeparableModel);
        assert!(err.to_string().contains("mechanical"), "{err}");
    }
    let blob = fixture(&mut rng, Method::ImplicitMidpoint, 0.0)
        .blob()
        .unwrap();
    let m = M::from_bytes(&blob).unwrap();
    assert!(!m.is_separable());
    assert_eq!(
        m.with_integrator(Integrator::new(Method::StormerVerlet, 0.01))
            .unwrap_err(),
        BlobError::MethodNeedsSeparableModel
    );
}

/// The state after `t_end` seconds with `method` at step `dt`.
fn roll(m: &M<'_>, method: Method, dt: f32, x0: &State<4>, t_end: f32) -> State<4> {
    let mut it = Integrator::new(method, dt);
    it.tolerance = 1e-7;
    it.max_iterations = 200;
    let m = m.with_integrator(it).unwrap();
    let mut x = *x0;
    for _ in 0..(t_end / dt).round() as usize {
        m.step(&mut x).unwrap();
    }
    x
}

fn distance(a: &State<4>, b: &State<4>) -> f64 {
    (0..2)
        .map(|i| {
            let dq = (a.q[i] - b.q[i]) as f64;
            let dp = (a.p[i] - b.p[i]) as f64;
            dq * dq + dp * dp
        })
        .sum::<f64>()
        .sqrt()
}

#[test]
fn implicit_methods_converge_at_order_two_and_discrete_gradient_conserves_h() {
    let mut rng = XorShift64Star(14);
    let blob = fixture(&mut rng, Method::ImplicitMidpoint, 0.02)
        .blob()
        .unwrap();
    let m = M::from_bytes(&blob).unwrap();
    let x0 = State::<4>::new(&[0.3, -0.4], &[0.5, 0.2]).unwrap();
    // Steps large enough that the method's error stands well above f32
    // round-off (about 1e-6 here).
    let t_end = 2.0;
    let reference = roll(&m, Method::Rk4, 0.001, &x0, t_end);
    for method in [Method::ImplicitMidpoint, Method::DiscreteGradient] {
        let e1 = distance(&roll(&m, method, 0.2, &x0, t_end), &reference);
        let e2 = distance(&roll(&m, method, 0.1, &x0, t_end), &reference);
        let order = (e1 / e2).log2();
        println!("{method:?}: error {e1:.3e} at dt 0.2, {e2:.3e} at dt 0.1, order {order:.2}");
        assert!(
            (1.8..2.2).contains(&order),
            "{method:?}: observed order {order}"
        );
    }
    // The discrete-gradient method keeps H to round-off.
    let it = Integrator::new(Method::DiscreteGradient, 0.02);
    let dg = m.with_integrator(it).unwrap();
    let h0 = dg.energy(&x0).unwrap();
    let mut x = x0;
    let mut worst = 0.0f32;
    // 500 steps: the random fixture's potential is unbounded, and past
    // about |q| = 10 it leaves any region a fitted model would cover.
    for _ in 0..500 {
        dg.step(&mut x).unwrap();
        worst = worst.max((dg.energy(&x).unwrap() - h0).abs());
    }
    println!(
        "discrete gradient: max |H - H0| / |H0| over 500 steps {:.2e}",
        worst / h0.abs()
    );
    assert!(worst / h0.abs() < 1e-4, "energy moved by {worst}");
}

#[test]
fn the_observer_steps_a_mechanical_model_as_its_integrator_does() {
    // Its step Jacobian is checked against num-dual in `step_jacobian.rs`;
    // here the observer's prediction is the integrator's own step, bit for
    // bit, and its covariance stays symmetric and finite.
    let mut rng = XorShift64Star(15);
    let blob = fixture(&mut rng, Method::ImplicitMidpoint, 0.0)
        .blob()
        .unwrap();
    let m = M::from_bytes(&blob).unwrap();
    let x0 = State::<4>::new(&[0.1, 0.2], &[0.0, 0.1]).unwrap();
    let mut obs = Observer::<_, 4, 8>::new(&m, m.integrator(), x0, &[1e-2; 4], &[0.0; 4]).unwrap();
    obs.predict(&[]).unwrap();
    let mut direct = x0;
    m.integrator().step(&m, &mut direct).unwrap();
    assert_eq!(
        *obs.state(),
        direct,
        "prediction differs from the integrator's step"
    );
    let p = obs.covariance();
    for i in 0..4 {
        for j in 0..4 {
            assert!(p[i][j].is_finite() && p[i][j] == p[j][i], "P[{i}][{j}]");
        }
    }
    assert!(m
        .momentum_from_velocity(&[0.1, 0.1], &mut [0.0; 2])
        .is_none());
}

#[test]
fn momentum_from_velocity_at_inverts_the_mechanical_velocity() {
    // p = M(q) v solved by pivoted elimination; v = dH/dp from the
    // runtime's gradient (checked against num-dual in `gradient.rs`) at
    // the p found must give back v. The M(q) closed form is checked
    // through the binary in trainer/tests/rollout_init.rs.
    let mut rng = XorShift64Star(16);
    let owned = fixture(&mut rng, Method::ImplicitMidpoint, 0.01);
    let blob = owned.blob().unwrap();
    let m = M::from_bytes(&blob).unwrap();
    let mut worst = 0.0f32;
    for _ in 0..20 {
        let q = [rng.uniform(-2.0, 2.0) as f32, rng.uniform(-2.0, 2.0) as f32];
        let v = [rng.uniform(-1.0, 1.0) as f32, rng.uniform(-1.0, 1.0) as f32];
        let mut p = [0.0f32; 2];
        m.momentum_from_velocity_at(&q, &v, &mut p).unwrap();
        let x = State::<4>::new(&q, &p).unwrap();
        let (mut gq, mut gp) = ([0.0f32; 4], [0.0f32; 4]);
        m.gradient(&x, &mut gq, &mut gp).unwrap();
        for i in 0..2 {
            worst = worst.max((gp[i] - v[i]).abs());
        }
    }
    assert!(worst < 1e-4, "largest |dH/dp - v| {worst}");
    // Non-finite input is refused, not propagated.
    assert!(m
        .momentum_from_velocity_at(&[f32::NAN, 0.0], &[0.1, 0.1], &mut [0.0; 2])
        .is_none());
}
