//! Host rollouts through `visviva-runtime`, the very arithmetic the device
//! runs, plus the helpers around them: parsing initial states (momenta or
//! velocities), the velocity columns v = dH/dp of a rollout CSV, sampling
//! test states inside a model's normalization range, and drift measures.

use std::fmt::Write as _;
use std::io::Write;

use anyhow::{bail, Context, Result};
use rand::{Rng, SeedableRng};
use visviva_runtime::{Hamiltonian, State, StepError};

use crate::deploy::blob::{HostModel, HOST_MAX_DOF};
use crate::deploy::envelope::{Envelope, FarState};

/// A trajectory computed on the host.
#[derive(Debug, Clone)]
pub struct Rollout {
    /// States (q1..qn, p1..pn), the initial state first.
    pub states: Vec<Vec<f32>>,
    /// Learned energy at each state.
    pub energy: Vec<f32>,
    /// Step index and error, when the rollout stopped early.
    pub failure: Option<(usize, StepError)>,
}

impl Rollout {
    /// Largest |H(t) - H(0)| of the learned energy.
    pub fn energy_excursion(&self) -> f64 {
        let e0 = self.energy.first().copied().unwrap_or(0.0) as f64;
        self.energy
            .iter()
            .map(|e| (*e as f64 - e0).abs())
            .fold(0.0, f64::max)
    }
}

/// A runtime state from a flat (q, p) vector.
pub fn state_of(x: &[f32]) -> Result<State<HOST_MAX_DOF>> {
    let n = x.len() / 2;
    State::new(&x[..n], &x[n..2 * n]).map_err(|e| anyhow::anyhow!("bad state: {e}"))
}

/// Step `model` `steps` times from `x0`, stopping at the first error.
pub fn roll(model: &HostModel<'_>, x0: &[f32], steps: usize) -> Result<Rollout> {
    roll_driven(model, x0, steps, &[])
}

/// As [`roll`], with input row `k` of `inputs` held over step `k` (zero
/// inputs when `inputs` is shorter). Keeps every state: for rollouts as
/// long as a log; long ones stream through [`roll_each`].
pub fn roll_driven(
    model: &HostModel<'_>,
    x0: &[f32],
    steps: usize,
    inputs: &[Vec<f32>],
) -> Result<Rollout> {
    let mut out = Rollout {
        states: Vec::new(),
        energy: Vec::new(),
        failure: None,
    };
    let fill = |k: usize, u: &mut [f32]| {
        if let Some(row) = inputs.get(k) {
            u.copy_from_slice(row);
        }
        Ok(())
    };
    out.failure = roll_each(model, x0, steps, fill, |k, s| {
        let e = model.energy(s);
        // The initial state's energy must exist; later a NaN marks a state
        // the model cannot evaluate.
        let e = if k == 0 {
            e.map_err(|e| anyhow::anyhow!("{e}"))?
        } else {
            e.unwrap_or(f32::NAN)
        };
        out.states.push(flat(s));
        out.energy.push(e);
        Ok(())
    })?;
    Ok(out)
}

/// The state as a flat (q1..qn, p1..pn) vector.
pub fn flat(s: &State<HOST_MAX_DOF>) -> Vec<f32> {
    let mut v = s.q().to_vec();
    v.extend_from_slice(s.p());
    v
}

/// Step `model` `steps` times from `x0`, handing every state to
/// `visit(k, state)` as it is computed (the initial state as k = 0) and
/// keeping none: memory does not grow with `steps`. `fill(k, u)` writes
/// the inputs held over step k into `u` (zeros unless it writes). Returns
/// the step index and error where stepping stopped, if it did.
pub fn roll_each(
    model: &HostModel<'_>,
    x0: &[f32],
    steps: usize,
    mut fill: impl FnMut(usize, &mut [f32]) -> Result<()>,
    mut visit: impl FnMut(usize, &State<HOST_MAX_DOF>) -> Result<()>,
) -> Result<Option<(usize, StepError)>> {
    let mut u = vec![0.0f32; model.inputs()];
    let mut s = state_of(x0)?;
    visit(0, &s)?;
    for k in 0..steps {
        u.iter_mut().for_each(|v| *v = 0.0);
        fill(k, &mut u)?;
        if let Err(e) = model.step_driven(&mut s, &u) {
            return Ok(Some((k, e)));
        }
        visit(k + 1, &s)?;
    }
    Ok(None)
}

