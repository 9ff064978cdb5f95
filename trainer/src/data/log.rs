//! Motion logs as CSV: loading with validation (every error names the file,
//! the 1-based line, header = line 1, and the column), writing, and splitting
//! into training and validation sets by whole trajectories.
//!
//! Columns: `traj`, `t`, `q1..qn`, then either `p1..pn` (momenta) or `v1..vn`
//! (velocities, converted with p = m v using [`LoadOptions::masses`]), and
//! optionally derivatives `dq1..dqn`, `dp1..dpn` (with velocities,
//! `dv1..dvn` in place of `dp*`, converted with dp = m dv). If both `p*`
//! and `v*` columns exist the momenta are used. Driven systems add inputs
//! `u1..um`.
//! Other columns are ignored. Rows of one trajectory must be contiguous; time must increase
//! strictly and evenly: a step may differ from the trajectory's median step
//! by at most [`LoadOptions::step_tolerance`] (1 % by default) of that median.
//! Without derivative columns the derivatives are estimated with a
//! Savitzky-Golay filter ([`crate::data::derivative`]), so every trajectory needs at
//! least the filter's window of samples.

use crate::atomic::write_atomic_with;
use crate::data::dataset::{Dataset, DerivativeSource, Trajectory};
use crate::data::derivative::SavitzkyGolay;
use ndarray::Array2;
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use std::collections::HashMap;
use std::fmt;
use std::path::{Path, PathBuf};

/// Options for [`load_csv`].
#[derive(Debug, Clone)]
pub struct LoadOptions {
    /// Masses m1..mn for logs with velocity columns (`--mass`).
    pub masses: Option<Vec<f64>>,
    /// Filter for estimating missing derivatives.
    pub filter: SavitzkyGolay,
    /// Largest allowed deviation of a time step from the trajectory's median
    /// step, as a fraction of the median.
    pub step_tolerance: f64,
}

impl Default for LoadOptions {
    fn default() -> Self {
        Self {
            masses: None,
            filter: SavitzkyGolay::default(),
            step_tolerance: 0.01,
        }
    }
}

/// What is wrong with a log.
#[derive(Debug, Clone, PartialEq)]
pub enum DataProblem {
    /// The file cannot be read.
    Io(String),
    /// The CSV itself is malformed (e.g. wrong number of fields).
    Malformed(String),
    /// No header, or a header but no data rows.
    Empty,
    /// A required column is absent.
    MissingColumn,
    /// q, p (or v) and derivative column counts disagree.
    MismatchedDimensions(String),
    /// Velocity columns but no `--mass`.
    MissingMasses,
    /// `--mass` has the wrong number of entries or a bad value.
    BadMasses(String),
    /// A field is not a number.
    NotNumeric(String),
    /// A field is NaN or infinite.
    NonFinite(String),
    /// Time does not increase strictly within a trajectory.
    TimeNotIncreasing {
        /// Previous time.
        previous: f64,
        /// This row's time.
        current: f64,
    },
    /// A time step differs too much from the trajectory's median step.
    UnevenSampling {
        /// This step.
        step: f64,
        /// Median step of the trajectory.
        median: f64,
        /// Allowed fraction.
        tolerance: f64,
    },
    /// Too few samples to estimate derivatives.
    TooShort {
        /// Trajectory id.
        traj: String,
        /// Samples present.
        samples: usize,
        /// Samples needed.
        needed: usize,
    },
    /// A column name appears twice in the header.
    DuplicateColumn {
        /// 1-based position of its first appearance.
        first: usize,
        /// 1-based position of the repeat.
        again: usize,
    },
    /// The header is one field holding another separator: the file is not
    /// comma-separated.
    WrongSeparator(char),
    /// A value computed from the log (a momentum m v, an estimated
    /// derivative) is not finite: what overflowed.
    Overflow(String),
    /// A trajectory id appears again after other trajectories.
    TrajectoryNotContiguous {
        /// Trajectory id.
        traj: String,
        /// Line where its first block started.
        first_line: u64,
    },
}

/// A log error, located by file, line (1-based, header = 1) and column.
#[derive(Debug, Clone, PartialEq)]
pub struct DataError {
    /// File.
    pub file: PathBuf,
    /// 1-based line number (header = 1).
    pub line: u64,
    /// Column name, if the problem concerns one column.
    pub column: Option<String>,
    /// The problem.
    pub problem: DataProblem,
}

