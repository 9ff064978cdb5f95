//! Logs as rigs write them: the `[columns]` mapping from the logger's own
//! column names to time, trajectory id, coordinates `q`, velocities `v`,
//! momenta `p` and inputs `u`, each with a scale into SI units (encoder
//! counts per revolution -> rad, mm -> m, ms -> s) and a unit for the report.
//!
//! Reading a mapped log: every field checked (errors name the file, the
//! 1-based line and the logger's column), time increasing within a
//! trajectory, trajectories split where a step exceeds `gap_factor` times
//! the log's median step (the gaps are counted, pieces shorter than the
//! derivative filter dropped and counted), the quantization step of each
//! coordinate declared or estimated from the values, and a per-coordinate
//! noise estimate that never goes below the quantization's own
//! (step / sqrt(12), uniform rounding error: common practice).
//!
//! A log with only `q` (and optionally `u`) is valid: velocities are
//! estimated (Savitzky-Golay) and momenta formed as p = m v with the stated
//! masses, or unit masses when none are stated (the energy scale cannot be
//! learned from positions, so it is fixed this way and said so).

use std::collections::HashMap;
use std::fmt;
use std::path::{Path, PathBuf};

use ndarray::Array2;
use serde::{Deserialize, Serialize};

use crate::data::dataset::{Dataset, DerivativeSource, Trajectory};
use crate::data::derivative::SavitzkyGolay;

/// One mapped column as written in the project file.
#[derive(Debug, Clone, Deserialize, Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
struct RawColumn {
    column: String,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    scale: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    counts_per_rev: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    unit: Option<String>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    quantization: Option<f64>,
}

/// One logger column and how to read it: SI value = raw value x `scale`.
#[derive(Debug, Clone, Deserialize, Serialize, PartialEq)]
#[serde(try_from = "RawColumn", into = "RawColumn")]
pub struct ColumnSpec {
    /// The logger's column name.
    pub column: String,
    /// Factor from the logged number to the SI value.
    pub scale: f64,
    /// Unit of the scaled value, for the report (e.g. "rad").
    pub unit: Option<String>,
    /// Quantization step in the logger's raw units (1 for encoder counts),
    /// when declared.
    pub quantization: Option<f64>,
    counts_per_rev: Option<f64>,
}

impl TryFrom<RawColumn> for ColumnSpec {
    type Error = String;

    fn try_from(r: RawColumn) -> Result<Self, String> {
        let name = &r.column;
        if name.trim().is_empty() {
            return Err("column name is empty".into());
        }
        let scale = match (r.scale, r.counts_per_rev) {
            (Some(_), Some(_)) => {
                return Err(format!(
                    "column '{name}': give scale or counts_per_rev, not both"
                ))
            }
            (_, Some(c)) if !(c.is_finite() && c > 0.0) => {
                return Err(format!(
                    "column '{name}': counts_per_rev = {c} must be a finite positive number"
                ))
            }
            (_, Some(c)) => std::f64::consts::TAU / c,
            (Some(s), None) if !(s.is_finite() && s != 0.0) => {
                return Err(format!(
                    "column '{name}': scale = {s} must be finite and non-zero"
                ))
            }
            (Some(s), None) => s,
            (None, None) => 1.0,
        };
        if let Some(qs) = r.quantization {
            if !(qs.is_finite() && qs > 0.0) {
                return Err(format!(
                    "column '{name}': quantization = {qs} must be a finite positive step (raw units)"
                ));
            }
        }
        let counts = r.counts_per_rev.is_some();
        Ok(Self {
            unit: r.unit.or_else(|| counts.then(|| "rad".to_string())),
            quantization: r.quantization.or(counts.then_some(1.0)),
            column: r.column,
            scale,
            counts_per_rev: r.counts_per_rev,
        })
    }
}

impl From<ColumnSpec> for RawColumn {
    fn from(c: ColumnSpec) -> Self {
        let counts = c.counts_per_rev.is_some();
        Self {
            column: c.column,
            scale: (!counts).then_some(c.scale),
            counts_per_rev: c.counts_per_rev,
            unit: c.unit,
            quantization: c.quantization,
        }
    }
}

impl ColumnSpec {
    /// A column read as it is (scale 1).
    pub fn plain(column: &str) -> Self {
        Self {
            column: column.into(),
            scale: 1.0,
            unit: None,
            quantization: None,
            counts_per_rev: None,
        }
    }
}

