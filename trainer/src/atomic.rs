//! All-or-nothing file writes: output goes to a temporary file in the target's
//! directory and is renamed over the target only once it is complete, so a
//! failed run never leaves a half-written file behind. A Ctrl-C pressed while
//! a file is written stops the writer with an error and removes the
//! temporary file (it is dropped, not persisted).

use anyhow::Context;
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};
use tempfile::NamedTempFile;

use crate::interrupt::{Interrupted, Watch};

/// A writer that fails once Ctrl-C is pressed (polled at every buffered
/// write, so every few kilobytes of output).
struct Polled<W> {
    inner: W,
    watch: Watch,
}

impl<W: Write> Write for Polled<W> {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        self.watch.check().map_err(std::io::Error::other)?;
        self.inner.write(buf)
    }

    fn flush(&mut self) -> std::io::Result<()> {
        self.inner.flush()
    }
}

/// Whether `e` (or anything in its chain) is a Ctrl-C.
fn was_interrupted(e: &anyhow::Error) -> bool {
    e.chain().any(|c| {
        c.is::<Interrupted>()
            || c.downcast_ref::<std::io::Error>()
                .and_then(|io| io.get_ref())
                .is_some_and(|inner| inner.is::<Interrupted>())
    })
}

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
    write_atomic_routed(path, |w| write(w).map(|()| None)).map(|_| ())
}

/// As [`write_atomic_with`], but `write` may send the finished content to
/// another file in the same folder instead of `path` (it returns that
/// file's name; `None` keeps `path`): how a rollout that stopped part-way
/// writes what it computed under a name that says so, leaving `path` as it
/// was. Returns the file written.
pub fn write_atomic_routed<F>(path: &Path, write: F) -> anyhow::Result<PathBuf>
where
    F: FnOnce(&mut dyn Write) -> anyhow::Result<Option<PathBuf>>,
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
    let watch = Watch::new();
    let target = {
        let mut buffered = BufWriter::new(Polled {
            inner: tmp.as_file_mut(),
            watch,
        });
        let written = write(&mut buffered).and_then(|to| Ok(buffered.flush().map(|()| to)?));
        let written = written.and_then(|to| Ok(watch.check().map(|()| to)?));
        match written {
            Ok(to) => to.unwrap_or_else(|| path.to_path_buf()),
            Err(e) => {
                // Dropping `tmp` on return removes the temporary file.
                if was_interrupted(&e) {
                    anyhow::bail!("{}: interrupted by Ctrl-C; nothing written", path.display());
                }
                return Err(e.context(format!("{}: nothing written", path.display())));
            }
        }
    };
    let path = target.as_path();
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
    Ok(target)
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
