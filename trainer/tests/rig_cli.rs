//! The README's "Bring your own rig" example end to end: a pendulum logged
//! as a logger writes it (run id, milliseconds, 4096-count encoder, one
//! dropped sample), mapped by exactly the README's `[columns]` table, fitted
//! by `visviva fit --columns` (trajectory matching, the default for a
//! positions-only log) and read by a `visviva run` project; bad requests
//! refused with the setting, file, line and column.

use std::io::Write;

use clap::Parser;
use visviva_runtime::{Hamiltonian, Model};
use visviva_trainer::cli::fit;
use visviva_trainer::reference::build_system;
use visviva_trainer::reference::simulate::{simulate, SimulationSpec};

/// The README's mapping, verbatim.
const README_COLUMNS: &str = r#"[columns]
t = { column = "stamp_ms", scale = 0.001, unit = "s" }   # ms -> s
traj = "run"                                              # optional
q = [{ column = "enc_counts", counts_per_rev = 4096 }]    # counts -> rad
"#;

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

/// A small pendulum log in the logger's format, row 30 of run 0 dropped.
fn write_rig_log(path: &std::path::Path) {
    let params = [("m".to_string(), 1.0), ("l".to_string(), 1.0)];
    let system = build_system("crane", &params).unwrap();
    let spec = SimulationSpec {
        trajectories: 5,
        duration: 1.5,
        rate: 100.0,
        seed: 4,
    };
    let ds = simulate(system.as_ref(), &spec).unwrap();
    let mut f = std::fs::File::create(path).unwrap();
    writeln!(f, "run,stamp_ms,enc_counts").unwrap();
    let per_rad = 4096.0 / std::f64::consts::TAU;
    for (r, t) in ds.trajectories.iter().enumerate() {
        for (k, time) in t.t.iter().enumerate() {
            if r == 0 && k == 30 {
                continue;
            }
            let counts = (t.x[[k, 0]] * per_rad).round();
            writeln!(f, "{r},{},{counts}", (time * 1000.0).round()).unwrap();
        }
    }
}

#[test]
fn the_readme_mapping_fits_a_positions_only_encoder_log() {
    let dir = tempfile::tempdir().unwrap();
    let log = dir.path().join("rig.csv");
    write_rig_log(&log);
    let toml = dir.path().join("visviva.toml");
    std::fs::write(&toml, README_COLUMNS).unwrap();
    let out = dir.path().join("rig.vvb");
    let (l, t, o) = (
        log.to_str().unwrap(),
        toml.to_str().unwrap(),
        out.to_str().unwrap(),
    );
    let small = [
        "--hidden",
        "8,8",
        "--epochs",
        "5",
        "--trajectory-epochs",
        "2",
        "--window-steps",
        "10",
        "--quiet",
    ];
    let mut args = vec!["--train", l, "--columns", t, "--out", o];
    args.extend_from_slice(&small);
    run(&args).unwrap();
    let bytes = std::fs::read(&out).unwrap();
    let model = Model::<8, 128>::from_bytes(&bytes).unwrap();
    assert_eq!(model.dof(), 1);
    assert!(model.is_separable());

    // Trajectory matching with an integrator it does not differentiate:
    // refused, naming the flag, and nothing written.
    let refused = dir.path().join("refused.vvb");
    let mut args = vec!["--train", l, "--columns", t, "--out"];
    args.push(refused.to_str().unwrap());
    args.extend_from_slice(&["--integrator", "midpoint", "--arch", "general"]);
    args.extend_from_slice(&small);
    let err = format!("{:#}", run(&args).unwrap_err());
    assert!(
        err.contains("--fit-mode") && err.contains("separable"),
        "{err}"
    );
    assert!(!refused.exists());

    // A mapping naming a column the log lacks: file, line 1, the column and
    // the key that maps it.
    let bad = dir.path().join("bad.toml");
    std::fs::write(&bad, README_COLUMNS.replace("enc_counts", "encoder")).unwrap();
    let mut args = vec!["--train", l, "--columns", bad.to_str().unwrap(), "--out", o];
    args.extend_from_slice(&small);
    let err = format!("{:#}", run(&args).unwrap_err());
    assert!(
        err.contains("rig.csv: line 1, column 'encoder'") && err.contains("[columns] q1"),
        "{err}"
    );
}

