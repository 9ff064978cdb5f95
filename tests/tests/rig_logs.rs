//! Rigs that log positions only: a pendulum read by a 4096-count-per-
//! revolution encoder at 100 Hz (millisecond time stamps, one dropped
//! sample) and a mass-spring logged in millimetres with 1 % noise, each
//! read through a `[columns]` mapping of the logger's own names and fitted
//! by trajectory matching (the default for positions-only logs). Checked
//! against closed forms: the pendulum's small-amplitude period
//! 2 pi sqrt(L/g) and its 90-degree period 4 sqrt(L/g) K(sin 45 deg)
//! (Abramowitz & Stegun ch. 17), the mass-spring's natural frequency
//! sqrt(k/m) (textbook); and trajectory matching against derivative
//! matching on the same quantized log by 10 s rollout error.

use std::io::Write;

use visviva_runtime::{Integrator, Method, State};
use visviva_tests::{momentum_sign_changes, pendulum_period, period_from_crossings};
use visviva_trainer::data::columns::{load_mapped, ColumnMap, MappedLog, MappedOptions};
use visviva_trainer::data::dataset::Dataset;
use visviva_trainer::data::log::split_by_trajectory;
use visviva_trainer::deploy::blob::{HostModel, WeightKind};
use visviva_trainer::deploy::fitted_blob::energy_blob;
use visviva_trainer::deploy::integrator::MethodName;
use visviva_trainer::learn::fit::{fit_model, ArchChoice, FitSettings};
use visviva_trainer::learn::hnn::{EnergyModel, PortArch};
use visviva_trainer::learn::mode::{plan_mode, ModeRequest, TrajectoryPlan};
use visviva_trainer::learn::stage::{plan_model, stop_text, ModelPlan, SettingNames};
use visviva_trainer::learn::trajectory::{fit_trajectory, TrajectorySettings};
use visviva_trainer::reference::build_system;
use visviva_trainer::reference::simulate::{add_noise, simulate, SimulationSpec};

/// Write `ds`'s first coordinate as a logger would: run id, time in ms,
/// position as round(q * per_unit); the row `drop` of the first run left
/// out.
fn logger_csv(ds: &Dataset, header: &str, per_unit: f64, drop: usize) -> tempfile::NamedTempFile {
    let mut f = tempfile::NamedTempFile::new().unwrap();
    writeln!(f, "{header}").unwrap();
    for (r, t) in ds.trajectories.iter().enumerate() {
        for (k, time) in t.t.iter().enumerate() {
            if r == 0 && k == drop {
                continue;
            }
            let ms = (time * 1000.0).round() as i64;
            writeln!(f, "{r},{ms},{}", (t.x[[k, 0]] * per_unit).round()).unwrap();
        }
    }
    f.flush().unwrap();
    f
}

fn read(file: &tempfile::NamedTempFile, mapping: &str) -> MappedLog {
    let map = ColumnMap::from_toml(mapping).unwrap();
    load_mapped(file.path(), &map, &MappedOptions::default()).unwrap()
}

fn settings() -> FitSettings {
    FitSettings {
        epochs: 200,
        batch: 64,
        quiet: true,
        seed: 7,
        ..FitSettings::default()
    }
}

/// The default plan (separable, quadratic kinetic term, Verlet at the
/// log's step) and trajectory matching's plan for a mapped log.
fn plans(log: &MappedLog, train: &Dataset, epochs: usize) -> (ModelPlan, TrajectoryPlan) {
    let choice = ArchChoice {
        hidden: vec![32, 32],
        ..ArchChoice::default()
    };
    let plan = plan_model(
        train,
        choice,
        PortArch::default(),
        Some(MethodName::Verlet),
        None,
        SettingNames::Flags,
    )
    .unwrap();
    let request = ModeRequest {
        epochs: Some(epochs),
        ..ModeRequest::default()
    };
    let (words, tp) = plan_mode(&request, Some(&log.rig), train, &plan, &|k| k.into()).unwrap();
    println!("{words}");
    let tp = tp.expect("a positions-only log defaults to trajectory matching");
    println!("{}", tp.energy_scale_note());
    (plan, tp)
}