/// The `[columns]` table as written.
#[derive(Debug, Clone, Deserialize, Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
struct RawColumnMap {
    t: ColumnSpec,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    traj: Option<String>,
    q: Vec<ColumnSpec>,
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    v: Vec<ColumnSpec>,
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    p: Vec<ColumnSpec>,
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    u: Vec<ColumnSpec>,
    #[serde(default = "default_gap_factor")]
    gap_factor: f64,
}

fn default_gap_factor() -> f64 {
    1.5
}

/// The `[columns]` mapping: logger columns to `t`, `traj`, `q1..qn`
/// (`q[0]` is q1), `v1..vn` or `p1..pn` (optional) and `u1..um`.
#[derive(Debug, Clone, Deserialize, Serialize, PartialEq)]
#[serde(try_from = "RawColumnMap", into = "RawColumnMap")]
pub struct ColumnMap {
    /// Time column (scale to seconds, e.g. 0.001 for ms).
    pub t: ColumnSpec,
    /// Trajectory id column; without it the log is one run split at gaps.
    pub traj: Option<String>,
    /// Coordinates q1..qn.
    pub q: Vec<ColumnSpec>,
    /// Velocities v1..vn (p = m v with the stated masses), or empty.
    pub v: Vec<ColumnSpec>,
    /// Momenta p1..pn, or empty.
    pub p: Vec<ColumnSpec>,
    /// Inputs u1..um, or empty.
    pub u: Vec<ColumnSpec>,
    /// A step longer than this multiple of the median step starts a new
    /// trajectory (a dropped sample is a gap, not an error); default 1.5.
    pub gap_factor: f64,
}

impl TryFrom<RawColumnMap> for ColumnMap {
    type Error = String;

    fn try_from(r: RawColumnMap) -> Result<Self, String> {
        let n = r.q.len();
        if n == 0 {
            return Err("q must map at least one column (q = [{ column = \"...\" }])".into());
        }
        if n > visviva_runtime::MAX_DOF_SUPPORTED {
            return Err(format!(
                "q maps {n} columns; the runtime supports at most {} degrees of freedom",
                visviva_runtime::MAX_DOF_SUPPORTED
            ));
        }
        for (key, cols) in [("v", &r.v), ("p", &r.p)] {
            if !cols.is_empty() && cols.len() != n {
                return Err(format!(
                    "{key} maps {} columns but q maps {n}; map all of them or none",
                    cols.len()
                ));
            }
        }
        if !r.v.is_empty() && !r.p.is_empty() {
            return Err("map v (velocities) or p (momenta), not both".into());
        }
        if r.u.len() > visviva_runtime::MAX_INPUTS {
            return Err(format!(
                "u maps {} columns; the runtime takes at most {} inputs",
                r.u.len(),
                visviva_runtime::MAX_INPUTS
            ));
        }
        if !(r.gap_factor.is_finite() && r.gap_factor > 1.0) {
            return Err(format!(
                "gap_factor = {} must be a finite number above 1",
                r.gap_factor
            ));
        }
        Ok(Self {
            t: r.t,
            traj: r.traj,
            q: r.q,
            v: r.v,
            p: r.p,
            u: r.u,
            gap_factor: r.gap_factor,
        })
    }
}

impl From<ColumnMap> for RawColumnMap {
    fn from(c: ColumnMap) -> Self {
        Self {
            t: c.t,
            traj: c.traj,
            q: c.q,
            v: c.v,
            p: c.p,
            u: c.u,
            gap_factor: c.gap_factor,
        }
    }
}

impl ColumnMap {
    /// Whether the log holds positions (and inputs) only.
    pub fn positions_only(&self) -> bool {
        self.v.is_empty() && self.p.is_empty()
    }

    /// Every mapped column with its project key (`t`, `q1`, `u2`, ...).
    fn keyed(&self) -> Vec<(String, &ColumnSpec)> {
        let mut out = vec![("t".to_string(), &self.t)];
        for (prefix, cols) in [
            ("q", &self.q),
            ("v", &self.v),
            ("p", &self.p),
            ("u", &self.u),
        ] {
            for (k, c) in cols.iter().enumerate() {
                out.push((format!("{prefix}{}", k + 1), c));
            }
        }
        out
    }

    /// Read a `[columns]` table from TOML text (a project file or a file of
    /// its own); errors name the line.
    pub fn from_toml(text: &str) -> Result<Self, String> {
        #[derive(Deserialize)]
        struct Outer {
            columns: Option<ColumnMap>,
        }
        let outer: Outer = toml::from_str(text).map_err(|e| {
            let at = e
                .span()
                .map(|s| {
                    let line = text[..s.start.min(text.len())].matches('\n').count() + 1;
                    format!("line {line}: ")
                })
                .unwrap_or_default();
            format!("{at}{}", e.message())
        })?;
        outer
            .columns
            .ok_or_else(|| "no [columns] table".to_string())
    }
}

