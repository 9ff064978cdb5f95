//! Damped and driven models in port-Hamiltonian form,
//! dx/dt = (J - R) dH/dx + G u, stepped by the discrete-gradient method:
//! * a damped oscillator's logarithmic decrement equals
//!   delta = 2 pi zeta / sqrt(1 - zeta^2) (any vibration textbook, e.g.
//!   Thomson, Theory of Vibration with Applications, ch. 2 — from memory);
//! * a rotor with viscous friction b under constant torque tau settles at
//!   omega = tau / b (Newton's second law for rotation, J domega/dt =
//!   tau - b omega);
//! * with no input the discrete energy never rises, from 100,000 random
//!   states of learned-style models (the discrete-gradient identity,
//!   Gonzalez 1996; McLachlan, Quispel & Robidoux 1999);
//! * with no damping it is conserved to round-off;
//! * R(q) and G(q) given as networks of q give the field
//!   (J - L L^T) dH/dx + G u of an independent f64 evaluation of the same
//!   networks (the port-Hamiltonian form's definition);
//! * blobs with constant port terms are version 2, with port networks
//!   version 3, validated, and refused with explicit symplectic methods.

mod common;

use common::*;
use visviva_runtime::format::{Activation, OLDEST_READABLE_VERSION};
use visviva_runtime::{BlobError, Hamiltonian, Integrator, Method, Model, State, StepError};

/// m q'' + c q' + k q = F: H = p^2/(2m) + k q^2/2, R = diag(0, c),
/// G = (0, 1)^T (a force on the momentum).
struct DampedOscillator {
    m: f32,
    k: f32,
    c: f32,
}

impl Hamiltonian<2> for DampedOscillator {
    fn dof(&self) -> usize {
        1
    }
    fn is_separable(&self) -> bool {
        true
    }
    fn energy(&self, x: &State<2>) -> Result<f32, StepError> {
        Ok(x.p[0] * x.p[0] / (2.0 * self.m) + 0.5 * self.k * x.q[0] * x.q[0])
    }
    fn gradient(
        &self,
        x: &State<2>,
        gq: &mut [f32; 2],
        gp: &mut [f32; 2],
    ) -> Result<(), StepError> {
        gq[0] = self.k * x.q[0];
        gp[0] = x.p[0] / self.m;
        Ok(())
    }
    fn inputs(&self) -> usize {
        1
    }
    fn has_port_terms(&self) -> bool {
        true
    }
    fn field_from_gradient(
        &self,
        _q: &[f32; 2],
        gq: &[f32; 2],
        gp: &[f32; 2],
        u: &[f32],
        fq: &mut [f32; 2],
        fp: &mut [f32; 2],
    ) {
        fq[0] = gp[0];
        fp[0] = -gq[0] - self.c * gp[0] + u[0];
    }
}

fn dg(dt: f32) -> Integrator {
    Integrator {
        max_iterations: 100,
        tolerance: 1e-7,
        ..Integrator::new(Method::DiscreteGradient, dt)
    }
}

#[test]
fn damped_oscillator_logarithmic_decrement() {
    for zeta in [0.02f32, 0.05, 0.1] {
        let (m, k) = (1.0f32, 1.0f32);
        let sys = DampedOscillator {
            m,
            k,
            c: 2.0 * zeta * (k * m).sqrt(),
        };
        let it = dg(0.005);
        let mut x = State::<2>::new(&[1.0], &[0.0]).unwrap();
        // Successive maxima of q (p changes sign from + to -).
        let mut peaks = Vec::new();
        let mut prev = x;
        for _ in 0..20_000 {
            it.step_driven(&sys, &mut x, &[0.0]).unwrap();
            if prev.p[0] > 0.0 && x.p[0] <= 0.0 {
                peaks.push(prev.q[0].max(x.q[0]) as f64);
            }
            prev = x;
        }
        let deltas: Vec<f64> = peaks
            .windows(2)
            .take(5)
            .map(|w| (w[0] / w[1]).ln())
            .collect();
        let delta = deltas.iter().sum::<f64>() / deltas.len() as f64;
        let z = zeta as f64;
        let expected = 2.0 * std::f64::consts::PI * z / (1.0 - z * z).sqrt();
        let rel = (delta - expected).abs() / expected;
        println!("zeta {zeta}: log decrement {delta:.5} vs {expected:.5} (rel {rel:.1e})");
        // Measured about 5e-6 (peak sampling at dt = 0.005 and f32 limit it).
        assert!(rel < 1e-4, "zeta {zeta}: {delta} vs {expected}");
    }
}

