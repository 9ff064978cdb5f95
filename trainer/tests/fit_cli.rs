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