#[test]
fn a_project_with_columns_reads_the_rig_log_and_chooses_trajectory_matching() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::create_dir_all(dir.path().join("data")).unwrap();
    write_rig_log(&dir.path().join("data/train.csv"));
    let project = format!("[model]\nhidden = [8, 8]\n\n{README_COLUMNS}");
    std::fs::write(dir.path().join("visviva.toml"), project).unwrap();
    let prep = visviva_trainer::project::pipeline::prepare(dir.path()).unwrap();
    let rig = prep.logs.rig.as_ref().expect("a mapped log");
    assert!(rig.positions_only);
    assert_eq!(rig.gaps, 1);
    assert!(
        prep.mode.starts_with("fit mode trajectory"),
        "{}",
        prep.mode
    );
    let tp = prep.trajectory.as_ref().expect("trajectory plan");
    assert!((tp.dt - 0.01).abs() < 1e-12);
    // A dropped sample split run 0: 6 pieces, some held out.
    let pieces = prep.logs.train.trajectories.len() + prep.logs.val.trajectories.len();
    assert_eq!(pieces, 6);
    // The default arch = "auto" finds trajectory matching permits the
    // separable structure only and takes it without a short fit; the model
    // integrator is the log's step, Verlet.
    let choice = prep.selection.as_ref().expect("the default is auto");
    assert_eq!(choice.chosen, "separable");
    assert_eq!(
        choice.basis,
        visviva_trainer::learn::auto::Basis::OnlyPermitted
    );
    assert!(prep.plan.choice.separable);
    assert!((prep.plan.integrator.dt - 0.01).abs() < 1e-6);
}

/// The whole `visviva run` on the rig project: fit by trajectory matching,
/// check, export and the report, whose `report.json` says the fit mode,
/// counts the gap and carries the column units and the noise model.
#[test]
fn a_rig_project_runs_end_to_end_and_its_report_counts_the_gap() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::create_dir_all(dir.path().join("data")).unwrap();
    write_rig_log(&dir.path().join("data/train.csv"));
    let project = format!(
        "[model]\nhidden = [8, 8]\n\n[fit]\nepochs = 3\ntrajectory_epochs = 3\n\n[check]\ngolden_states = 2\ngolden_steps = 50\n\n{README_COLUMNS}"
    );
    std::fs::write(dir.path().join("visviva.toml"), project).unwrap();
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_visviva"))
        .arg("run")
        .arg(dir.path())
        .output()
        .unwrap();
    let err = String::from_utf8_lossy(&out.stderr);
    let stdout = String::from_utf8_lossy(&out.stdout);
    // A 3-epoch fit may well miss the budget or the baseline; the run must
    // still write its report (exit 0 or a budget failure), never crash.
    let report = dir.path().join("out/report.json");
    assert!(report.exists(), "no report: {stdout}\n{err}");
    let json: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(report).unwrap()).unwrap();
    assert!(
        json["fit_mode"]
            .as_str()
            .unwrap()
            .starts_with("fit mode trajectory"),
        "{}",
        json["fit_mode"]
    );
    assert_eq!(json["data"]["rig"]["gaps"], 1);
    assert_eq!(json["data"]["rig"]["positions_only"], true);
    assert_eq!(json["data"]["units"]["q"][0], "rad");
    let noise = json["data"]["rig"]["noise"][0].as_f64().unwrap();
    // Quantization noise floor of a 4096-count encoder: step / sqrt(12)
    // (uniform quantization error, textbook signal processing).
    let floor = std::f64::consts::TAU / 4096.0 / 12f64.sqrt();
    assert!(noise >= floor * 0.999, "noise model {noise} below {floor}");
    let html = std::fs::read_to_string(dir.path().join("out/report.html")).unwrap();
    assert!(html.contains("gaps that split trajectories"));
    assert!(html.contains(r#"data-k="fit_mode""#));
}
