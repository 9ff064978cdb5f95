//! Measurement logs for the state observer, read one row at a time so memory
//! stays bounded by the model, not by the log's length.
//!
//! Columns: `traj`, `t`, `q1..qn` (measured positions, n = the model's
//! degrees of freedom), optionally `v1..vn` (measured velocities) and, for a
//! driven model, its inputs `u1..um`. An empty q or v field is a missed
//! sample (the observer only predicts at that tick); `traj`, `t` and `u`
//! fields are always required. Other columns (e.g. `p*` or derivative
//! columns of a training log) are ignored. Every error names the file, the
//! 1-based line (header = 1) and the column.

use std::fs::File;
use std::path::{Path, PathBuf};

use anyhow::{anyhow, bail, Result};

/// One row of a measurement log.
#[derive(Debug, Clone, PartialEq)]
pub struct MeasurementRow {
    /// 1-based line in the file.
    pub line: u64,
    /// Trajectory id.
    pub traj: String,
    /// Time (s).
    pub t: f64,
    /// Measured positions (`None`: missed sample).
    pub q: Vec<Option<f64>>,
    /// Measured velocities (empty when the log has no `v*` columns).
    pub v: Vec<Option<f64>>,
    /// Inputs u1..um.
    pub u: Vec<f64>,
}

/// Column indices of a measurement log.
#[derive(Debug, Clone)]
struct Columns {
    traj: usize,
    t: usize,
    q: Vec<usize>,
    v: Vec<usize>,
    u: Vec<usize>,
    names: Vec<String>,
}

/// A streaming reader of a measurement log for a model with `dof` degrees
/// of freedom and `inputs` inputs.
pub struct MeasurementReader {
    file: PathBuf,
    reader: csv::Reader<File>,
    columns: Columns,
    record: csv::StringRecord,
}

/// `prefix1..prefixN` contiguous from 1.
fn numbered(names: &[String], prefix: &str) -> Vec<usize> {
    (1..)
        .map_while(|k| names.iter().position(|n| *n == format!("{prefix}{k}")))
        .collect()
}

/// Whether `name` is `prefix` followed by digits only.
fn is_numbered(name: &str, prefix: &str) -> bool {
    name.strip_prefix(prefix)
        .is_some_and(|k| !k.is_empty() && k.bytes().all(|b| b.is_ascii_digit()))
}

/// The header's layout checked against the model: n q columns, none or n v
/// columns, exactly m u columns, no stray numbered q/v/u column.
fn layout(file: &Path, names: Vec<String>, dof: usize, inputs: usize) -> Result<Columns> {
    let at =
        |col: &str, what: String| anyhow!("{}: line 1, column '{col}': {what}", file.display());
    let find = |name: &str| {
        names
            .iter()
            .position(|n| n == name)
            .ok_or_else(|| at(name, "required column is missing".into()))
    };
    let (traj, t) = (find("traj")?, find("t")?);
    let (q, v, u) = (
        numbered(&names, "q"),
        numbered(&names, "v"),
        numbered(&names, "u"),
    );
    if q.len() != dof {
        let col = format!("q{}", q.len().min(dof) + 1);
        return Err(at(
            &col,
            format!(
                "the model has {dof} degrees of freedom but the log has {} q columns",
                q.len()
            ),
        ));
    }
    if !v.is_empty() && v.len() != dof {
        let col = format!("v{}", v.len().min(dof) + 1);
        return Err(at(
            &col,
            format!("{} v columns; velocities need all {dof} or none", v.len()),
        ));
    }
    if u.len() != inputs {
        let col = format!("u{}", u.len().min(inputs) + 1);
        return Err(at(
            &col,
            format!(
                "the model takes {inputs} inputs but the log has {} u columns",
                u.len()
            ),
        ));
    }
    for (i, name) in names.iter().enumerate() {
        let used = q.contains(&i) || v.contains(&i) || u.contains(&i);
        if !used && ["q", "v", "u"].iter().any(|p| is_numbered(name, p)) {
            return Err(at(
                name,
                format!("column does not fit the numbering 1..{dof}"),
            ));
        }
    }
    Ok(Columns {
        traj,
        t,
        q,
        v,
        u,
        names,
    })
}

impl MeasurementReader {
    /// Open `file` and check its header against the model's sizes.
    pub fn open(file: &Path, dof: usize, inputs: usize) -> Result<Self> {
        let mut reader = csv::ReaderBuilder::new()
            .has_headers(true)
            .trim(csv::Trim::All)
            .from_path(file)
            .map_err(|e| anyhow!("{}: cannot read file: {e}", file.display()))?;
        let names: Vec<String> = reader
            .headers()
            .map_err(|e| anyhow!("{}: line 1: malformed CSV: {e}", file.display()))?
            .iter()
            .map(str::to_string)
            .collect();
        let columns = layout(file, names, dof, inputs)?;
        Ok(Self {
            file: file.to_path_buf(),
            reader,
            columns,
            record: csv::StringRecord::new(),
        })
    }

    /// Whether the log carries velocity columns.
    pub fn has_velocities(&self) -> bool {
        !self.columns.v.is_empty()
    }

    /// The next row, `None` at the end of the file.
    pub fn next_row(&mut self) -> Result<Option<MeasurementRow>> {
        let more = self.reader.read_record(&mut self.record).map_err(|e| {
            let line = e.position().map_or(0, |p| p.line());
            anyhow!("{}: line {line}: malformed CSV: {e}", self.file.display())
        })?;
        if !more {
            return Ok(None);
        }
        let line = self.record.position().map_or(0, |p| p.line());
        let c = &self.columns;
        let traj = self.record.get(c.traj).unwrap_or("").to_string();
        let t = self.number(line, c.t)?;
        let q =
            c.q.iter()
                .map(|&i| self.optional(line, i))
                .collect::<Result<_>>()?;
        let v =
            c.v.iter()
                .map(|&i| self.optional(line, i))
                .collect::<Result<_>>()?;
        let u =
            c.u.iter()
                .map(|&i| self.number(line, i))
                .collect::<Result<_>>()?;
        Ok(Some(MeasurementRow {
            line,
            traj,
            t,
            q,
            v,
            u,
        }))
    }

    /// A required finite number in column `col`.
    fn number(&self, line: u64, col: usize) -> Result<f64> {
        self.optional(line, col)?.ok_or_else(|| {
            anyhow!(
                "{}: line {line}, column '{}': the field is empty",
                self.file.display(),
                self.columns.names[col]
            )
        })
    }

    /// A finite number, or `None` for an empty field.
    fn optional(&self, line: u64, col: usize) -> Result<Option<f64>> {
        let text = self.record.get(col).unwrap_or("");
        if text.is_empty() {
            return Ok(None);
        }
        let name = &self.columns.names[col];
        let v: f64 = text.parse().map_err(|_| {
            anyhow!(
                "{}: line {line}, column '{name}': '{text}' is not a number",
                self.file.display()
            )
        })?;
        if !v.is_finite() {
            bail!(
                "{}: line {line}, column '{name}': '{text}' is not finite",
                self.file.display()
            );
        }
        Ok(Some(v))
    }
}
