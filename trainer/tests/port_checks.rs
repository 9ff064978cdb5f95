//! Fitted damped and driven models against outside references, through the
//! trainer's export path and the runtime's arithmetic:
//! * damped flexure: the damping ratio from the logarithmic decrement of
//!   the fitted model's free decay, delta = ln(x_k / x_(k+1)) =
//!   2 pi zeta / sqrt(1 - zeta^2) (Thomson & Dahleh, "Theory of Vibration
//!   with Applications", section on the logarithmic decrement; from
//!   memory), within 0.05 % of the simulated zeta;
//! * drivetrain: under a constant motor torque tau the steady speed of a
//!   two-inertia chain whose only friction to ground is viscous (b, on the
//!   load) is tau / b (steady state of J dw/dt = tau - b w, any dynamics
//!   text; from memory), within 1 %;
//! * with u = 0 the exported model's discrete energy never rises over many
//!   random states (the discrete-gradient identity H(x1) - H(x0) =
//!   -h |L^T g|^2 <= 0, Gonzalez 1996 / McLachlan, Quispel & Robidoux 1999;
//!   from memory);
//! * crane payload under a trolley, G(q) learned as a network of q: under
//!   a constant trolley acceleration a the payload settles at
//!   q = -atan(a / g) (a pendulum in a uniformly accelerating frame hangs
//!   along the effective gravity; any introductory mechanics text, from
//!   memory), within 1 %, and the learned G(q) follows -m l cos q within
//!   2 % of m l;
//! * flexure beside a plate, R(q) learned as a network of q: the learned
//!   damping follows the squeeze-film law c(q) = c0 (h / (h - q))^3
//!   (Reynolds lubrication theory for parallel plates; from memory) within
//!   5 % where the logs see the mass move (c changes by a factor of 6
//!   there);
//! * `visviva check`'s damping per mode (linearization at rest) agrees with
//!   the simulated damping ratio and natural frequency (flexure: closed
//!   form; drivetrain: eigenvalues of the exact linear system from the
//!   general-purpose `nalgebra` crate, not the trainer's routine);
//!
//! Seed spread (measured 2026-12-02 by temporarily offsetting the data and
//! fit seeds by 0, 1, 2, 3, release build): each assertion below states it.
//! * the runtime's field (J - R) dH/dx + G u equals the trainer's
//!   prediction on random states and inputs (relative 1e-4).
//!
//! Release build: each fit takes a few seconds; in debug builds (about 2.5
//! minutes) the two fitting tests are ignored: `cargo test --release -p
//! visviva-trainer --test port_checks` runs them.

use nalgebra::DMatrix;
use ndarray::Array2;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use visviva_runtime::{Hamiltonian, Integrator, Method, State};
use visviva_trainer::data::dataset::Dataset;
use visviva_trainer::deploy::blob::{BlobModel, HostModel, HOST_MAX_DOF};
use visviva_trainer::deploy::fitted_blob::blob_model;
use visviva_trainer::deploy::rollout::{roll_driven, sample_states};
use visviva_trainer::evidence::check::{check_port, eigenvalues};
use visviva_trainer::learn::fit::{fit_model, ArchChoice, FitSettings};
use visviva_trainer::learn::hnn::{EnergyModel, PortArch};
use visviva_trainer::reference::build_system;
use visviva_trainer::reference::simulate::{simulate as simulate_system, SimulationSpec};

fn simulate(
    name: &str,
    params: &[(String, f64)],
    trajectories: usize,
    duration: f64,
    rate: f64,
    seed: u64,
) -> Dataset {
    let system = build_system(name, params).unwrap();
    let spec = SimulationSpec {
        trajectories,
        duration,
        rate,
        seed,
    };
    simulate_system(system.as_ref(), &spec).unwrap()
}

fn fit(ds: &Dataset, hidden: &[usize], epochs: usize) -> EnergyModel {
    let terms = PortArch {
        dissipation: true,
        ..PortArch::default()
    };
    fit_terms(ds, hidden, epochs, &terms)
}

