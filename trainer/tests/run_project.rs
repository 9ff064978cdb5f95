//! `visviva run` end to end on a tiny project: the HTML report shows exactly
//! the numbers of report.json, reruns reuse unchanged steps (editing only the
//! export section does not refit), and a bad project file is refused with
//! its line and no output.

mod page_numbers;

use std::path::Path;
use std::process::Command;

fn visviva(args: &[&str], dir: &Path) -> std::process::Output {
    Command::new(env!("CARGO_BIN_EXE_visviva"))
        .args(args)
        .arg(dir)
        .output()
        .unwrap()
}

fn simulate(out: &Path, seed: &str, n: &str) {
    let st = Command::new(env!("CARGO_BIN_EXE_visviva"))
        .args([
            "simulate",
            "--system",
            "flexure",
            "--trajectories",
            n,
            "--duration",
            "0.4",
            "--rate",
            "100",
            "--seed",
            seed,
            "--out",
        ])
        .arg(out)
        .output()
        .unwrap();
    assert!(
        st.status.success(),
        "{}",
        String::from_utf8_lossy(&st.stderr)
    );
}

const PROJECT: &str = r#"
name = "tiny rig"
[data]
train = "data/train.csv"
validation = "data/val.csv"
[model]
arch = "separable"
hidden = [8]
[fit]
epochs = 15
[check]
horizon_steps = 200
golden_steps = 50
reference_system = "flexure"
[[export]]
name = "tiny-f32"
[device]
flash_bytes = 100
"#;

#[test]
fn report_matches_json_and_reruns_reuse_the_fit() {
    let dir = tempfile::tempdir().unwrap();
    let p = dir.path();
    std::fs::create_dir_all(p.join("data")).unwrap();
    simulate(&p.join("data/train.csv"), "1", "6");
    simulate(&p.join("data/val.csv"), "2", "2");
    std::fs::write(p.join("visviva.toml"), PROJECT).unwrap();

    let o = visviva(&["run", "--quiet"], p);
    let stdout = String::from_utf8_lossy(&o.stdout);
    assert!(
        o.status.success(),
        "{stdout}\n{}",
        String::from_utf8_lossy(&o.stderr)
    );
    assert!(
        stdout.contains("report: ") && stdout.contains("not a safety function"),
        "{stdout}"
    );
    // A 100-byte flash budget cannot hold the blob: the report must say so.
    assert!(stdout.contains("device budget FAIL"), "{stdout}");

    let json: serde_json::Value =
        serde_json::from_slice(&std::fs::read(p.join("out/report.json")).unwrap()).unwrap();
    let html = std::fs::read_to_string(p.join("out/report.html")).unwrap();
    let tags = page_numbers::spans(&html);
    assert!(tags.len() > 40, "only {} tagged numbers", tags.len());
    assert_eq!(
        page_numbers::disagreements(&html, &json),
        vec![],
        "page text, read back as numbers, disagrees with report.json (key, page, report)"
    );
    // The page is self-contained: no scripts, no external resources (the
    // only URL is the SVG namespace name, which is never fetched).
    for bad in ["<script", "src=", "<link", "url(", "@import"] {
        assert!(!html.contains(bad), "report.html contains {bad}");
    }
    assert!(html.matches("<svg").count() >= 4);
    assert!(html.contains("exceeds the flash budget"));
    horizons_table_is_tagged(&json, &html);
    held_out_of_the_f32_blob_is_the_check(&json, &html);
    assert_eq!(json["fit"]["reused"], false);
    provenance_units_and_verdicts(p, &json, &html);

    // Edit only the export section: the fit is reused, the blob redone.
    let edited = PROJECT.replace(
        "name = \"tiny-f32\"",
        "name = \"tiny-int8\"\nweights = \"int8\"\nqat = true",
    );
    std::fs::write(p.join("visviva.toml"), edited).unwrap();
    let o = visviva(&["run", "--quiet"], p);
    assert!(o.status.success());
    assert!(String::from_utf8_lossy(&o.stdout).contains("inputs unchanged, reusing"));
    let json: serde_json::Value =
        serde_json::from_slice(&std::fs::read(p.join("out/report.json")).unwrap()).unwrap();
    assert_eq!(json["fit"]["reused"], true);
    assert_eq!(json["devices"][0]["export"]["weights"], "int8");
    // The int8 blob was quantized after quantization-aware fine-tuning of
    // the reused fit's parameters; the export says so.
    let qat = &json["devices"][0]["export"]["qat"];
    assert_eq!(qat["steps"], visviva_trainer::learn::qat::STEPS);
    let rounded = qat["loss_rounded"].as_f64().unwrap();
    let tuned = qat["loss_fine_tuned"].as_f64().unwrap();
    assert!(tuned <= rounded && tuned.is_finite(), "{qat}");
    assert!(
        String::from_utf8_lossy(&o.stdout).contains("quantization-aware fine-tuning: 300 steps")
    );
    // The second run compares itself with the first: the same fit, so the
    // state error is unchanged; the page shows the block, tagged.
    let change = &json["change"];
    let state = change["figures"]
        .as_array()
        .unwrap()
        .iter()
        .find(|f| f["figure"] == "median state error, model")
        .unwrap();
    assert_eq!(state["verdict"], "unchanged");
    assert_eq!(state["previous"], state["current"]);
    assert!(change["previous_created_utc"].is_string());
    let html = std::fs::read_to_string(p.join("out/report.html")).unwrap();
    assert!(html.contains("Change against the previous run"));
    assert_eq!(page_numbers::disagreements(&html, &json), vec![]);
    assert!(p.join("out/tiny-int8.vvb").exists());
    assert!(p.join("out/golden/tiny-int8-0.csv").exists());
}

