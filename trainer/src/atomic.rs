//! All-or-nothing file writes: output goes to a temporary file in the target's
//! directory and is renamed over the target only once it is complete, so a
//! failed run never leaves a half-written file behind.

use anyhow::Context;
use std::io::{BufWriter, Write};
use std::path::Path;
use tempfile::NamedTempFile;

/// Write `bytes` to `path` atomically (temporary file + rename).
pub fn write_atomic(path: &Path, bytes: &[u8]) -> anyhow::Result<()> {
    write_atomic_with(path, |w| {
        w.write_all(bytes)?;
        Ok(())
    })
}

/// Stream content into `path` atomically: `write` receives a buffered writer
/// onto a temporary file in the same directory. If `write` (or any later step)
/// fails, the temporary file is removed and `path` is left untouched.
pub fn write_atomic_with<F>(path: &Path, write: F) -> anyhow::Result<()>
where
    F: FnOnce(&mut dyn Write) -> anyhow::Result<()>,
{
    let dir = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    };
    let mut tmp = NamedTempFile::new_in(dir).with_context(|| {
        format!(
            "{}: cannot create a temporary file in {}",
            path.display(),
            dir.display()
        )
    })?;
    {
        let mut buffered = BufWriter::new(tmp.as_file_mut());
        write(&mut buffered).with_context(|| format!("{}: writing failed", path.display()))?;
        buffered
            .flush()
            .with_context(|| format!("{}: writing failed", path.display()))?;
    }
    tmp.as_file()
        .sync_all()
        .with_context(|| format!("{}: cannot flush to disk", path.display()))?;
    #[cfg(unix)]
    {
        // NamedTempFile is created 0600; give the result ordinary file permissions.
        use std::os::unix::fs::PermissionsExt;
        let _ = tmp
            .as_file()
            .set_permissions(std::fs::Permissions::from_mode(0o644));
    }
    tmp.persist(path).map_err(|e| e.error).with_context(|| {
        format!(
            "{}: cannot move the finished file into place",
            path.display()
        )
    })?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn writes_whole_content() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("out.bin");
        write_atomic(&path, b"hello").unwrap();
        assert_eq!(std::fs::read(&path).unwrap(), b"hello");
        // Overwrites an existing file completely.
        write_atomic(&path, b"xy").unwrap();
        assert_eq!(std::fs::read(&path).unwrap(), b"xy");
    }

    #[test]
    fn failure_leaves_no_file_and_keeps_old_content() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("out.csv");
        let err = write_atomic_with(&path, |w| {
            w.write_all(b"partial")?;
            anyhow::bail!("generator failed")
        });
        assert!(err.is_err());
        assert!(!path.exists());
        // No stray temporary file either.
        assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 0);

        std::fs::write(&path, b"old").unwrap();
        let err = write_atomic_with(&path, |w| {
            w.write_all(b"new but broken")?;
            anyhow::bail!("generator failed")
        });
        assert!(err.is_err());
        assert_eq!(std::fs::read(&path).unwrap(), b"old");
        assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 1);
    }

    #[test]
    fn missing_directory_is_an_error_naming_the_path() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("no_such_dir").join("out.csv");
        let err = write_atomic(&path, b"x").unwrap_err();
        assert!(format!("{err:#}").contains("out.csv"));
    }
}