fn fit_terms(ds: &Dataset, hidden: &[usize], epochs: usize, terms: &PortArch) -> EnergyModel {
    let arch = ArchChoice {
        hidden: hidden.to_vec(),
        ..ArchChoice::default()
    }
    .build(ds.dof)
    .unwrap();
    let settings = FitSettings {
        epochs,
        early_stop: false,
        quiet: true,
        lr: 3e-3,
        ..FitSettings::default()
    };
    let fitted = fit_model(ds, None, &arch, terms, &settings).unwrap();
    println!(
        "fitted: final training loss {:.3e}",
        fitted.report.history.train.last().unwrap()
    );
    fitted.model
}

fn export(model: &EnergyModel, dt: f32) -> Vec<u8> {
    let integrator = Integrator::new(Method::DiscreteGradient, dt);
    let blob: BlobModel = blob_model(model, integrator);
    blob.to_bytes().unwrap()
}

/// Largest difference between the runtime's field (J - R) dH/dx + G u of
/// the exported blob and the trainer's prediction, over 500 states within
/// 1.5 scales of the data and one input uniform in +-`u_amplitude` each,
/// relative to each component's RMS rate.
fn field_difference(
    model: &EnergyModel,
    runtime: &HostModel<'_>,
    u_amplitude: f32,
    seed: u64,
) -> f64 {
    let n = model.dof;
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let states = sample_states(&model.norm.offset, &model.norm.scale, 1.5, 500, 3);
    let us: Vec<f32> = (0..states.len())
        .map(|_| rng.random_range(-u_amplitude..u_amplitude))
        .collect();
    let x = Array2::from_shape_fn((states.len(), 2 * n), |(r, i)| states[r][i]);
    let ua = Array2::from_shape_fn((states.len(), 1), |(r, _)| us[r]);
    let trainer = model.vector_field_driven(x.view(), ua.view());
    let mut worst = 0.0f64;
    for (r, s) in states.iter().enumerate() {
        let st = State::new(&s[..n], &s[n..]).unwrap();
        let (mut dq, mut dp) = ([0.0f32; HOST_MAX_DOF], [0.0f32; HOST_MAX_DOF]);
        runtime
            .vector_field_driven(&st, &[us[r]], &mut dq, &mut dp)
            .unwrap();
        for i in 0..2 * n {
            let v = if i < n { dq[i] } else { dp[i - n] };
            let err = (v as f64 - trainer[[r, i]] as f64).abs() / model.norm.rate_scale[i] as f64;
            worst = worst.max(err);
        }
    }
    println!("runtime vs trainer field: worst error {worst:.2e} of the RMS rate");
    worst
}

/// Successive positive peaks of a sampled signal (parabolic interpolation
/// through the three samples around each local maximum).
fn positive_peaks(x: &[f64]) -> Vec<f64> {
    (1..x.len() - 1)
        .filter(|&k| x[k] > 0.0 && x[k] >= x[k - 1] && x[k] > x[k + 1])
        .map(|k| {
            let (a, b, c) = (x[k - 1], x[k], x[k + 1]);
            let denom = a - 2.0 * b + c;
            if denom == 0.0 {
                b
            } else {
                b - 0.125 * (a - c) * (a - c) / denom
            }
        })
        .collect()
}

