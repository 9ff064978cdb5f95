//! Comparison of two trajectory CSVs value by value (bit for bit, or within
//! a relative tolerance), naming the first difference.

use std::path::Path;

use anyhow::{bail, Context, Result};

/// Outcome of a comparison.
#[derive(Debug, PartialEq)]
pub enum Verdict {
    /// Every value matched.
    Same {
        /// Rows compared.
        rows: usize,
    },
    /// The first mismatch.
    Differs {
        /// 0-based data row (the step).
        step: usize,
        /// Column name.
        column: String,
        /// Value in A as written.
        a: String,
        /// Value in B as written.
        b: String,
    },
}

/// A value as written: `0x…` bit patterns are f32 bits, anything else a
/// decimal number rounded to the nearest f32 (the runtime's precision; the
/// shortest round-trip decimals `visviva rollout` writes parse back exactly).
fn value(s: &str, path: &Path, line: usize, col: &str) -> Result<f32> {
    let t = s.trim();
    if let Some(hex) = t.strip_prefix("0x") {
        let bits = u32::from_str_radix(hex, 16).with_context(|| {
            format!(
                "{}: line {line}, column {col}: '{t}' is not a bit pattern",
                path.display()
            )
        })?;
        return Ok(f32::from_bits(bits));
    }
    t.parse::<f32>().with_context(|| {
        format!(
            "{}: line {line}, column {col}: '{t}' is not a number",
            path.display()
        )
    })
}

/// Whether two values match: identical bits, or with `rel`, within the
/// relative tolerance. A NaN matches only a NaN of identical bits, in both
/// modes (no tolerance can say how far apart two NaNs are), so whatever is
/// bit-identical also matches within any tolerance.
pub fn values_match(x: f32, y: f32, rel: Option<f64>) -> bool {
    if x.to_bits() == y.to_bits() {
        return true;
    }
    match rel {
        Some(tol) if !x.is_nan() && !y.is_nan() => {
            let (x, y) = (f64::from(x), f64::from(y));
            x == y || (x - y).abs() <= tol * x.abs().max(y.abs())
        }
        _ => false,
    }
}

fn read(path: &Path) -> Result<(Vec<String>, Vec<csv::StringRecord>)> {
    let mut r =
        csv::Reader::from_path(path).with_context(|| format!("{}: cannot read", path.display()))?;
    let header: Vec<String> = r
        .headers()
        .with_context(|| format!("{}: line 1: cannot read the header", path.display()))?
        .iter()
        .map(str::to_string)
        .collect();
    if header.iter().all(|h| h.trim().is_empty()) {
        bail!(
            "{}: line 1: no header (an empty file); there is nothing to compare",
            path.display()
        );
    }
    let rows = r
        .records()
        .enumerate()
        .map(|(k, rec)| {
            rec.with_context(|| format!("{}: line {}: malformed row", path.display(), k + 2))
        })
        .collect::<Result<Vec<_>>>()?;
    if rows.is_empty() {
        bail!(
            "{}: line 2: no data rows after the header; there is nothing to compare",
            path.display()
        );
    }
    Ok((header, rows))
}

/// Compare two CSV files; `rel = None` means bit for bit.
pub fn compare(a: &Path, b: &Path, rel: Option<f64>) -> Result<Verdict> {
    let (ha, ra) = read(a)?;
    let (hb, rb) = read(b)?;
    if ha != hb {
        bail!(
            "{} and {} have different columns: {:?} vs {:?}",
            a.display(),
            b.display(),
            ha,
            hb
        );
    }
    for (k, (x, y)) in ra.iter().zip(&rb).enumerate() {
        for (c, col) in ha.iter().enumerate() {
            let (sx, sy) = (x.get(c).unwrap_or(""), y.get(c).unwrap_or(""));
            let vx = value(sx, a, k + 2, col)?;
            let vy = value(sy, b, k + 2, col)?;
            if !values_match(vx, vy, rel) {
                return Ok(Verdict::Differs {
                    step: k,
                    column: col.clone(),
                    a: sx.to_string(),
                    b: sy.to_string(),
                });
            }
        }
    }
    if ra.len() != rb.len() {
        let n = ra.len().min(rb.len());
        return Ok(Verdict::Differs {
            step: n,
            column: "(row count)".into(),
            a: format!("{} rows", ra.len()),
            b: format!("{} rows", rb.len()),
        });
    }
    Ok(Verdict::Same { rows: ra.len() })
}
