//! The observer settings of one blob, kept in a small companion TOML file
//! beside it (`M.observer.toml` next to `M.vvb`) rather than in the blob:
//! the noise figures are tuned after export, from logs, and may be retuned
//! for another sensor without touching the verified blob. The file carries
//! its own `format_version`, read before anything else (this reader takes
//! versions 1 and 2; version 2 added the energy-scaled process noise,
//! `process_variance_per_energy` and `energy_reference`), is written with
//! the oldest version that can express it, and refuses unknown keys with
//! their name.

use std::path::{Path, PathBuf};

use anyhow::{anyhow, bail, Context, Result};
use serde::{Deserialize, Serialize};
use visviva_runtime::monitor::FalseAlarm;

use crate::atomic::write_atomic;

/// The newest version this build writes and reads.
pub const SETTINGS_VERSION: u32 = 2;

/// The oldest version this build reads.
pub const OLDEST_SETTINGS_VERSION: u32 = 1;

/// Window lengths (updates) the host monitor is built for.
pub const WINDOWS: [usize; 4] = [20, 50, 100, 200];

/// Observer and monitor settings for one blob (all per model step; noise
/// figures as standard deviations in the log's units, q then p).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ObserverSettings {
    /// [`SETTINGS_VERSION`].
    pub format_version: u32,
    /// Measurement noise of each position q_i (standard deviation).
    pub position_noise: Vec<f64>,
    /// Measurement noise of each velocity v_i (standard deviation), used when
    /// a log has `v*` columns.
    pub velocity_noise: Vec<f64>,
    /// Process noise per model step, one variance per state coordinate
    /// (q1..qn, p1..pn): the constant part Q0.
    pub process_variance: Vec<f64>,
    /// Version 2: the part of the process noise that grows with the energy,
    /// variance per model step per unit of energy above `energy_reference`
    /// (Q1; q then p): Q(x) = Q0 + Q1 max(H(x) - energy_reference, 0).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub process_variance_per_energy: Option<Vec<f64>>,
    /// Version 2: the model's energy where the energy-scaled part starts
    /// (the lowest learned energy on the tuning logs), in the model's
    /// energy units.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub energy_reference: Option<f64>,
    /// Standard deviation of the first estimate's momenta (the positions
    /// start from the first measurement with its noise).
    pub initial_momentum_std: Vec<f64>,
    /// NIS window length in updates (one of [`WINDOWS`]).
    pub window: usize,
    /// Updates at the start of each trajectory kept out of the monitor while
    /// the filter settles from its initial spread (the chi-square window
    /// test assumes a settled filter).
    pub settle_updates: usize,
    /// Two-sided false-alarm rate of the NIS window test: "10%", "5%", "1%"
    /// or "0.2%".
    pub false_alarm: String,
    /// Lower bounds of the envelope (q then p).
    pub envelope_low: Vec<f64>,
    /// Upper bounds of the envelope (q then p).
    pub envelope_high: Vec<f64>,
    /// Threshold of the energy-balance residual over a window (energy units);
    /// absent: the energy flag is never raised.
    #[serde(default)]
    pub energy_threshold: Option<f64>,
}

/// The companion file of `blob`: `M.observer.toml` for `M.vvb`.
pub fn companion_path(blob: &Path) -> PathBuf {
    blob.with_extension("observer.toml")
}

/// Refuse a `format_version` this build cannot read, naming the key.
fn check_version(v: i64) -> Result<()> {
    if !(i64::from(OLDEST_SETTINGS_VERSION)..=i64::from(SETTINGS_VERSION)).contains(&v) {
        bail!(
            "key 'format_version': version {v} is not readable by this build (it reads versions {OLDEST_SETTINGS_VERSION} to {SETTINGS_VERSION}){}",
            if v > i64::from(SETTINGS_VERSION) {
                "; the file was written by a newer visviva"
            } else {
                ""
            }
        );
    }
    Ok(())
}

/// The false-alarm rate named by `text`.
pub fn parse_false_alarm(text: &str) -> Result<FalseAlarm> {
    Ok(match text.trim() {
        "10%" => FalseAlarm::TenPercent,
        "5%" => FalseAlarm::FivePercent,
        "1%" => FalseAlarm::OnePercent,
        "0.2%" => FalseAlarm::PointTwoPercent,
        other => bail!("false_alarm '{other}': expected one of 10%, 5%, 1%, 0.2%"),
    })
}

