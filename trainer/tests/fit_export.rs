//! Exported blobs evaluate like the trainer: a briefly trained model of a
//! two-stage vibration-isolation mount (two masses on two springs in series)
//! in every structure (separable with quadratic or network kinetic term,
//! general, mechanical) is written as a blob, parsed by visviva-runtime, and its energy and gradient
//! dH/dx compared with the trainer's own f32 computation at random states.
//! The two use different tanh/softplus implementations (std vs the runtime's
//! deterministic ones, both within ~2.5e-7 of the true value), so agreement is
//! expected to f32 rounding level, checked at relative 1e-4.

use ndarray::Array2;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use visviva_runtime::{Hamiltonian, Integrator, Method, Model, State};
use visviva_trainer::data::dataset::{Dataset, DerivativeSource, Trajectory};
use visviva_trainer::deploy::blob::WeightKind;
use visviva_trainer::deploy::fitted_blob::{energy_blob, read_baseline, write_baseline};
use visviva_trainer::learn::fit::{fit_baseline, fit_model, ArchChoice, FitSettings};
use visviva_trainer::learn::net::Activation;

const M: [f64; 2] = [0.2, 0.5];
const K: [f64; 2] = [50.0, 30.0];
const REST: [f64; 2] = [0.05, 0.12];

/// H = p1^2/2m1 + p2^2/2m2 + k1 (q1 - r1)^2/2 + k2 (q2 - q1 - (r2 - r1))^2/2
/// (textbook series springs); returns dx/dt = (dH/dp, -dH/dq).
fn series_springs_rate(x: &[f64]) -> [f64; 4] {
    let s1 = x[0] - REST[0];
    let s2 = x[1] - x[0] - (REST[1] - REST[0]);
    let dv1 = K[0] * s1 - K[1] * s2;
    let dv2 = K[1] * s2;
    [x[2] / M[0], x[3] / M[1], -dv1, -dv2]
}

fn random_states(count: usize, seed: u64) -> Dataset {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut x = Array2::zeros((count, 4));
    let mut dx = Array2::zeros((count, 4));
    for r in 0..count {
        let s = [
            REST[0] + rng.random_range(-0.01..0.01),
            REST[1] + rng.random_range(-0.02..0.02),
            rng.random_range(-0.3..0.3),
            rng.random_range(-0.5..0.5),
        ];
        let d = series_springs_rate(&s);
        for i in 0..4 {
            x[[r, i]] = s[i];
            dx[[r, i]] = d[i];
        }
    }
    Dataset {
        dof: 2,
        inputs: 0,
        trajectories: vec![Trajectory {
            id: "mount".into(),
            t: (0..count).map(|i| i as f64 * 1e-3).collect(),
            x,
            dx,
            u: Array2::zeros((count, 0)),
        }],
        derivatives: DerivativeSource::Given,
    }
}

#[test]
fn runtime_matches_trainer_for_every_structure() {
    let data = random_states(400, 1);
    let settings = FitSettings {
        epochs: 20,
        batch: 64,
        quiet: true,
        ..FitSettings::default()
    };
    let mut rng = ChaCha8Rng::seed_from_u64(2);
    let mut worst_grad = 0.0f64;
    let mut worst_energy = 0.0f64;
    for activation in [Activation::Tanh, Activation::Softplus] {
        let structures = [
            (true, true, false),
            (true, false, false),
            (false, false, false),
            (false, false, true),
        ];
        for (separable, quadratic, mechanical) in structures {
            let choice = ArchChoice {
                separable,
                quadratic_kinetic: quadratic,
                mechanical,
                hidden: vec![32, 24],
                activation,
            };
            let fitted = fit_model(
                &data,
                None,
                &choice.build(2).unwrap(),
                &Default::default(),
                &settings,
            )
            .unwrap();
            let method = if separable {
                Method::StormerVerlet
            } else {
                Method::ImplicitMidpoint
            };
            let blob = energy_blob(
                &fitted.model,
                Integrator::new(method, 1e-3),
                WeightKind::F32,
            )
            .unwrap();
            let model = Model::<8, 128>::from_bytes(&blob).unwrap();
            assert_eq!(model.is_separable(), separable);
            let states = Array2::from_shape_fn((50, 4), |(_, i)| {
                let c = [REST[0], REST[1], 0.0, 0.0][i];
                let w = [0.012, 0.025, 0.35, 0.6][i];
                (c + rng.random_range(-w..w)) as f32
            });
            let (energy, grad) = fitted.model.energy_and_gradient(states.view());
            let es = fitted.model.norm.energy_scale as f64;
            for r in 0..states.nrows() {
                let s = states.row(r);
                let st = State::<8>::new(&[s[0], s[1]], &[s[2], s[3]]).unwrap();
                let h = model.energy(&st).unwrap() as f64;
                let mut gq = [0.0f32; 8];
                let mut gp = [0.0f32; 8];
                model.gradient(&st, &mut gq, &mut gp).unwrap();
                let runtime = [gq[0], gq[1], gp[0], gp[1]];
                let norm = (0..4).map(|i| grad[[r, i]].abs()).fold(0.0f32, f32::max) as f64;
                for i in 0..4 {
                    let rel = (runtime[i] as f64 - grad[[r, i]] as f64).abs() / norm.max(1e-30);
                    worst_grad = worst_grad.max(rel);
                    assert!(
                        rel < 1e-4,
                        "{choice:?} state {r} component {i}: runtime {} trainer {}",
                        runtime[i],
                        grad[[r, i]]
                    );
                }
                // Energy relative to its magnitude or the energy unit.
                let rel = (h - energy[r] as f64).abs() / (energy[r].abs() as f64).max(es);
                worst_energy = worst_energy.max(rel);
                assert!(
                    rel < 1e-4,
                    "{choice:?} state {r}: energy {h} vs {}",
                    energy[r]
                );
            }
        }
    }
    println!(
        "max relative difference runtime vs trainer: gradient {worst_grad:.2e}, energy {worst_energy:.2e}"
    );
}

#[test]
fn baseline_file_round_trips() {
    let data = random_states(200, 3);
    let settings = FitSettings {
        epochs: 3,
        batch: 64,
        quiet: true,
        ..FitSettings::default()
    };
    let base = fit_baseline(&data, None, &[16], Activation::Tanh, &settings).unwrap();
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("b.baseline.json");
    write_baseline(&path, &base.model).unwrap();
    let back = read_baseline(&path).unwrap();
    assert_eq!(back, base.model);
    let x = [0.05f32, 0.12, 0.1, -0.2];
    assert_eq!(back.vector_field(&x), base.model.vector_field(&x));
}