/// What is wrong with a mapped log.
#[derive(Debug, Clone, PartialEq)]
pub enum ColumnProblem {
    /// The file cannot be read or is malformed CSV.
    Unreadable(String),
    /// No data rows.
    Empty,
    /// A mapped column is not in the header.
    NotInHeader {
        /// The `[columns]` key that maps it (`q1`, `t`, ...).
        key: String,
        /// The header's columns.
        header: Vec<String>,
    },
    /// A field is not a finite number.
    NotNumeric(String),
    /// Time does not increase.
    TimeNotIncreasing {
        /// Previous time (s).
        previous: f64,
        /// This row's time (s).
        current: f64,
    },
    /// A step is neither the median step nor a gap.
    UnevenSampling {
        /// This step (s).
        step: f64,
        /// Median step (s).
        median: f64,
        /// Allowed fraction.
        tolerance: f64,
        /// Gap threshold as a multiple of the median.
        gap_factor: f64,
    },
    /// A trajectory id appears again after other trajectories.
    NotContiguous(String),
    /// Velocities or masses missing or wrong.
    Masses(String),
    /// Nothing left long enough to differentiate.
    TooShort {
        /// Samples needed per piece.
        needed: usize,
    },
}

/// A mapped-log error, located by file, line (header = 1) and the logger's
/// column.
#[derive(Debug, Clone, PartialEq)]
pub struct ColumnError {
    /// File.
    pub file: PathBuf,
    /// 1-based line (header = 1).
    pub line: u64,
    /// The logger's column name.
    pub column: Option<String>,
    /// The problem.
    pub problem: ColumnProblem,
}

impl fmt::Display for ColumnError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        crate::data::log::write_location(f, &self.file, self.line, self.column.as_deref())?;
        match &self.problem {
            ColumnProblem::Unreadable(e) => write!(f, "cannot read the log: {e}"),
            ColumnProblem::Empty => write!(f, "the log has no data rows"),
            ColumnProblem::NotInHeader { key, header } => write!(
                f,
                "not in the header ([columns] {key} maps it); the header has: {}",
                header.join(", ")
            ),
            ColumnProblem::NotNumeric(v) => write!(f, "'{v}' is not a finite number"),
            ColumnProblem::TimeNotIncreasing { previous, current } => write!(
                f,
                "time {current} s does not increase (previous sample {previous} s)"
            ),
            ColumnProblem::UnevenSampling {
                step,
                median,
                tolerance,
                gap_factor,
            } => write!(
                f,
                "step {step} s differs from the median step {median} s by more than {}% but is \
                 no gap (gaps are steps above {gap_factor} x the median: [columns] gap_factor)",
                tolerance * 100.0
            ),
            ColumnProblem::NotContiguous(id) => write!(
                f,
                "trajectory '{id}' reappears; its rows must be contiguous"
            ),
            ColumnProblem::Masses(e) => write!(f, "{e}"),
            ColumnProblem::TooShort { needed } => write!(
                f,
                "no piece between gaps has the {needed} samples the derivative filter needs"
            ),
        }
    }
}

impl std::error::Error for ColumnError {}

/// Options for [`load_mapped`].
#[derive(Debug, Clone)]
pub struct MappedOptions {
    /// Masses m1..mn (p = m v); unit masses when `None` and the log has no
    /// velocity columns.
    pub masses: Option<Vec<f64>>,
    /// Derivative filter.
    pub filter: SavitzkyGolay,
    /// Largest deviation of a non-gap step from the median, as a fraction.
    pub step_tolerance: f64,
}

impl Default for MappedOptions {
    fn default() -> Self {
        Self {
            masses: None,
            filter: SavitzkyGolay::default(),
            step_tolerance: 0.01,
        }
    }
}

