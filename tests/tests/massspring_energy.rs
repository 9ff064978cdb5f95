//! Sensor mass on a flexure (mass-spring, H = p^2/(2m) + k q^2/2), exact
//! derivatives, no noise: the fitted energy model, exported as a blob and
//! stepped by visviva-runtime, keeps the TRUE energy over 100 periods from
//! held-out initial states, and the plain vector-field baseline fitted on the
//! same data and rolled out with RK4 at the same step drifts far more.

use std::f64::consts::PI;

use visviva_runtime::{Integrator, Method, State};
use visviva_trainer::deploy::blob::{HostModel, WeightKind};
use visviva_trainer::deploy::fitted_blob::energy_blob;
use visviva_trainer::evidence::check::{check, CheckSettings};
use visviva_trainer::learn::fit::{fit_baseline, fit_model, ArchChoice, FitSettings};
use visviva_trainer::learn::net::Activation;
use visviva_trainer::reference::simulate::{simulate, SimulationSpec};
use visviva_trainer::reference::{build_system, ReferenceSystem};

/// Steps of the rollout per period of the true system.
const STEPS_PER_PERIOD: usize = 100;
/// Rollout length in periods (the horizon).
const PERIODS: usize = 100;

/// The median of sorted, non-empty `values`.
fn median(values: &[f64]) -> f64 {
    let n = values.len();
    if n % 2 == 1 {
        values[n / 2]
    } else {
        0.5 * (values[n / 2 - 1] + values[n / 2])
    }
}

/// Largest |H(t) - H(0)| / |H(0)| of the true energy along the states.
fn worst_relative_drift(system: &dyn ReferenceSystem, states: &[[f32; 2]]) -> f64 {
    let h = |x: &[f32; 2]| system.hamiltonian(&[x[0] as f64, x[1] as f64]);
    let h0 = h(&states[0]);
    states
        .iter()
        .map(|x| (h(x) - h0).abs() / h0.abs())
        .fold(0.0, f64::max)
}