/// Derivative fit (the warm start) and trajectory fit of a mapped log.
fn fit_both(log: &MappedLog, epochs: usize) -> (EnergyModel, EnergyModel) {
    let (train, val) = split_by_trajectory(&log.dataset, 0.2, 1);
    let (plan, tp) = plans(log, &train, epochs);
    let s = settings();
    let warm = fit_model(&train, Some(&val), &plan.arch, &plan.terms, &s).unwrap();
    println!("derivative fit: {}", stop_text(warm.report.stop));
    let ts = TrajectorySettings {
        window_steps: tp.window_steps,
        windows_per_batch: tp.windows_per_batch,
        method: plan.integrator.method,
        dt: tp.dt,
        sigma: tp.sigma.clone(),
        mass1: tp.mass1,
    };
    let traj_settings = FitSettings {
        epochs: tp.epochs,
        lr: tp.lr,
        ..s
    };
    let fitted =
        fit_trajectory(&train, Some(&val), warm.model.clone(), &ts, &traj_settings).unwrap();
    let r = &fitted.report;
    println!(
        "trajectory fit: {} steps, {:.1} s, training-window loss {:.3} (noise variances), {}",
        r.steps,
        r.seconds,
        r.best_val,
        stop_text(r.stop)
    );
    (warm.model, fitted.model)
}

/// Period of `model` released at rest at amplitude `a`, by Yoshida-4 at
/// `dt` over five periods of `expected` (as in crane_period.rs).
fn period(model: &EnergyModel, a: f64, expected: f64, dt: f64) -> f64 {
    let integrator = Integrator::new(Method::Yoshida4, dt as f32);
    let blob = energy_blob(model, integrator, WeightKind::F32).unwrap();
    let host = HostModel::from_bytes(&blob).unwrap();
    let x0 = State::new(&[a as f32], &[0.0]).unwrap();
    let steps = (5.0 * expected / dt) as usize;
    let crossings = momentum_sign_changes(&host, &integrator, x0, 0, steps).unwrap();
    period_from_crossings(&crossings).expect("model did not oscillate")
}

/// RMS position error of `model` (Verlet at the log's step) against exact
/// trajectories, each rolled out from its true initial state (p = v here:
/// the pendulum's inertia m L^2 is 1).
fn rollout_error(model: &EnergyModel, truth: &Dataset, dt: f64) -> f64 {
    let integrator = Integrator::new(Method::StormerVerlet, dt as f32);
    let blob = energy_blob(model, integrator, WeightKind::F32).unwrap();
    let host = HostModel::from_bytes(&blob).unwrap();
    let (mut sq, mut count) = (0.0f64, 0usize);
    for t in &truth.trajectories {
        let mut x = State::new(&[t.x[[0, 0]] as f32], &[t.x[[0, 1]] as f32]).unwrap();
        for k in 1..t.t.len() {
            integrator.step(&host, &mut x).unwrap();
            sq += (x.q[0] as f64 - t.x[[k, 0]]).powi(2);
            count += 1;
        }
    }
    (sq / count as f64).sqrt()
}

const PENDULUM_MAP: &str = r#"
[columns]
t = { column = "stamp_ms", scale = 0.001, unit = "s" }
traj = "run"
q = [{ column = "enc_counts", counts_per_rev = 4096 }]
"#;

