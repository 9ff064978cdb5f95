//! Shared test support: random fixture models (seeded weights, not trained
//! models) built with `visviva-blob-support`, drawn from xorshift64*, the
//! generator these tests were validated with.
#![allow(dead_code)]

pub use visviva_blob_support::{
    Generator, OwnedEnergy, OwnedKinetic, OwnedMlp, OwnedModel, Precision, XorShift64Star,
};
use visviva_runtime::format::{Activation, ModelDesc};
use visviva_runtime::{Integrator, Method};

/// Encode a description into a fresh vector.
pub fn encode(desc: &ModelDesc<'_>) -> Vec<u8> {
    visviva_blob_support::encode(desc).expect("fixture encodes")
}

/// A model with random offsets in +-0.2, scales in [0.5, 2) and energy
/// scale 1.5.
pub fn random_model(
    dof: usize,
    energy: OwnedEnergy,
    integrator: Integrator,
    rng: &mut XorShift64Star,
) -> OwnedModel {
    let offset: Vec<f32> = (0..2 * dof)
        .map(|_| rng.uniform(-0.2, 0.2) as f32)
        .collect();
    let scale: Vec<f32> = (0..2 * dof).map(|_| rng.uniform(0.5, 2.0) as f32).collect();
    OwnedModel::new(dof, offset, scale, 1.5, energy, integrator)
}

/// A random Cholesky factor with positive diagonal.
pub fn random_cholesky(rng: &mut XorShift64Star, n: usize) -> OwnedKinetic {
    let mut l = Vec::new();
    for i in 0..n {
        for j in 0..=i {
            l.push(if i == j {
                rng.uniform(0.6, 1.4) as f32
            } else {
                rng.uniform(-0.3, 0.3) as f32
            });
        }
    }
    OwnedKinetic::quadratic(l)
}

/// A separable fixture: V is an MLP with `hidden` widths, T quadratic.
pub fn separable(
    rng: &mut XorShift64Star,
    dof: usize,
    hidden: &[usize],
    act: Activation,
    precision: Precision,
    method: Method,
    dt: f32,
) -> OwnedModel {
    let mut sizes = vec![dof];
    sizes.extend_from_slice(hidden);
    sizes.push(1);
    let potential = OwnedMlp::random(rng, &sizes, act, precision);
    let kinetic = random_cholesky(rng, dof);
    random_model(
        dof,
        OwnedEnergy::Separable { potential, kinetic },
        Integrator::new(method, dt),
        rng,
    )
}

/// A general fixture: H is one MLP over all 2n coordinates.
pub fn general(
    rng: &mut XorShift64Star,
    dof: usize,
    hidden: &[usize],
    act: Activation,
    precision: Precision,
    method: Method,
    dt: f32,
) -> OwnedModel {
    let mut sizes = vec![2 * dof];
    sizes.extend_from_slice(hidden);
    sizes.push(1);
    let net = OwnedMlp::random(rng, &sizes, act, precision);
    random_model(
        dof,
        OwnedEnergy::General(net),
        Integrator::new(method, dt),
        rng,
    )
}

/// A mechanical fixture: the factor L(z_q) and V are MLPs with `hidden`
/// widths (L with n (n + 1) / 2 outputs), the floor eps = `floor`.
#[allow(clippy::too_many_arguments)]
pub fn mechanical(
    rng: &mut XorShift64Star,
    dof: usize,
    hidden: &[usize],
    act: Activation,
    precision: Precision,
    method: Method,
    dt: f32,
    floor: f32,
) -> OwnedModel {
    let sizes = |out: usize| {
        let mut s = vec![dof];
        s.extend_from_slice(hidden);
        s.push(out);
        s
    };
    let factor = OwnedMlp::random(rng, &sizes(dof * (dof + 1) / 2), act, precision);
    let potential = OwnedMlp::random(rng, &sizes(1), act, precision);
    random_model(
        dof,
        OwnedEnergy::Mechanical {
            factor,
            floor,
            potential,
        },
        Integrator::new(method, dt),
        rng,
    )
}