/// The CSV header `t,q1..qn,p1..pn`, then `v1..vn` with `velocities`.
pub fn write_csv_header(w: &mut dyn Write, dof: usize, velocities: bool) -> std::io::Result<()> {
    let mut s = String::from("t");
    let kinds: &[&str] = if velocities {
        &["q", "p", "v"]
    } else {
        &["q", "p"]
    };
    for k in kinds {
        for i in 1..=dof {
            let _ = write!(s, ",{k}{i}");
        }
    }
    s.push('\n');
    w.write_all(s.as_bytes())
}

/// One CSV row: time `k dt` (with the step's precision, [`time_text`]), then the values, as exact bit patterns
/// (`bits`) or shortest round-trip decimals.
pub fn write_csv_row(
    w: &mut dyn Write,
    k: usize,
    dt: f32,
    x: &[f32],
    bits: bool,
) -> std::io::Result<()> {
    w.write_all(time_text(k, dt).as_bytes())?;
    for v in x {
        if bits {
            write!(w, ",{:#010x}", v.to_bits())?;
        } else {
            write!(w, ",{v}")?;
        }
    }
    w.write_all(b"\n")
}

/// About how many bytes a CSV row of `dof` degrees of freedom takes (for
/// the disk-space check before a long rollout), with or without the
/// velocity columns.
pub fn csv_row_bytes(dof: usize, bits: bool, velocities: bool) -> u128 {
    let value = if bits { 11 } else { 10 };
    let columns = if velocities { 3 } else { 2 };
    8 + columns * dof as u128 * value
}

/// The velocities v = dH/dp of `model` at the flat state `x` (q, p) into
/// `v`, from the runtime's own gradient; NaN where the model cannot
/// evaluate the state.
pub fn velocity_of(model: &HostModel<'_>, x: &[f32], v: &mut [f32]) {
    let (mut gq, mut gp) = ([0.0f32; HOST_MAX_DOF], [0.0f32; HOST_MAX_DOF]);
    let ok = state_of(x)
        .ok()
        .and_then(|s| model.gradient(&s, &mut gq, &mut gp).ok());
    for (i, vi) in v.iter_mut().enumerate() {
        *vi = if ok.is_some() { gp[i] } else { f32::NAN };
    }
}

/// What a streamed rollout found besides its rows.
#[derive(Debug, Clone)]
pub struct Streamed {
    /// The first state far outside the training data (with an envelope).
    pub far: Option<FarState>,
    /// The step index and why stepping stopped there, if it did: the rows
    /// written are the states computed before it.
    pub failure: Option<(usize, String)>,
    /// Steps asked for.
    pub steps: usize,
}

impl Streamed {
    /// Rows written (the initial state and every completed step).
    pub fn rows(&self) -> usize {
        self.failure.as_ref().map_or(self.steps, |(k, _)| *k) + 1
    }

    /// An error naming the failed step, for a caller that needs the whole
    /// rollout.
    pub fn complete(&self) -> Result<()> {
        match self.failure_text() {
            Some(why) => bail!("{why}"),
            None => Ok(()),
        }
    }

    /// `step K of N: why`, when a step failed (steps counted from 1).
    pub fn failure_text(&self) -> Option<String> {
        self.failure
            .as_ref()
            .map(|(k, e)| format!("step {} of {}: {e}", k + 1, self.steps))
    }
}

/// Stream a rollout of `model` into `w` as CSV (`t,q1..qn,p1..pn`, then
/// `v1..vn` = dH/dp with `velocities`), each row written as its state is
/// computed; `fill(k, u)` writes the inputs held over step k (zeros unless
/// it writes). See [`stream_rows`].
#[allow(clippy::too_many_arguments)]
pub fn stream_csv(
    model: &HostModel<'_>,
    x0: &[f32],
    steps: usize,
    mut fill: impl FnMut(usize, &mut [f32]) -> Result<()>,
    bits: bool,
    velocities: bool,
    watch: crate::interrupt::Watch,
    envelope: Option<&Envelope>,
    w: &mut dyn Write,
) -> Result<Streamed> {
    let mut u = vec![0.0f32; model.inputs()];
    let dof = model.dof();
    let step = |k: usize, x: &mut [f32]| {
        u.iter_mut().for_each(|v| *v = 0.0);
        fill(k, &mut u)?;
        let mut s = state_of(x)?;
        Ok(match model.step_driven(&mut s, &u) {
            Ok(()) => {
                x[..dof].copy_from_slice(s.q());
                x[dof..].copy_from_slice(s.p());
                None
            }
            Err(e) => Some(e.to_string()),
        })
    };
    let velocity = |x: &[f32], v: &mut [f32]| velocity_of(model, x, v);
    let rows = RowSettings {
        dof,
        dt: model.integrator().dt,
        bits,
        watch,
        envelope,
        velocity: velocities.then_some(&velocity as &VelocityFn<'_>),
    };
    stream_rows(&rows, x0, steps, step, w)
}

/// The velocities of a flat state (q, p) written into the slice.
pub type VelocityFn<'a> = dyn Fn(&[f32], &mut [f32]) + 'a;

/// How [`stream_rows`] writes: degrees of freedom, the time step of a row,
/// bit patterns or decimals, Ctrl-C, and the envelope to warn about.
pub struct RowSettings<'a> {
    /// Degrees of freedom n.
    pub dof: usize,
    /// Time step of one row (s).
    pub dt: f32,
    /// Exact bit patterns instead of shortest decimals.
    pub bits: bool,
    /// Ctrl-C.
    pub watch: crate::interrupt::Watch,
    /// The training data's envelope, when known.
    pub envelope: Option<&'a Envelope>,
    /// Velocities of a state, written as `v1..vn` after the momenta.
    pub velocity: Option<&'a VelocityFn<'a>>,
}

