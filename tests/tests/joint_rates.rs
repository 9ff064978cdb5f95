//! Joint-rate logs without masses: a double pendulum (point masses m1, m2
//! on links l1, l2, absolute angles from the downward vertical) logged as
//! angles and joint rates only, `t, traj, q1, q2, v1, v2`, as a rig with
//! encoders and gyros writes it. The trainer learns M(q) from the rates
//! alone ([`visviva_trainer::learn::inertia`]); with the one stated figure
//! the normalization allows (the mean of M11 = (m1 + m2) l1^2, constant for
//! this linkage), its M(q) matches the closed form
//! [[(m1 + m2) l1^2, m2 l1 l2 cos(q1 - q2)], [m2 l1 l2 cos(q1 - q2), m2 l2^2]]
//! (Landau & Lifshitz, Mechanics, 3rd ed., section 5, problem 1; from
//! memory) within 2 % at every position of a held-out log.
//!
//! And the whole path with default settings on such a log (the structure
//! chosen automatically, the momenta from the learned M(q), normalized):
//! the energy model's median state error on held-out runs of 25 s is below
//! the plain baseline's at 1 s, 5 s and 20 s.

use std::fmt::Write as _;
use std::path::Path;

use visviva_trainer::data::columns::load_any;
use visviva_trainer::data::dataset::Dataset;
use visviva_trainer::data::log::LoadOptions;
use visviva_trainer::evidence::report::Evidence;
use visviva_trainer::learn::fit::ArchChoice;
use visviva_trainer::learn::inertia::{fit_inertia, InertiaSettings};
use visviva_trainer::project::pipeline;
use visviva_trainer::reference::linkage::{DoublePendulum, DOUBLE_PENDULUM_PARAMS};
use visviva_trainer::reference::params::ParamValues;
use visviva_trainer::reference::simulate::{simulate, SimulationSpec};

fn system() -> DoublePendulum {
    DoublePendulum::from_params(
        ParamValues::new("double-pendulum", DOUBLE_PENDULUM_PARAMS, &[]).unwrap(),
    )
}

/// Simulated trajectories written as angles and joint rates (v = M^-1 p
/// by the closed form), and read back as a user's log would be.
fn rates_log_spec(sys: &DoublePendulum, spec: &SimulationSpec, path: &Path) -> Dataset {
    let sim = simulate(sys, spec).unwrap();
    let mut csv = String::from("t,traj,q1,q2,v1,v2\n");
    for (k, t) in sim.trajectories.iter().enumerate() {
        for (time, row) in t.t.iter().zip(t.x.rows()) {
            let m = sys.mass_matrix(&[row[0], row[1]]);
            let det = m[0][0] * m[1][1] - m[0][1] * m[1][0];
            let v1 = (m[1][1] * row[2] - m[0][1] * row[3]) / det;
            let v2 = (-m[1][0] * row[2] + m[0][0] * row[3]) / det;
            writeln!(csv, "{time},{k},{},{},{v1},{v2}", row[0], row[1]).unwrap();
        }
    }
    std::fs::write(path, csv).unwrap();
    let (ds, rig) = load_any(path, None, &LoadOptions::default()).unwrap();
    assert!(
        rig.expect("read through the rates layout")
            .rates_without_masses
    );
    ds
}

/// [`rates_log_spec`] of runs of 4 s at 25 Hz.
fn rates_log(sys: &DoublePendulum, trajectories: usize, seed: u64, path: &Path) -> Dataset {
    let spec = SimulationSpec {
        trajectories,
        duration: 4.0,
        rate: 25.0,
        seed,
    };
    rates_log_spec(sys, &spec, path)
}