/// The location every log error starts with: `FILE: line L, column 'C': `.
pub(crate) fn write_location(
    f: &mut fmt::Formatter<'_>,
    file: &std::path::Path,
    line: u64,
    column: Option<&str>,
) -> fmt::Result {
    write!(f, "{}: line {line}", file.display())?;
    if let Some(c) = column {
        write!(f, ", column '{c}'")?;
    }
    write!(f, ": ")
}

impl fmt::Display for DataError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write_location(f, &self.file, self.line, self.column.as_deref())?;
        match &self.problem {
            DataProblem::Io(e) => write!(f, "cannot read file: {e}"),
            DataProblem::Malformed(e) => write!(f, "malformed CSV: {e}"),
            DataProblem::Empty => write!(f, "file has no header or no data rows"),
            DataProblem::MissingColumn => write!(f, "required column is missing"),
            DataProblem::MismatchedDimensions(e) => write!(f, "mismatched dimensions: {e}"),
            DataProblem::MissingMasses => write!(
                f,
                "velocity columns need the masses (--mass m1,..,mn) to form p = m v"
            ),
            DataProblem::BadMasses(e) => write!(f, "bad --mass: {e}"),
            DataProblem::NotNumeric(v) => write!(f, "'{v}' is not a number"),
            DataProblem::NonFinite(v) => write!(f, "'{v}' is not finite"),
            DataProblem::TimeNotIncreasing { previous, current } => write!(
                f,
                "time {current} does not increase (previous sample {previous})"
            ),
            DataProblem::UnevenSampling {
                step,
                median,
                tolerance,
            } => write!(
                f,
                "uneven sampling: step {step} differs from the median step {median} by more than {}%",
                tolerance * 100.0
            ),
            DataProblem::TooShort {
                traj,
                samples,
                needed,
            } => write!(
                f,
                "trajectory '{traj}' has {samples} samples; at least {needed} are needed to estimate derivatives"
            ),
            DataProblem::DuplicateColumn { first, again } => write!(
                f,
                "the column appears twice (columns {first} and {again}); rename or remove one"
            ),
            DataProblem::WrongSeparator(c) => write!(
                f,
                "the header is a single column holding '{}': the file looks separated by {}, \
                 but logs are comma-separated (replace the separator with ',' and decimal \
                 commas with '.')",
                c.escape_default(),
                match c {
                    ';' => "semicolons",
                    '\t' => "tabs",
                    _ => "another character",
                }
            ),
            DataProblem::Overflow(what) => write!(f, "{what} is not finite (overflow)"),
            DataProblem::TrajectoryNotContiguous { traj, first_line } => write!(
                f,
                "trajectory '{traj}' reappears; its rows must be contiguous (first block starts at line {first_line})"
            ),
        }
    }
}

impl std::error::Error for DataError {}

/// The `dq*` and `dp*` (or `dv*`) column indices.
type DerivativeColumns = (Vec<usize>, Vec<usize>);

/// Column indices found in a header.
struct Layout {
    traj: usize,
    t: usize,
    q: Vec<usize>,
    /// p or v columns.
    p: Vec<usize>,
    /// dq and dp (or dv) columns, if present.
    derivatives: Option<DerivativeColumns>,
    /// u columns (only when inputs are read).
    u: Vec<usize>,
    names: Vec<String>,
}

/// The header's names before any column is looked up: a name given twice
/// (the second would be silently ignored), or one field that holds another
/// separator (a file that is not comma-separated).
fn check_header(file: &Path, names: &[String]) -> Result<(), DataError> {
    let err = HeaderErrors { file };
    if let [only] = names {
        if let Some(c) = [';', '\t', '|'].into_iter().find(|c| only.contains(*c)) {
            return Err(DataError {
                column: None,
                ..err.at("", DataProblem::WrongSeparator(c))
            });
        }
    }
    for (k, name) in names.iter().enumerate() {
        if let Some(first) = names[..k].iter().position(|n| n == name) {
            let problem = DataProblem::DuplicateColumn {
                first: first + 1,
                again: k + 1,
            };
            return Err(err.at(name, problem));
        }
    }
    Ok(())
}

/// Indexed columns `prefix1..prefixN` (contiguous from 1).
fn numbered(names: &[String], prefix: &str) -> Vec<usize> {
    let mut found = Vec::new();
    for k in 1.. {
        match names.iter().position(|n| *n == format!("{prefix}{k}")) {
            Some(i) => found.push(i),
            None => break,
        }
    }
    found
}

