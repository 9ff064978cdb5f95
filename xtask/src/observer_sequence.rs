//! The recorded measurement sequences of the device observer check: rows
//! taken from a demo project's committed log (positions, optionally
//! velocities and inputs), with a fixed pattern of fields left empty so the
//! observer's predict-only steps (a missed sample) and partial updates are
//! covered. Written as the measurement CSV `visviva observe` reads; the same
//! rows go into the firmware's observer plan (`observer_plan`).

use std::path::Path;

use anyhow::{bail, Context, Result};

/// One row of a measurement sequence.
#[derive(Debug, Clone, PartialEq)]
pub struct SeqRow {
    pub traj: String,
    pub t: f64,
    /// Measured positions (None: missed sample).
    pub q: Vec<Option<f64>>,
    /// Measured velocities (empty: the sequence has no velocity columns).
    pub v: Vec<Option<f64>>,
    /// Inputs u1..um.
    pub u: Vec<f64>,
}

/// Which fields of row `i` (0-based over the whole sequence) are left empty.
#[derive(Debug, Clone, Copy)]
pub struct Gaps {
    /// Every position of rows with `i % period == phase` (0: none).
    pub q_every: (usize, usize),
    /// Every velocity of rows with `i % period == phase` (0: none).
    pub v_every: (usize, usize),
    /// Every field of rows `start..end` (a run of missed samples).
    pub run: (usize, usize),
}

/// Where a sequence comes from: a demo log, the rows taken from each
/// trajectory, the columns, the gaps.
#[derive(Debug, Clone, Copy)]
pub struct SeqSource {
    /// Log file, relative to the workspace root.
    pub log: &'static str,
    /// (trajectory id, rows from its start).
    pub take: &'static [(&'static str, usize)],
    /// Column whose values become the velocity measurements v1..vn (the
    /// suffix is the coordinate number), e.g. "dq"; None: positions only.
    pub velocity_prefix: Option<&'static str>,
    pub gaps: Gaps,
}

fn hits(i: usize, (period, phase): (usize, usize)) -> bool {
    period > 0 && i % period == phase
}

/// Column indices `prefix1..prefixN`, contiguous from 1.
fn numbered(header: &[&str], prefix: &str) -> Vec<usize> {
    (1..)
        .map_while(|k| header.iter().position(|h| *h == format!("{prefix}{k}")))
        .collect()
}

/// Read the source log and build the sequence.
pub fn build(root: &Path, src: &SeqSource) -> Result<Vec<SeqRow>> {
    let path = root.join(src.log);
    let text =
        std::fs::read_to_string(&path).with_context(|| format!("reading {}", path.display()))?;
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap_or_default().split(',').collect();
    let col = |name: &str| {
        header
            .iter()
            .position(|h| *h == name)
            .with_context(|| format!("{}: no column `{name}`", path.display()))
    };
    let (traj, t) = (col("traj")?, col("t")?);
    let q = numbered(&header, "q");
    let v = src
        .velocity_prefix
        .map_or(Vec::new(), |p| numbered(&header, p));
    let u = numbered(&header, "u");
    if q.is_empty() || src.velocity_prefix.is_some() && v.len() != q.len() {
        bail!(
            "{}: expected q1..qn and as many velocity columns",
            path.display()
        );
    }
    let mut taken = vec![0usize; src.take.len()];
    let mut rows = Vec::new();
    for (n, line) in lines.enumerate() {
        let fields: Vec<&str> = line.split(',').collect();
        let number = |c: usize| -> Result<f64> {
            fields
                .get(c)
                .and_then(|f| f.parse().ok())
                .with_context(|| format!("{}: line {}, column {}", path.display(), n + 2, c + 1))
        };
        let id = fields.get(traj).copied().unwrap_or_default();
        let Some(k) = src.take.iter().position(|(want, _)| *want == id) else {
            continue;
        };
        if taken[k] >= src.take[k].1 {
            continue;
        }
        taken[k] += 1;
        let i = rows.len();
        let missed = (src.gaps.run.0..src.gaps.run.1).contains(&i);
        let qi = !missed && !hits(i, src.gaps.q_every);
        let vi = !missed && !hits(i, src.gaps.v_every);
        rows.push(SeqRow {
            traj: id.to_string(),
            t: number(t)?,
            q: q.iter()
                .map(|&c| number(c).map(|x| qi.then_some(x)))
                .collect::<Result<_>>()?,
            v: v.iter()
                .map(|&c| number(c).map(|x| vi.then_some(x)))
                .collect::<Result<_>>()?,
            u: u.iter().map(|&c| number(c)).collect::<Result<_>>()?,
        });
    }
    if taken
        .iter()
        .zip(src.take)
        .any(|(got, (_, want))| got != want)
    {
        bail!(
            "{}: fewer rows than the sequence takes ({taken:?} of {:?})",
            path.display(),
            src.take
        );
    }
    Ok(rows)
}

/// Write `rows` as a measurement log (`traj,t,q*,v*,u*`; an empty field is
/// a missed sample). Decimals are Rust's shortest round-trip form, so
/// `visviva observe` reads back exactly these `f64` values.
pub fn write_csv(rows: &[SeqRow], path: &Path) -> Result<()> {
    let Some(first) = rows.first() else {
        bail!("empty measurement sequence");
    };
    let mut out = String::from("traj,t");
    for (prefix, len) in [
        ("q", first.q.len()),
        ("v", first.v.len()),
        ("u", first.u.len()),
    ] {
        for k in 1..=len {
            out.push_str(&format!(",{prefix}{k}"));
        }
    }
    out.push('\n');
    let field = |x: &Option<f64>| x.map_or(String::new(), |x| format!("{x}"));
    for r in rows {
        out.push_str(&format!("{},{}", r.traj, r.t));
        for x in r.q.iter().chain(&r.v) {
            out.push(',');
            out.push_str(&field(x));
        }
        for x in &r.u {
            out.push_str(&format!(",{x}"));
        }
        out.push('\n');
    }
    std::fs::write(path, out).with_context(|| format!("writing {}", path.display()))
}
