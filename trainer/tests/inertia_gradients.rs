//! The parameter gradient of the loss that learns a mass matrix from joint
//! rates (`learn::inertia_loss`: the Euler-Lagrange residual over windows,
//! as a ratio to the momentum change) against central finite differences
//! of the same loss (common practice), along random directions, for a
//! driven two-coordinate chunk with the input gain and joint friction
//! terms non-zero.

use ndarray::Array2;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use visviva_trainer::learn::hnn::{EnergyArch, HnnObjective, HnnWork};
use visviva_trainer::learn::inertia_loss::{Batch, Chunk, InertiaLoss};
use visviva_trainer::learn::net::{Activation, MlpShape};

fn setup(act: Activation) -> (InertiaLoss, Vec<Chunk>, Vec<f32>) {
    let n = 2;
    let arch = EnergyArch::Mechanical {
        potential: MlpShape::new(n, &[6], 1, act),
        factor: MlpShape::new(n, &[6], 3, act),
    };
    let loss = InertiaLoss {
        objective: HnnObjective {
            dof: n,
            arch: arch.clone(),
            gains: vec![1.0; 2 * n],
        },
        rate_gain: vec![1.7, 0.6],
        window: 4,
        inputs: 1,
    };
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    let chunk = |rng: &mut ChaCha8Rng, rows: usize| Chunk {
        z: Array2::from_shape_fn((rows, 2 * n), |_| rng.random_range(-1.5..1.5)),
        u: Array2::from_shape_fn((rows, 1), |_| rng.random_range(-1.0..1.0)),
        h: (0..rows).map(|_| rng.random_range(0.05..0.15)).collect(),
    };
    let chunks = vec![chunk(&mut rng, 9), chunk(&mut rng, 6)];
    let mut p = arch.init(n, 11);
    p.extend((0..n * 2).map(|_| rng.random_range(-0.5f32..0.5)));
    (loss, chunks, p)
}

fn loss_at(loss: &InertiaLoss, p: &[f32], chunks: &[Chunk]) -> f64 {
    let batch = Batch::of(&chunks.iter().collect::<Vec<_>>());
    loss.loss(p, &batch, &mut HnnWork::default(), None)
}

#[test]
fn inertia_loss_gradient_matches_central_differences() {
    for act in [Activation::Tanh, Activation::Softplus] {
        let (loss, chunks, p) = setup(act);
        assert_eq!(p.len(), loss.param_count());
        let batch = Batch::of(&chunks.iter().collect::<Vec<_>>());
        let mut grad = vec![0.0f32; p.len()];
        loss.loss(&p, &batch, &mut HnnWork::default(), Some(&mut grad));
        let mut rng = ChaCha8Rng::seed_from_u64(9);
        for trial in 0..4 {
            let d: Vec<f32> = (0..p.len()).map(|_| rng.random_range(-1.0..1.0)).collect();
            let h = 2e-3f32;
            let shifted =
                |s: f32| -> Vec<f32> { p.iter().zip(&d).map(|(a, b)| a + s * b).collect() };
            let fd = (loss_at(&loss, &shifted(h), &chunks) - loss_at(&loss, &shifted(-h), &chunks))
                / (2.0 * h as f64);
            let analytic: f64 = grad.iter().zip(&d).map(|(g, v)| (*g * v) as f64).sum();
            let magnitude: f64 = grad
                .iter()
                .zip(&d)
                .map(|(g, v)| (*g * v).abs() as f64)
                .sum();
            let rel = (analytic - fd).abs() / magnitude.max(1e-12);
            println!("{act:?} direction {trial}: analytic {analytic:.6e}, central difference {fd:.6e}, relative {rel:.2e}");
            assert!(rel < 5e-3, "{act:?} direction {trial}: {analytic} vs {fd}");
        }
    }
}