#[test]
fn rotor_with_viscous_friction_settles_at_torque_over_b() {
    // q = angle, p = J omega; H = p^2 / (2J); R = b on p; G = 1 (torque).
    let (j, b, tau) = (0.02f32, 0.004f32, 0.03f32);
    let sys = DampedOscillator { m: j, k: 0.0, c: b };
    let it = dg(0.05);
    let mut x = State::<2>::new(&[0.0], &[0.0]).unwrap();
    // Time constant J / b = 5 s; run 20 time constants.
    for _ in 0..2000 {
        it.step_driven(&sys, &mut x, &[tau]).unwrap();
    }
    let omega = x.p[0] / j;
    let expected = tau / b;
    let rel = ((omega - expected) / expected).abs();
    println!("steady speed {omega} rad/s vs tau/b = {expected} (rel {rel:.1e})");
    assert!(rel < 1e-4, "{omega} vs {expected}");
}

#[test]
fn conservative_discrete_gradient_conserves_energy() {
    let sys = DampedOscillator {
        m: 1.0,
        k: 1.0,
        c: 0.0,
    };
    let it = dg(0.1);
    let mut x = State::<2>::new(&[1.0], &[0.0]).unwrap();
    let e0 = sys.energy(&x).unwrap() as f64;
    let mut worst = 0.0f64;
    for _ in 0..10_000 {
        it.step_driven(&sys, &mut x, &[0.0]).unwrap();
        worst = worst.max(((sys.energy(&x).unwrap() as f64) - e0).abs() / e0);
    }
    println!("undamped discrete gradient: max relative energy error {worst:.2e} over 10000 steps");
    // Exact in exact arithmetic; f32 round-off random walk (sqrt(N) eps).
    assert!(worst < 1e-4, "{worst}");
}

#[test]
fn energy_never_rises_without_input_over_1e5_random_states() {
    let mut rng = XorShift64Star(0xdec0de);
    let mut blobs = Vec::new();
    for (k, act) in [Activation::Tanh, Activation::Softplus]
        .into_iter()
        .enumerate()
    {
        let mut g = general(
            &mut rng,
            2,
            &[16, 16],
            act,
            Precision::F32,
            Method::DiscreteGradient,
            0.02,
        )
        .with_port(&mut rng, 0.3, 1);
        g.integrator.max_iterations = 100;
        blobs.push(g.blob().unwrap());
        let mut s = separable(
            &mut rng,
            1 + k,
            &[16],
            act,
            Precision::Int8,
            Method::DiscreteGradient,
            0.02,
        )
        .with_port(&mut rng, 0.3, 0);
        s.integrator.max_iterations = 100;
        blobs.push(s.blob().unwrap());
        // R(q) = L(q) L(q)^T and G(q) as networks of q.
        let mut net = separable(
            &mut rng,
            2,
            &[16],
            act,
            Precision::F32,
            Method::DiscreteGradient,
            0.02,
        )
        .with_port_networks(&mut rng, 0.5, 1, 8, Precision::F32);
        net.integrator.max_iterations = 100;
        blobs.push(net.blob().unwrap());
    }
    let (mut steps, mut rises, mut worst) = (0u32, 0u32, 0.0f64);
    for k in 0..100_000u32 {
        let b = &blobs[k as usize % blobs.len()];
        let m: Model<'_, 8, 32> = Model::from_bytes(b).unwrap();
        let n = m.dof();
        let q: Vec<f32> = (0..n).map(|_| rng.uniform(-1.5, 1.5) as f32).collect();
        let p: Vec<f32> = (0..n).map(|_| rng.uniform(-1.5, 1.5) as f32).collect();
        let mut x = State::<8>::new(&q, &p).unwrap();
        let e0 = m.energy(&x).unwrap();
        let zeros = vec![0.0f32; m.inputs()];
        if m.step_driven(&mut x, &zeros).is_err() {
            continue;
        }
        steps += 1;
        let e1 = m.energy(&x).unwrap();
        if e1 > e0 {
            rises += 1;
            // In units of the f32 spacing at |H|.
            worst = worst.max(((e1 - e0) / (e0.abs().max(1e-30) * f32::EPSILON)) as f64);
        }
    }
    println!("{steps} steps from random states: {rises} with H(x1) > H(x0), largest rise {worst:.1} ulp of |H|");
    assert!(steps > 95_000, "only {steps} steps converged");
    // H(x1) - H(x0) = -h |L^T g|^2 <= 0 by the discrete-gradient identity.
    assert_eq!(
        rises, 0,
        "energy rose in {rises} steps, by up to {worst} ulp"
    );
}

