//! Logs as rigs write them, read through a `[columns]` mapping: logger
//! column names, encoder counts, milliseconds, dropped samples; every bad
//! mapping or field named by file, line and the logger's column.

use std::f64::consts::TAU;
use std::io::Write;

use visviva_trainer::data::columns::{load_mapped, ColumnMap, MappedOptions};

fn write(dir: &tempfile::TempDir, name: &str, text: &str) -> std::path::PathBuf {
    let path = dir.path().join(name);
    std::fs::File::create(&path)
        .unwrap()
        .write_all(text.as_bytes())
        .unwrap();
    path
}

const MAP: &str = r#"
[columns]
t = { column = "stamp_ms", scale = 0.001, unit = "s" }
traj = "run"
q = [{ column = "enc", counts_per_rev = 4096 }]
u = [{ column = "cmd_mNm", scale = 0.001, unit = "N m" }]
"#;

/// A counts log of q = 0.5 sin(2 pi t) rad at 100 Hz, 2 runs of 100 rows,
/// the 40th row of run a dropped.
fn counts_log() -> String {
    let mut s = String::from("run,stamp_ms,enc,cmd_mNm,note\n");
    for run in ["a", "b"] {
        for k in 0..100 {
            if run == "a" && k == 40 {
                continue;
            }
            let t = k as f64 * 0.01;
            let counts = (0.5 * (TAU * t).sin() * 4096.0 / TAU).round();
            s.push_str(&format!("{run},{},{counts},{},x\n", k * 10, 250 + k));
        }
    }
    s
}

#[test]
fn counts_and_milliseconds_become_radians_and_seconds_split_at_the_gap() {
    let dir = tempfile::tempdir().unwrap();
    let log = write(&dir, "rig.csv", &counts_log());
    let map = ColumnMap::from_toml(MAP).unwrap();
    let read = load_mapped(&log, &map, &MappedOptions::default()).unwrap();
    let ds = &read.dataset;
    assert_eq!((ds.dof, ds.inputs), (1, 1));
    // Run a splits at the dropped row into 40 and 59 samples; run b whole.
    let lengths: Vec<usize> = ds.trajectories.iter().map(|t| t.t.len()).collect();
    assert_eq!(lengths, vec![40, 59, 100]);
    assert_eq!(read.rig.gaps, 1);
    assert!(read.rig.positions_only);
    assert!((read.rig.step - 0.01).abs() < 1e-12);
    // One count is 2 pi / 4096 rad (declared by counts_per_rev).
    let step = read.rig.quantization[0].unwrap();
    assert!((step - TAU / 4096.0).abs() < 1e-15);
    // The noise model never goes below step / sqrt(12) (uniform rounding
    // error, common practice).
    assert!(read.rig.noise[0] >= step / 12f64.sqrt() - 1e-18);
    // Time in seconds, input in N m, positions within half a count of the
    // sine.
    let b = &ds.trajectories[2];
    assert!((b.t[99] - 0.99).abs() < 1e-12);
    assert!((b.u[[10, 0]] - 0.26).abs() < 1e-12);
    let q = b.x[[13, 0]];
    assert!((q - 0.5 * (TAU * 0.13).sin()).abs() <= 0.5 * step + 1e-12);
    // Estimated velocity dq/dt = pi cos(2 pi t) (textbook derivative) to
    // within the quantization's effect; p = v with unit mass.
    let v = b.x[[50, 1]];
    assert!((v - 0.5 * TAU * (TAU * 0.5).cos()).abs() < 0.02, "{v}");
    assert_eq!(read.rig.units, vec!["rad".to_string(), "N m".to_string()]);
}

#[test]
fn bad_fields_and_mappings_name_file_line_and_logger_column() {
    let dir = tempfile::tempdir().unwrap();
    let map = ColumnMap::from_toml(MAP).unwrap();
    // A column the header does not have.
    let log = write(&dir, "a.csv", "run,stamp_ms,encoder,cmd_mNm\na,0,1,2\n");
    let err = load_mapped(&log, &map, &MappedOptions::default()).unwrap_err();
    let msg = err.to_string();
    assert!(
        msg.contains("a.csv: line 1, column 'enc'")
            && msg.contains("[columns] q1")
            && msg.contains("encoder"),
        "{msg}"
    );
    // A field that is not a number: line 4 (header = 1).
    let mut text = counts_log();
    text = text.replacen("a,20,", "a,20,12x", 1);
    let log = write(&dir, "b.csv", &text);
    let msg = load_mapped(&log, &map, &MappedOptions::default())
        .unwrap_err()
        .to_string();
    assert!(msg.contains("b.csv: line 4, column 'enc'"), "{msg}");
    // An uneven step that is no gap (15 ms in a 10 ms log).
    let text = counts_log().replacen("a,30,", "a,35,", 1);
    let log = write(&dir, "c.csv", &text);
    let msg = load_mapped(&log, &map, &MappedOptions::default())
        .unwrap_err()
        .to_string();
    assert!(
        msg.contains("c.csv: line 5, column 'stamp_ms'") && msg.contains("gap_factor"),
        "{msg}"
    );
    // Velocity columns without masses: read as (q, v) for a learned mass
    // matrix, and said so.
    let vmap = ColumnMap::from_toml(
        "[columns]\nt = { column = \"stamp_ms\" }\ntraj = \"run\"\nq = [{ column = \"enc\" }]\nv = [{ column = \"cmd_mNm\" }]\n",
    )
    .unwrap();
    let log = write(&dir, "d.csv", &counts_log());
    let read = load_mapped(&log, &vmap, &MappedOptions::default()).unwrap();
    assert!(read.rig.rates_without_masses && !read.rig.masses_stated);
}

#[test]
fn a_bad_mapping_in_a_project_file_names_its_line() {
    let text = "name = \"rig\"\n\n[columns]\nt = { column = \"ms\", scale = 0.001 }\nq = [{ column = \"enc\", counts_per_rev = -4096 }]\n";
    let err = visviva_trainer::project::file::Project::parse(text)
        .unwrap_err()
        .to_string();
    assert!(
        err.starts_with("line 5:") && err.contains("counts_per_rev"),
        "{err}"
    );
    let err = visviva_trainer::project::file::Project::parse(
        "[columns]\nt = { column = \"ms\" }\nq = [{ column = \"enc\", sacle = 2.0 }]\n",
    )
    .unwrap_err()
    .to_string();
    assert!(err.starts_with("line 3:") && err.contains("sacle"), "{err}");
}