#[test]
fn encoder_logged_pendulum_has_the_closed_form_periods_and_trajectory_matching_beats_derivatives() {
    // m = 1 kg, L = 1 m: inertia m L^2 = 1, so p = dq/dt in both the
    // simulation and the unit-mass normalization.
    // A test campaign of small swings (amplitudes up to 25 deg) and large
    // ones (up to 100 deg), 12 runs each, 4 s at 100 Hz.
    let pendulum = |max_deg: f64| {
        let params = [
            ("m".to_string(), 1.0),
            ("l".to_string(), 1.0),
            ("max_angle_deg".to_string(), max_deg),
        ];
        build_system("crane", &params).unwrap()
    };
    let spec = |seed| SimulationSpec {
        trajectories: 12,
        duration: 4.0,
        rate: 100.0,
        seed,
    };
    let system = pendulum(100.0);
    let (l, g) = (system.params().get("l"), system.params().get("g"));
    let mut sim = simulate(pendulum(25.0).as_ref(), &spec(30)).unwrap();
    sim.trajectories
        .extend(simulate(system.as_ref(), &spec(31)).unwrap().trajectories);
    let counts_per_rad = 4096.0 / std::f64::consts::TAU;
    let file = logger_csv(&sim, "run,stamp_ms,enc_counts", counts_per_rad, 123);
    let log = read(&file, PENDULUM_MAP);
    assert_eq!(log.rig.gaps, 1);
    assert!(log.rig.positions_only);
    let (derivative, trajectory) = fit_both(&log, 150);

    let t0 = 2.0 * std::f64::consts::PI * (l / g).sqrt();
    for (degrees, exact) in [
        (5.0f64, t0),
        (90.0, pendulum_period(l, g, 90f64.to_radians())),
    ] {
        let measured = period(&trajectory, degrees.to_radians(), exact, t0 / 400.0);
        let warm = period(&derivative, degrees.to_radians(), exact, t0 / 400.0);
        println!(
            "derivative matching: period {warm:.5} s ({:+.3e})",
            warm / exact - 1.0
        );
        let error = measured / exact - 1.0;
        println!(
            "amplitude {degrees} deg: period {measured:.5} s, closed form {exact:.5} s, \
             relative error {error:+.3e}"
        );
        // 2 pi sqrt(L/g) (textbook) at small amplitude (5 deg: the
        // amplitude's own effect is (1/16) a^2 = 4.8e-4, inside the bound),
        // 4 sqrt(L/g) K(sin 45 deg) (A&S ch. 17) at 90 deg; bound 0.5 %.
        assert!(
            error.abs() <= 0.005,
            "{degrees} deg: {:.3} %",
            100.0 * error
        );
    }

    let truth = simulate(
        system.as_ref(),
        &SimulationSpec {
            trajectories: 4,
            duration: 10.0,
            rate: 100.0,
            seed: 32,
        },
    )
    .unwrap();
    let e_derivative = rollout_error(&derivative, &truth, 0.01);
    let e_trajectory = rollout_error(&trajectory, &truth, 0.01);
    let ratio = e_derivative / e_trajectory;
    println!(
        "10 s rollout RMS error: derivative matching {e_derivative:.3e} rad, trajectory \
         matching {e_trajectory:.3e} rad, ratio {ratio:.2}"
    );
    assert!(ratio >= 2.0, "trajectory matching only {ratio:.2}x better");
}

#[test]
fn mass_spring_logged_in_millimetres_with_noise_has_the_natural_frequency() {
    // Sensor mass on a flexure, m = 0.05 kg, k = 20 N/m: omega = 20 rad/s.
    let system = build_system("flexure", &[]).unwrap();
    let (m, k) = (system.params().get("m"), system.params().get("k"));
    let omega = (k / m).sqrt();
    let mut sim = simulate(
        system.as_ref(),
        &SimulationSpec {
            trajectories: 16,
            duration: 3.0,
            rate: 100.0,
            seed: 41,
        },
    )
    .unwrap();
    // 1 % of each coordinate's RMS as Gaussian noise, as `visviva simulate
    // --noise 0.01` writes it; only positions are logged, in micrometres
    // resolution of a millimetre column.
    add_noise(&mut sim, 0.01, 42).unwrap();
    let file = logger_csv(&sim, "run,stamp_ms,pos_um", 1e6, 77);
    let log = read(
        &file,
        r#"
[columns]
t = { column = "stamp_ms", scale = 0.001, unit = "s" }
traj = "run"
q = [{ column = "pos_um", scale = 1e-6, unit = "m" }]
"#,
    );
    let (_, trajectory) = fit_both(&log, 150);
    let t0 = std::f64::consts::TAU / omega;
    let amplitude = 0.5 * system.params().get("amp");
    let measured = std::f64::consts::TAU / period(&trajectory, amplitude, t0, t0 / 400.0);
    let error = measured / omega - 1.0;
    println!(
        "natural frequency {measured:.5} rad/s, sqrt(k/m) = {omega:.5} rad/s, relative error \
         {error:+.3e}"
    );
    // sqrt(k/m) (textbook); bound 0.5 %.
    assert!(error.abs() <= 0.005, "{:.3} %", 100.0 * error);
}
