//! Work counts from blob shapes: a dense layer of i inputs and o outputs
//! costs i*o multiply-accumulates forward and i*o again for the input
//! gradient (reverse-mode differentiation of a dense layer; common result).

mod common;

use common::*;
use visviva_runtime::format::Activation;
use visviva_runtime::{Integrator, Method, Model};

#[test]
fn macs_and_sizes_of_a_2_64_64_1_model() {
    let forward = 2 * 64 + 64 * 64 + 64;
    let mut rng = XorShift64Star(1);
    for kind in [Precision::F32, Precision::Int8] {
        let owned = general(
            &mut rng,
            1,
            &[64, 64],
            Activation::Tanh,
            kind,
            Method::ImplicitMidpoint,
            0.01,
        );
        let blob = owned.blob().unwrap();
        let m: Model<'_, 1, 64> = Model::from_bytes(&blob).unwrap();
        let c = m.cost();
        println!(
            "2-64-64-1 {kind:?}: blob {} bytes, {} MAC/gradient",
            blob.len(),
            c.macs_per_gradient
        );
        assert_eq!(c.macs_per_gradient, 2 * forward as u32);
        assert_eq!(c.parameters, (forward + 64 + 64 + 1) as u32);
        // One explicit Euler predictor plus at most 50 fixed-point iterations.
        assert_eq!(c.macs_per_step, 51 * 2 * forward as u32);
        // f32: 4 bytes per weight and bias; int8: 1 byte per weight, 4 per
        // bias and per-channel scale; the rest is framing and shapes.
        let weights = forward;
        let (lo, hi) = match kind {
            Precision::F32 => (4 * (weights + 129), 4 * (weights + 129) + 200),
            Precision::Int8 => (weights + 8 * 129, weights + 8 * 129 + 200),
        };
        assert!(
            (lo..hi).contains(&blob.len()),
            "{kind:?} blob {} bytes",
            blob.len()
        );
    }
    // Separable Stormer-Verlet: two potential gradients and one kinetic
    // (quadratic: n(n+1) MAC) per step.
    let owned = separable(
        &mut rng,
        2,
        &[32],
        Activation::Tanh,
        Precision::F32,
        Method::StormerVerlet,
        0.01,
    );
    let blob = owned.blob().unwrap();
    let m: Model<'_, 2, 32> = Model::from_bytes(&blob).unwrap();
    let v = 2 * (2 * 32 + 32) as u32;
    assert_eq!(m.cost().macs_per_step, 2 * v + 6);
    // The potential gradient at the end of one Verlet stage serves the next
    // stage's first kick: Yoshida-4 with 2 substeps (6 stages) takes 7
    // potential and 6 kinetic gradients per step.
    let yoshida = m
        .with_integrator(Integrator {
            substeps: 2,
            ..Integrator::new(Method::Yoshida4, 0.01)
        })
        .unwrap();
    assert_eq!(yoshida.cost().macs_per_step, 7 * v + 6 * 6);
}