/// What reading a mapped log found, besides the trajectories.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct RigSummary {
    /// Whether the log held positions (and inputs) only.
    pub positions_only: bool,
    /// Steps longer than `gap_factor` times the median step.
    pub gaps: usize,
    /// Pieces between gaps too short to differentiate (dropped).
    pub dropped_pieces: usize,
    /// Median sampling step (s).
    pub step: f64,
    /// Units of q1..qn then u1..um ("" when not stated).
    pub units: Vec<String>,
    /// Quantization step of each coordinate in SI units: declared, else
    /// estimated from the values, else `None` (no grid found).
    pub quantization: Vec<Option<f64>>,
    /// Whether each coordinate's quantization step was declared.
    pub quantization_declared: Vec<bool>,
    /// Noise standard deviation of each coordinate (SI units): the larger
    /// of the fourth-difference estimate and step / sqrt(12).
    pub noise: Vec<f64>,
    /// The masses used for p = m v.
    pub masses: Vec<f64>,
    /// Whether the masses were stated (false: unit masses by normalization).
    pub masses_stated: bool,
    /// Whether the log holds joint rates without masses: its states are
    /// (q, v) until a learned mass matrix forms p = M(q) v
    /// ([`crate::learn::inertia`]).
    pub rates_without_masses: bool,
}

impl RigSummary {
    /// One line per fact, for the command output.
    pub fn lines(&self) -> Vec<String> {
        let mut out = vec![format!(
            "log: {}; median step {:.6} s; {} gap(s) split trajectories{}",
            if self.positions_only {
                "positions only (velocities estimated, Savitzky-Golay)"
            } else {
                "positions with velocities or momenta"
            },
            self.step,
            self.gaps,
            if self.dropped_pieces > 0 {
                format!(
                    ", {} piece(s) too short to use were dropped",
                    self.dropped_pieces
                )
            } else {
                String::new()
            }
        )];
        for (i, (q, noise)) in self.quantization.iter().zip(&self.noise).enumerate() {
            let unit = self.units.get(i).filter(|u| !u.is_empty());
            let unit = unit.map_or(String::new(), |u| format!(" {u}"));
            let quant = match q {
                Some(step) if self.quantization_declared[i] => {
                    format!("quantization step {step:.6e}{unit} (declared)")
                }
                Some(step) => format!("quantization step {step:.6e}{unit} (estimated)"),
                None => "no quantization grid found".into(),
            };
            out.push(format!(
                "q{}: {quant}; noise model sigma {noise:.3e}{unit}",
                i + 1
            ));
        }
        out
    }
}

/// A mapped log, read.
#[derive(Debug, Clone)]
pub struct MappedLog {
    /// The trajectories (x = (q, p) in SI units, derivatives estimated).
    pub dataset: Dataset,
    /// What else was found.
    pub rig: RigSummary,
}

/// The identity mapping of a log in the canonical layout that has
/// positions `q1..qn` (and maybe inputs `u1..um`) but neither momenta nor
/// velocities, or `None` for any other header (the canonical loader then
/// reads it). Without a `traj` column the log is one run.
pub fn positions_only_layout(path: &Path) -> Option<ColumnMap> {
    canonical_layout(path, false)
}

/// The identity mapping of a canonical log with positions `q1..qn` and
/// joint rates `v1..vn` (and maybe inputs) but no momenta, for reading it
/// without masses ([`RigSummary::rates_without_masses`]); `None` for any
/// other header.
pub fn rates_layout(path: &Path) -> Option<ColumnMap> {
    canonical_layout(path, true)
}

fn canonical_layout(path: &Path, rates: bool) -> Option<ColumnMap> {
    let mut reader = csv::ReaderBuilder::new()
        .trim(csv::Trim::All)
        .from_path(path)
        .ok()?;
    let header: Vec<String> = reader.headers().ok()?.iter().map(str::to_string).collect();
    let has = |name: &str| header.iter().any(|h| h == name);
    if !has("t") || !has("q1") || has("p1") || has("v1") != rates {
        return None;
    }
    let numbered = |prefix: &str| -> Vec<ColumnSpec> {
        (1..)
            .map(|k| format!("{prefix}{k}"))
            .take_while(|name| has(name))
            .map(|name| ColumnSpec::plain(&name))
            .collect()
    };
    Some(ColumnMap {
        t: ColumnSpec::plain("t"),
        traj: has("traj").then(|| "traj".to_string()),
        q: numbered("q"),
        v: if rates { numbered("v") } else { Vec::new() },
        p: Vec::new(),
        u: numbered("u"),
        gap_factor: default_gap_factor(),
    })
}

/// Whether stated masses form the momenta (p = m v) of the log at `path`:
/// masses given and no momentum columns (`p` in `map`, or `p1` in a
/// canonical header).
pub fn masses_form_momenta(path: &Path, map: Option<&ColumnMap>, masses_given: bool) -> bool {
    if !masses_given {
        return false;
    }
    match map {
        Some(m) => m.p.is_empty(),
        None => csv::ReaderBuilder::new()
            .trim(csv::Trim::All)
            .from_path(path)
            .ok()
            .and_then(|mut r| r.headers().ok().map(|h| !h.iter().any(|c| c == "p1")))
            .unwrap_or(false),
    }
}

