//! The fit the mechanical-structure release checks share: `arch =
//! mechanical` with hidden layers 24, 24, fitted by the derivative loss for
//! 300 epochs on 40 simulated trajectories of 4 s at 25 Hz, checked on 8
//! held-out ones, and exported as an f32 implicit-midpoint blob (the
//! structure's default integrator) to be read back through the runtime.

use visviva_runtime::{Integrator, Method};
use visviva_trainer::data::dataset::Dataset;
use visviva_trainer::deploy::blob::WeightKind;
use visviva_trainer::deploy::fitted_blob::energy_blob;
use visviva_trainer::learn::fit::{fit_model, ArchChoice, FitSettings};
use visviva_trainer::reference::simulate::{simulate, SimulationSpec};
use visviva_trainer::reference::ReferenceSystem;

/// The held-out log (simulated with seed `seed + 1`) and the blob fitted
/// to the training log (seed `seed`).
pub fn fit_mechanical(system: &dyn ReferenceSystem, seed: u64) -> (Dataset, Vec<u8>) {
    let spec = |trajectories, seed| SimulationSpec {
        trajectories,
        duration: 4.0,
        rate: 25.0,
        seed,
    };
    let train = simulate(system, &spec(40, seed)).unwrap();
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