/// Locates errors in the header (line 1) of one file.
struct HeaderErrors<'a> {
    file: &'a Path,
}

impl HeaderErrors<'_> {
    fn at(&self, column: &str, problem: DataProblem) -> DataError {
        DataError {
            file: self.file.to_path_buf(),
            line: 1,
            column: Some(column.to_string()),
            problem,
        }
    }
}

/// The header's layout: required columns, momenta or velocities,
/// derivatives (all or none), inputs, no stray numbered columns; and the
/// masses that turn velocities into momenta.
fn parse_layout(
    file: &Path,
    names: Vec<String>,
    opts: &LoadOptions,
) -> Result<(Layout, Option<Vec<f64>>), DataError> {
    let err = HeaderErrors { file };
    let find = |name: &str| {
        names
            .iter()
            .position(|n| n == name)
            .ok_or_else(|| err.at(name, DataProblem::MissingColumn))
    };
    let traj = find("traj")?;
    let t = find("t")?;
    let q = numbered(&names, "q");
    if q.is_empty() {
        return Err(err.at("q1", DataProblem::MissingColumn));
    }
    let (p, velocity) = momentum_columns(&err, &names, q.len())?;
    let derivatives = derivative_columns(&err, &names, q.len(), velocity)?;
    let u = input_columns(&err, &names)?;
    let layout = Layout {
        traj,
        t,
        q,
        p,
        derivatives,
        u,
        names,
    };
    refuse_stray_columns(&err, &layout, velocity)?;
    let masses = if velocity {
        Some(masses_for_velocities(&err, opts, layout.q.len())?)
    } else {
        if opts.masses.is_some() {
            eprintln!(
                "warning: {}: the log has momenta p1..p{}, so the masses given are not used \
                 (they only turn velocity columns v1..vn into momenta)",
                file.display(),
                layout.q.len()
            );
        }
        None
    };
    Ok((layout, masses))
}

/// `p1..pn`, else `v1..vn` (true when velocities), matching the n q columns.
fn momentum_columns(
    err: &HeaderErrors,
    names: &[String],
    n: usize,
) -> Result<(Vec<usize>, bool), DataError> {
    let p_cols = numbered(names, "p");
    let v_cols = numbered(names, "v");
    let (p, velocity) = match (p_cols.is_empty(), v_cols.is_empty()) {
        (false, _) => (p_cols, false),
        (true, false) => (v_cols, true),
        (true, true) => return Err(err.at("p1", DataProblem::MissingColumn)),
    };
    let pv = if velocity { "v" } else { "p" };
    if p.len() != n {
        let column = format!("{pv}{}", p.len().min(n) + 1);
        return Err(err.at(
            &column,
            DataProblem::MismatchedDimensions(format!(
                "{n} q columns but {} {pv} columns",
                p.len()
            )),
        ));
    }
    Ok((p, velocity))
}

/// `dq1..dqn` with `dp1..dpn` (or `dv1..dvn`): all of them or none.
fn derivative_columns(
    err: &HeaderErrors,
    names: &[String],
    n: usize,
    velocity: bool,
) -> Result<Option<DerivativeColumns>, DataError> {
    let dq = numbered(names, "dq");
    let dpv_prefix = if velocity { "dv" } else { "dp" };
    let dp = numbered(names, dpv_prefix);
    if dq.is_empty() && dp.is_empty() {
        return Ok(None);
    }
    for (cols, prefix) in [(&dq, "dq"), (&dp, dpv_prefix)] {
        if cols.len() != n {
            let column = format!("{prefix}{}", cols.len().min(n) + 1);
            let problem = if cols.len() < n {
                DataProblem::MissingColumn
            } else {
                DataProblem::MismatchedDimensions(format!(
                    "{n} q columns but {} {prefix} columns",
                    cols.len()
                ))
            };
            return Err(err.at(&column, problem));
        }
    }
    Ok(Some((dq, dp)))
}

/// `u1..um`, at most as many as the runtime takes.
fn input_columns(err: &HeaderErrors, names: &[String]) -> Result<Vec<usize>, DataError> {
    let u = numbered(names, "u");
    let max = visviva_runtime::MAX_INPUTS;
    if u.len() > max {
        return Err(err.at(
            &format!("u{}", max + 1),
            DataProblem::MismatchedDimensions(format!(
                "{} input columns; the runtime takes at most {max}",
                u.len()
            )),
        ));
    }
    Ok(u)
}