#[test]
fn energy_model_keeps_true_energy_over_100_periods_and_baseline_drifts() {
    let system = build_system("flexure", &[]).unwrap();
    let period = system.small_amplitude_period().expect("closed form");
    // One period per trajectory, 40 samples per period, exact derivatives.
    let spec = |trajectories, seed| SimulationSpec {
        trajectories,
        duration: period,
        rate: 40.0 / period,
        seed,
    };
    let train = simulate(system.as_ref(), &spec(24, 1)).unwrap();
    let val = simulate(system.as_ref(), &spec(6, 2)).unwrap();

    let arch = ArchChoice {
        hidden: vec![32, 32],
        ..ArchChoice::default()
    };
    let settings = FitSettings {
        epochs: 1500,
        batch: 64,
        lr: 3e-3,
        early_stop: false,
        quiet: true,
        seed: 7,
        ..FitSettings::default()
    };
    let fitted = fit_model(
        &train,
        Some(&val),
        &arch.build(1).unwrap(),
        &Default::default(),
        &settings,
    )
    .unwrap();
    let base = fit_baseline(
        &train,
        Some(&val),
        &arch.hidden,
        Activation::Tanh,
        &settings,
    )
    .unwrap();
    println!(
        "fit: energy model val loss {:.3e} ({} steps), baseline val loss {:.3e} ({} steps)",
        fitted.report.best_val, fitted.report.steps, base.report.best_val, base.report.steps
    );

    // Yoshida-4 at 100 steps per period: the integrator's own bounded energy
    // oscillation is O((w h)^4) ~ 1e-5 relative (w h = 2 pi / 100), far
    // below the 1e-3 target (Yoshida, Phys. Lett. A 150, 1990: 4th-order
    // symplectic composition; from memory).
    let dt = (period / STEPS_PER_PERIOD as f64) as f32;
    let blob = energy_blob(
        &fitted.model,
        Integrator::new(Method::Yoshida4, dt),
        WeightKind::F32,
    )
    .unwrap();
    let model = HostModel::from_bytes(&blob).unwrap();

    // Held-out initial states (not on any training trajectory): amplitude
    // fractions of the system's largest amplitude and phases chosen here.
    let amp = system.params().get("amp");
    let omega = 2.0 * PI / period;
    let mass = system.params().get("m");
    let inits: Vec<[f32; 2]> = [(0.35, 0.3), (0.6, 2.1), (0.85, 4.0), (0.5, 5.5)]
        .iter()
        .map(|&(fraction, phase): &(f64, f64)| {
            let a = fraction * amp;
            [
                (a * phase.cos()) as f32,
                (-mass * omega * a * phase.sin()) as f32,
            ]
        })
        .collect();

    let steps = STEPS_PER_PERIOD * PERIODS;
    let mut model_worst = 0.0f64;
    let mut ratios = Vec::with_capacity(inits.len());
    for x0 in &inits {
        let mut s = State::new(&x0[..1], &x0[1..]).unwrap();
        let mut xb = *x0;
        let mut model_states = Vec::with_capacity(steps + 1);
        let mut base_states = Vec::with_capacity(steps + 1);
        model_states.push(*x0);
        base_states.push(*x0);
        for _ in 0..steps {
            model.step(&mut s).unwrap();
            model_states.push([s.q[0], s.p[0]]);
            base.model.step_rk4(&mut xb, dt);
            base_states.push(xb);
        }
        let m = worst_relative_drift(system.as_ref(), &model_states);
        let b = worst_relative_drift(system.as_ref(), &base_states);
        println!(
            "init q = {:.3e} m, p = {:.3e} kg m/s: max rel. true-energy drift over {PERIODS} \
             periods: energy model (Yoshida-4) {m:.3e}, baseline (RK4) {b:.3e}, ratio {:.1}",
            x0[0],
            x0[1],
            b / m
        );
        model_worst = model_worst.max(m);
        ratios.push(b / m);
    }
    ratios.sort_by(f64::total_cmp);
    let ratio_median = median(&ratios);
    let ratio_worst = ratios[0];
    println!(
        "worst energy-model drift {model_worst:.3e} (bound 1e-3); baseline/model drift ratio \
         over the {} initial states: median {ratio_median:.1} (bound 100), smallest \
         {ratio_worst:.1} (bound 30)",
        ratios.len()
    );
    // The bound: relative true-energy drift at most 1e-3 over 100
    // periods. Greydanus, Dzamba & Yosinski (2019, Table 1) report the
    // Hamiltonian network's energy error orders of magnitude below the
    // baseline's on the ideal mass-spring (from memory).
    assert!(model_worst <= 1e-3, "energy model drift {model_worst:.3e}");
    // Same source: the baseline's drift at least 100 times the energy
    // model's (same data, same step, same start), as the median over the
    // initial states, since the published comparisons report averages over
    // initial states rather than the worst one; and no initial state below
    // 30 times (our own floor, so one state cannot hide behind the median).
    assert!(
        ratio_median >= 100.0,
        "median baseline/model drift ratio only {ratio_median:.1}"
    );
    assert!(
        ratio_worst >= 30.0,
        "baseline drift only {ratio_worst:.1} x the energy model's from some initial state"
    );
    learned_drift_stays_small_for_an_accurate_model(&model, &val, system.as_ref());
}

/// The report's learned-energy drift ranks models like their true drift:
/// it is measured in the blob's energy scale (the training data's typical
/// energy), not in the learned energy's spread along one trajectory, which
/// vanishes for an accurate model and once ranked a good model below a bad
/// one. So this model, whose true drift (closed-form energy above) is
/// within 1e-3, must show a learned drift within the same bound on every
/// held-out trajectory of `visviva check`'s long horizon.
fn learned_drift_stays_small_for_an_accurate_model(
    model: &HostModel<'_>,
    val: &visviva_trainer::data::dataset::Dataset,
    system: &dyn ReferenceSystem,
) {
    let settings = CheckSettings::default();
    let report = check(model, None, val, Some(system), &settings).unwrap();
    for t in &report.trajectories {
        let learned = t.model.learned_energy_drift.expect("learned drift");
        let truth = t.model.true_energy_drift.expect("true drift");
        println!(
            "check trajectory {}: learned-energy drift {learned:.3e} energy scales, true-energy drift {truth:.3e}",
            t.id
        );
        assert!(learned <= 1e-3, "learned drift {learned:.3e} of {}", t.id);
    }
}