#[test]
#[cfg_attr(
    debug_assertions,
    ignore = "trains for about 3 s in release but minutes in debug; run with --release"
)]
fn damped_flexure_log_decrement_gives_the_simulated_damping_ratio() {
    let zeta = 0.05;
    let params = vec![("zeta".to_string(), zeta)];
    let ds = simulate("flexure-damped", &params, 30, 3.0, 100.0, 7);
    assert!(!ds.driven());
    let model = fit(&ds, &[32, 32], 300);
    let bytes = export(&model, 0.002);
    let runtime = HostModel::from_bytes(&bytes).unwrap();
    // Free decay from 0.8 of the largest simulated amplitude (5 mm default),
    // inside the fitted range; 2 s = about 6 periods.
    let x0 = [0.004f32, 0.0];
    let out = roll_driven(&runtime, &x0, 1000, &[]).unwrap();
    assert!(out.failure.is_none(), "{:?}", out.failure);
    let q: Vec<f64> = out.states.iter().map(|s| s[0] as f64).collect();
    let peaks = positive_peaks(&q);
    assert!(peaks.len() >= 5, "only {} peaks", peaks.len());
    let cycles = (peaks.len() - 1) as f64;
    let delta = (peaks[0] / peaks[peaks.len() - 1]).ln() / cycles;
    let fitted_zeta = delta / (4.0 * std::f64::consts::PI.powi(2) + delta * delta).sqrt();
    let rel = (fitted_zeta - zeta).abs() / zeta;
    println!(
        "log decrement {delta:.4} over {cycles} cycles: zeta {fitted_zeta:.4} vs simulated {zeta} ({:.2} %)",
        rel * 100.0
    );
    // Seeds 0..3: 0.01 %, 0.01 %, 0.02 %, 0.01 %; README: within 0.05 %.
    assert!(rel < 5e-4, "fitted zeta {fitted_zeta} vs {zeta}");

    // `visviva check`'s damping per mode (eigenvalues of the linearization at
    // rest) gives the same ratio and the undamped natural frequency
    // sqrt(k / m) / (2 pi) = 3.183 Hz (textbook closed form).
    let blob = BlobModel::from_bytes(&bytes).unwrap();
    let report = check_port(&runtime, &blob, &ds).unwrap();
    println!("modes at rest: {:?}", report.modes);
    assert_eq!(report.modes.len(), 1);
    let mode = &report.modes[0];
    let f_n = (20.0f64 / 0.05).sqrt() / (2.0 * std::f64::consts::PI);
    // Seeds 0..3: ratio off by 0.11 %, 0.11 %, 0.11 %, 0.14 %; frequency
    // by 0.12 %, 0.10 %, 0.12 %, 0.13 %.
    assert!((mode.damping_ratio - zeta).abs() / zeta < 0.005, "{mode:?}");
    assert!((mode.natural_hz - f_n).abs() / f_n < 0.005, "{mode:?}");
    assert!(report.rollouts.iter().all(|r| r.failure.is_none()));
}

#[test]
fn eigenvalues_of_a_damped_oscillator_match_the_closed_form() {
    // dx/dt = [[0, 1], [-w^2, -2 zeta w]] x has lambda = -zeta w +- i w
    // sqrt(1 - zeta^2) (textbook closed form); and a 4 x 4 block-diagonal
    // pair of such oscillators gives both pairs.
    let (w1, z1, w2, z2) = (20.0f64, 0.05, 77.0, 0.3);
    let a = vec![
        vec![0.0, 1.0, 0.0, 0.0],
        vec![-w1 * w1, -2.0 * z1 * w1, 0.0, 0.0],
        vec![0.0, 0.0, 0.0, 1.0],
        vec![0.0, 0.0, -w2 * w2, -2.0 * z2 * w2],
    ];
    let mut eig = eigenvalues(&a);
    eig.sort_by(|a, b| a.1.total_cmp(&b.1));
    let expect = [
        (-z2 * w2, -w2 * (1.0 - z2 * z2).sqrt()),
        (-z1 * w1, -w1 * (1.0 - z1 * z1).sqrt()),
        (-z1 * w1, w1 * (1.0 - z1 * z1).sqrt()),
        (-z2 * w2, w2 * (1.0 - z2 * z2).sqrt()),
    ];
    for ((r, i), (er, ei)) in eig.iter().zip(expect) {
        assert!(
            (r - er).abs() < 1e-9 * w2 && (i - ei).abs() < 1e-9 * w2,
            "{eig:?}"
        );
    }
}