#[test]
fn port_networks_give_the_port_hamiltonian_field() {
    let mut rng = XorShift64Star(77);
    let mut worst = 0.0f64;
    for (dof, m, kind) in [
        (1, 1, Precision::F32),
        (2, 2, Precision::Int8),
        (3, 1, Precision::F32),
    ] {
        let fixture = general(
            &mut rng,
            dof,
            &[12],
            Activation::Tanh,
            Precision::F32,
            Method::DiscreteGradient,
            0.01,
        )
        .with_port_networks(&mut rng, 0.5, m, 10, kind);
        let blob = fixture.blob().unwrap();
        let model: Model<'_, 4, 32> = Model::from_bytes(&blob).unwrap();
        let (n, n2) = (dof, 2 * dof);
        let l_net = fixture.dissipation_net.as_ref().unwrap();
        let g_net = &fixture.input_net.as_ref().unwrap().1;
        for _ in 0..200 {
            let q: Vec<f32> = (0..n).map(|_| rng.uniform(-1.5, 1.5) as f32).collect();
            let p: Vec<f32> = (0..n).map(|_| rng.uniform(-1.5, 1.5) as f32).collect();
            let u: Vec<f32> = (0..m).map(|_| rng.uniform(-2.0, 2.0) as f32).collect();
            let x = State::<4>::new(&q, &p).unwrap();
            let (mut fq, mut fp) = ([0.0f32; 4], [0.0f32; 4]);
            model.vector_field_driven(&x, &u, &mut fq, &mut fp).unwrap();
            // Reference: the model's own dH/dx, then (J - L L^T) g + G u
            // in f64 with L(q), G(q) from an f64 pass over the same weights.
            let (mut gq, mut gp) = ([0.0f32; 4], [0.0f32; 4]);
            model.gradient(&x, &mut gq, &mut gp).unwrap();
            let g: Vec<f64> = (0..n2)
                .map(|k| if k < n { gq[k] } else { gp[k - n] } as f64)
                .collect();
            let zq: Vec<f64> = (0..n)
                .map(|i| ((q[i] - fixture.offset[i]) / fixture.scale[i]) as f64)
                .collect();
            let l = l_net.forward_f64(&zq);
            let gm = g_net.forward_f64(&zq);
            let lij = |i: usize, j: usize| if j <= i { l[i * (i + 1) / 2 + j] } else { 0.0 };
            let lt_g: Vec<f64> = (0..n2)
                .map(|j| (0..n2).map(|i| lij(i, j) * g[i]).sum())
                .collect();
            for k in 0..n2 {
                let j_g = if k < n { g[n + k] } else { -g[k - n] };
                let r_g: f64 = (0..n2).map(|j| lij(k, j) * lt_g[j]).sum();
                let g_u: f64 = (0..m).map(|c| gm[k * m + c] * u[c] as f64).sum();
                let want = j_g - r_g + g_u;
                let got = if k < n { fq[k] } else { fp[k - n] } as f64;
                let scale = j_g.abs() + r_g.abs() + g_u.abs() + 1e-3;
                worst = worst.max((got - want).abs() / scale);
            }
        }
    }
    println!("port networks: worst field error {worst:.2e} relative to the term sizes");
    // f32 kernels against f64: a few ulp per term, summed over small sums.
    assert!(
        worst < 2e-6,
        "field differs from the f64 reference by {worst:e}"
    );
}