#[test]
fn mass_matrix_learned_from_joint_rates_matches_the_double_pendulum() {
    let sys = system();
    let dir = tempfile::tempdir().unwrap();
    let train = rates_log(&sys, 40, 31, &dir.path().join("train.csv"));
    let val = rates_log(&sys, 8, 32, &dir.path().join("val.csv"));
    let m11 = 1.5 * 0.6 * 0.6; // (m1 + m2) l1^2 with the defaults 1, 0.5 kg, 0.6 m
    let settings = InertiaSettings {
        arch: ArchChoice {
            hidden: vec![64, 64],
            ..ArchChoice::default()
        },
        epochs: 300,
        batch: visviva_trainer::learn::inertia::BATCH,
        lr: 3e-3,
        seed: 0,
        reference_inertia: Some(m11),
    };
    let model = fit_inertia(&train, Some(&val), &settings).unwrap();
    for line in model.summary.lines() {
        println!("{line}");
    }
    let mut worst = 0.0f64;
    let mut count = 0;
    for t in &val.trajectories {
        let q = t.x.slice(ndarray::s![.., ..2]).to_owned();
        for (row, got) in q.rows().into_iter().zip(model.mass_matrices(&q)) {
            let exact = sys.mass_matrix(&[row[0], row[1]]);
            let (mut diff, mut norm) = (0.0f64, 0.0f64);
            for i in 0..2 {
                for j in 0..2 {
                    diff += (got[[i, j]] - exact[i][j]).powi(2);
                    norm += exact[i][j].powi(2);
                }
            }
            worst = worst.max((diff / norm).sqrt());
            count += 1;
        }
    }
    println!("M(q) from rates: worst relative (Frobenius) error {worst:.3e} over {count} held-out positions (bound 2e-2)");
    assert!(worst <= 0.02, "M(q) off by {:.2} %", 100.0 * worst);
}

/// A project that states nothing but its logs: angles and rates logged at
/// 100 Hz,
/// 20 runs of 4 s, checked on 3 held-out runs of 25 s.
fn default_project(dir: &Path) {
    let sys = system();
    let spec = |trajectories, duration, seed| SimulationSpec {
        trajectories,
        duration,
        rate: 100.0,
        seed,
    };
    let _ = rates_log_spec(&sys, &spec(20, 4.0, 41), &dir.join("train.csv"));
    let _ = rates_log_spec(&sys, &spec(3, 25.0, 42), &dir.join("val.csv"));
    std::fs::write(
        dir.join("visviva.toml"),
        "[data]\ntrain = \"train.csv\"\nvalidation = \"val.csv\"\n",
    )
    .unwrap();
}

#[test]
fn default_settings_on_angles_and_rates_beat_the_baseline_at_1_5_and_20_s() {
    let dir = tempfile::tempdir().unwrap();
    default_project(dir.path());
    let prep = pipeline::prepare(dir.path()).unwrap();
    let summary = prep
        .logs
        .inertia
        .as_ref()
        .expect("momenta learned from the rates");
    for line in summary.lines() {
        println!("{line}");
    }
    if let Some(s) = &prep.selection {
        for c in &s.candidates {
            println!("{}", c.line(s.basis));
        }
        println!("structure chosen: {}", s.chosen);
        assert_eq!(
            s.chosen, "mechanical",
            "a linkage needs the mechanical structure"
        );
    }
    let fit = pipeline::fit(&prep, true, true).unwrap();
    let checked = pipeline::check(&prep, &fit).unwrap();
    let Evidence::Check(report) = &checked.evidence else {
        panic!("a conservative log gives the conservative check");
    };
    for h in &report.horizons {
        println!(
            "{} s: model {:?}, baseline {:?} over {} held-out runs",
            h.seconds, h.median_model, h.median_baseline, h.reached
        );
    }
    for want in [1.0, 5.0, 20.0] {
        let h = report.horizons.iter().find(|h| h.seconds == want).unwrap();
        assert_eq!(h.reached, 3, "{want} s");
        let (m, b) = (h.median_model.unwrap(), h.median_baseline.unwrap());
        assert!(
            m < b,
            "{want} s: model {m:.3e} does not beat the baseline {b:.3e}"
        );
    }
}
