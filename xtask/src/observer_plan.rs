//! The firmware's observer plan (`VISVIVA_OBSERVER_PLAN`, layout in
//! `firmware-example/src/observe_plan.rs`): the observer settings file
//! `M.observer.toml` resolved to the `f32` values `visviva observe` computes
//! from it (trainer/src/deploy/observe.rs: variances as the square of the
//! standard deviation in `f64`, then rounded; an unmeasured first position
//! at the envelope's middle with the envelope's width as its spread), the
//! model steps between rows (`round((t - t_prev) / dt)`, as the host), and
//! the measurement sequence. Any difference from the host's resolution
//! would show as differing bits in the device check.

use std::path::Path;

use anyhow::{bail, ensure, Context, Result};

use crate::observer_sequence::SeqRow;

/// The settings file's values (format version 1, or 2 with the
/// energy-scaled process noise).
#[derive(Debug, Clone, PartialEq)]
pub struct Settings {
    pub position_noise: Vec<f64>,
    pub velocity_noise: Vec<f64>,
    pub process_variance: Vec<f64>,
    pub initial_momentum_std: Vec<f64>,
    pub window: u32,
    pub settle_updates: u32,
    pub false_alarm: String,
    pub envelope_low: Vec<f64>,
    pub envelope_high: Vec<f64>,
    pub energy_threshold: Option<f64>,
    /// Process variance per unit of energy above `energy_reference` (2n).
    pub process_variance_per_energy: Option<Vec<f64>>,
    pub energy_reference: Option<f64>,
}

fn numbers(table: &toml::Table, key: &str, len: usize) -> Result<Vec<f64>> {
    let values = table
        .get(key)
        .and_then(toml::Value::as_array)
        .with_context(|| format!("key `{key}`: missing or not a list"))?;
    let out = values
        .iter()
        .map(|v| v.as_float().or_else(|| v.as_integer().map(|i| i as f64)))
        .collect::<Option<Vec<f64>>>()
        .with_context(|| format!("key `{key}`: not a list of numbers"))?;
    ensure!(
        out.len() == len,
        "key `{key}`: {} values, expected {len}",
        out.len()
    );
    Ok(out)
}

fn integer(table: &toml::Table, key: &str) -> Result<u32> {
    table
        .get(key)
        .and_then(toml::Value::as_integer)
        .and_then(|i| u32::try_from(i).ok())
        .with_context(|| format!("key `{key}`: missing or not a count"))
}

impl Settings {
    /// Read `path` for a model with `n` degrees of freedom.
    pub fn read(path: &Path, n: usize) -> Result<Self> {
        let text =
            std::fs::read_to_string(path).with_context(|| format!("reading {}", path.display()))?;
        let t: toml::Table = text
            .parse()
            .with_context(|| format!("{}: not TOML", path.display()))?;
        let read = || -> Result<Self> {
            let version = integer(&t, "format_version")?;
            ensure!(
                version == 1 || version == 2,
                "format_version {version} is neither 1 nor 2"
            );
            let per_energy = match t.get("process_variance_per_energy") {
                Some(_) => Some(numbers(&t, "process_variance_per_energy", 2 * n)?),
                None => None,
            };
            Ok(Self {
                position_noise: numbers(&t, "position_noise", n)?,
                velocity_noise: numbers(&t, "velocity_noise", n)?,
                process_variance: numbers(&t, "process_variance", 2 * n)?,
                initial_momentum_std: numbers(&t, "initial_momentum_std", n)?,
                window: integer(&t, "window")?,
                settle_updates: integer(&t, "settle_updates")?,
                false_alarm: t
                    .get("false_alarm")
                    .and_then(toml::Value::as_str)
                    .context("key `false_alarm`: missing")?
                    .to_string(),
                envelope_low: numbers(&t, "envelope_low", 2 * n)?,
                envelope_high: numbers(&t, "envelope_high", 2 * n)?,
                energy_threshold: t.get("energy_threshold").and_then(toml::Value::as_float),
                process_variance_per_energy: per_energy,
                energy_reference: t.get("energy_reference").and_then(toml::Value::as_float),
            })
        };
        read().with_context(|| format!("{}", path.display()))
    }