/// A numbered column outside the contiguous runs (e.g. q3 without q2) is
/// almost certainly a mistake; refuse it rather than ignore it.
fn refuse_stray_columns(
    err: &HeaderErrors,
    layout: &Layout,
    velocity: bool,
) -> Result<(), DataError> {
    let n = layout.q.len();
    let (pv, dpv) = if velocity { ("v", "dv") } else { ("p", "dp") };
    let used: Vec<usize> = layout
        .q
        .iter()
        .chain(&layout.p)
        .chain(
            layout
                .derivatives
                .iter()
                .flat_map(|(a, b)| a.iter().chain(b)),
        )
        .chain(&layout.u)
        .copied()
        .collect();
    for (i, name) in layout.names.iter().enumerate() {
        let stray = ["q", pv, "dq", dpv, "u"].iter().any(|prefix| {
            name.strip_prefix(prefix)
                .is_some_and(|k| !k.is_empty() && k.bytes().all(|b| b.is_ascii_digit()))
        });
        if stray && !used.contains(&i) {
            return Err(err.at(
                name,
                DataProblem::MismatchedDimensions(format!(
                    "column does not fit the numbering 1..{n} of the {n} q columns"
                )),
            ));
        }
    }
    Ok(())
}

/// The masses that turn `n` velocity columns into momenta: given, n of
/// them, finite and positive.
fn masses_for_velocities(
    err: &HeaderErrors,
    opts: &LoadOptions,
    n: usize,
) -> Result<Vec<f64>, DataError> {
    let masses = opts
        .masses
        .clone()
        .ok_or_else(|| err.at("v1", DataProblem::MissingMasses))?;
    if masses.len() != n {
        return Err(err.at(
            "v1",
            DataProblem::BadMasses(format!(
                "{} masses given for {n} velocity columns",
                masses.len()
            )),
        ));
    }
    if let Some(m) = masses.iter().find(|m| !m.is_finite() || **m <= 0.0) {
        return Err(err.at(
            "v1",
            DataProblem::BadMasses(format!("mass {m} is not a finite positive number")),
        ));
    }
    Ok(masses)
}

/// Rows of one trajectory while reading.
struct Block {
    id: String,
    first_line: u64,
    lines: Vec<u64>,
    t: Vec<f64>,
    x: Vec<f64>,
    dx: Vec<f64>,
    u: Vec<f64>,
}

impl Block {
    fn new(id: String, first_line: u64) -> Self {
        Self {
            id,
            first_line,
            lines: Vec::new(),
            t: Vec::new(),
            x: Vec::new(),
            dx: Vec::new(),
            u: Vec::new(),
        }
    }
}

/// Load and validate a CSV log: states, derivatives when given (estimated
/// otherwise) and inputs `u1..um` when present (validated like every other
/// column).
pub fn load_csv(path: &Path, opts: &LoadOptions) -> Result<Dataset, DataError> {
    let file_err = |line: u64, column: Option<String>, problem| DataError {
        file: path.to_path_buf(),
        line,
        column,
        problem,
    };
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(true)
        .trim(csv::Trim::Headers)
        .from_path(path)
        .map_err(|e| file_err(1, None, DataProblem::Io(e.to_string())))?;
    let headers = reader
        .headers()
        .map_err(|e| file_err(1, None, DataProblem::Malformed(e.to_string())))?
        .clone();
    if headers.is_empty() || headers.iter().all(|h| h.is_empty()) {
        return Err(file_err(1, None, DataProblem::Empty));
    }
    let names: Vec<String> = headers.iter().map(str::to_string).collect();
    check_header(path, &names)?;
    let (layout, masses) = parse_layout(path, names, opts)?;
    let reading = Reading {
        path,
        layout: &layout,
        masses: masses.as_deref(),
        opts,
    };
    let trajectories = reading.trajectories(&mut reader)?;
    Ok(Dataset {
        dof: layout.q.len(),
        inputs: layout.u.len(),
        trajectories,
        derivatives: if layout.derivatives.is_some() {
            DerivativeSource::Given
        } else {
            DerivativeSource::Estimated
        },
    })
}

