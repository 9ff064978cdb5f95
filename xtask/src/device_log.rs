//! Parsing the firmware's decoded defmt log (`defmt-print --log-format {s}`)
//! into its facts: bounds, FPU status, calibration, model cost, every logged
//! state's bit patterns, every observer estimate's (the harness built with
//! `observe`), timing, stack use and errors.

use std::collections::HashMap;

use anyhow::{anyhow, Context, Result};

/// Everything the firmware reported.
#[derive(Debug, Default)]
pub struct DeviceLog {
    /// (max_dof, max_width) the firmware was built with.
    pub bounds: Option<(u32, u32)>,
    /// CPACR grants full access to CP10/CP11 (the FPU).
    pub fpu_enabled: Option<bool>,
    /// (loop instructions, ticks, reading overhead ticks).
    pub calibration: Option<(u32, u32, u32)>,
    /// Multiply-accumulates per step as the device computed them.
    pub macs_per_step: Option<u32>,
    /// (steps timed, SysTick ticks inside `step`).
    pub timing: Option<(u32, u64)>,
    /// (stack bytes used, stack region bytes).
    pub stack: Option<(u32, u32)>,
    /// The firmware reached its end.
    pub done: bool,
    /// Lines that report an error.
    pub errors: Vec<String>,
    /// (initial state, step) -> bit patterns of q1..qn, p1..pn.
    pub states: HashMap<(u32, u32), Vec<u32>>,
    /// Observer row -> the update's words (firmware-example/src/observe.rs:
    /// q, p, v, NIS, count, window sum, window count, energy residual,
    /// flags).
    pub estimates: HashMap<u32, Vec<u32>>,
    /// The observer's timing: (updates, predictions, SysTick ticks in the
    /// predictions, ticks in the updates with the monitor).
    pub observer_timing: Option<ObserverTiming>,
}

/// What the observer harness timed.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ObserverTiming {
    pub updates: u32,
    pub predicts: u32,
    pub predict_ticks: u64,
    pub update_ticks: u64,
}

fn field<T: std::str::FromStr>(line: &str, key: &str) -> Option<T> {
    line.split_whitespace()
        .find_map(|t| t.strip_prefix(key)?.strip_prefix('='))
        .and_then(|v| v.parse().ok())
}

/// `<indices> [b0, b1, ...]`: the indices and the bytes as little-endian
/// 32-bit words.
fn indexed_words(rest: &str) -> Result<(Vec<u32>, Vec<u32>)> {
    let (head, list) = rest.split_once('[').context("no byte list")?;
    let indices = head
        .split_whitespace()
        .map(str::parse::<u32>)
        .collect::<Result<Vec<u32>, _>>()?;
    let bytes = list
        .trim_end()
        .strip_suffix(']')
        .context("unterminated byte list")?
        .split(',')
        .map(|b| b.trim().parse::<u8>())
        .collect::<Result<Vec<u8>, _>>()?;
    if bytes.len() % 4 != 0 {
        return Err(anyhow!("{} bytes is not whole f32 values", bytes.len()));
    }
    let words = bytes
        .chunks_exact(4)
        .map(|c| u32::from_le_bytes([c[0], c[1], c[2], c[3]]))
        .collect();
    Ok((indices, words))
}

fn parse_state(line: &str) -> Result<((u32, u32), Vec<u32>)> {
    let rest = line.strip_prefix("x ").context("not a state line")?;
    let (indices, words) = indexed_words(rest)?;
    match indices[..] {
        [s, k] => Ok(((s, k), words)),
        _ => Err(anyhow!("expected a state and a step index")),
    }
}

fn parse_estimate(line: &str) -> Result<(u32, Vec<u32>)> {
    let rest = line.strip_prefix("o ").context("not an estimate line")?;
    let (indices, words) = indexed_words(rest)?;
    match indices[..] {
        [r] => Ok((r, words)),
        _ => Err(anyhow!("expected one row index")),
    }
}

fn observer_timing(line: &str) -> Option<ObserverTiming> {
    Some(ObserverTiming {
        updates: field(line, "updates")?,
        predicts: field(line, "predicts")?,
        predict_ticks: field(line, "predict_ticks")?,
        update_ticks: field(line, "update_ticks")?,
    })
}