#[test]
#[cfg_attr(
    debug_assertions,
    ignore = "trains for about 3 s in release but minutes in debug; run with --release"
)]
fn drivetrain_steady_speed_is_torque_over_friction() {
    let ds = simulate("drivetrain", &[], 16, 4.0, 400.0, 11);
    assert!(ds.driven());
    let model = fit(&ds, &[32, 32], 60);
    let dt = 0.0025f32;
    let bytes = export(&model, dt);
    let runtime = HostModel::from_bytes(&bytes).unwrap();
    // Defaults: b = 0.01 N m s/rad; a small torque keeps the angles in the
    // fitted range: steady speed 0.5 rad/s.
    let (tau, b) = (0.005f32, 0.01f64);
    let steps = 800; // 2 s, about 16 time constants (Jm + Jl) / b = 0.12 s
    let u = vec![vec![tau]; steps];
    let out = roll_driven(&runtime, &[0.0, 0.0, 0.0, 0.0], steps, &u).unwrap();
    assert!(out.failure.is_none(), "{:?}", out.failure);
    // Mean motor speed over the last 0.25 s from the angle (averages out
    // any residual shaft oscillation).
    let back = 100;
    let q_end = out.states[steps][0] as f64;
    let q_before = out.states[steps - back][0] as f64;
    let speed = (q_end - q_before) / (back as f64 * dt as f64);
    let load = (out.states[steps][1] as f64 - out.states[steps - back][1] as f64)
        / (back as f64 * dt as f64);
    let expected = tau as f64 / b;
    let rel = (speed - expected).abs() / expected;
    println!(
        "steady motor speed {speed:.4} rad/s, load {load:.4} rad/s vs tau/b = {expected} ({:.2} %)",
        rel * 100.0
    );
    // Seeds 0..3: 0.19 %, 0.42 %, 0.10 %, 0.40 %.
    assert!(rel < 0.01, "motor speed {speed} vs {expected}");
    assert!(
        (load - expected).abs() / expected < 0.01,
        "load speed {load}"
    );

    // Modes at rest against the exact linear system A = (J - R) Q with
    // Q = Hessian of H (closed form from the parameters): the shaft mode
    // and the real friction mode near -b / (Jm + Jl). Its eigenvalues come
    // from nalgebra (real Schur form), not from the trainer's routine that
    // gives the learned modes.
    let (jm, jl, k, c) = (2e-4f64, 1e-3f64, 1.0f64, 2e-3f64);
    #[rustfmt::skip]
    let exact = DMatrix::from_row_slice(4, 4, &[
        0.0, 0.0, 1.0 / jm, 0.0,
        0.0, 0.0, 0.0, 1.0 / jl,
        -k, k, -c / jm, c / jl,
        k, -k, c / jm, -(c + b) / jl,
    ]);
    let mut exact_modes: Vec<(f64, f64)> = exact
        .complex_eigenvalues()
        .iter()
        .map(|z| (z.re, z.im))
        .filter(|(r, i)| r.hypot(*i) > 1e-3 && *i > -1e-6)
        .collect();
    exact_modes.sort_by(|a, b| a.0.hypot(a.1).total_cmp(&b.0.hypot(b.1)));
    let blob = BlobModel::from_bytes(&bytes).unwrap();
    let report = check_port(&runtime, &blob, &ds).unwrap();
    println!("modes at rest: {:?}; exact {exact_modes:?}", report.modes);
    assert_eq!(report.modes.len(), exact_modes.len());
    // Seeds 0..3, shaft mode: frequency off by 0.38 %, 0.48 %, 0.49 %,
    // 0.55 %; damping ratio by 0.33 %, 0.24 %, 0.34 %, 0.17 %.
    for (mode, (er, ei)) in report.modes.iter().zip(&exact_modes) {
        let w = er.hypot(*ei);
        assert!(
            (mode.natural_hz * 2.0 * std::f64::consts::PI - w).abs() / w < 0.01,
            "{mode:?}"
        );
        let zeta = -er / w;
        assert!(
            (mode.damping_ratio - zeta).abs() / zeta < 0.01,
            "{mode:?} vs {zeta}"
        );
    }

    // The runtime's field equals the trainer's prediction (physical units).
    let worst = field_difference(&model, &runtime, 0.04, 5);
    assert!(
        worst < 1e-4,
        "runtime field differs from the trainer's by {worst}"
    );

    // With u = 0 the discrete energy never rises.
    let (mut rises, mut stepped) = (0, 0);
    for s in sample_states(&model.norm.offset, &model.norm.scale, 2.0, 20_000, 9) {
        let mut st = State::new(&s[..2], &s[2..]).unwrap();
        let e0 = runtime.energy(&st).unwrap();
        if runtime.step_driven(&mut st, &[0.0]).is_err() {
            continue;
        }
        stepped += 1;
        if runtime.energy(&st).unwrap() > e0 {
            rises += 1;
        }
    }
    println!("{stepped} unforced steps, {rises} energy rises");
    // Seeds 0 and 2: no rise; seeds 1 and 3 (data and fit seeds offset,
    // not what runs here): 1 rise in 20,000 each, which fails this
    // assertion. Not investigated yet (rounding of the f32 energy near a
    // vanishing step is a candidate); kept as it is, not loosened.
    assert!(stepped > 19_000);
    assert_eq!(rises, 0);
}