/// The text naming `alarm`.
pub fn false_alarm_text(alarm: FalseAlarm) -> &'static str {
    match alarm {
        FalseAlarm::TenPercent => "10%",
        FalseAlarm::FivePercent => "5%",
        FalseAlarm::OnePercent => "1%",
        FalseAlarm::PointTwoPercent => "0.2%",
    }
}

/// The two-sided rate as a fraction.
pub fn false_alarm_fraction(alarm: FalseAlarm) -> f64 {
    match alarm {
        FalseAlarm::TenPercent => 0.10,
        FalseAlarm::FivePercent => 0.05,
        FalseAlarm::OnePercent => 0.01,
        FalseAlarm::PointTwoPercent => 0.002,
    }
}

impl ObserverSettings {
    /// Check every field against a model with `dof` degrees of freedom;
    /// errors name the key.
    pub fn validate(&self, dof: usize) -> Result<()> {
        check_version(i64::from(self.format_version))?;
        self.validate_energy_scaling(dof)?;
        let lists: [(&str, &Vec<f64>, usize, bool); 6] = [
            ("position_noise", &self.position_noise, dof, false),
            ("velocity_noise", &self.velocity_noise, dof, false),
            ("process_variance", &self.process_variance, 2 * dof, true),
            (
                "initial_momentum_std",
                &self.initial_momentum_std,
                dof,
                false,
            ),
            ("envelope_low", &self.envelope_low, 2 * dof, true),
            ("envelope_high", &self.envelope_high, 2 * dof, true),
        ];
        for (key, values, len, zero_or_negative_ok) in lists {
            if values.len() != len {
                bail!("{key}: {} values for a model needing {len}", values.len());
            }
            let ok = |v: &f64| v.is_finite() && (zero_or_negative_ok || *v > 0.0);
            if let Some(v) = values.iter().find(|v| !ok(v)) {
                bail!("{key}: {v} is not a finite positive number");
            }
        }
        if let Some(v) = self.process_variance.iter().find(|v| **v < 0.0) {
            bail!("process_variance: {v} is negative");
        }
        if !WINDOWS.contains(&self.window) {
            bail!("window {}: expected one of {WINDOWS:?}", self.window);
        }
        parse_false_alarm(&self.false_alarm).context("false_alarm")?;
        if let Some(t) = self.energy_threshold {
            if !(t.is_finite() && t > 0.0) {
                bail!("energy_threshold: {t} is not a finite positive number");
            }
        }
        Ok(())
    }

    /// The oldest format version that can express these settings.
    pub fn needed_version(&self) -> u32 {
        if self.process_variance_per_energy.is_some() || self.energy_reference.is_some() {
            2
        } else {
            1
        }
    }

    /// The version-2 keys: both or neither, 2n finite values >= 0 and a
    /// finite reference, and only in a version-2 file.
    fn validate_energy_scaling(&self, dof: usize) -> Result<()> {
        let (slope, reference) = (&self.process_variance_per_energy, self.energy_reference);
        if self.format_version < 2 && (slope.is_some() || reference.is_some()) {
            let key = if slope.is_some() {
                "process_variance_per_energy"
            } else {
                "energy_reference"
            };
            bail!(
                "{key}: needs format_version 2 (the file says {})",
                self.format_version
            );
        }
        match (slope, reference) {
            (None, None) => Ok(()),
            (Some(_), None) => {
                bail!("energy_reference: missing (process_variance_per_energy is given)")
            }
            (None, Some(_)) => {
                bail!("process_variance_per_energy: missing (energy_reference is given)")
            }
            (Some(v), Some(r)) => {
                if v.len() != 2 * dof {
                    bail!(
                        "process_variance_per_energy: {} values for a model needing {}",
                        v.len(),
                        2 * dof
                    );
                }
                if let Some(x) = v.iter().find(|x| !(x.is_finite() && **x >= 0.0)) {
                    bail!("process_variance_per_energy: {x} is not a finite number >= 0");
                }
                if !r.is_finite() {
                    bail!("energy_reference: {r} is not a finite number");
                }
                Ok(())
            }
        }
    }

    /// Read and validate a settings file for a model with `dof` degrees of
    /// freedom. The `format_version` key is read first, so a file from a
    /// newer build is refused by its version, not by a key this build does
    /// not know.
    pub fn read(path: &Path, dof: usize) -> Result<Self> {
        let text = std::fs::read_to_string(path)
            .map_err(|e| anyhow!("{}: cannot read: {e}", path.display()))?;
        let table: toml::Table =
            toml::from_str(&text).map_err(|e| anyhow!("{}: {e}", path.display()))?;
        let version = match table.get("format_version") {
            None => bail!("{}: key 'format_version': missing", path.display()),
            Some(toml::Value::Integer(v)) => *v,
            Some(other) => bail!(
                "{}: key 'format_version': expected a whole number, found {other}",
                path.display()
            ),
        };
        check_version(version).with_context(|| format!("{}", path.display()))?;
        let s: Self = toml::from_str(&text).map_err(|e| anyhow!("{}: {e}", path.display()))?;
        s.validate(dof)
            .with_context(|| format!("{}", path.display()))?;
        Ok(s)
    }

