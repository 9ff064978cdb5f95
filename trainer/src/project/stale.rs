//! `out/` holds the files of one model. When a fit replaces the model, the
//! files derived from the previous one (device blobs with their
//! measurements and hashes, golden rollouts, the emulator's measurements,
//! the report) are removed before the new model is written, so a later
//! failure (an export that is refused, Ctrl-C) never leaves blobs of another
//! model beside it. Only names `visviva run` and the device check write are
//! touched, and never a file the project reads.

use std::path::{Path, PathBuf};

use anyhow::{Context, Result};

/// Whether `name` (a file directly in `out/`) was derived from the model.
fn derived_at_top(name: &str) -> bool {
    let blob = name.ends_with(".vvb") && name != "model.vvb";
    let hash = name.ends_with(".sha256") && name != "fit.sha256";
    blob || hash || name.ends_with(".export.json") || name == "report.json" || name == "report.html"
}

/// Which names in a folder are derived files.
type NameFilter<'a> = &'a dyn Fn(&str) -> bool;

/// The files under `out/` derived from the current model: see
/// [`derived_at_top`], `golden/*.csv` and `device/*.json`.
pub fn derived_files(out: &Path) -> Result<Vec<PathBuf>> {
    let mut found = Vec::new();
    let groups: [(PathBuf, NameFilter<'_>); 3] = [
        (out.to_path_buf(), &derived_at_top),
        (out.join("golden"), &|n: &str| n.ends_with(".csv")),
        (out.join("device"), &|n: &str| n.ends_with(".json")),
    ];
    for (dir, keep) in groups {
        let Ok(entries) = std::fs::read_dir(&dir) else {
            continue;
        };
        for entry in entries {
            let entry = entry.with_context(|| format!("{}: cannot list", dir.display()))?;
            let is_file = entry.file_type().is_ok_and(|t| t.is_file());
            let name = entry.file_name();
            if is_file && name.to_str().is_some_and(keep) {
                found.push(entry.path());
            }
        }
    }
    found.sort();
    Ok(found)
}

/// Remove the files derived from the previous model (see
/// [`derived_files`]), sparing any file in `inputs` (the project's logs).
/// Returns how many were removed.
pub fn remove_derived(out: &Path, inputs: &[&Path]) -> Result<usize> {
    let inputs: Vec<PathBuf> = inputs
        .iter()
        .filter_map(|p| p.canonicalize().ok())
        .collect();
    let mut removed = 0;
    for path in derived_files(out)? {
        if path.canonicalize().is_ok_and(|c| inputs.contains(&c)) {
            continue;
        }
        std::fs::remove_file(&path).with_context(|| {
            format!(
                "{}: cannot remove this file of the previous model",
                path.display()
            )
        })?;
        removed += 1;
    }
    Ok(removed)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn only_files_of_the_previous_model_go() {
        let dir = tempfile::tempdir().unwrap();
        let out = dir.path();
        std::fs::create_dir_all(out.join("golden")).unwrap();
        let files = [
            "model.vvb",
            "fit.sha256",
            "fit.json",
            "old-f32.vvb",
            "old-f32.sha256",
            "old-f32.export.json",
            "report.json",
            "notes.txt",
            "fleet-unit.json",
            "golden/old-f32-0.csv",
            "log.vvb",
        ];
        for f in files {
            std::fs::write(out.join(f), "x").unwrap();
        }
        let log = out.join("log.vvb");
        assert_eq!(remove_derived(out, &[&log]).unwrap(), 5);
        let left: Vec<bool> = files.iter().map(|f| out.join(f).exists()).collect();
        assert_eq!(
            left,
            [true, true, true, false, false, false, false, true, true, false, true]
        );
    }
}