#[test]
#[cfg_attr(
    debug_assertions,
    ignore = "trains for about 5 s in release but minutes in debug; run with --release"
)]
fn crane_under_a_trolley_settles_at_the_effective_gravity_angle() {
    let (m, l, g) = (2.0f64, 1.0f64, 9.81f64); // the scenario's defaults
    let ds = simulate("crane-trolley", &[], 30, 12.0, 50.0, 3);
    assert!(ds.driven());
    let terms = PortArch {
        dissipation: true,
        input_hidden: vec![8],
        ..PortArch::default()
    };
    let model = fit_terms(&ds, &[32, 32], 200, &terms);
    let dt = 0.02f32;
    let bytes = export(&model, dt);
    // f32 weights aligned: version 6 (the port networks alone need 3).
    assert_eq!(
        u16::from_le_bytes([bytes[4], bytes[5]]),
        visviva_runtime::format::ALIGNED_VERSION
    );
    let runtime = HostModel::from_bytes(&bytes).unwrap();

    // Constant trolley accelerations, from rest at q = 0; 80 s is about
    // 12 decay time constants 1 / (zeta w) of the simulated rope damping.
    let steps = 4000;
    let mut worst = 0.0f64;
    for a in [0.1 * g, 0.3 * g, 0.5 * g] {
        let u = vec![vec![a as f32]; steps];
        let out = roll_driven(&runtime, &[0.0, 0.0], steps, &u).unwrap();
        assert!(out.failure.is_none(), "{:?}", out.failure);
        // Mean over the last 2 s (one swing period is 2.0 s).
        let tail = &out.states[steps - 100..];
        let q = tail.iter().map(|s| s[0] as f64).sum::<f64>() / tail.len() as f64;
        let expected = -(a / g).atan();
        let rel = (q - expected).abs() / expected.abs();
        worst = worst.max(rel);
        println!(
            "a = {a:.3} m/s^2: settles at {:.3} deg vs -atan(a/g) = {:.3} deg ({:.3} %); -asin(a/g) would be {:.3} deg",
            q.to_degrees(),
            expected.to_degrees(),
            rel * 100.0,
            -(a / g).asin().to_degrees()
        );
    }
    // Seeds 0..3: worst 0.56 %, 0.22 %, 0.55 %, 0.71 % (README: 1 %).
    assert!(
        worst < 0.01,
        "equilibrium angle off by {:.2} %",
        worst * 100.0
    );

    // G(q) through the runtime: dp/dt(u = 1) - dp/dt(u = 0) at p = 0
    // against -m l cos q, over the angles the data covers well.
    let mut worst_g = 0.0f64;
    for k in 0..=40 {
        let q = (-40.0 + 2.0 * k as f64).to_radians();
        let st = State::new(&[q as f32], &[0.0]).unwrap();
        let (mut dq, mut dp1, mut dp0) = (
            [0.0f32; HOST_MAX_DOF],
            [0.0f32; HOST_MAX_DOF],
            [0.0f32; HOST_MAX_DOF],
        );
        runtime
            .vector_field_driven(&st, &[1.0], &mut dq, &mut dp1)
            .unwrap();
        runtime
            .vector_field_driven(&st, &[0.0], &mut dq, &mut dp0)
            .unwrap();
        let learned = (dp1[0] - dp0[0]) as f64;
        let exact = -m * l * q.cos();
        worst_g = worst_g.max((learned - exact).abs() / (m * l));
    }
    println!(
        "learned G(q) vs -m l cos q over +-40 deg: worst error {:.3} % of m l",
        worst_g * 100.0
    );
    // Seeds 0..3: 0.70 %, 1.96 %, 0.72 %, 0.99 % (README: 2 %, one run
    // 0.70 %); not tighter: seed 1 sits near the limit.
    assert!(
        worst_g < 0.02,
        "G(q) off by {:.2} % of m l",
        worst_g * 100.0
    );

    // The runtime's field equals the trainer's prediction with the input
    // network too.
    let worst_field = field_difference(&model, &runtime, 5.0, 8);
    assert!(worst_field < 1e-4);
}

