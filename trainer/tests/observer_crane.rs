//! The observer on the crane demo (its committed blob, tuned from its own
//! training and validation logs), fed with noisy positions only, against
//! two outside yardsticks of velocity from positions:
//! * central finite differences (z[k+1] - z[k-1]) / 2T, whose white-noise
//!   error is sigma / (sqrt(2) T) (textbook numerical differentiation);
//! * the constant-velocity Kalman filter of Bar-Shalom, Li and Kirubarajan,
//!   *Estimation with Applications to Tracking and Navigation*, 2001
//!   (discretized continuous white-noise acceleration model), its
//!   acceleration intensity picked by grid search against the true velocity
//!   on separate trajectories: the baseline gets its best case.
//!
//! The truth comes from the built-in crane simulator (closed-form energy,
//! integrated to 1e-13 relative tolerance), not from the model.

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
use visviva_trainer::reference::build_system;
use visviva_trainer::reference::simulate::{simulate, SimulationSpec};

fn demo() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../models-demo/crane-sway")
}

/// Crane trajectories (default parameters, 20 Hz as the demo logs) with
/// N(0, sigma^2) noise added to the angle only; returns (noisy, clean).
fn noisy_crane(seed: u64, trajectories: usize, sigma: f64) -> (Dataset, Dataset) {
    let crane = build_system("crane", &[]).unwrap();
    let spec = SimulationSpec {
        trajectories,
        duration: 30.0,
        rate: 20.0,
        seed,
    };
    let clean = simulate(crane.as_ref(), &spec).unwrap();
    let mut noisy = clean.clone();
    let mut rng = ChaCha8Rng::seed_from_u64(seed ^ 0x5eed);
    for t in &mut noisy.trajectories {
        for j in 0..t.t.len() {
            let z: f64 = StandardNormal.sample(&mut rng);
            t.x[[j, 0]] += sigma * z;
        }
    }
    (noisy, clean)
}

/// Samples skipped at the start of every trajectory by every method
/// (filters settling): one second.
const SKIP: usize = 20;

fn rms(errors: &[f64]) -> f64 {
    (errors.iter().map(|e| e * e).sum::<f64>() / errors.len() as f64).sqrt()
}

/// Velocity errors of `estimate(noisy positions)` against the true dq/dt.
fn errors(
    noisy: &Dataset,
    clean: &Dataset,
    estimate: &mut dyn FnMut(&[f64]) -> Vec<f64>,
) -> Vec<f64> {
    let mut out = Vec::new();
    for (tn, tc) in noisy.trajectories.iter().zip(&clean.trajectories) {
        let z: Vec<f64> = tn.x.column(0).to_vec();
        let v = estimate(&z);
        for (j, vj) in v.iter().enumerate().skip(SKIP) {
            out.push(vj - tc.dx[[j, 0]]);
        }
    }
    out
}

#[test]
#[cfg_attr(
    debug_assertions,
    ignore = "runs the observer over long logs: seconds in release, minutes in debug; run with --release"
)]
fn observer_velocity_beats_finite_differences_and_the_cv_filter() {
    let bytes = std::fs::read(demo().join("out/model.vvb")).unwrap();
    let model = HostModel::from_bytes(&bytes).unwrap();
    let opts = LoadOptions::default();
    let train = load_csv(&demo().join("data/train.csv"), &opts).unwrap();
    let val = load_csv(&demo().join("data/val.csv"), &opts).unwrap();
    let tuning = tune(&model, &[&train, &val], FalseAlarm::OnePercent, 50).unwrap();
    let sigma = tuning.settings.position_noise[0];
    let dt = 0.05;
    println!(
        "logged noise estimate of q1: {sigma:.3e} rad; process-noise scale {}; residual std {:?}",
        tuning.scale, tuning.residual_std
    );
    let (noisy, clean) = noisy_crane(101, 5, sigma);
    // The observer: positions only, its own tuned settings.
    let mut run = ObserverRun::new(&model, tuning.settings.clone()).unwrap();
    let mut obs = Vec::new();
    for (tn, tc) in noisy.trajectories.iter().zip(&clean.trajectories) {
        for (j, row) in position_rows(tn, 1).enumerate() {
            let e = run.push(&row).unwrap();
            if j >= SKIP {
                obs.push(e.v[0] as f64 - tc.dx[[j, 0]]);
            }
        }
    }
    let fd = errors(&noisy, &clean, &mut |z| central_differences(z, dt));
    // The CV filter's intensity: the best of a grid on other trajectories.
    let (tune_noisy, tune_clean) = noisy_crane(202, 5, sigma);
    let r = sigma * sigma;
    let best_s = (-12..=8)
        .map(|e| 10f64.powf(e as f64 / 2.0))
        .min_by(|a, b| {
            let ea = rms(&errors(&tune_noisy, &tune_clean, &mut |z| {
                cv_velocities(z, dt, r, *a)
            }));
            let eb = rms(&errors(&tune_noisy, &tune_clean, &mut |z| {
                cv_velocities(z, dt, r, *b)
            }));
            ea.total_cmp(&eb)
        })
        .unwrap();
    let cv = errors(&noisy, &clean, &mut |z| cv_velocities(z, dt, r, best_s));
    let (e_obs, e_fd, e_cv) = (rms(&obs), rms(&fd), rms(&cv));
    println!(
        "crane, noisy angle only (sigma {sigma:.3e} rad), velocity RMS error over {} samples: observer {e_obs:.3e} rad/s, central differences {e_fd:.3e} (ratio {:.1}), constant-velocity Kalman filter {e_cv:.3e} (intensity {best_s:.1e}; ratio {:.2})",
        obs.len(),
        e_fd / e_obs,
        e_cv / e_obs
    );
    // Finite differences' noise floor sigma / (sqrt(2) T) is a closed form:
    // the measured error must sit at it (within 10 %, truncation is small).
    let floor = sigma / (2f64.sqrt() * dt);
    assert!(
        (e_fd - floor).abs() < 0.1 * floor,
        "FD error {e_fd} vs floor {floor}"
    );
    // The targets: at least 3x better than finite differences and
    // better than the textbook constant-velocity filter.
    assert!(
        3.0 * e_obs <= e_fd,
        "observer {e_obs} vs finite differences {e_fd}"
    );
    assert!(e_obs < e_cv, "observer {e_obs} vs CV filter {e_cv}");
}