/// One row read: trajectory id, line, time and the scaled values of the
/// mapped q, v-or-p and u columns in that order.
struct Row {
    id: String,
    line: u64,
    t: f64,
    values: Vec<f64>,
}

/// Column indices of every mapped column, in [`ColumnMap::keyed`] order.
fn locate(
    path: &Path,
    map: &ColumnMap,
    header: &[String],
) -> Result<(Option<usize>, Vec<usize>), ColumnError> {
    let at = |name: &str, key: String| ColumnError {
        file: path.to_path_buf(),
        line: 1,
        column: Some(name.to_string()),
        problem: ColumnProblem::NotInHeader {
            key,
            header: header.to_vec(),
        },
    };
    let traj = match &map.traj {
        Some(name) => Some(
            header
                .iter()
                .position(|h| h == name)
                .ok_or_else(|| at(name, "traj".into()))?,
        ),
        None => None,
    };
    let mut idx = Vec::new();
    for (key, spec) in map.keyed() {
        let i = header
            .iter()
            .position(|h| *h == spec.column)
            .ok_or_else(|| at(&spec.column, key))?;
        idx.push(i);
    }
    Ok((traj, idx))
}

/// Every record as a [`Row`], fields checked and scaled.
fn read_rows(path: &Path, map: &ColumnMap) -> Result<Vec<Row>, ColumnError> {
    let err = |line: u64, column: Option<String>, problem| ColumnError {
        file: path.to_path_buf(),
        line,
        column,
        problem,
    };
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(true)
        .trim(csv::Trim::All)
        .from_path(path)
        .map_err(|e| err(1, None, ColumnProblem::Unreadable(e.to_string())))?;
    let header: Vec<String> = reader
        .headers()
        .map_err(|e| err(1, None, ColumnProblem::Unreadable(e.to_string())))?
        .iter()
        .map(str::to_string)
        .collect();
    let (traj, idx) = locate(path, map, &header)?;
    let specs: Vec<&ColumnSpec> = map.keyed().into_iter().map(|(_, s)| s).collect();
    let mut rows = Vec::new();
    let mut record = csv::StringRecord::new();
    loop {
        let more = reader.read_record(&mut record).map_err(|e| {
            let line = e.position().map_or(0, |p| p.line());
            err(line, None, ColumnProblem::Unreadable(e.to_string()))
        })?;
        if !more {
            break;
        }
        let line = record.position().map_or(0, |p| p.line());
        let mut values = Vec::with_capacity(idx.len());
        for (&i, spec) in idx.iter().zip(&specs) {
            let text = record.get(i).unwrap_or("");
            let v: f64 = text.parse().unwrap_or(f64::NAN);
            let scaled = v * spec.scale;
            if !scaled.is_finite() {
                let column = Some(spec.column.clone());
                return Err(err(line, column, ColumnProblem::NotNumeric(text.into())));
            }
            values.push(scaled);
        }
        let id = traj
            .map_or("log", |i| record.get(i).unwrap_or(""))
            .to_string();
        let t = values.remove(0);
        rows.push(Row {
            id,
            line,
            t,
            values,
        });
    }
    if rows.is_empty() {
        return Err(err(2, None, ColumnProblem::Empty));
    }
    Ok(rows)
}

/// Rows grouped by trajectory id (contiguous, time increasing).
fn group(path: &Path, map: &ColumnMap, rows: Vec<Row>) -> Result<Vec<Vec<Row>>, ColumnError> {
    let mut groups: Vec<Vec<Row>> = Vec::new();
    let mut seen: HashMap<String, ()> = HashMap::new();
    let tcol = Some(map.t.column.clone());
    for row in rows {
        let same = groups.last().is_some_and(|g| g[0].id == row.id);
        if !same {
            if seen.insert(row.id.clone(), ()).is_some() {
                return Err(ColumnError {
                    file: path.to_path_buf(),
                    line: row.line,
                    column: map.traj.clone(),
                    problem: ColumnProblem::NotContiguous(row.id),
                });
            }
            groups.push(vec![row]);
            continue;
        }
        let Some(g) = groups.last_mut() else { break };
        let previous = g[g.len() - 1].t;
        if row.t <= previous {
            return Err(ColumnError {
                file: path.to_path_buf(),
                line: row.line,
                column: tcol,
                problem: ColumnProblem::TimeNotIncreasing {
                    previous,
                    current: row.t,
                },
            });
        }
        g.push(row);
    }
    Ok(groups)
}