/// The state errors at the default horizons (1, 5, 20 s) are in
/// report.json and on the page, and every cell of their table that shows a
/// digit shows it inside a tagged number (as `cargo xtask browser` demands).
fn horizons_table_is_tagged(json: &serde_json::Value, html: &str) {
    let h = json["check"]["horizons"].as_array().unwrap();
    let seconds: Vec<f64> = h.iter().map(|x| x["seconds"].as_f64().unwrap()).collect();
    assert_eq!(seconds, [1.0, 5.0, 20.0]);
    let cells = page_numbers::cells_without_untagged_digits(html, "State error at chosen horizons");
    assert!(cells >= 5 * 3, "{cells} cells");
}

/// An f32 blob with the model's own integrator rolls out exactly as the
/// fitted model does in the check, so its held-out figures are the check's;
/// the page's table of them shows every digit tagged.
fn held_out_of_the_f32_blob_is_the_check(json: &serde_json::Value, html: &str) {
    let held = &json["devices"][0]["held_out"];
    let model = &json["check"]["median_model"];
    assert_eq!(held["state_rel_rmse"], model["state_rel_rmse"]);
    assert_eq!(held["learned_energy_drift"], model["learned_energy_drift"]);
    let horizons = json["check"]["horizons"].as_array().unwrap();
    for (j, h) in horizons.iter().enumerate() {
        assert_eq!(held["horizons"][j]["seconds"], h["seconds"]);
        assert_eq!(held["horizons"][j]["state_rel_rmse"], h["median_model"]);
    }
    let cells = page_numbers::cells_without_untagged_digits(html, "Each blob on the held-out logs");
    assert_eq!(cells, 2 * (4 + horizons.len()));
}

/// Provenance (hashes against sha2's SHA-256 of the files), the units of
/// the built-in flexure (m, kg m/s, J), and the flash verdict as used /
/// limit / margin.
fn provenance_units_and_verdicts(p: &Path, json: &serde_json::Value, html: &str) {
    use sha2::Digest as _;
    let prov = &json["provenance"];
    let train = std::fs::read(p.join("data/train.csv")).unwrap();
    let hex: String = sha2::Sha256::digest(&train)
        .iter()
        .map(|b| format!("{b:02x}"))
        .collect();
    assert_eq!(prov["inputs"][0]["sha256"], hex.as_str());
    assert_eq!(prov["inputs"][0]["bytes"], train.len());
    assert!(prov["command"]
        .as_str()
        .unwrap()
        .starts_with("visviva run "));
    let settings = prov["settings"].as_str().unwrap();
    // Defaults filled in: the fit's batch, the model's integrator and dt.
    for key in [
        "batch = 256",
        "integrator = \"verlet\"",
        "dt = 0.01",
        "cycles_per_mac = 4.0",
    ] {
        assert!(settings.contains(key), "{key} missing in\n{settings}");
    }
    assert!(prov["created_utc"].as_str().unwrap().ends_with('Z'));
    let units = &json["data"]["units"];
    assert_eq!(
        (units["q"][0].as_str(), units["p"][0].as_str()),
        (Some("m"), Some("kg m/s"))
    );
    let flash = &json["verdicts"][0];
    assert_eq!(flash["limit"], 100.0);
    let used = flash["used"].as_f64().unwrap();
    assert_eq!(flash["margin"].as_f64().unwrap(), 100.0 - used);
    assert_eq!(flash["verdict"], "fail");
    // The step time is not judged (no clock): the page says what sets it.
    assert!(html.contains("not estimated: set [device] clock_hz"));
    assert!(json["model_description"]
        .as_str()
        .unwrap()
        .starts_with("energy = kinetic"));
}

#[test]
fn a_bad_project_file_names_its_line_and_writes_nothing() {
    let dir = tempfile::tempdir().unwrap();
    let p = dir.path();
    std::fs::write(
        p.join("visviva.toml"),
        "[data]\ntrain = \"x.csv\"\n[fit]\nepochz = 3\n",
    )
    .unwrap();
    let o = visviva(&["run"], p);
    assert!(!o.status.success());
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("visviva.toml") && err.contains("line 4") && err.contains("epochz"),
        "{err}"
    );
    assert!(!p.join("out").exists());
}
