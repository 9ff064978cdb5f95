//! `visviva fit` from the library entry point: a small mass-spring log (exact
//! textbook solution q = A cos t, p = -A sin t) is fitted and the blob parses
//! in visviva-runtime; ReLU, impossible integrator choices and broken logs are
//! refused without leaving an output file.

use clap::Parser;
use ndarray::Array2;
use visviva_runtime::{Hamiltonian, Model};
use visviva_trainer::cli::fit;
use visviva_trainer::data::dataset::{Dataset, DerivativeSource, Trajectory};

#[derive(Parser)]
struct Cli {
    #[command(flatten)]
    args: fit::Args,
}

fn run(args: &[&str]) -> anyhow::Result<()> {
    let mut all = vec!["visviva-fit"];
    all.extend_from_slice(args);
    fit::run(Cli::try_parse_from(all)?.args)
}

fn write_log(path: &std::path::Path) {
    let mut trajectories = Vec::new();
    for k in 0..5 {
        let amp = 0.5 + 0.1 * k as f64;
        let t: Vec<f64> = (0..60).map(|i| i as f64 * 0.1).collect();
        let x = Array2::from_shape_fn((60, 2), |(i, c)| {
            if c == 0 {
                amp * t[i].cos()
            } else {
                -amp * t[i].sin()
            }
        });
        let dx = Array2::from_shape_fn(
            (60, 2),
            |(i, c)| if c == 0 { x[[i, 1]] } else { -x[[i, 0]] },
        );
        trajectories.push(Trajectory {
            id: format!("{k}"),
            t,
            x,
            dx,
            u: Array2::zeros((60, 0)),
        });
    }
    let ds = Dataset {
        dof: 1,
        inputs: 0,
        trajectories,
        derivatives: DerivativeSource::Given,
    };
    visviva_trainer::data::log::write_csv(path, &ds, true).unwrap();
}

#[test]
fn fit_writes_a_parsable_blob_and_refuses_bad_requests() {
    let dir = tempfile::tempdir().unwrap();
    let log = dir.path().join("flexure.csv");
    write_log(&log);
    let out = dir.path().join("m.vvb");
    let (log_s, out_s) = (log.to_str().unwrap(), out.to_str().unwrap());

    run(&[
        "--data",
        log_s,
        "--out",
        out_s,
        "--arch",
        "separable",
        "--epochs",
        "5",
        "--hidden",
        "16,16",
        "--quiet",
        "--baseline",
    ])
    .unwrap();
    let bytes = std::fs::read(&out).unwrap();
    let model = Model::<8, 128>::from_bytes(&bytes).unwrap();
    assert!(model.is_separable());
    assert!(fit::baseline_path(&out).exists());

    let relu = dir.path().join("relu.vvb");
    let err = run(&[
        "--data",
        log_s,
        "--out",
        relu.to_str().unwrap(),
        "--activation",
        "relu",
    ])
    .unwrap_err()
    .to_string();
    assert!(err.contains("piecewise"), "{err}");
    assert!(!relu.exists());

    let gen = dir.path().join("gen.vvb");
    let err = run(&[
        "--data",
        log_s,
        "--out",
        gen.to_str().unwrap(),
        "--arch",
        "general",
        "--integrator",
        "verlet",
    ])
    .unwrap_err()
    .to_string();
    assert!(err.contains("separable"), "{err}");
    assert!(!gen.exists());

    // A corrupted value: the error names the file and line; no output file.
    let text = std::fs::read_to_string(&log).unwrap();
    let mut lines: Vec<String> = text.lines().map(String::from).collect();
    let mut fields: Vec<&str> = lines[3].split(',').collect();
    fields[2] = "abc";
    lines[3] = fields.join(",");
    let broken = dir.path().join("broken.csv");
    std::fs::write(&broken, lines.join("\n")).unwrap();
    let bad_out = dir.path().join("bad.vvb");
    let err = run(&[
        "--data",
        broken.to_str().unwrap(),
        "--out",
        bad_out.to_str().unwrap(),
    ])
    .unwrap_err()
    .to_string();
    // lines[3] is the file's line 4 (line 1 is the header).
    assert!(err.contains("broken.csv: line 4"), "{err}");
    assert!(!bad_out.exists());
}