/// Parse a decoded log.
pub fn parse(text: &str) -> Result<DeviceLog> {
    let mut log = DeviceLog::default();
    for (i, line) in text.lines().enumerate() {
        let line = line.trim();
        if line.starts_with("x ") {
            let (key, words) = parse_state(line)
                .with_context(|| format!("device log line {}: `{line}`", i + 1))?;
            log.states.insert(key, words);
        } else if line.starts_with("o ") {
            let (row, words) = parse_estimate(line)
                .with_context(|| format!("device log line {}: `{line}`", i + 1))?;
            log.estimates.insert(row, words);
        } else if line.starts_with("visviva-fw observer timing") {
            log.observer_timing = observer_timing(line);
        } else if line.starts_with("visviva-fw error") {
            log.errors.push(line.to_string());
        } else if line.starts_with("visviva-fw bounds") {
            log.bounds = field(line, "max_dof").zip(field(line, "max_width"));
        } else if line.starts_with("visviva-fw fpu") {
            log.fpu_enabled = field(line, "cp10_cp11_full_access");
        } else if line.starts_with("visviva-fw calib") {
            log.calibration = match (
                field(line, "loop_instructions"),
                field(line, "ticks"),
                field(line, "overhead_ticks"),
            ) {
                (Some(a), Some(b), Some(c)) => Some((a, b, c)),
                _ => None,
            };
        } else if line.starts_with("visviva-fw model") {
            log.macs_per_step = field(line, "macs_per_step");
        } else if line.starts_with("visviva-fw timing") {
            log.timing = field(line, "steps").zip(field(line, "ticks"));
        } else if line.starts_with("visviva-fw stack") {
            log.stack = field(line, "used").zip(field(line, "size"));
        } else if line == "visviva-fw done" {
            log.done = true;
        }
    }
    Ok(log)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn state_bytes_become_ieee754_bit_patterns() {
        // IEEE 754 binary32: 1.0 = 0x3F80_0000, -2.0 = 0xC000_0000; the
        // firmware sends each value as little-endian bytes.
        let log = parse("x 1 7 [0, 0, 128, 63, 0, 0, 0, 192]\nvisviva-fw done\n").unwrap();
        let words = &log.states[&(1, 7)];
        assert_eq!(words, &vec![0x3F80_0000, 0xC000_0000]);
        assert_eq!(f32::from_bits(words[0]), 1.0);
        assert_eq!(f32::from_bits(words[1]), -2.0);
        assert!(log.done);
    }

    #[test]
    fn key_value_lines_and_errors_are_read() {
        let text = "visviva-fw calib loop_instructions=200000 ticks=320001 overhead_ticks=3\n\
                    visviva-fw timing steps=20000 ticks=1650116524\n\
                    visviva-fw error: blob refused: BadMagic (not a Visviva model blob)\n";
        let log = parse(text).unwrap();
        assert_eq!(log.calibration, Some((200_000, 320_001, 3)));
        assert_eq!(log.timing, Some((20_000, 1_650_116_524)));
        assert_eq!(log.errors.len(), 1);
        assert!(!log.done);
    }

    #[test]
    fn estimate_lines_and_observer_timing_are_read() {
        // IEEE 754 binary32: 0.5 = 0x3F00_0000; the count 2 as a u32 word.
        let text = "o 12 [0, 0, 0, 63, 2, 0, 0, 0]\n\
                    visviva-fw observer timing updates=300 predicts=1495 predict_ticks=9 update_ticks=7\n";
        let log = parse(text).unwrap();
        assert_eq!(log.estimates[&12], vec![0x3F00_0000, 2]);
        let t = log.observer_timing.unwrap();
        assert_eq!(
            (t.updates, t.predicts, t.predict_ticks, t.update_ticks),
            (300, 1495, 9, 7)
        );
        assert!(parse("o 1 2 [0, 0, 0, 0]\n").is_err());
    }

    #[test]
    fn a_torn_state_line_is_an_error_naming_the_line() {
        let err = parse("visviva-fw done\nx 0 1 [1, 2, 3]\n").unwrap_err();
        assert!(format!("{err:#}").contains("line 2"));
    }
}
