//! Output paths checked before any work: every command hands its inputs and
//! outputs here first. An output that resolves to an input (the same file
//! through another spelling, a symbolic link or a hard link) or to another
//! output of the same command is refused, and so is an output whose folder
//! is missing, not a folder or not writable, so that a long fit cannot end
//! in a write that fails or destroys a log.

use std::path::{Path, PathBuf};

use anyhow::{bail, Context, Result};

/// A path as the user named it: the flag or key, and the path.
pub type Named<'a> = (&'a str, &'a Path);

/// Where an output will land: its folder (existing, writable) and the full
/// path with that folder resolved.
struct Resolved {
    name: String,
    given: PathBuf,
    canonical: PathBuf,
}

/// Refuse outputs that would overwrite an input or each other, or that
/// cannot be written. Inputs that do not exist are left to the command's
/// own error (nothing can be overwritten there).
pub fn check_outputs(inputs: &[Named<'_>], outputs: &[Named<'_>]) -> Result<()> {
    let resolved = outputs
        .iter()
        .map(|(name, path)| resolve_output(name, path))
        .collect::<Result<Vec<_>>>()?;
    for (k, out) in resolved.iter().enumerate() {
        for (in_name, input) in inputs {
            if same_file(input, &out.given, &out.canonical) {
                bail!(
                    "{} {}: is the same file as {in_name} {}; refusing to overwrite an input \
                     (nothing was written)",
                    out.name,
                    out.given.display(),
                    input.display()
                );
            }
        }
        for other in &resolved[..k] {
            if other.canonical == out.canonical {
                bail!(
                    "{} {} and {} {} name the same file; give each output its own path \
                     (nothing was written)",
                    other.name,
                    other.given.display(),
                    out.name,
                    out.given.display()
                );
            }
        }
    }
    Ok(())
}

/// Refuse an output folder (created when missing) that is a file or whose
/// nearest existing ancestor is not a writable folder.
pub fn check_output_dir(name: &str, dir: &Path) -> Result<()> {
    if dir.exists() {
        if !dir.is_dir() {
            bail!("{name} {}: exists and is not a folder", dir.display());
        }
        return probe_writable(name, dir);
    }
    let mut ancestor = dir.parent();
    while let Some(a) = ancestor {
        let a = if a.as_os_str().is_empty() {
            Path::new(".")
        } else {
            a
        };
        if a.exists() {
            if !a.is_dir() {
                bail!("{name} {}: {} is not a folder", dir.display(), a.display());
            }
            return probe_writable(name, a);
        }
        ancestor = a.parent();
    }
    bail!("{name} {}: no existing folder above it", dir.display())
}

/// Refuse inputs inside `dir`, a folder the command owns and rewrites
/// (`visviva run`'s `out/`); `name` names the folder in the message.
pub fn check_inputs_outside(inputs: &[Named<'_>], name: &str, dir: &Path) -> Result<()> {
    let Ok(owned) = dir.canonicalize() else {
        return Ok(());
    };
    for (in_name, input) in inputs {
        if input.canonicalize().is_ok_and(|c| c.starts_with(&owned)) {
            bail!(
                "{in_name} {}: lies in {name} {}, which this command rewrites; keep inputs \
                 elsewhere (nothing was written)",
                input.display(),
                dir.display()
            );
        }
    }
    Ok(())
}

/// The output's folder must exist and be writable; the output itself must
/// not be a folder.
fn resolve_output(name: &str, path: &Path) -> Result<Resolved> {
    if path.is_dir() {
        bail!("{name} {}: is a folder, not a file", path.display());
    }
    let Some(file_name) = path.file_name() else {
        bail!("{name} {}: names no file", path.display());
    };
    let dir = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    };
    if !dir.exists() {
        bail!(
            "{name} {}: the folder {} does not exist",
            path.display(),
            dir.display()
        );
    }
    if !dir.is_dir() {
        bail!(
            "{name} {}: {} is not a folder",
            path.display(),
            dir.display()
        );
    }
    probe_writable(name, dir)?;
    let folder = dir
        .canonicalize()
        .with_context(|| format!("{name} {}: cannot resolve its folder", path.display()))?;
    Ok(Resolved {
        name: name.to_string(),
        given: path.to_path_buf(),
        canonical: folder.join(file_name),
    })
}

/// Whether writing `out` (resolved to `canonical`) would replace `input`.
fn same_file(input: &Path, out: &Path, canonical: &Path) -> bool {
    if let Ok(c) = input.canonicalize() {
        if c == canonical {
            return true;
        }
    }
    // Hard links and symbolic links to the input resolve to the same file
    // on disk (a link path is refused even where a rename would spare it).
    out.exists() && same_file::is_same_file(input, out).unwrap_or(false)
}

/// A folder is writable when a temporary file can be made in it (removed
/// at once); this also sees read-only mounts and access lists.
fn probe_writable(name: &str, dir: &Path) -> Result<()> {
    tempfile::Builder::new()
        .prefix(".visviva-probe")
        .tempfile_in(dir)
        .map(drop)
        .with_context(|| format!("{name}: the folder {} is not writable", dir.display()))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn an_output_equal_to_an_input_by_another_spelling_is_refused() {
        let dir = tempfile::tempdir().unwrap();
        let log = dir.path().join("log.csv");
        std::fs::write(&log, "x").unwrap();
        let again = dir.path().join(".").join("log.csv");
        let err = check_outputs(&[("--train", &log)], &[("--out", &again)]).unwrap_err();
        let msg = format!("{err:#}");
        assert!(msg.contains("--out") && msg.contains("--train"), "{msg}");
        // A fresh output beside it is fine; two outputs on one path are not.
        let a = dir.path().join("a.vvb");
        check_outputs(&[("--train", &log)], &[("--out", &a)]).unwrap();
        let err = check_outputs(&[], &[("--out", &a), ("--history", &a)]).unwrap_err();
        assert!(format!("{err:#}").contains("--history"), "{err:#}");
        // Nothing was left behind by the probes.
        assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 1);
    }

    #[cfg(unix)]
    #[test]
    fn links_to_an_input_are_refused() {
        let dir = tempfile::tempdir().unwrap();
        let log = dir.path().join("log.csv");
        std::fs::write(&log, "x").unwrap();
        let hard = dir.path().join("hard.csv");
        std::fs::hard_link(&log, &hard).unwrap();
        assert!(check_outputs(&[("--train", &log)], &[("--out", &hard)]).is_err());
        let soft = dir.path().join("soft.csv");
        std::os::unix::fs::symlink(&log, &soft).unwrap();
        assert!(check_outputs(&[("--train", &log)], &[("--out", &soft)]).is_err());
    }

    #[test]
    fn a_missing_folder_is_named() {
        let dir = tempfile::tempdir().unwrap();
        let out = dir.path().join("no-such").join("m.vvb");
        let msg = format!("{:#}", check_outputs(&[], &[("--out", &out)]).unwrap_err());
        assert!(
            msg.contains("--out") && msg.contains("does not exist"),
            "{msg}"
        );
        check_output_dir("--plots", &dir.path().join("a/b")).unwrap();
        let file = dir.path().join("f");
        std::fs::write(&file, "x").unwrap();
        assert!(check_output_dir("--plots", &file).is_err());
        assert!(check_outputs(&[], &[("--out", dir.path())]).is_err());
    }
}
