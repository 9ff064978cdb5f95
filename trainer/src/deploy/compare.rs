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
fn value(s: &str, path: &Path, line: usize, col: &str) -> Result<f64> {
    let t = s.trim();
    if let Some(hex) = t.strip_prefix("0x") {
        let bits = u32::from_str_radix(hex, 16).with_context(|| {
            format!(
                "{}: line {line}, column {col}: '{t}' is not a bit pattern",
                path.display()
            )
        })?;
        return Ok(f32::from_bits(bits) as f64);
    }
    t.parse::<f32>().map(f64::from).with_context(|| {
        format!(
            "{}: line {line}, column {col}: '{t}' is not a number",
            path.display()
        )
    })
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
    let rows = r
        .records()
        .enumerate()
        .map(|(k, rec)| {
            rec.with_context(|| format!("{}: line {}: malformed row", path.display(), k + 2))
        })
        .collect::<Result<Vec<_>>>()?;
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
            let same = match rel {
                None => vx.to_bits() == vy.to_bits() || (vx.is_nan() && vy.is_nan()),
                Some(tol) => vx == vy || (vx - vy).abs() <= tol * vx.abs().max(vy.abs()),
            };
            if !same {
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
