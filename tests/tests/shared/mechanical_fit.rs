//! The fit the mechanical-structure release checks share: `arch =
//! mechanical` with hidden layers 24, 24, fitted by the derivative loss for
//! 300 epochs on 40 simulated trajectories of 4 s at 25 Hz, checked on 8
//! held-out ones, and exported as an f32 implicit-midpoint blob (the
//! structure's default integrator) to be read back through the runtime;
//! and how they read the fitted M(q) from it.

use visviva_runtime::{Hamiltonian, Integrator, Method, State};
use visviva_trainer::data::dataset::Dataset;
use visviva_trainer::deploy::blob::{HostModel, WeightKind};
use visviva_trainer::deploy::fitted_blob::energy_blob;
use visviva_trainer::learn::fit::{fit_model, ArchChoice, FitSettings};
use visviva_trainer::reference::simulate::{simulate, SimulationSpec};
use visviva_trainer::reference::ReferenceSystem;

/// `trajectories` runs of 4 s at 25 Hz.
fn spec(trajectories: usize, seed: u64) -> SimulationSpec {
    SimulationSpec {
        trajectories,
        duration: 4.0,
        rate: 25.0,
        seed,
    }
}

/// The training log of [`fit_mechanical`] for `seed`.
pub fn training_log(system: &dyn ReferenceSystem, seed: u64) -> Dataset {
    simulate(system, &spec(40, seed)).unwrap()
}

/// The held-out log (simulated with seed `seed + 1`) and the blob fitted
/// to the training log (seed `seed`).
pub fn fit_mechanical(system: &dyn ReferenceSystem, seed: u64) -> (Dataset, Vec<u8>) {
    let train = training_log(system, seed);
    let val = simulate(system, &spec(8, seed + 1)).unwrap();
    let arch = ArchChoice {
        separable: false,
        mechanical: true,
        hidden: vec![24, 24],
        ..ArchChoice::default()
    };
    let settings = FitSettings {
        epochs: 300,
        batch: 64,
        early_stop: false,
        quiet: true,
        seed: 3,
        ..FitSettings::default()
    };
    let fitted = fit_model(
        &train,
        Some(&val),
        &arch.build(2).unwrap(),
        &Default::default(),
        &settings,
    )
    .unwrap();
    println!(
        "fit: val loss {:.3e} after {} steps",
        fitted.report.best_val, fitted.report.steps
    );
    let blob = energy_blob(
        &fitted.model,
        Integrator::new(Method::ImplicitMidpoint, 0.01),
        WeightKind::F32,
    )
    .unwrap();
    (val, blob)
}

/// The fitted model's M(q): the inverse of the matrix whose columns are
/// dH/dp at unit momenta (dH/dp = M(q)^-1 p, exactly linear in p).
pub fn fitted_mass_matrix(model: &HostModel<'_>, q: [f32; 2]) -> [[f64; 2]; 2] {
    let mut inv = [[0.0f64; 2]; 2];
    for j in 0..2 {
        let mut p = [0.0f32; 2];
        p[j] = 1.0;
        let s = State::new(&q, &p).unwrap();
        let (mut gq, mut gp) = ([0.0f32; 16], [0.0f32; 16]);
        model.gradient(&s, &mut gq, &mut gp).unwrap();
        for i in 0..2 {
            inv[i][j] = gp[i] as f64;
        }
    }
    let det = inv[0][0] * inv[1][1] - inv[0][1] * inv[1][0];
    [
        [inv[1][1] / det, -inv[0][1] / det],
        [-inv[1][0] / det, inv[0][0] / det],
    ]
}
