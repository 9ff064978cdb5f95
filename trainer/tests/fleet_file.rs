//! The demo fleet's file read as a user's would be: units found by the glob,
//! overrides applied to the template and listed, the Slurm array script with
//! one task per unit and the resources asked for; refusals name their line.
//! No fitting here: `cargo xtask fleet` runs the fleet.

use std::path::Path;

use visviva_trainer::project::fleet::file::Fleet;
use visviva_trainer::project::fleet::slurm::{script, units_text};

fn demo() -> std::path::PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../models-demo/crane-fleet")
}

#[test]
fn the_demo_fleet_loads_with_its_overrides() {
    let fleet = Fleet::load(&demo()).unwrap();
    assert_eq!(fleet.units.len(), 12);
    assert_eq!(fleet.units[0].name, "crane-01");
    let long = fleet.units.iter().find(|u| u.name == "crane-07").unwrap();
    assert_eq!(long.project.check.reference_params.get("l"), Some(&9.2));
    assert_eq!(
        long.overrides,
        vec!["check.reference_params.l = 9.2".to_string()]
    );
    // The template's other keys are untouched by the override.
    assert_eq!(long.project.model.hidden, vec![16, 16]);
    let text = script(&fleet, Path::new("/opt/visviva"), Path::new("/fleet"));
    for line in [
        "#SBATCH --array=0-11",
        "#SBATCH --cpus-per-task=1",
        "#SBATCH --mem=500M",
        "#SBATCH --time=00:10:00",
        "fleet task '/fleet' --index \"$SLURM_ARRAY_TASK_ID\"",
    ] {
        assert!(text.contains(line), "{line} missing from\n{text}");
    }
    assert!(units_text(&fleet).contains("6\tcrane-07\n"));
}

#[test]
fn refusals_name_the_line() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    std::fs::create_dir_all(d.join("units/a")).unwrap();
    std::fs::write(d.join("visviva.toml"), "[fit]\nepochs = 5\n").unwrap();
    let load = |text: &str| {
        std::fs::write(d.join("fleet.toml"), text).unwrap();
        Fleet::load(d).map(|_| ()).unwrap_err().to_string()
    };
    let e = load("units = \"units/*\"\n[overrides.b]\nfit.seed = 1\n");
    assert!(
        e.contains("line 2") && e.contains("[overrides.b]") && e.contains("no unit"),
        "{e}"
    );
    let e = load("units = \"units/*\"\n\n[overrides.a]\nmodel.hiden = [4]\n");
    assert!(e.contains("line 3") && e.contains("hiden"), "{e}");
    let e = load("units = \"units/*\"\ntemplat = \"x.toml\"\n");
    assert!(e.contains("line 2") && e.contains("templat"), "{e}");
    let e = load("units = \"nothing/*\"\n");
    assert!(e.contains("matches no folder"), "{e}");
}
