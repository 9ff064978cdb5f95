//! Host rollouts through `visviva-runtime`, the very arithmetic the device
//! runs, plus the helpers around them: parsing initial states, sampling
//! test states inside a model's normalization range, and drift measures.

use std::fmt::Write as _;

use anyhow::{bail, Context, Result};
use rand::{Rng, SeedableRng};
use visviva_runtime::{Hamiltonian, State, StepError};

use crate::deploy::blob::{HostModel, HOST_MAX_DOF};

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
/// inputs when `inputs` is shorter).
pub fn roll_driven(
    model: &HostModel<'_>,
    x0: &[f32],
    steps: usize,
    inputs: &[Vec<f32>],
) -> Result<Rollout> {
    let zeros = vec![0.0f32; model.inputs()];
    let mut s = state_of(x0)?;
    let n = s.dof();
    let flat = |s: &State<HOST_MAX_DOF>| {
        let mut v = s.q().to_vec();
        v.extend_from_slice(s.p());
        v
    };
    let mut out = Rollout {
        states: vec![flat(&s)],
        energy: vec![model.energy(&s).map_err(|e| anyhow::anyhow!("{e}"))?],
        failure: None,
    };
    out.states.reserve(steps);
    for k in 0..steps {
        let u = inputs.get(k).map_or(zeros.as_slice(), Vec::as_slice);
        if let Err(e) = model.step_driven(&mut s, u) {
            out.failure = Some((k, e));
            break;
        }
        debug_assert_eq!(s.dof(), n);
        out.states.push(flat(&s));
        out.energy.push(model.energy(&s).unwrap_or(f32::NAN));
    }
    Ok(out)
}

/// Read an input sequence: CSV with header `t,u1..um`, one row per step.
/// Errors name the file, line and column.
pub fn read_inputs(path: &std::path::Path, m: usize) -> Result<Vec<Vec<f32>>> {
    let mut r =
        csv::Reader::from_path(path).with_context(|| format!("{}: cannot read", path.display()))?;
    let header: Vec<String> = r
        .headers()
        .with_context(|| format!("{}: line 1: cannot read the header", path.display()))?
        .iter()
        .map(|h| h.trim().to_string())
        .collect();
    let want: Vec<String> = std::iter::once("t".to_string())
        .chain((1..=m).map(|i| format!("u{i}")))
        .collect();
    if header != want {
        bail!(
            "{}: line 1: columns {:?}, the model needs {:?}",
            path.display(),
            header,
            want
        );
    }
    let mut rows = Vec::new();
    for (k, rec) in r.records().enumerate() {
        let line = k + 2;
        let rec = rec.with_context(|| format!("{}: line {line}: malformed row", path.display()))?;
        let mut row = Vec::with_capacity(m);
        for (c, name) in want.iter().enumerate().skip(1) {
            let text = rec.get(c).unwrap_or("").trim();
            let v: f32 = text.parse().with_context(|| {
                format!(
                    "{}: line {line}, column {name}: '{text}' is not a number",
                    path.display()
                )
            })?;
            if !v.is_finite() {
                bail!("{}: line {line}, column {name}: not finite", path.display());
            }
            row.push(v);
        }
        rows.push(row);
    }
    Ok(rows)
}

/// Parse `q1=0.1,p1=0` (every coordinate named once) for `dof` degrees of
/// freedom.
pub fn parse_init(spec: &str, dof: usize) -> Result<Vec<f32>> {
    let mut x = vec![None; 2 * dof];
    for part in spec.split(',').map(str::trim).filter(|s| !s.is_empty()) {
        let (name, value) = part
            .split_once('=')
            .with_context(|| format!("--init: '{part}' is not NAME=VALUE"))?;
        let name = name.trim();
        let (kind, idx) = name.split_at(1);
        let i: usize = idx
            .parse()
            .ok()
            .filter(|i| (1..=dof).contains(i))
            .with_context(|| {
                format!("--init: unknown coordinate '{name}' (model has q1..q{dof}, p1..p{dof})")
            })?;
        let slot = match kind {
            "q" => i - 1,
            "p" => dof + i - 1,
            _ => bail!("--init: unknown coordinate '{name}' (model has q1..q{dof}, p1..p{dof})"),
        };
        let v: f32 = value
            .trim()
            .parse()
            .with_context(|| format!("--init: value of {name} '{value}' is not a number"))?;
        if !v.is_finite() {
            bail!("--init: value of {name} is not finite");
        }
        if x[slot].replace(v).is_some() {
            bail!("--init: {name} given twice");
        }
    }
    x.iter()
        .enumerate()
        .map(|(k, v)| {
            v.with_context(|| {
                let (kind, i) = if k < dof {
                    ("q", k + 1)
                } else {
                    ("p", k - dof + 1)
                };
                format!("--init: {kind}{i} missing")
            })
        })
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
    let mut s = String::from("t");
    for k in ["q", "p"] {
        for i in 1..=dof {
            let _ = write!(s, ",{k}{i}");
        }
    }
    s.push('\n');
    for (k, x) in states.iter().enumerate() {
        s.push_str(&time_text(k, dt));
        for v in x {
            if bits {
                let _ = write!(s, ",{:#010x}", v.to_bits());
            } else {
                let _ = write!(s, ",{v}");
            }
        }
        s.push('\n');
    }
    s
}

#[cfg(test)]
mod tests {
    use super::time_text;

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
