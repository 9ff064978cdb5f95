//! Log loading: every kind of bad input yields an error naming the file, the
//! 1-based line (header = 1) and the column; velocity logs convert with
//! p = m v; splitting keeps trajectories whole.

use ndarray::Array2;
use proptest::prelude::*;
use std::path::PathBuf;
use visviva_trainer::data::dataset::{Dataset, DerivativeSource, Trajectory};
use visviva_trainer::data::log::{
    load_csv, split_by_trajectory, split_owned, write_csv, DataProblem, LoadOptions,
};

fn fixture(name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("tests")
        .join("fixtures")
        .join(name)
}

/// Load a fixture that must fail; check the message names file, line and
/// column, and return the problem.
fn load_err(name: &str, opts: &LoadOptions, line: u64, column: Option<&str>) -> DataProblem {
    let err = load_csv(&fixture(name), opts).expect_err(name);
    let text = err.to_string();
    assert!(text.contains(name), "file missing from: {text}");
    assert!(
        text.contains(&format!(": line {line}")),
        "line {line} missing from: {text}"
    );
    assert_eq!(err.line, line, "{text}");
    if let Some(c) = column {
        assert!(
            text.contains(&format!("column '{c}'")),
            "column {c} missing from: {text}"
        );
    }
    assert_eq!(err.column.as_deref(), column, "{text}");
    err.problem
}

#[test]
fn missing_column() {
    let p = load_err("missing_t.csv", &LoadOptions::default(), 1, Some("t"));
    assert_eq!(p, DataProblem::MissingColumn);
}

#[test]
fn partial_derivative_columns() {
    let p = load_err("missing_dp.csv", &LoadOptions::default(), 1, Some("dp1"));
    assert_eq!(p, DataProblem::MissingColumn);
}

#[test]
fn not_numeric() {
    let p = load_err("not_numeric.csv", &LoadOptions::default(), 3, Some("p1"));
    assert_eq!(p, DataProblem::NotNumeric("abc".into()));
}

#[test]
fn non_finite() {
    let p = load_err("non_finite.csv", &LoadOptions::default(), 4, Some("dq1"));
    assert_eq!(p, DataProblem::NonFinite("NaN".into()));
}

#[test]
fn time_not_increasing() {
    let p = load_err(
        "time_not_increasing.csv",
        &LoadOptions::default(),
        4,
        Some("t"),
    );
    assert!(matches!(p, DataProblem::TimeNotIncreasing { .. }), "{p:?}");
}

#[test]
fn uneven_sampling() {
    // Steps 0.1, 0.1, 0.15, 0.05, 0.1: median 0.1; the 0.15 step ends on
    // line 5.
    let p = load_err("uneven_sampling.csv", &LoadOptions::default(), 5, Some("t"));
    match p {
        DataProblem::UnevenSampling { step, median, .. } => {
            assert!((step - 0.15).abs() < 1e-12 && (median - 0.1).abs() < 1e-12);
        }
        other => panic!("{other:?}"),
    }
}

#[test]
fn too_short_to_differentiate() {
    // Trajectory 'a' has 12 samples (enough for the 11-sample window);
    // 'b' starts on line 14 with 5.
    let p = load_err("too_short.csv", &LoadOptions::default(), 14, Some("t"));
    assert_eq!(
        p,
        DataProblem::TooShort {
            traj: "b".into(),
            samples: 5,
            needed: 11
        }
    );
}

#[test]
fn mismatched_dimensions() {
    let p = load_err(
        "mismatched_dimensions.csv",
        &LoadOptions::default(),
        1,
        Some("p2"),
    );
    assert!(matches!(p, DataProblem::MismatchedDimensions(_)), "{p:?}");
}

#[test]
fn gap_in_column_numbering() {
    let p = load_err(
        "gap_in_numbering.csv",
        &LoadOptions::default(),
        1,
        Some("q3"),
    );
    assert!(matches!(p, DataProblem::MismatchedDimensions(_)), "{p:?}");
}

#[test]
fn empty_file() {
    // An empty file has no column to name: file and line only.
    let p = load_err("empty.csv", &LoadOptions::default(), 1, None);
    assert_eq!(p, DataProblem::Empty);
    let p = load_err("header_only.csv", &LoadOptions::default(), 2, None);
    assert_eq!(p, DataProblem::Empty);
}

#[test]
fn trajectory_not_contiguous() {
    let p = load_err(
        "traj_reappears.csv",
        &LoadOptions::default(),
        5,
        Some("traj"),
    );
    assert_eq!(
        p,
        DataProblem::TrajectoryNotContiguous {
            traj: "a".into(),
            first_line: 2
        }
    );
}

#[test]
fn ragged_row() {
    // A row with too few fields: the CSV layer's error, located by line.
    let p = load_err("ragged.csv", &LoadOptions::default(), 3, None);
    assert!(matches!(p, DataProblem::Malformed(_)), "{p:?}");
}

#[test]
fn velocities_need_masses() {
    let p = load_err("velocities.csv", &LoadOptions::default(), 1, Some("v1"));
    assert_eq!(p, DataProblem::MissingMasses);
    let opts = LoadOptions {
        masses: Some(vec![2.0]),
        ..LoadOptions::default()
    };
    let p = load_err("velocities.csv", &opts, 1, Some("v1"));
    assert!(matches!(p, DataProblem::BadMasses(_)), "{p:?}");
}