    /// The plan's false-alarm code.
    fn alarm_code(&self) -> Result<u32> {
        Ok(match self.false_alarm.trim() {
            "10%" => 0,
            "5%" => 1,
            "1%" => 2,
            "0.2%" => 3,
            other => bail!("false_alarm `{other}`"),
        })
    }

    /// The energy-scaled process noise as the host applies it: both the
    /// slope and the reference given (trainer/src/deploy/observe.rs).
    fn energy_scaled(&self) -> Option<(&[f64], f64)> {
        match (&self.process_variance_per_energy, self.energy_reference) {
            (Some(slope), Some(reference)) => Some((slope, reference)),
            _ => None,
        }
    }

    /// The 13 n constants in plan order.
    fn constants(&self) -> Vec<f32> {
        let n = self.position_noise.len();
        let square = |v: &[f64]| v.iter().map(|s| (s * s) as f32).collect::<Vec<f32>>();
        let f32s = |v: &[f64]| v.iter().map(|x| *x as f32).collect::<Vec<f32>>();
        let mut out = square(&self.position_noise);
        out.extend(square(&self.velocity_noise));
        out.extend(f32s(&self.process_variance));
        out.extend(square(&self.initial_momentum_std));
        for i in 0..n {
            let sd = (self.envelope_high[i] - self.envelope_low[i]).max(1e-30);
            out.push((sd * sd) as f32);
        }
        for i in 0..n {
            out.push((0.5 * (self.envelope_low[i] + self.envelope_high[i])) as f32);
        }
        out.extend(f32s(&self.envelope_low));
        out.extend(f32s(&self.envelope_high));
        match self.energy_scaled() {
            Some((slope, _)) => out.extend(f32s(slope)),
            None => out.extend(std::iter::repeat_n(0.0f32, 2 * n)),
        }
        out
    }
}

/// Model steps from `last` to `t` with step `dt`, as `visviva observe`
/// counts them (a whole number within 1 % of a step, at least one).
fn steps_between(last: f64, t: f64, dt: f64) -> Result<u32> {
    let k = ((t - last) / dt).round();
    ensure!(
        k >= 1.0 && ((t - last) - k * dt).abs() <= 0.01 * dt && k <= 100_000.0,
        "time {t} is not a whole number of model steps (dt = {dt} s) after {last}"
    );
    Ok(k as u32)
}

