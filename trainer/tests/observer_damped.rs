//! The observer on the damped, driven demos (trolley crane, servo
//! drivetrain: committed blobs stepped by the discrete-gradient method),
//! tuned on their training logs with Gaussian noise added to the positions
//! and run on the held-out validation logs fed with noisy positions (and
//! the logged inputs) only. The truth is the logs' own velocity column (the
//! built-in simulators' dq/dt, noise-free). Yardsticks as in
//! `observer_crane.rs`:
//! * central finite differences, whose white-noise error is
//!   sigma / (sqrt(2) T) (textbook numerical differentiation);
//! * the constant-velocity Kalman filter of Bar-Shalom, Li and Kirubarajan,
//!   *Estimation with Applications to Tracking and Navigation*, 2001, its
//!   intensity picked by grid search against the true velocity on the
//!   training trajectories (its best case).

use std::path::PathBuf;

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};
use visviva_runtime::monitor::FalseAlarm;
use visviva_trainer::data::dataset::Dataset;
use visviva_trainer::data::log::{load_csv, LoadOptions};
use visviva_trainer::deploy::blob::HostModel;
use visviva_trainer::deploy::observe::ObserverRun;
use visviva_trainer::deploy::observer_tuning::{position_rows, tune};
use visviva_trainer::evidence::cv_filter::{central_differences, cv_velocities};

/// Samples skipped at the start of every trajectory by every method.
const SKIP: usize = 20;

fn demo(name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("../models-demo")
        .join(name)
}

/// The log with N(0, sigma^2) added to every position.
fn with_noise(clean: &Dataset, sigma: f64, seed: u64) -> Dataset {
    let mut noisy = clean.clone();
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    for t in &mut noisy.trajectories {
        for j in 0..t.t.len() {
            for i in 0..clean.dof {
                let z: f64 = StandardNormal.sample(&mut rng);
                t.x[[j, i]] += sigma * z;
            }
        }
    }
    noisy
}

fn rms(errors: &[f64]) -> f64 {
    (errors.iter().map(|e| e * e).sum::<f64>() / errors.len() as f64).sqrt()
}

/// Errors of `estimate(noisy positions of coordinate i)` against dq_i/dt.
fn errors(
    noisy: &Dataset,
    clean: &Dataset,
    estimate: &mut dyn FnMut(&[f64]) -> Vec<f64>,
) -> Vec<f64> {
    let mut out = Vec::new();
    for (tn, tc) in noisy.trajectories.iter().zip(&clean.trajectories) {
        for i in 0..clean.dof {
            let z: Vec<f64> = tn.x.column(i).to_vec();
            for (j, vj) in estimate(&z).iter().enumerate().skip(SKIP) {
                out.push(vj - tc.dx[[j, i]]);
            }
        }
    }
    out
}

struct Outcome {
    observer: f64,
    fd: f64,
    cv: f64,
    floor: f64,
    nis_high: usize,
    nis_low: usize,
    windows: usize,
}

fn compare(name: &str, blob: &str, sigma: f64, dt: f64) -> Outcome {
    let bytes = std::fs::read(demo(name).join("out").join(blob)).unwrap();
    let model = HostModel::from_bytes(&bytes).unwrap();
    let opts = LoadOptions::default();
    let train = load_csv(&demo(name).join("data/train.csv"), &opts).unwrap();
    let val = load_csv(&demo(name).join("data/val.csv"), &opts).unwrap();
    let (noisy_train, noisy_val) = (with_noise(&train, sigma, 11), with_noise(&val, sigma, 22));
    // Tuned on the training log only: the validation log is held out.
    let tuning = tune(&model, &[&noisy_train], FalseAlarm::OnePercent, 50).unwrap();
    let mut run = ObserverRun::new(&model, tuning.settings.clone()).unwrap();
    let mut obs = Vec::new();
    let (mut nis_high, mut nis_low, mut windows) = (0, 0, 0);
    for (tn, tc) in noisy_val.trajectories.iter().zip(&val.trajectories) {
        for (j, row) in position_rows(tn, val.dof).enumerate() {
            let e = run.push(&row).unwrap();
            windows += usize::from(e.window_full);
            nis_high += usize::from(e.health.nis_high);
            nis_low += usize::from(e.health.nis_low);
            if j >= SKIP {
                for i in 0..val.dof {
                    obs.push(e.v[i] as f64 - tc.dx[[j, i]]);
                }
            }
        }
    }
    let fd = errors(&noisy_val, &val, &mut |z| central_differences(z, dt));
    let r = sigma * sigma;
    let best_s = (-12..=16)
        .map(|e| 10f64.powf(e as f64 / 2.0))
        .min_by(|a, b| {
            let ea = rms(&errors(&noisy_train, &train, &mut |z| {
                cv_velocities(z, dt, r, *a)
            }));
            let eb = rms(&errors(&noisy_train, &train, &mut |z| {
                cv_velocities(z, dt, r, *b)
            }));
            ea.total_cmp(&eb)
        })
        .unwrap();
    let cv = errors(&noisy_val, &val, &mut |z| cv_velocities(z, dt, r, best_s));
    let out = Outcome {
        observer: rms(&obs),
        fd: rms(&fd),
        cv: rms(&cv),
        floor: sigma / (2f64.sqrt() * dt),
        nis_high,
        nis_low,
        windows,
    };
    println!(
        "{name} ({blob}), positions with sigma {sigma:.1e}: velocity RMS error over {} samples: observer {:.3e}, central differences {:.3e} (ratio {:.1}; floor {:.3e}), constant-velocity filter {:.3e} (intensity {best_s:.1e}; ratio {:.2}); NIS windows {} full, {} above, {} below; tuned noise {:?}, scale {}",
        obs.len(),
        out.observer,
        out.fd,
        out.fd / out.observer,
        out.floor,
        out.cv,
        out.cv / out.observer,
        out.windows,
        out.nis_high,
        out.nis_low,
        tuning.settings.position_noise,
        tuning.scale,
    );
    out
}