/// The median step over every trajectory.
fn median_step(groups: &[Vec<Row>]) -> Option<f64> {
    let mut steps: Vec<f64> = groups
        .iter()
        .flat_map(|g| g.windows(2).map(|w| w[1].t - w[0].t))
        .collect();
    if steps.is_empty() {
        return None;
    }
    steps.sort_by(f64::total_cmp);
    Some(steps[steps.len() / 2])
}

/// Split each group at gaps; an uneven step that is no gap is an error.
fn split_at_gaps(
    path: &Path,
    map: &ColumnMap,
    groups: Vec<Vec<Row>>,
    median: f64,
    tolerance: f64,
) -> Result<(Vec<Vec<Row>>, usize), ColumnError> {
    let mut pieces = Vec::new();
    let mut gaps = 0;
    for g in groups {
        let mut piece: Vec<Row> = Vec::new();
        for row in g {
            if let Some(prev) = piece.last() {
                let step = row.t - prev.t;
                if step > map.gap_factor * median {
                    gaps += 1;
                    pieces.push(std::mem::take(&mut piece));
                } else if (step - median).abs() > tolerance * median {
                    return Err(ColumnError {
                        file: path.to_path_buf(),
                        line: row.line,
                        column: Some(map.t.column.clone()),
                        problem: ColumnProblem::UnevenSampling {
                            step,
                            median,
                            tolerance,
                            gap_factor: map.gap_factor,
                        },
                    });
                }
            }
            piece.push(row);
        }
        pieces.push(piece);
    }
    Ok((pieces, gaps))
}

/// Quantization step of a column's values: the smallest positive spacing
/// between distinct values, accepted when every value lies on that grid
/// (within 1e-6 of a step) and the grid is not finer than 1e-9 of the
/// range (then the values are continuous in practice).
pub fn estimate_quantization(values: &[f64]) -> Option<f64> {
    let mut sorted: Vec<f64> = values.to_vec();
    sorted.sort_by(f64::total_cmp);
    sorted.dedup();
    if sorted.len() < 3 {
        return None;
    }
    let range = sorted[sorted.len() - 1] - sorted[0];
    let step = sorted
        .windows(2)
        .map(|w| w[1] - w[0])
        .fold(f64::INFINITY, f64::min);
    if step.is_nan() || step <= 1e-9 * range {
        return None;
    }
    let base = sorted[0];
    let on_grid = sorted.iter().all(|v| {
        let k = (v - base) / step;
        (k - k.round()).abs() <= 1e-6 * k.abs().max(1.0)
    });
    on_grid.then_some(step)
}

/// Noise standard deviation from fourth differences: for white noise of
/// standard deviation s, x[k+2] - 4x[k+1] + 6x[k] - 4x[k-1] + x[k-2] has
/// variance 70 s^2 (binomial coefficients; textbook), while a smooth signal
/// sampled finely contributes only its fourth derivative times step^4.
pub fn fourth_difference_noise(columns: &[Vec<f64>]) -> f64 {
    let (mut sum, mut count) = (0.0f64, 0usize);
    for c in columns {
        for w in c.windows(5) {
            let d = w[4] - 4.0 * w[3] + 6.0 * w[2] - 4.0 * w[1] + w[0];
            sum += d * d;
            count += 1;
        }
    }
    (sum / count.max(1) as f64 / 70.0).sqrt()
}

/// The masses for p = m v: stated (n finite positive values) or unit.
fn masses(path: &Path, map: &ColumnMap, given: &Option<Vec<f64>>) -> Result<Vec<f64>, ColumnError> {
    let n = map.q.len();
    let err = |msg: String| ColumnError {
        file: path.to_path_buf(),
        line: 1,
        column: map.v.first().map(|c| c.column.clone()),
        problem: ColumnProblem::Masses(msg),
    };
    match given {
        // Rates without masses: (q, v) kept as they are; the momenta come
        // from a learned mass matrix (crate::learn::inertia).
        None => Ok(vec![1.0; n]),
        Some(m) if m.len() != n => {
            Err(err(format!("{} masses given for {n} coordinates", m.len())))
        }
        Some(m) if m.iter().any(|v| !(v.is_finite() && *v > 0.0)) => {
            Err(err(format!("masses {m:?} must be finite and positive")))
        }
        Some(m) => Ok(m.clone()),
    }
}