/// The blob a fit writes carries its training envelope: the training
/// states' per-coordinate range widened by a tenth of it on each side. The
/// log is q = A cos t, p = -A sin t (A up to 0.9, t over 0..5.9 s, more than
/// half a period), so both ranges are [-0.9, 0.9] to within the sampling
/// (closed form) and the bounds +-1.08; the exact extremes are recomputed
/// here from the same closed form at the logged times. `inspect` prints the
/// bounds, and the observer's flag uses them rather than the settings'.
#[test]
fn a_fitted_blob_carries_its_training_range_widened_by_a_tenth() {
    let dir = tempfile::tempdir().unwrap();
    let log = dir.path().join("flexure.csv");
    write_log(&log);
    let out = dir.path().join("m.vvb");
    let (log_s, out_s) = (log.to_str().unwrap(), out.to_str().unwrap());
    run(&[
        "--data",
        log_s,
        "--out",
        out_s,
        "--arch",
        "separable",
        "--val-fraction",
        "0",
        "--epochs",
        "3",
        "--hidden",
        "8",
        "--quiet",
    ])
    .unwrap();
    let bytes = std::fs::read(&out).unwrap();
    // f32 weights are written aligned (version 6; the envelope needs 4).
    assert_eq!(
        u16::from_le_bytes([bytes[4], bytes[5]]),
        visviva_runtime::format::ALIGNED_VERSION
    );
    let model = Model::<8, 128>::from_bytes(&bytes).unwrap();
    let env = model.envelope().expect("a fitted blob has an envelope");
    let (mut lo, mut hi) = ([f64::INFINITY; 2], [f64::NEG_INFINITY; 2]);
    for k in 0..5 {
        let amp = 0.5 + 0.1 * k as f64;
        for i in 0..60 {
            let t = i as f64 * 0.1;
            for (c, v) in [amp * t.cos(), -amp * t.sin()].into_iter().enumerate() {
                lo[c] = lo[c].min(v);
                hi[c] = hi[c].max(v);
            }
        }
    }
    for c in 0..2 {
        let m = 0.1 * (hi[c] - lo[c]);
        let (l, h) = (env.lower.get(c), env.upper.get(c));
        // The log's CSV text holds the values to its printed precision.
        assert!(((l as f64) - (lo[c] - m)).abs() < 1e-6, "lower {c}: {l}");
        assert!(((h as f64) - (hi[c] + m)).abs() < 1e-6, "upper {c}: {h}");
        assert!(
            (l + 1.08).abs() < 2e-3 && (h - 1.08).abs() < 2e-3,
            "{l} {h}"
        );
    }
    let r = visviva_trainer::deploy::inspect::inspect(&bytes).unwrap();
    let rows = r.envelope.unwrap();
    assert_eq!(rows[0].coordinate, "q1");
    assert_eq!(
        (rows[1].lower, rows[1].upper),
        (env.lower.get(1), env.upper.get(1))
    );

    // The observer's flag: the blob's bounds, not the settings' (which
    // here would flag every state).
    use visviva_trainer::deploy::observe::{EnvelopeSource, ObserverRun};
    use visviva_trainer::deploy::observer_settings::{ObserverSettings, SETTINGS_VERSION};
    let settings = ObserverSettings {
        format_version: SETTINGS_VERSION,
        position_noise: vec![0.01],
        velocity_noise: vec![1.0],
        process_variance: vec![1e-8, 1e-8],
        initial_momentum_std: vec![0.5],
        window: 20,
        settle_updates: 0,
        false_alarm: "1%".into(),
        envelope_low: vec![5.0, 5.0],
        envelope_high: vec![6.0, 6.0],
        energy_threshold: None,
        process_variance_per_energy: None,
        energy_reference: None,
    };
    let host = visviva_trainer::deploy::blob::HostModel::from_bytes(&bytes).unwrap();
    let mut obs = ObserverRun::new(&host, settings.clone()).unwrap();
    assert_eq!(obs.envelope_source(), EnvelopeSource::Blob);
    let row = |q: f64| visviva_trainer::data::measure_log::MeasurementRow {
        line: 2,
        traj: "0".into(),
        t: 0.0,
        q: vec![Some(q)],
        v: vec![],
        u: vec![],
    };
    assert!(!obs.push(&row(0.5)).unwrap().health.out_of_envelope);
    let mut obs = ObserverRun::new(&host, settings.clone()).unwrap();
    assert!(obs.push(&row(1.5)).unwrap().health.out_of_envelope);
    // The same model without the section falls back to the settings.
    let mut plain = visviva_trainer::deploy::blob::BlobModel::from_bytes(&bytes).unwrap();
    plain.envelope = None;
    let plain_bytes = plain.to_bytes().unwrap();
    assert_eq!(
        u16::from_le_bytes([plain_bytes[4], plain_bytes[5]]),
        visviva_runtime::format::ALIGNED_VERSION
    );
    let host = visviva_trainer::deploy::blob::HostModel::from_bytes(&plain_bytes).unwrap();
    let mut obs = ObserverRun::new(&host, settings).unwrap();
    assert_eq!(obs.envelope_source(), EnvelopeSource::Settings);
    assert!(obs.push(&row(0.5)).unwrap().health.out_of_envelope);
}