#[test]
#[cfg_attr(
    debug_assertions,
    ignore = "runs the observer over long logs: seconds in release, minutes in debug; run with --release"
)]
fn observer_on_the_damped_driven_demos() {
    for (name, blob, sigma, dt) in [
        ("trolley-crane", "trolley-f32-dgrad.vvb", 1e-3, 0.02),
        ("servo-drivetrain", "servo-f32-dgrad.vvb", 1e-3, 0.005),
    ] {
        let o = compare(name, blob, sigma, dt);
        // Finite differences sit at their closed-form noise floor.
        assert!(
            (o.fd - o.floor).abs() < 0.1 * o.floor,
            "{name}: FD {} vs floor {}",
            o.fd,
            o.floor
        );
        // Measured: 4.7x (trolley) and 3.2x (servo) below finite
        // differences, 7.4x and 4.4x below the constant-velocity filter. The
        // floor asserted is our own, below both (the crane's issue target
        // of 3x is not claimed for blobs `cargo xtask demos` refits).
        assert!(
            2.0 * o.observer < o.fd,
            "{name}: observer {} vs FD {}",
            o.observer,
            o.fd
        );
        assert!(
            o.observer < o.cv,
            "{name}: observer {} vs CV filter {}",
            o.observer,
            o.cv
        );
        // The NIS monitor ran on full windows (counts reported above).
        assert!(o.windows > 1000 && o.nis_high + o.nis_low < o.windows);
    }
}

/// The trolley crane's noise-free logs: the position noise estimated from
/// them is round-off (about 1e-6 rad), and at the largest process-noise
/// scales the tuning tries, the f32 covariance beside it loses
/// definiteness. The tuning must then search below the largest scale the
/// observer runs with (it once stopped with the observer's error) and still
/// meet its own target: upper flags on at most the upper tail's share of
/// the 1 % rate (0.5 %) of the full windows of the tuning logs.
#[test]
#[cfg_attr(
    debug_assertions,
    ignore = "runs the observer over long logs many times: run with --release"
)]
fn tuning_runs_on_noise_free_logs() {
    let name = "trolley-crane";
    let bytes = std::fs::read(demo(name).join("out/trolley-f32-dgrad.vvb")).unwrap();
    let model = HostModel::from_bytes(&bytes).unwrap();
    let opts = LoadOptions::default();
    let train = load_csv(&demo(name).join("data/train.csv"), &opts).unwrap();
    let val = load_csv(&demo(name).join("data/val.csv"), &opts).unwrap();
    let tuning = tune(&model, &[&train, &val], FalseAlarm::OnePercent, 50).unwrap();
    let s = &tuning.tuning_summary;
    println!(
        "noise-free trolley logs: position noise {:.3e}, scale {:.3e}, {} of {} full windows above, {} below",
        tuning.noise[0], tuning.scale, s.nis_high, s.full_windows, s.nis_low
    );
    assert!(tuning.noise[0] < 1e-5, "the logs are noise-free");
    assert!(s.full_windows > 1000);
    assert!((s.nis_high as f64) <= 0.005 * s.full_windows as f64);
}