#[test]
#[cfg_attr(
    debug_assertions,
    ignore = "trains for about 5 s in release but minutes in debug; run with --release"
)]
fn squeeze_film_damping_is_learned_as_a_function_of_the_gap() {
    // The scenario's defaults.
    let (m, k, gap, zeta0) = (0.05f64, 20.0f64, 0.002f64, 0.05f64);
    let c0 = 2.0 * zeta0 * (k * m).sqrt();
    let law = |q: f64| c0 * (gap / (gap - q)).powi(3);
    let ds = simulate("flexure-squeeze", &[], 30, 3.0, 100.0, 7);
    assert!(!ds.driven());
    let terms = PortArch {
        dissipation: true,
        dissipation_hidden: vec![16],
        ..PortArch::default()
    };
    let model = fit_terms(&ds, &[32, 32], 600, &terms);
    let bytes = export(&model, 0.002);
    // f32 weights aligned: version 6 (the port networks alone need 3).
    assert_eq!(
        u16::from_le_bytes([bytes[4], bytes[5]]),
        visviva_runtime::format::ALIGNED_VERSION
    );
    let runtime = HostModel::from_bytes(&bytes).unwrap();
    // R_pp(q) through the runtime: dp/dt = -dH/dq - R_pp dH/dp, where the
    // logs see the mass move fast: swinging with amplitudes of up to
    // 1.2 mm, it passes +-0.6 mm at most of its peak speed, while near the
    // turning points v = 0 and the damping force c v, hence c, is
    // unobservable.
    let mut worst = 0.0f64;
    let (lo, hi) = (-0.6e-3, 0.6e-3);
    for i in 0..=20 {
        let q = lo + (hi - lo) * i as f64 / 20.0;
        let st = State::new(&[q as f32], &[0.005]).unwrap();
        let (mut gq, mut gp) = ([0.0f32; HOST_MAX_DOF], [0.0f32; HOST_MAX_DOF]);
        runtime.gradient(&st, &mut gq, &mut gp).unwrap();
        let (mut dq, mut dp) = ([0.0f32; HOST_MAX_DOF], [0.0f32; HOST_MAX_DOF]);
        runtime.vector_field(&st, &mut dq, &mut dp).unwrap();
        let learned = -(dp[0] as f64 + gq[0] as f64) / gp[0] as f64;
        let rel = (learned - law(q)).abs() / law(q);
        worst = worst.max(rel);
        if i % 5 == 0 {
            println!(
                "q = {:+.2} mm: learned c {learned:.5} N s/m, law {:.5} ({:.2} %)",
                q * 1e3,
                law(q),
                rel * 100.0
            );
        }
    }
    println!(
        "squeeze film: worst {:.2} % over q in [-0.6, 0.6] mm (c from {:.4} to {:.4} N s/m)",
        worst * 100.0,
        law(lo),
        law(hi)
    );
    // Seeds 0..3: 3.63 %, 4.15 %, 3.81 %, 4.32 % (README: 5 %).
    assert!(worst < 0.05, "learned c(q) off by {:.2} %", worst * 100.0);
}
