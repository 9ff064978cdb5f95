//! What produced a report: tool version, creation time (UTC), host, the
//! input files with their SHA-256, the effective settings with every
//! default filled in, and the command that reproduces the run.

use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};

/// One input file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct InputFile {
    /// What it is ("training log", "project file").
    pub role: String,
    /// Path as the project names it.
    pub file: String,
    /// Size in bytes.
    pub bytes: u64,
    /// SHA-256 of its bytes, hex.
    pub sha256: String,
}

impl InputFile {
    /// Describe `bytes` read from `file`.
    pub fn new(role: &str, file: &str, bytes: &[u8]) -> Self {
        let digest = Sha256::digest(bytes);
        Self {
            role: role.into(),
            file: file.into(),
            bytes: bytes.len() as u64,
            sha256: digest.iter().map(|b| format!("{b:02x}")).collect(),
        }
    }
}

/// The provenance block of a report.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Provenance {
    /// "visviva 0.x.y".
    pub tool: String,
    /// Creation time, RFC 3339 in UTC.
    pub created_utc: String,
    /// Host name of the machine that ran it.
    pub host: String,
    /// The command that reproduces the run.
    pub command: String,
    /// Input files with their hashes.
    pub inputs: Vec<InputFile>,
    /// The effective settings as `visviva.toml` text, every default filled in.
    pub settings: String,
}

impl Provenance {
    /// Provenance of a run now, on this host.
    pub fn now(command: String, inputs: Vec<InputFile>, settings: String) -> Self {
        Self {
            tool: format!("visviva {}", env!("CARGO_PKG_VERSION")),
            created_utc: humantime::format_rfc3339_seconds(std::time::SystemTime::now())
                .to_string(),
            host: host_name(),
            command,
            inputs,
            settings,
        }
    }
}

/// The kernel's host name (Linux), else the usual environment variables,
/// else "unknown".
fn host_name() -> String {
    std::fs::read_to_string("/proc/sys/kernel/hostname")
        .ok()
        .map(|s| s.trim().to_string())
        .filter(|s| !s.is_empty())
        .or_else(|| std::env::var("HOSTNAME").ok())
        .or_else(|| std::env::var("COMPUTERNAME").ok())
        .unwrap_or_else(|| "unknown".into())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn input_hash_is_the_fips_180_test_vector() {
        // SHA-256("abc") from FIPS 180-2, appendix B.1.
        let f = InputFile::new("log", "a.csv", b"abc");
        assert_eq!(
            f.sha256,
            "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
        );
        let p = Provenance::now("visviva run x".into(), vec![f], String::new());
        // RFC 3339 in UTC: 2026-12-03T06:22:00Z.
        assert!(
            p.created_utc.ends_with('Z') && p.created_utc.len() == 20,
            "{}",
            p.created_utc
        );
        assert!(p.tool.starts_with("visviva "));
    }
}