/// Load a log through a column mapping (see the module doc).
pub fn load_mapped(
    path: &Path,
    map: &ColumnMap,
    opts: &MappedOptions,
) -> Result<MappedLog, ColumnError> {
    let masses = masses(path, map, &opts.masses)?;
    let rows = read_rows(path, map)?;
    let groups = group(path, map, rows)?;
    let median = median_step(&groups).ok_or_else(|| ColumnError {
        file: path.to_path_buf(),
        line: 2,
        column: Some(map.t.column.clone()),
        problem: ColumnProblem::Empty,
    })?;
    let (pieces, gaps) = split_at_gaps(path, map, groups, median, opts.step_tolerance)?;
    let needed = opts.filter.window();
    let total = pieces.len();
    let kept: Vec<Vec<Row>> = pieces.into_iter().filter(|p| p.len() >= needed).collect();
    if kept.is_empty() {
        return Err(ColumnError {
            file: path.to_path_buf(),
            line: 2,
            column: Some(map.t.column.clone()),
            problem: ColumnProblem::TooShort { needed },
        });
    }
    let dropped_pieces = total - kept.len();
    let trajectories = number_pieces(kept)
        .into_iter()
        .map(|(id, rows)| to_trajectory(id, &rows, map, &masses, &opts.filter, median))
        .collect();
    let dataset = Dataset {
        dof: map.q.len(),
        inputs: map.u.len(),
        trajectories,
        derivatives: DerivativeSource::Estimated,
    };
    let (quantization, quantization_declared, noise) = noise_model(map, &dataset);
    let rig = RigSummary {
        positions_only: map.positions_only(),
        gaps,
        dropped_pieces,
        step: median,
        units: map
            .q
            .iter()
            .chain(&map.u)
            .map(|c| c.unit.clone().unwrap_or_default())
            .collect(),
        quantization,
        quantization_declared,
        noise,
        masses_stated: opts.masses.is_some(),
        rates_without_masses: opts.masses.is_none() && !map.v.is_empty(),
        masses,
    };
    Ok(MappedLog { dataset, rig })
}

/// Ids for the pieces: the trajectory id, with `#k` when it was split.
fn number_pieces(pieces: Vec<Vec<Row>>) -> Vec<(String, Vec<Row>)> {
    let mut count: HashMap<String, usize> = HashMap::new();
    for p in &pieces {
        *count.entry(p[0].id.clone()).or_default() += 1;
    }
    let mut seen: HashMap<String, usize> = HashMap::new();
    pieces
        .into_iter()
        .map(|p| {
            let id = p[0].id.clone();
            let k = seen.entry(id.clone()).or_default();
            *k += 1;
            let name = if count[&id] > 1 {
                format!("{id}#{k}")
            } else {
                id
            };
            (name, p)
        })
        .collect()
}

/// One piece as a trajectory: q as logged, p = m v (v logged or
/// estimated) or as logged, derivatives estimated.
fn to_trajectory(
    id: String,
    rows: &[Row],
    map: &ColumnMap,
    masses: &[f64],
    filter: &SavitzkyGolay,
    dt: f64,
) -> Trajectory {
    let (n, m) = (map.q.len(), map.u.len());
    let samples = rows.len();
    let rates = if map.positions_only() { 0 } else { n };
    let column = |c: usize| -> Vec<f64> { rows.iter().map(|r| r.values[c]).collect() };
    let derive = |y: &[f64]| filter.derivative(y, dt).expect("piece length checked");
    let mut x = Array2::zeros((samples, 2 * n));
    let mut dx = Array2::zeros((samples, 2 * n));
    for i in 0..n {
        let q = column(i);
        let p: Vec<f64> = if !map.p.is_empty() {
            column(n + i)
        } else if !map.v.is_empty() {
            column(n + i).iter().map(|v| masses[i] * v).collect()
        } else {
            derive(&q).iter().map(|v| masses[i] * v).collect()
        };
        let (dq, dp) = (derive(&q), derive(&p));
        for k in 0..samples {
            x[[k, i]] = q[k];
            x[[k, n + i]] = p[k];
            dx[[k, i]] = dq[k];
            dx[[k, n + i]] = dp[k];
        }
    }
    let u = Array2::from_shape_fn((samples, m), |(k, j)| rows[k].values[n + rates + j]);
    Trajectory {
        id,
        t: rows.iter().map(|r| r.t).collect(),
        x,
        dx,
        u,
    }
}

/// Per coordinate: quantization step (SI), whether declared, and the noise
/// standard deviation (never below step / sqrt(12)).
type NoiseModel = (Vec<Option<f64>>, Vec<bool>, Vec<f64>);

