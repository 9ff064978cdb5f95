//! Sizes a user types (rollout steps, trajectory counts, sampling rates
//! times durations, golden states, threads), checked against what this
//! machine can hold before any work starts: memory that would be held at
//! once, and disk space that output would fill. A size that overflows or
//! does not fit is an error naming the flag or key; work that streams needs
//! no memory check.

use std::path::Path;

use anyhow::{bail, Result};

/// Bytes of memory this process may still take: `MemAvailable` of
/// `/proc/meminfo`, lowered to a cgroup v2 limit's headroom when one is
/// set. `None` where neither can be read.
pub fn available_memory() -> Option<u64> {
    let meminfo = std::fs::read_to_string("/proc/meminfo").ok()?;
    let kib: u64 = meminfo
        .lines()
        .find_map(|l| l.strip_prefix("MemAvailable:"))?
        .trim()
        .trim_end_matches("kB")
        .trim()
        .parse()
        .ok()?;
    let mut avail = kib.saturating_mul(1024);
    let cgroup = |f: &str| -> Option<u64> {
        std::fs::read_to_string(Path::new("/sys/fs/cgroup").join(f))
            .ok()?
            .trim()
            .parse()
            .ok()
    };
    if let (Some(max), Some(used)) = (cgroup("memory.max"), cgroup("memory.current")) {
        avail = avail.min(max.saturating_sub(used));
    }
    Some(avail)
}

/// Free bytes for an unprivileged writer on the file system holding
/// `dir` (or its nearest existing ancestor, for a folder a command will
/// create). `None` where it cannot be asked.
pub fn free_disk(dir: &Path) -> Option<u64> {
    let dir = dir.ancestors().find(|a| a.exists())?;
    #[cfg(unix)]
    {
        let s = rustix::fs::statvfs(dir).ok()?;
        Some(s.f_bavail.saturating_mul(s.f_frsize))
    }
    #[cfg(not(unix))]
    {
        let _ = dir;
        None
    }
}

/// A byte count for messages: "3.2 GB".
pub fn human(bytes: u128) -> String {
    let units = ["B", "kB", "MB", "GB", "TB", "PB", "EB"];
    let mut v = bytes as f64;
    let mut k = 0;
    while v >= 1000.0 && k + 1 < units.len() {
        v /= 1000.0;
        k += 1;
    }
    if k == 0 {
        format!("{bytes} B")
    } else {
        format!("{v:.1} {}", units[k])
    }
}

/// `count` items of `each` bytes held in memory at once for the setting
/// `what` (a flag or key, as the user wrote it): refused when the product
/// overflows, exceeds what an allocation may hold, or exceeds this
/// machine's available memory.
pub fn check_memory(what: &str, count: u128, each: u128) -> Result<()> {
    let need = count.saturating_mul(each);
    if need > isize::MAX as u128 {
        bail!(
            "{what}: {count} items of {each} bytes ({}) is more memory than any machine can address",
            human(need)
        );
    }
    if let Some(avail) = available_memory() {
        if need > avail as u128 {
            bail!(
                "{what}: {count} items need about {} of memory at once; this machine has {} available",
                human(need),
                human(avail as u128)
            );
        }
    }
    Ok(())
}

/// About `bytes` of output written to `path` for the setting `what`:
/// refused when the file system holding `path` has less free space.
pub fn check_disk(what: &str, path: &Path, bytes: u128) -> Result<()> {
    let dir = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    };
    if let Some(free) = free_disk(dir) {
        if bytes > free as u128 {
            bail!(
                "{what}: the output {} would take about {}; {} has {} free",
                path.display(),
                human(bytes),
                dir.display(),
                human(free as u128)
            );
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn absurd_sizes_are_refused_naming_the_setting() {
        let e = check_memory("--trajectories", 1 << 70, 8).unwrap_err();
        assert!(format!("{e}").starts_with("--trajectories: "), "{e}");
        let e = check_memory("[check] golden_states", u128::MAX, u128::MAX).unwrap_err();
        assert!(format!("{e}").contains("golden_states"), "{e}");
        // A kilobyte always fits.
        check_memory("--x", 1, 1000).unwrap();
    }

    #[test]
    fn the_machine_reports_memory_and_disk() {
        // Linux always has MemAvailable (kernel 3.14 and later, from memory).
        if cfg!(target_os = "linux") {
            assert!(available_memory().unwrap() > 0);
        }
        let dir = tempfile::tempdir().unwrap();
        if cfg!(unix) {
            assert!(free_disk(dir.path()).is_some());
        }
        let e = check_disk("--steps", &dir.path().join("o.csv"), u128::MAX).unwrap_err();
        assert!(format!("{e}").contains("o.csv"), "{e}");
    }

    #[test]
    fn byte_counts_read_as_people_write_them() {
        assert_eq!(human(999), "999 B");
        assert_eq!(human(3_200_000_000), "3.2 GB");
    }
}