/// What reading the records of one file needs.
struct Reading<'a> {
    path: &'a Path,
    layout: &'a Layout,
    masses: Option<&'a [f64]>,
    opts: &'a LoadOptions,
}

impl Reading<'_> {
    fn err(&self, line: u64, column: Option<String>, problem: DataProblem) -> DataError {
        DataError {
            file: self.path.to_path_buf(),
            line,
            column,
            problem,
        }
    }

    /// Stream the records (one reused record buffer): rows gather into the
    /// current trajectory's block, and a block becomes a [`Trajectory`] as
    /// soon as the next trajectory starts, so only one block's line numbers
    /// are held at a time.
    fn trajectories(
        &self,
        reader: &mut csv::Reader<std::fs::File>,
    ) -> Result<Vec<Trajectory>, DataError> {
        let mut done: Vec<Trajectory> = Vec::new();
        let mut block: Option<Block> = None;
        let mut seen: HashMap<String, u64> = HashMap::new();
        let mut record = csv::ByteRecord::new();
        loop {
            let more = reader.read_byte_record(&mut record).map_err(|e| {
                let line = e.position().map_or(0, |p| p.line());
                self.err(line, None, DataProblem::Malformed(e.to_string()))
            })?;
            if !more {
                break;
            }
            let line = record.position().map_or(0, |p| p.line());
            self.check_utf8(&record, line)?;
            let id = self.text(&record, self.layout.traj, line)?;
            if block.as_ref().is_none_or(|b| b.id != id) {
                if let Some(first_line) = seen.get(id) {
                    return Err(self.err(
                        line,
                        Some("traj".into()),
                        DataProblem::TrajectoryNotContiguous {
                            traj: id.to_string(),
                            first_line: *first_line,
                        },
                    ));
                }
                seen.insert(id.to_string(), line);
                let next = Block::new(id.to_string(), line);
                if let Some(b) = block.replace(next) {
                    done.push(to_trajectory(self.path, b, self.layout, self.opts)?);
                }
            }
            if let Some(b) = block.as_mut() {
                self.push_row(b, &record, line)?;
            }
        }
        match block {
            Some(b) => done.push(to_trajectory(self.path, b, self.layout, self.opts)?),
            None => return Err(self.err(2, None, DataProblem::Empty)),
        }
        Ok(done)
    }

    /// A record that is not UTF-8 is malformed (the log is text): one
    /// check of the whole record, then of a field only if that passed but
    /// the field does not.
    fn check_utf8(&self, record: &csv::ByteRecord, line: u64) -> Result<(), DataError> {
        let bad = if std::str::from_utf8(record.as_slice()).is_ok() {
            None
        } else {
            record.iter().position(|f| std::str::from_utf8(f).is_err())
        };
        match bad {
            None => Ok(()),
            Some(k) => Err(self.err(
                line,
                None,
                DataProblem::Malformed(format!("invalid UTF-8 in field {}", k + 1)),
            )),
        }
    }

    /// Field `col` as text, trimmed ("" when the record is shorter).
    fn text<'r>(
        &self,
        record: &'r csv::ByteRecord,
        col: usize,
        line: u64,
    ) -> Result<&'r str, DataError> {
        let bytes = record.get(col).unwrap_or(b"");
        std::str::from_utf8(bytes).map(str::trim).map_err(|_| {
            let problem = DataProblem::Malformed(format!("invalid UTF-8 in field {}", col + 1));
            self.err(line, None, problem)
        })
    }

    /// One field as a finite number.
    fn number(&self, record: &csv::ByteRecord, col: usize, line: u64) -> Result<f64, DataError> {
        let text = self.text(record, col, line)?;
        let name = || Some(self.layout.names[col].clone());
        let v: f64 = text
            .parse()
            .map_err(|_| self.err(line, name(), DataProblem::NotNumeric(text.into())))?;
        if !v.is_finite() {
            return Err(self.err(line, name(), DataProblem::NonFinite(text.into())));
        }
        Ok(v)
    }

    /// m * value (p = m v, dp = m dv), which must stay finite.
    fn momentum(
        &self,
        record: &csv::ByteRecord,
        k: usize,
        col: usize,
        line: u64,
    ) -> Result<f64, DataError> {
        let m = self.masses.map_or(1.0, |m| m[k]);
        let value = self.number(record, col, line)?;
        let v = m * value;
        if v.is_finite() {
            return Ok(v);
        }
        let what = format!("mass {m} x {value}");
        let name = Some(self.layout.names[col].clone());
        Err(self.err(line, name, DataProblem::Overflow(what)))
    }

    /// Append one record to its trajectory's block, checking each field and
    /// that time increases.
    fn push_row(
        &self,
        b: &mut Block,
        record: &csv::ByteRecord,
        line: u64,
    ) -> Result<(), DataError> {
        let layout = self.layout;
        let t = self.number(record, layout.t, line)?;
        if let Some(&previous) = b.t.last() {
            if t <= previous {
                return Err(self.err(
                    line,
                    Some("t".into()),
                    DataProblem::TimeNotIncreasing {
                        previous,
                        current: t,
                    },
                ));
            }
        }
        b.t.push(t);
        b.lines.push(line);
        for &c in &layout.q {
            b.x.push(self.number(record, c, line)?);
        }
        for (k, &c) in layout.p.iter().enumerate() {
            b.x.push(self.momentum(record, k, c, line)?);
        }
        if let Some((dq, dp)) = &layout.derivatives {
            for &c in dq {
                b.dx.push(self.number(record, c, line)?);
            }
            for (k, &c) in dp.iter().enumerate() {
                b.dx.push(self.momentum(record, k, c, line)?);
            }
        }
        for &c in &layout.u {
            b.u.push(self.number(record, c, line)?);
        }
        Ok(())
    }
}