/// Stream a rollout into `w` as CSV, each row written as its state is
/// computed: `step(k, x)` advances the flat state `x` by step k and returns
/// why it could not (`Some`), which ends the rows there and is returned
/// (the caller decides what a part-way rollout means); an `Err` (unreadable
/// inputs) or a Ctrl-C (seen through the settings' watch) stops with an
/// error. With an envelope, the first state far outside the training data
/// is returned (the rollout goes on: the caller warns).
pub fn stream_rows(
    rows: &RowSettings<'_>,
    x0: &[f32],
    steps: usize,
    mut step: impl FnMut(usize, &mut [f32]) -> Result<Option<String>>,
    w: &mut dyn Write,
) -> Result<Streamed> {
    write_csv_header(w, rows.dof, rows.velocity.is_some())?;
    let mut x = x0.to_vec();
    let mut row = vec![0.0f32; 3 * rows.dof];
    let mut far = None;
    let mut failure = None;
    for k in 0..=steps {
        if k % 4096 == 0 {
            rows.watch.check()?;
        }
        if k > 0 {
            if let Some(why) = step(k - 1, &mut x)? {
                failure = Some((k - 1, why));
                break;
            }
        }
        if far.is_none() {
            far = rows.envelope.and_then(|e| e.far(k, &x));
        }
        let line = match rows.velocity {
            Some(velocity) => {
                let n = x.len();
                row[..n].copy_from_slice(&x);
                velocity(&x, &mut row[n..n + rows.dof]);
                &row[..n + rows.dof]
            }
            None => &x[..],
        };
        write_csv_row(w, k, rows.dt, line, rows.bits)?;
    }
    Ok(Streamed {
        far,
        failure,
        steps,
    })
}

/// An input sequence read row by row: CSV with header `t,u1..um`, one row
/// per step. Errors name the file, line and column. Memory does not grow
/// with the number of rows.
pub struct InputRows {
    path: std::path::PathBuf,
    reader: csv::Reader<std::fs::File>,
    record: csv::StringRecord,
    names: Vec<String>,
    line: usize,
}

impl InputRows {
    /// Open `path` and check its header for `m` inputs.
    pub fn open(path: &std::path::Path, m: usize) -> Result<Self> {
        let mut reader = csv::Reader::from_path(path)
            .with_context(|| format!("{}: cannot read", path.display()))?;
        let header: Vec<String> = reader
            .headers()
            .with_context(|| format!("{}: line 1: cannot read the header", path.display()))?
            .iter()
            .map(|h| h.trim().to_string())
            .collect();
        let names: Vec<String> = std::iter::once("t".to_string())
            .chain((1..=m).map(|i| format!("u{i}")))
            .collect();
        if header != names {
            bail!(
                "{}: line 1: columns {:?}, the model needs {:?}",
                path.display(),
                header,
                names
            );
        }
        Ok(Self {
            path: path.to_path_buf(),
            reader,
            record: csv::StringRecord::new(),
            names,
            line: 1,
        })
    }

    /// The next row's inputs into `u`; `false` at the end of the file.
    pub fn next_into(&mut self, u: &mut [f32]) -> Result<bool> {
        let path = self.path.display();
        self.line += 1;
        let line = self.line;
        let more = self
            .reader
            .read_record(&mut self.record)
            .with_context(|| format!("{path}: line {line}: malformed row"))?;
        if !more {
            return Ok(false);
        }
        for (c, name) in self.names.iter().enumerate().skip(1) {
            let text = self.record.get(c).unwrap_or("").trim();
            let v: f32 = text.parse().with_context(|| {
                format!("{path}: line {line}, column {name}: '{text}' is not a number")
            })?;
            if !v.is_finite() {
                bail!("{path}: line {line}, column {name}: not finite");
            }
            if let Some(slot) = u.get_mut(c - 1) {
                *slot = v;
            }
        }
        Ok(true)
    }