#[test]
#[cfg_attr(
    debug_assertions,
    ignore = "runs the observer over long logs: seconds in release, minutes in debug; run with --release"
)]
fn run_report_section_compares_the_observer_on_the_validation_log() {
    use visviva_trainer::evidence::observer_check::observer_report;
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("model.vvb");
    std::fs::copy(demo().join("out/model.vvb"), &path).unwrap();
    let bytes = std::fs::read(&path).unwrap();
    let model = HostModel::from_bytes(&bytes).unwrap();
    let opts = LoadOptions::default();
    let train = load_csv(&demo().join("data/train.csv"), &opts).unwrap();
    let val = load_csv(&demo().join("data/val.csv"), &opts).unwrap();
    let r = observer_report(&model, &path, &train, &val, 50, "1%").unwrap();
    println!(
        "{:?}",
        visviva_trainer::evidence::observer_check::ObserverReport {
            traces: None,
            ..r.clone()
        }
    );
    assert!(dir.path().join("model.observer.toml").exists());
    // The demo log already carries the tuned noise: nothing is added.
    assert_eq!(r.added_noise, vec![0.0]);
    // Against the log's own (Savitzky-Golay) velocity the observer must
    // still beat central finite differences of the same positions.
    assert!(r.velocity_rmse_observer[0] < r.velocity_rmse_finite_differences[0]);
    // The charts' series: the first validation trajectory after the
    // settling samples, the three estimators' errors sample by sample, and
    // the NIS window sums with bounds at 50 measurements per window, the
    // chi-square quantiles 27.99 and 79.49 (0.5 % and 99.5 %, 50 degrees
    // of freedom; tabulated values, from memory) within 0.5 %.
    let t = r.traces.as_ref().unwrap();
    assert_eq!(t.trajectory, val.trajectories[0].id);
    let samples = val.trajectories[0].t.len() - 20;
    assert_eq!(t.t.len(), samples);
    assert!(t.velocity_error.iter().all(|e| e.len() == samples));
    assert_eq!(t.nis.len(), val.trajectories[0].t.len() - 20 - 50 + 1);
    for &(_, sum, low, high) in &t.nis {
        assert!(sum.is_finite() && sum >= 0.0);
        assert!((low - 27.99).abs() < 0.005 * 27.99, "lower bound {low}");
        assert!((high - 79.49).abs() < 0.005 * 79.49, "upper bound {high}");
    }
    let units =
        visviva_trainer::evidence::units::Units::resolve(None, Some("crane"), 1, 0).unwrap();
    let charts = visviva_trainer::evidence::observer_check::observer_charts(
        &r,
        t,
        "energy model (test)",
        &units,
    );
    assert_eq!(charts.len(), 2);
    for c in &charts {
        assert!(c.title.contains("energy model (test)"), "{}", c.title);
        assert!(c.to_svg().contains("<path"), "{}: no line drawn", c.title);
    }
    assert!(charts[0].y_label.contains("rad/s"), "{}", charts[0].y_label);
}