/// One block as a trajectory: even sampling checked, derivatives taken
/// from the log or estimated by the Savitzky-Golay filter.
fn to_trajectory(
    path: &Path,
    block: Block,
    layout: &Layout,
    opts: &LoadOptions,
) -> Result<Trajectory, DataError> {
    check_even_steps(path, &block, opts.step_tolerance)?;
    let (n, m) = (layout.q.len(), layout.u.len());
    let samples = block.t.len();
    let x = Array2::from_shape_vec((samples, 2 * n), block.x).expect("row-major 2n per row");
    let u = Array2::from_shape_vec((samples, m), block.u).expect("m per row");
    let dx = if layout.derivatives.is_some() {
        Array2::from_shape_vec((samples, 2 * n), block.dx).expect("row-major 2n per row")
    } else {
        let needed = opts.filter.window();
        if samples < needed {
            return Err(DataError {
                file: path.to_path_buf(),
                line: block.first_line,
                column: Some("t".into()),
                problem: DataProblem::TooShort {
                    traj: block.id,
                    samples,
                    needed,
                },
            });
        }
        let dt = (block.t[samples - 1] - block.t[0]) / (samples - 1) as f64;
        let mut dx = Array2::zeros((samples, 2 * n));
        for c in 0..2 * n {
            let column: Vec<f64> = x.column(c).to_vec();
            let d = opts
                .filter
                .derivative(&column, dt)
                .expect("length checked above");
            dx.column_mut(c).assign(&ndarray::Array1::from(d));
        }
        dx
    };
    if let Some(((row, c), _)) = dx.indexed_iter().find(|(_, v)| !v.is_finite()) {
        let prefix = if c < n { "dq" } else { "dp" };
        return Err(DataError {
            file: path.to_path_buf(),
            line: block.lines[row],
            column: Some(format!("{prefix}{}", c % n + 1)),
            problem: DataProblem::Overflow(
                "the derivative estimated from the values and time steps".into(),
            ),
        });
    }
    Ok(Trajectory {
        id: block.id,
        t: block.t,
        x,
        dx,
        u,
    })
}

fn check_even_steps(path: &Path, block: &Block, tolerance: f64) -> Result<(), DataError> {
    if block.t.len() < 3 {
        return Ok(());
    }
    let steps: Vec<f64> = block.t.windows(2).map(|w| w[1] - w[0]).collect();
    let mut sorted = steps.clone();
    sorted.sort_by(f64::total_cmp);
    let median = sorted[sorted.len() / 2];
    for (k, step) in steps.iter().enumerate() {
        if (step - median).abs() > tolerance * median {
            return Err(DataError {
                file: path.to_path_buf(),
                line: block.lines[k + 1],
                column: Some("t".into()),
                problem: DataProblem::UnevenSampling {
                    step: *step,
                    median,
                    tolerance,
                },
            });
        }
    }
    Ok(())
}