    /// Write the settings atomically, with the oldest format version that
    /// can express them.
    pub fn write(&self, path: &Path) -> Result<()> {
        let mut oldest = self.clone();
        oldest.format_version = self.needed_version();
        let body = toml::to_string(&oldest)?;
        let text = format!(
            "# Observer settings (visviva): noise figures per model step, tuned from logs.\n{body}"
        );
        write_atomic(path, text.as_bytes())
    }

    /// The false-alarm rate.
    pub fn alarm(&self) -> FalseAlarm {
        parse_false_alarm(&self.false_alarm).unwrap_or(FalseAlarm::OnePercent)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn settings(per_energy: bool) -> ObserverSettings {
        ObserverSettings {
            format_version: SETTINGS_VERSION,
            position_noise: vec![1e-3],
            velocity_noise: vec![1.0],
            process_variance: vec![1e-8, 1e-6],
            process_variance_per_energy: per_energy.then(|| vec![2e-9, 3e-7]),
            energy_reference: per_energy.then_some(-0.5),
            initial_momentum_std: vec![0.1],
            window: 50,
            settle_updates: 20,
            false_alarm: "1%".into(),
            envelope_low: vec![-1.0, -1.0],
            envelope_high: vec![1.0, 1.0],
            energy_threshold: None,
        }
    }

    fn message(e: anyhow::Error) -> String {
        format!("{e:#}")
    }

    #[test]
    fn written_with_the_oldest_version_that_expresses_them_and_read_back() {
        let dir = tempfile::tempdir().unwrap();
        for (per_energy, version) in [(false, 1), (true, 2)] {
            let path = dir.path().join(format!("m{version}.observer.toml"));
            let s = settings(per_energy);
            s.write(&path).unwrap();
            let text = std::fs::read_to_string(&path).unwrap();
            assert!(
                text.contains(&format!("format_version = {version}")),
                "{text}"
            );
            let back = ObserverSettings::read(&path, 1).unwrap();
            assert_eq!(back.format_version, version);
            assert_eq!(
                back.process_variance_per_energy,
                s.process_variance_per_energy
            );
            assert_eq!(back.energy_reference, s.energy_reference);
        }
    }

    #[test]
    fn unknown_versions_and_misplaced_keys_are_refused_naming_file_and_key() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("m.observer.toml");
        settings(true).write(&path).unwrap();
        let text = std::fs::read_to_string(&path).unwrap();
        // A newer file, with a key this build does not know: refused by its
        // version, not by the key.
        let newer = text.replace("format_version = 2", "format_version = 3")
            + "process_model = \"table\"\n";
        std::fs::write(&path, newer).unwrap();
        let e = message(ObserverSettings::read(&path, 1).unwrap_err());
        assert!(e.contains("m.observer.toml"), "{e}");
        assert!(e.contains("key 'format_version': version 3"), "{e}");
        assert!(e.contains("newer visviva"), "{e}");
        std::fs::write(&path, text.replace("format_version = 2\n", "")).unwrap();
        let e = message(ObserverSettings::read(&path, 1).unwrap_err());
        assert!(e.contains("key 'format_version': missing"), "{e}");
        // Version 1 cannot carry the energy-scaled process noise.
        std::fs::write(
            &path,
            text.replace("format_version = 2", "format_version = 1"),
        )
        .unwrap();
        let e = message(ObserverSettings::read(&path, 1).unwrap_err());
        assert!(e.contains("m.observer.toml"), "{e}");
        assert!(
            e.contains("process_variance_per_energy: needs format_version 2"),
            "{e}"
        );
        // Both keys or neither; values finite and >= 0.
        let mut s = settings(true);
        s.energy_reference = None;
        assert!(message(s.validate(1).unwrap_err()).contains("energy_reference: missing"));
        let mut s = settings(true);
        s.process_variance_per_energy = Some(vec![1e-9, -1.0]);
        assert!(message(s.validate(1).unwrap_err()).contains("process_variance_per_energy: -1"));
    }
}