/// The plan's bytes for a model with `dt` (its integrator's step) and
/// `inputs` inputs.
pub fn to_bytes(settings: &Settings, rows: &[SeqRow], dt: f32, inputs: usize) -> Result<Vec<u8>> {
    let first = rows.first().context("empty measurement sequence")?;
    let n = first.q.len();
    let velocities = !first.v.is_empty();
    let mut words: Vec<u32> = vec![
        u32::from_le_bytes(*b"VOBS"),
        2,
        n as u32,
        inputs as u32,
        u32::from(velocities),
        settings.window,
        settings.alarm_code()?,
        settings.settle_updates,
        settings
            .energy_threshold
            .map_or(f32::INFINITY, |t| t as f32)
            .to_bits(),
        settings
            .energy_scaled()
            .map_or(f32::NAN, |(_, reference)| reference as f32)
            .to_bits(),
        rows.len() as u32,
    ];
    words.extend(settings.constants().iter().map(|v| v.to_bits()));
    let mut last: Option<&SeqRow> = None;
    for (i, r) in rows.iter().enumerate() {
        ensure!(
            r.q.len() == n && r.v.len() == if velocities { n } else { 0 } && r.u.len() == inputs,
            "sequence row {i}: wrong number of fields"
        );
        let steps = match last {
            Some(prev) if prev.traj == r.traj => steps_between(prev.t, r.t, f64::from(dt))
                .with_context(|| format!("sequence row {i}"))?,
            _ => 0,
        };
        last = Some(r);
        let channels: Vec<Option<f64>> = r.q.iter().chain(&r.v).copied().collect();
        let mask = channels
            .iter()
            .enumerate()
            .filter(|(_, c)| c.is_some())
            .fold(0u32, |m, (c, _)| m | 1 << c);
        words.push(steps);
        words.push(mask);
        words.extend(channels.iter().map(|c| (c.unwrap_or(0.0) as f32).to_bits()));
        words.extend(r.u.iter().map(|u| (*u as f32).to_bits()));
    }
    Ok(words.iter().flat_map(|w| w.to_le_bytes()).collect())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn settings() -> Settings {
        Settings {
            position_noise: vec![0.5],
            velocity_noise: vec![2.0],
            process_variance: vec![0.25, 1.0],
            initial_momentum_std: vec![3.0],
            window: 50,
            settle_updates: 20,
            false_alarm: "1%".into(),
            envelope_low: vec![-1.0, -4.0],
            envelope_high: vec![3.0, 4.0],
            energy_threshold: None,
            process_variance_per_energy: None,
            energy_reference: None,
        }
    }

    fn row(traj: &str, t: f64, q: Option<f64>, u: f64) -> SeqRow {
        SeqRow {
            traj: traj.into(),
            t,
            q: vec![q],
            v: Vec::new(),
            u: vec![u],
        }
    }

    fn words(bytes: &[u8]) -> Vec<u32> {
        bytes
            .chunks_exact(4)
            .map(|c| u32::from_le_bytes([c[0], c[1], c[2], c[3]]))
            .collect()
    }

    #[test]
    fn the_plan_holds_the_resolved_settings_and_the_rows() {
        let rows = [
            row("0", 0.0, Some(0.5), 1.0),
            row("0", 0.1, None, 2.0),
            row("0", 0.2, Some(-2.0), 3.0),
            row("1", 5.0, Some(1.5), 4.0),
        ];
        let w = words(&to_bytes(&settings(), &rows, 0.05, 1).unwrap());
        assert_eq!(&w[..2], &[u32::from_le_bytes(*b"VOBS"), 2]);
        // n, m, velocities, window, 1 % = code 2, settle, no threshold,
        // constant process noise (NaN reference), rows.
        assert_eq!(&w[2..8], &[1, 1, 0, 50, 2, 20]);
        assert_eq!(f32::from_bits(w[8]), f32::INFINITY);
        assert!(f32::from_bits(w[9]).is_nan());
        assert_eq!(w[10], 4);
        // Variances are squared standard deviations; the unmeasured start is
        // the envelope's middle with its width as the spread; no growth with
        // the energy.
        let c: Vec<f32> = w[11..24].iter().map(|b| f32::from_bits(*b)).collect();
        assert_eq!(
            c,
            [0.25, 4.0, 0.25, 1.0, 9.0, 16.0, 1.0, -1.0, -4.0, 3.0, 4.0, 0.0, 0.0]
        );
        // Rows: steps (0 starts a trajectory; 0.1 s / 0.05 s = 2), mask,
        // value, input.
        let r: Vec<&[u32]> = w[24..].chunks(4).collect();
        assert_eq!(r[0], &[0, 1, 0.5f32.to_bits(), 1.0f32.to_bits()]);
        assert_eq!(r[1], &[2, 0, 0, 2.0f32.to_bits()]);
        assert_eq!(r[2][..2], [2, 1]);
        assert_eq!(r[3][..2], [0, 1]);
    }

    #[test]
    fn the_energy_scaled_process_noise_rides_in_the_header_and_the_last_block() {
        let mut s = settings();
        s.process_variance_per_energy = Some(vec![0.125, 0.5]);
        s.energy_reference = Some(-0.75);
        let rows = [row("0", 0.0, Some(0.5), 1.0)];
        let w = words(&to_bytes(&s, &rows, 0.05, 1).unwrap());
        assert_eq!(f32::from_bits(w[9]), -0.75);
        assert_eq!(f32::from_bits(w[22]), 0.125);
        assert_eq!(f32::from_bits(w[23]), 0.5);
        // A slope without its reference is not applied (as on the host).
        s.energy_reference = None;
        let w = words(&to_bytes(&s, &rows, 0.05, 1).unwrap());
        assert!(f32::from_bits(w[9]).is_nan());
        assert_eq!(&w[22..24], &[0, 0]);
    }

    #[test]
    fn a_row_off_the_step_grid_is_refused() {
        let rows = [
            row("0", 0.0, Some(0.5), 0.0),
            row("0", 0.07, Some(0.5), 0.0),
        ];
        let err = format!("{:#}", to_bytes(&settings(), &rows, 0.05, 1).unwrap_err());
        assert!(
            err.contains("row 1") && err.contains("whole number"),
            "{err}"
        );
    }
}
