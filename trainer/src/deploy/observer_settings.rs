//! The observer settings of one blob, kept in a small companion TOML file
//! beside it (`M.observer.toml` next to `M.vvb`) rather than in the blob:
//! the noise figures are tuned after export, from logs, and may be retuned
//! for another sensor without touching the verified blob. The file carries
//! its own `format_version` (this reader takes version 1 only) and refuses
//! unknown keys with their name.

use std::path::{Path, PathBuf};

use anyhow::{anyhow, bail, Context, Result};
use serde::{Deserialize, Serialize};
use visviva_runtime::monitor::FalseAlarm;

use crate::atomic::write_atomic;

/// The version this build writes and reads.
pub const SETTINGS_VERSION: u32 = 1;

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
    /// (q1..qn, p1..pn).
    pub process_variance: Vec<f64>,
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
        if self.format_version != SETTINGS_VERSION {
            bail!(
                "format_version {}: this build reads version {SETTINGS_VERSION}",
                self.format_version
            );
        }
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

    /// Read and validate a settings file for a model with `dof` degrees of
    /// freedom.
    pub fn read(path: &Path, dof: usize) -> Result<Self> {
        let text = std::fs::read_to_string(path)
            .map_err(|e| anyhow!("{}: cannot read: {e}", path.display()))?;
        let s: Self = toml::from_str(&text).map_err(|e| anyhow!("{}: {e}", path.display()))?;
        s.validate(dof)
            .with_context(|| format!("{}", path.display()))?;
        Ok(s)
    }

    /// Write the settings atomically.
    pub fn write(&self, path: &Path) -> Result<()> {
        let body = toml::to_string(self)?;
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