    /// Check every row of `path` and count them, holding one row at a time.
    pub fn count(path: &std::path::Path, m: usize) -> Result<usize> {
        let mut rows = Self::open(path, m)?;
        let mut u = vec![0.0f32; m];
        let mut n = 0usize;
        while rows.next_into(&mut u)? {
            n += 1;
        }
        Ok(n)
    }
}

/// An initial state as `--init` gives it: the coordinates, and either the
/// momenta or the velocities (one kind for all coordinates).
#[derive(Debug, Clone, PartialEq)]
pub struct InitSpec {
    /// q1..qn.
    pub q: Vec<f32>,
    /// p1..pn or v1..vn.
    pub rates: Rates,
}

/// The second half of an initial state.
#[derive(Debug, Clone, PartialEq)]
pub enum Rates {
    /// Momenta p1..pn, the model's own state.
    Momenta(Vec<f32>),
    /// Velocities v1..vn, to be converted with the model's p = M(q) v.
    Velocities(Vec<f32>),
}

/// Parse `q1=0.1,p1=0` (every coordinate named once) for `dof` degrees of
/// freedom; velocities (`v1=..`) are refused here: see [`parse_init_spec`]
/// for a model that converts them.
pub fn parse_init(spec: &str, dof: usize) -> Result<Vec<f32>> {
    let init = parse_init_spec(spec, dof)?;
    match init.rates {
        Rates::Momenta(p) => Ok(init.q.into_iter().chain(p).collect()),
        Rates::Velocities(_) => bail!(
            "--init: velocities (v1..v{dof}) need a model with a mass matrix p = M(q) v; \
             give the momenta p1..p{dof}"
        ),
    }
}

/// Parse `q1=0.1,p1=0` or `q1=0.1,v1=0.2` for `dof` degrees of freedom:
/// every coordinate named once, and for each index either p or v, the same
/// kind for all (a p and a v of one coordinate, or a mix of kinds, is
/// refused naming the keys).
pub fn parse_init_spec(spec: &str, dof: usize) -> Result<InitSpec> {
    // Slots: q1..qn, p1..pn, v1..vn.
    let mut x = vec![None; 3 * dof];
    for part in spec.split(',').map(str::trim).filter(|s| !s.is_empty()) {
        let (name, v) = init_entry(part)?;
        let slot = init_slot(name, dof)?;
        if x[slot].replace(v).is_some() {
            bail!("--init: {name} given twice");
        }
    }
    let q = (0..dof)
        .map(|i| x[i].with_context(|| format!("--init: q{} missing", i + 1)))
        .collect::<Result<Vec<f32>>>()?;
    let (p, v) = (&x[dof..2 * dof], &x[2 * dof..]);
    for i in 0..dof {
        if p[i].is_some() && v[i].is_some() {
            bail!(
                "--init: p{0} and v{0} both given: give the momentum p{0} or the velocity v{0}, \
                 not both",
                i + 1
            );
        }
    }
    let (np, nv) = (p.iter().flatten().count(), v.iter().flatten().count());
    if np > 0 && nv > 0 {
        let pk = p.iter().position(Option::is_some).unwrap_or(0) + 1;
        let vk = v.iter().position(Option::is_some).unwrap_or(0) + 1;
        bail!("--init: p{pk} and v{vk} mix momenta and velocities: give p1..p{dof} or v1..v{dof}");
    }
    let rates = if nv > 0 {
        Rates::Velocities(all_given(v, "v")?)
    } else {
        Rates::Momenta(all_given(p, "p")?)
    };
    Ok(InitSpec { q, rates })
}

/// One `NAME=VALUE` entry: the name and its finite value.
fn init_entry(part: &str) -> Result<(&str, f32)> {
    let (name, value) = part
        .split_once('=')
        .with_context(|| format!("--init: '{part}' is not NAME=VALUE"))?;
    let name = name.trim();
    let v: f32 = value
        .trim()
        .parse()
        .with_context(|| format!("--init: value of {name} '{value}' is not a number"))?;
    if !v.is_finite() {
        bail!("--init: value of {name} is not finite");
    }
    Ok((name, v))
}