/// Column names of a dataset with `dof` degrees of freedom:
/// `traj,t,q1..qn,p1..pn` and, if `derivatives`, `dq1..dqn,dp1..dpn`.
pub fn column_names(dof: usize, derivatives: bool) -> Vec<String> {
    let mut names = vec!["traj".to_string(), "t".to_string()];
    let prefixes: &[&str] = if derivatives {
        &["q", "p", "dq", "dp"]
    } else {
        &["q", "p"]
    };
    for prefix in prefixes {
        names.extend((1..=dof).map(|k| format!("{prefix}{k}")));
    }
    names
}

/// Write `ds` as CSV (atomically), with momenta, derivative columns only if
/// `derivatives`, and input columns `u1..um` after the others when the
/// trajectories carry inputs. Numbers use Rust's shortest round-trip
/// formatting, so the output is deterministic and re-reads to the same values.
pub fn write_csv(path: &Path, ds: &Dataset, derivatives: bool) -> anyhow::Result<()> {
    anyhow::ensure!(
        ds.trajectories
            .iter()
            .all(|t| t.u.dim() == (t.t.len(), ds.inputs)),
        "inputs do not match the trajectories"
    );
    write_atomic_with(path, |w| {
        let mut writer = csv::Writer::from_writer(w);
        let mut header = column_names(ds.dof, derivatives);
        header.extend((1..=ds.inputs).map(|k| format!("u{k}")));
        writer.write_record(header)?;
        let mut row: Vec<String> = Vec::new();
        for traj in &ds.trajectories {
            for (i, t) in traj.t.iter().enumerate() {
                row.clear();
                row.push(traj.id.clone());
                row.push(format!("{t}"));
                row.extend(traj.x.row(i).iter().map(|v| format!("{v}")));
                if derivatives {
                    row.extend(traj.dx.row(i).iter().map(|v| format!("{v}")));
                }
                row.extend(traj.u.row(i).iter().map(|v| format!("{v}")));
                writer.write_record(&row)?;
            }
        }
        writer.flush()?;
        Ok(())
    })
}

/// Split whole trajectories (with their inputs) into (training,
/// validation), never single rows. About `val_fraction` (clamped to [0, 1])
/// of the trajectories, chosen by a seeded shuffle, go to validation; with
/// two or more trajectories each side gets at least one. A single trajectory
/// goes to training. Both sides keep the original trajectory order.
pub fn split_by_trajectory(ds: &Dataset, val_fraction: f64, seed: u64) -> (Dataset, Dataset) {
    let is_val = validation_mask(ds.trajectories.len(), val_fraction, seed);
    let pick = |want: bool| Dataset {
        trajectories: ds
            .trajectories
            .iter()
            .zip(&is_val)
            .filter(|(_, v)| **v == want)
            .map(|(t, _)| t.clone())
            .collect(),
        dof: ds.dof,
        inputs: ds.inputs,
        derivatives: ds.derivatives,
    };
    (pick(false), pick(true))
}

/// [`split_by_trajectory`] of a dataset given up: the trajectories move to
/// their side without a copy (the same split for the same seed).
pub fn split_owned(ds: Dataset, val_fraction: f64, seed: u64) -> (Dataset, Dataset) {
    let is_val = validation_mask(ds.trajectories.len(), val_fraction, seed);
    let empty = || Dataset {
        trajectories: Vec::new(),
        dof: ds.dof,
        inputs: ds.inputs,
        derivatives: ds.derivatives,
    };
    let (mut train, mut val) = (empty(), empty());
    for (t, v) in ds.trajectories.into_iter().zip(is_val) {
        if v { &mut val } else { &mut train }.trajectories.push(t);
    }
    (train, val)
}

/// Which of `count` trajectories go to validation (see
/// [`split_by_trajectory`]).
fn validation_mask(count: usize, val_fraction: f64, seed: u64) -> Vec<bool> {
    let fraction = if val_fraction.is_nan() {
        0.0
    } else {
        val_fraction.clamp(0.0, 1.0)
    };
    let n_val = if count >= 2 {
        ((fraction * count as f64).round() as usize).clamp(1, count - 1)
    } else {
        0
    };
    let mut order: Vec<usize> = (0..count).collect();
    order.shuffle(&mut ChaCha8Rng::seed_from_u64(seed));
    let mut is_val = vec![false; count];
    for &i in &order[..n_val] {
        is_val[i] = true;
    }
    is_val
}