fn noise_model(map: &ColumnMap, ds: &Dataset) -> NoiseModel {
    let mut steps = Vec::new();
    let mut declared = Vec::new();
    let mut noise = Vec::new();
    for (i, spec) in map.q.iter().enumerate() {
        let columns: Vec<Vec<f64>> = ds
            .trajectories
            .iter()
            .map(|t| t.x.column(i).to_vec())
            .collect();
        let step = match spec.quantization {
            Some(raw) => Some(raw * spec.scale.abs()),
            None => estimate_quantization(&columns.concat()),
        };
        let floor = step.map_or(0.0, |s| s / 12f64.sqrt());
        noise.push(fourth_difference_noise(&columns).max(floor));
        steps.push(step);
        declared.push(spec.quantization.is_some());
    }
    (steps, declared, noise)
}

/// Read a log by whichever loader fits it: through `map` when given,
/// through the identity mapping when it is a canonical log with positions
/// only ([`positions_only_layout`]) or with joint rates and no masses given
/// ([`rates_layout`]), else by the canonical loader
/// ([`crate::data::log::load_csv`]). The summary is `None` for the last.
pub fn load_any(
    path: &Path,
    map: Option<&ColumnMap>,
    opts: &crate::data::log::LoadOptions,
) -> anyhow::Result<(Dataset, Option<RigSummary>)> {
    let implicit;
    let map = match map {
        Some(m) => Some(m),
        None => {
            implicit = positions_only_layout(path)
                .or_else(|| opts.masses.is_none().then(|| rates_layout(path)).flatten());
            implicit.as_ref()
        }
    };
    let Some(map) = map else {
        return Ok((crate::data::log::load_csv(path, opts)?, None));
    };
    let mapped = load_mapped(
        path,
        map,
        &MappedOptions {
            masses: opts.masses.clone(),
            filter: opts.filter.clone(),
            step_tolerance: opts.step_tolerance,
        },
    )?;
    Ok((mapped.dataset, Some(mapped.rig)))
}

/// The noise standard deviation of each coordinate of a data set read
/// without a mapping: fourth differences, never below an estimated
/// quantization step / sqrt(12).
pub fn coordinate_noise(ds: &Dataset) -> Vec<f64> {
    (0..ds.dof)
        .map(|i| {
            let columns: Vec<Vec<f64>> = ds
                .trajectories
                .iter()
                .map(|t| t.x.column(i).to_vec())
                .collect();
            let floor = estimate_quantization(&columns.concat()).map_or(0.0, |s| s / 12f64.sqrt());
            fourth_difference_noise(&columns).max(floor)
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_grid_is_found_and_continuous_values_are_not() {
        let on: Vec<f64> = (0..50)
            .map(|k| 0.25 * ((k * 7) % 23) as f64 - 1.0)
            .collect();
        assert_eq!(estimate_quantization(&on), Some(0.25));
        let off: Vec<f64> = (0..50).map(|k| (k as f64 * 0.37).sin()).collect();
        assert_eq!(estimate_quantization(&off), None);
    }

    #[test]
    fn counts_per_rev_gives_radians_and_one_count() {
        let map = ColumnMap::from_toml(
            "[columns]\nt = { column = \"ms\", scale = 0.001 }\nq = [{ column = \"enc\", counts_per_rev = 4096 }]\n",
        )
        .unwrap();
        assert!((map.q[0].scale - std::f64::consts::TAU / 4096.0).abs() < 1e-18);
        assert_eq!(map.q[0].quantization, Some(1.0));
        assert_eq!(map.q[0].unit.as_deref(), Some("rad"));
        assert!(map.positions_only());
    }

    #[test]
    fn bad_mappings_name_their_line() {
        let err = ColumnMap::from_toml(
            "[columns]\nt = { column = \"ms\" }\nq = [{ column = \"enc\", scale = 0.0 }]\n",
        )
        .unwrap_err();
        assert!(err.starts_with("line 3:") && err.contains("scale"), "{err}");
        let err = ColumnMap::from_toml("[columns]\nt = { column = \"ms\" }\nq = []\n").unwrap_err();
        assert!(err.contains("at least one"), "{err}");
        let err = ColumnMap::from_toml(
            "[columns]\nt = { column = \"ms\" }\nq = [{ column = \"a\" }]\ngap_factor = 0.5\n",
        )
        .unwrap_err();
        assert!(err.contains("gap_factor"), "{err}");
    }
}