#[test]
fn velocities_convert_to_momenta() {
    // Definition of momentum for a point mass: p = m v, and dp/dt = m dv/dt.
    let opts = LoadOptions {
        masses: Some(vec![2.0, 3.0]),
        ..LoadOptions::default()
    };
    let ds = load_csv(&fixture("velocities.csv"), &opts).unwrap();
    assert_eq!(ds.dof, 2);
    assert_eq!(ds.derivatives, DerivativeSource::Given);
    let traj = &ds.trajectories[0];
    assert_eq!(traj.id, "x");
    assert_eq!(
        traj.x.row(0).to_vec(),
        vec![0.1, 0.2, 2.0 * 1.5, 3.0 * -2.0]
    );
    assert_eq!(
        traj.x.row(1).to_vec(),
        vec![0.115, 0.18, 2.0 * 1.46, 3.0 * -1.92]
    );
    assert_eq!(
        traj.dx.row(0).to_vec(),
        vec![1.5, -2.0, 2.0 * -4.0, 3.0 * 8.0]
    );
    assert_eq!(
        traj.dx.row(1).to_vec(),
        vec![1.46, -1.92, 2.0 * -4.1, 3.0 * 7.9]
    );
}

#[test]
fn derivatives_are_estimated_when_absent() {
    // Closed form: q = A cos(w t), p = -m w A sin(w t) (harmonic oscillator),
    // 100 samples per period; the estimated derivatives must match
    // dq/dt = -w A sin(w t), dp/dt = -m w^2 A cos(w t) to 4e-3 of their
    // amplitudes (the bound the derivative module's tests establish for the
    // end samples; interior samples to 1e-4).
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("log.csv");
    let (a, m, w) = (0.01f64, 0.5f64, 2.0 * std::f64::consts::PI);
    let mut text = String::from("traj,t,q1,p1\n");
    for i in 0..150 {
        let t = i as f64 * 0.01;
        let q = a * (w * t).cos();
        let p = -m * w * a * (w * t).sin();
        text.push_str(&format!("run1,{t},{q},{p}\n"));
    }
    std::fs::write(&path, text).unwrap();
    let ds = load_csv(&path, &LoadOptions::default()).unwrap();
    assert_eq!(ds.derivatives, DerivativeSource::Estimated);
    let traj = &ds.trajectories[0];
    for (i, t) in traj.t.iter().enumerate() {
        let dq = -w * a * (w * t).sin();
        let dp = -m * w * w * a * (w * t).cos();
        let bound = if (5..145).contains(&i) { 1e-4 } else { 4e-3 };
        assert!((traj.dx[[i, 0]] - dq).abs() < bound * w * a, "t={t}");
        assert!(
            (traj.dx[[i, 1]] - dp).abs() < bound * m * w * w * a,
            "t={t}"
        );
    }
}

#[test]
fn write_then_load_round_trips() {
    let ds = dataset_with(3, 12);
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("rt.csv");
    write_csv(&path, &ds, true).unwrap();
    assert_eq!(load_csv(&path, &LoadOptions::default()).unwrap(), ds);
}

/// `count` trajectories of `samples` evenly spaced samples, 1 dof.
fn dataset_with(count: usize, samples: usize) -> Dataset {
    let trajectories = (0..count)
        .map(|k| Trajectory {
            id: format!("r{k}"),
            t: (0..samples).map(|i| i as f64 * 0.5).collect(),
            x: Array2::from_shape_fn((samples, 2), |(i, c)| (k * 100 + i * 2 + c) as f64),
            dx: Array2::from_shape_fn((samples, 2), |(i, c)| -((k * 100 + i * 2 + c) as f64)),
            u: Array2::zeros((samples, 0)),
        })
        .collect();
    Dataset {
        dof: 1,
        inputs: 0,
        trajectories,
        derivatives: DerivativeSource::Given,
    }
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(200))]

    #[test]
    fn split_keeps_trajectories_whole(count in 0usize..25, fraction in 0.0f64..1.0, seed in any::<u64>()) {
        let ds = dataset_with(count, 3);
        let (train, val) = split_by_trajectory(&ds, fraction, seed);
        // Every trajectory lands on exactly one side, whole and unchanged.
        prop_assert_eq!(train.trajectories.len() + val.trajectories.len(), count);
        for traj in &ds.trajectories {
            let in_train = train.trajectories.iter().filter(|t| *t == traj).count();
            let in_val = val.trajectories.iter().filter(|t| *t == traj).count();
            prop_assert_eq!(in_train + in_val, 1);
        }
        if count >= 2 {
            prop_assert!(!train.trajectories.is_empty() && !val.trajectories.is_empty());
            let expected = ((fraction * count as f64).round() as usize).clamp(1, count - 1);
            prop_assert_eq!(val.trajectories.len(), expected);
        } else {
            prop_assert!(val.trajectories.is_empty());
        }
        prop_assert_eq!(train.dof, ds.dof);
        prop_assert_eq!(val.derivatives, ds.derivatives);
        // Same seed, same split; the owning split moves the same
        // trajectories to the same sides.
        prop_assert_eq!(split_owned(ds.clone(), fraction, seed), (train.clone(), val.clone()));
        prop_assert_eq!(split_by_trajectory(&ds, fraction, seed), (train, val));
    }
}