#[test]
fn port_blobs_are_versioned_validated_and_refuse_explicit_methods() {
    let mut rng = XorShift64Star(5);
    // int8 weights keep the versions the port terms need (f32 weights are
    // aligned, version 6, whatever else the blob holds).
    let plain = general(
        &mut rng,
        1,
        &[8],
        Activation::Tanh,
        Precision::Int8,
        Method::DiscreteGradient,
        0.01,
    );
    assert_eq!(
        u16::from_le_bytes([plain.blob().unwrap()[4], plain.blob().unwrap()[5]]),
        OLDEST_READABLE_VERSION
    );
    let driven = plain.clone().with_port(&mut rng, 0.2, 2);
    let blob = driven.blob().unwrap();
    assert_eq!(u16::from_le_bytes([blob[4], blob[5]]), 2);
    // Port networks need version 3; a version-2 header cannot carry them.
    let networked = plain
        .clone()
        .with_port_networks(&mut rng, 0.5, 1, 6, Precision::Int8);
    let mut v3 = networked.blob().unwrap();
    assert_eq!(u16::from_le_bytes([v3[4], v3[5]]), 3);
    assert!(Model::<4, 16>::from_bytes(&v3).is_ok());
    v3[4..6].copy_from_slice(&2u16.to_le_bytes());
    let end = v3.len() - 4;
    let crc = crc::Crc::<u32>::new(&crc::CRC_32_ISO_HDLC).checksum(&v3[4..end]);
    v3[end..].copy_from_slice(&crc.to_le_bytes());
    assert_eq!(
        Model::<4, 16>::from_bytes(&v3).unwrap_err(),
        BlobError::Malformed
    );
    // A network with the wrong number of outputs for L is refused.
    let mut wrong = networked.clone();
    wrong.dissipation_net = Some(OwnedMlp::random(
        &mut rng,
        &[1, 6, 2],
        Activation::Tanh,
        Precision::F32,
    ));
    assert!(matches!(
        Model::<4, 16>::from_bytes(&wrong.blob().unwrap()),
        Err(BlobError::ShapeMismatch {
            section: visviva_runtime::error::Section::Dissipation,
            ..
        })
    ));
    let m: Model<'_, 4, 16> = Model::from_bytes(&blob).unwrap();
    assert_eq!(m.inputs(), 2);
    let mut x = State::<4>::new(&[0.1], &[0.2]).unwrap();
    assert_eq!(
        m.step_driven(&mut x, &[1.0]),
        Err(StepError::InputMismatch { model: 2, given: 1 })
    );
    assert_eq!(
        m.step_driven(&mut x, &[1.0, f32::NAN]),
        Err(StepError::NonFiniteState)
    );
    m.step_driven(&mut x, &[1.0, -0.5]).unwrap();

    // A version-1 header cannot carry port terms.
    let mut v1 = blob.clone();
    v1[4..6].copy_from_slice(&1u16.to_le_bytes());
    let end = v1.len() - 4;
    let crc = crc::Crc::<u32>::new(&crc::CRC_32_ISO_HDLC).checksum(&v1[4..end]);
    v1[end..].copy_from_slice(&crc.to_le_bytes());
    assert_eq!(
        Model::<4, 16>::from_bytes(&v1).unwrap_err(),
        BlobError::Malformed
    );

    // Verlet would drop R and G.
    let mut sep = separable(
        &mut rng,
        1,
        &[8],
        Activation::Tanh,
        Precision::F32,
        Method::StormerVerlet,
        0.01,
    )
    .with_port(&mut rng, 0.2, 0);
    assert_eq!(
        Model::<4, 16>::from_bytes(&sep.blob().unwrap()).unwrap_err(),
        BlobError::MethodIgnoresPortTerms
    );
    sep.integrator.method = Method::DiscreteGradient;
    assert!(Model::<4, 16>::from_bytes(&sep.blob().unwrap()).is_ok());

    // Wrong factor length, non-finite G.
    let mut bad = driven.clone();
    if let Some(f) = bad.dissipation.as_mut() {
        f.truncate(f.len() - 4);
    }
    assert!(matches!(
        Model::<4, 16>::from_bytes(&bad.blob().unwrap()),
        Err(BlobError::ShapeMismatch { .. })
    ));
    let mut bad = driven;
    if let Some((_, g)) = bad.input.as_mut() {
        g[0..4].copy_from_slice(&f32::INFINITY.to_le_bytes());
    }
    assert!(matches!(
        Model::<4, 16>::from_bytes(&bad.blob().unwrap()),
        Err(BlobError::NonFinite { .. })
    ));
}