/// The slot of `q3`, `p3` or `v3` among q1..qn, p1..pn, v1..vn.
fn init_slot(name: &str, dof: usize) -> Result<usize> {
    let unknown = || {
        anyhow::anyhow!(
            "--init: unknown coordinate '{name}' (model has q1..q{dof}, p1..p{dof} or v1..v{dof})"
        )
    };
    // The first character (any, not a byte) names q, p or v.
    let mut chars = name.chars();
    let kind = chars.next().map_or("", |c| &name[..c.len_utf8()]);
    let i: usize = chars
        .as_str()
        .parse()
        .ok()
        .filter(|i| (1..=dof).contains(i))
        .ok_or_else(unknown)?;
    match kind {
        "q" => Ok(i - 1),
        "p" => Ok(dof + i - 1),
        "v" => Ok(2 * dof + i - 1),
        _ => Err(unknown()),
    }
}

/// Every value of one kind (`p` or `v`), or which is missing.
fn all_given(values: &[Option<f32>], kind: &str) -> Result<Vec<f32>> {
    values
        .iter()
        .enumerate()
        .map(|(i, v)| v.with_context(|| format!("--init: {kind}{} missing", i + 1)))
        .collect()
}

/// `count` seeded states with every coordinate uniform within
/// `offset ± spread * scale`: inside the region the model was fitted on.
pub fn sample_states(
    offset: &[f32],
    scale: &[f32],
    spread: f32,
    count: usize,
    seed: u64,
) -> Vec<Vec<f32>> {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    (0..count)
        .map(|_| {
            offset
                .iter()
                .zip(scale)
                .map(|(o, s)| o + spread * s * rng.random_range(-1.0f32..=1.0))
                .collect()
        })
        .collect()
}

/// The time of step `k` written with the step's own precision: as many
/// decimals as the shortest decimal of `dt` has (dt = 0.05 gives 0.05,
/// 0.10, ..., never 0.05000000074505806).
pub fn time_text(k: usize, dt: f32) -> String {
    let shortest = format!("{dt}");
    let decimals = shortest.split_once('.').map_or(0, |(_, d)| d.len());
    let step: f64 = shortest.parse().unwrap_or(dt as f64);
    format!("{:.decimals$}", k as f64 * step)
}

/// Render a rollout as CSV `t,q1..qn,p1..pn`.
pub fn to_csv(states: &[Vec<f32>], dof: usize, dt: f32, bits: bool) -> String {
    let mut out = Vec::new();
    write_csv_header(&mut out, dof, false).expect("writing to memory");
    for (k, x) in states.iter().enumerate() {
        write_csv_row(&mut out, k, dt, x, bits).expect("writing to memory");
    }
    String::from_utf8(out).expect("ASCII")
}

#[cfg(test)]
mod tests {
    use super::{parse_init, parse_init_spec, time_text, InitSpec, Rates};

    #[test]
    fn init_takes_momenta_or_velocities_one_kind_for_all() {
        let v = parse_init_spec("v2=0.5, q1=1,q2=2,v1=-0.25", 2).unwrap();
        assert_eq!(
            v,
            InitSpec {
                q: vec![1.0, 2.0],
                rates: Rates::Velocities(vec![-0.25, 0.5])
            }
        );
        assert_eq!(parse_init("q1=1,p1=3", 1).unwrap(), vec![1.0, 3.0]);
        let refusal = |spec: &str, dof: usize| parse_init_spec(spec, dof).unwrap_err().to_string();
        assert!(refusal("q1=0,p1=1,v1=2", 1).contains("p1 and v1 both given"));
        assert!(refusal("q1=0,q2=0,p1=1,v2=2", 2).contains("p1 and v2 mix"));
        assert!(refusal("q1=0,q2=0,v2=2", 2).contains("v1 missing"));
        assert!(refusal("q1=0,w1=2", 1).contains("p1..p1 or v1..v1"));
        assert!(refusal("q1=0,v1=2,v1=3", 1).contains("v1 given twice"));
        // Where no mass matrix converts them (a baseline file), velocities
        // are refused naming the flag.
        let e = parse_init("q1=0,v1=2", 1).unwrap_err().to_string();
        assert!(e.starts_with("--init: velocities"), "{e}");
    }

    #[test]
    fn times_carry_the_step_precision() {
        // 0.05 as f32 is 0.0500000007450580596923828125 (IEEE 754 binary32);
        // the written times keep the step's two decimals.
        assert_eq!(time_text(1, 0.05), "0.05");
        assert_eq!(time_text(3, 0.05), "0.15");
        assert_eq!(time_text(1000, 0.05), "50.00");
        assert_eq!(time_text(7, 1e-3), "0.007");
        assert_eq!(time_text(2, 2.0), "4");
    }
}
