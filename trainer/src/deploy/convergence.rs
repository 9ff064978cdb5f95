//! The convergence proof of an implicit step (implicit midpoint, the
//! discrete-gradient method) before an export is written: from states that
//! span the training range — its centre, the centres of its faces, its
//! corners and seeded states inside — the blob takes a few steps, and each
//! step's iteration count is measured. The export then knows the largest
//! count the training range needs and refuses a limit below it, naming the
//! state.
//!
//! The count is measured with the runtime's own step: the fixed-point
//! iterates do not depend on the limit (the limit only decides when to give
//! up), so a step succeeds with limit k exactly when it converges within k
//! iterations, and then gives the same bits as with any larger limit. The
//! smallest such k is found by doubling, then bisection.

use anyhow::Result;
use rand::{Rng, SeedableRng};
use serde::{Deserialize, Serialize};
use visviva_runtime::integrate::{MAX_ITERATIONS, MAX_TOLERANCE};
use visviva_runtime::{Integrator, Method, State, StepError};

use crate::data::dataset::Dataset;
use crate::deploy::blob::{HostModel, HOST_MAX_DOF};
use crate::deploy::rollout::{flat, state_of};
use crate::interrupt::Watch;

/// Steps taken from each state of the proof.
pub const STEPS_EACH: usize = 8;
/// Seeded states inside the range, beside its centre, faces and corners.
pub const RANDOM_STATES: usize = 64;
/// Corners taken: all of them up to this many (2n <= 8), else this many
/// seeded corners.
pub const MAX_CORNERS: usize = 256;
/// Standard deviations either side of the mean that stand for the training
/// range when only a blob is at hand (it carries the mean and standard
/// deviation per coordinate, not the range): a sinusoid's swing is sqrt(2)
/// standard deviations, a uniform spread's sqrt(3) (textbook), both inside.
pub const NORMALIZATION_SIGMAS: f32 = 2.0;

/// Whether `m` solves an implicit equation by iteration (and so has an
/// iteration limit that matters).
pub fn is_implicit(m: Method) -> bool {
    matches!(m, Method::ImplicitMidpoint | Method::DiscreteGradient)
}

/// The per-coordinate range (q1..qn, p1..pn) the proof spans.
#[derive(Debug, Clone, PartialEq)]
pub struct TrainingRange {
    /// Smallest value per coordinate.
    pub lo: Vec<f32>,
    /// Largest value per coordinate.
    pub hi: Vec<f32>,
    /// Where the range came from, for the report.
    pub source: String,
}

impl TrainingRange {
    /// The smallest and largest logged value of every coordinate.
    pub fn of_dataset(ds: &Dataset) -> Self {
        let n = 2 * ds.dof;
        let (mut lo, mut hi) = (vec![f64::INFINITY; n], vec![f64::NEG_INFINITY; n]);
        for t in &ds.trajectories {
            for row in t.x.rows() {
                for (i, v) in row.iter().enumerate() {
                    lo[i] = lo[i].min(*v);
                    hi[i] = hi[i].max(*v);
                }
            }
        }
        Self {
            lo: lo.iter().map(|v| *v as f32).collect(),
            hi: hi.iter().map(|v| *v as f32).collect(),
            source: "the training log's range per coordinate".into(),
        }
    }

    /// The mean plus and minus [`NORMALIZATION_SIGMAS`] standard deviations
    /// (a blob's normalization).
    pub fn of_normalization(offset: &[f32], scale: &[f32]) -> Self {
        let k = NORMALIZATION_SIGMAS;
        Self {
            lo: offset.iter().zip(scale).map(|(o, s)| o - k * s).collect(),
            hi: offset.iter().zip(scale).map(|(o, s)| o + k * s).collect(),
            source: format!("the blob's training mean +/- {k} standard deviations per coordinate"),
        }
    }

    /// The proof's starting states, each with what it is: the centre, the
    /// face centres, the corners (all, or [`MAX_CORNERS`] seeded ones) and
    /// [`RANDOM_STATES`] seeded states inside.
    pub fn states(&self) -> Vec<(&'static str, Vec<f32>)> {
        let n = self.lo.len();
        let mid: Vec<f32> = self
            .lo
            .iter()
            .zip(&self.hi)
            .map(|(a, b)| 0.5 * (a + b))
            .collect();
        let mut out = vec![("the centre of the training range", mid.clone())];
        for i in 0..n {
            for end in [&self.lo, &self.hi] {
                let mut x = mid.clone();
                x[i] = end[i];
                out.push(("a face centre of the training range", x));
            }
        }
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(0x636f_6e76);
        let corner = |bits: u64| -> Vec<f32> {
            (0..n)
                .map(|i| {
                    if bits >> i & 1 == 1 {
                        self.hi[i]
                    } else {
                        self.lo[i]
                    }
                })
                .collect()
        };
        if n < 64 && (1usize << n) <= MAX_CORNERS {
            out.extend((0..1u64 << n).map(|b| ("a corner of the training range", corner(b))));
        } else {
            out.extend(
                (0..MAX_CORNERS).map(|_| ("a corner of the training range", corner(rng.random()))),
            );
        }
        out.extend((0..RANDOM_STATES).map(|_| {
            let x = self
                .lo
                .iter()
                .zip(&self.hi)
                .map(|(a, b)| a + (b - a) * rng.random_range(0.0f32..=1.0))
                .collect();
            ("a seeded state inside the training range", x)
        }));
        out
    }
}

/// What the proof measured.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ConvergenceProof {
    /// Where the range came from.
    pub range: String,
    /// Starting states.
    pub states: usize,
    /// Steps from each.
    pub steps_each: usize,
    /// The largest iteration count any of those steps needed: the smallest
    /// limit with which all of them converge.
    pub iterations_needed: u16,
    /// The blob's iteration limit.
    pub max_iterations: u16,
}

/// A step of the proof that the blob's settings cannot take.
#[derive(Debug, Clone, PartialEq)]
pub struct NotProven {
    /// The starting state and what it is (a corner, ...).
    pub start: (&'static str, Vec<f32>),
    /// The step (counted from 1) that failed.
    pub step: usize,
    /// The state that step started from.
    pub state: Vec<f32>,
    /// Iterations that step needs (None: not within [`MAX_ITERATIONS`], or
    /// another error).
    pub needed: Option<u16>,
    /// The step's error at the blob's limit.
    pub error: StepError,
    /// When the step converges under no limit: the tightest of 10, 100 and
    /// 1000 times the blob's tolerance with which it converges within the
    /// blob's limit (the iterates settle, but within f32 round-off above
    /// the tolerance rather than within it).
    pub looser_tolerance: Option<f32>,
}

/// The outcome: proved, or the worst step found (the one needing the most
/// iterations, or one that converges under no limit at all).
pub type Outcome = std::result::Result<ConvergenceProof, NotProven>;

/// Step `model` [`STEPS_EACH`] times from every state of `range` with its
/// own integrator, measuring the iterations of each step; `Ok(None)` when
/// the integrator is explicit (nothing to prove).
pub fn prove(
    model: &HostModel<'_>,
    range: &TrainingRange,
    watch: Watch,
) -> Result<Option<Outcome>> {
    let it = model.integrator();
    if !is_implicit(it.method) {
        return Ok(None);
    }
    let starts = range.states();
    let mut needed = 0u16;
    let mut worst: Option<NotProven> = None;
    for start in &starts {
        watch.check()?;
        let mut s = state_of(&start.1)?;
        for k in 1..=STEPS_EACH {
            match iterations_needed(model, it, &s) {
                Ok((n, next)) => {
                    needed = needed.max(n);
                    if n > it.max_iterations
                        && worst
                            .as_ref()
                            .is_none_or(|w| w.needed.is_some_and(|m| n > m))
                    {
                        let error = StepError::NotConverged {
                            iterations: it.max_iterations,
                        };
                        worst = Some(not_proven(start, k, &s, Some(n), error));
                    }
                    s = next;
                }
                Err(error) => {
                    if worst.as_ref().is_none_or(|w| w.needed.is_some()) {
                        let mut w = not_proven(start, k, &s, None, error);
                        w.looser_tolerance = looser_tolerance(model, it, &s);
                        worst = Some(w);
                    }
                    break;
                }
            }
        }
    }
    Ok(Some(match worst {
        Some(w) => Err(w),
        None => Ok(ConvergenceProof {
            range: range.source.clone(),
            states: starts.len(),
            steps_each: STEPS_EACH,
            iterations_needed: needed,
            max_iterations: it.max_iterations,
        }),
    }))
}

fn not_proven(
    start: &(&'static str, Vec<f32>),
    step: usize,
    s: &State<HOST_MAX_DOF>,
    needed: Option<u16>,
    error: StepError,
) -> NotProven {
    NotProven {
        start: start.clone(),
        step,
        state: flat(s),
        needed,
        error,
        looser_tolerance: None,
    }
}

/// The tightest of 10, 100 and 1000 times `it`'s tolerance (at most the
/// largest a blob holds) with which one step from `s` converges within
/// `it`'s limit.
fn looser_tolerance(model: &HostModel<'_>, it: Integrator, s: &State<HOST_MAX_DOF>) -> Option<f32> {
    [10.0f32, 100.0, 1000.0]
        .into_iter()
        .map(|k| (k * it.tolerance).min(MAX_TOLERANCE))
        .find(|&tolerance| {
            let mut x = *s;
            Integrator { tolerance, ..it }.step(model, &mut x).is_ok()
        })
}

/// The smallest iteration limit with which one step from `s` succeeds, and
/// the state after it; the step's error when it fails for another reason
/// than the limit or needs more than [`MAX_ITERATIONS`].
fn iterations_needed(
    model: &HostModel<'_>,
    it: Integrator,
    s: &State<HOST_MAX_DOF>,
) -> std::result::Result<(u16, State<HOST_MAX_DOF>), StepError> {
    let attempt = |k: u16| {
        let mut x = *s;
        Integrator {
            max_iterations: k,
            ..it
        }
        .step(model, &mut x)
        .map(|()| x)
    };
    // Doubling until a limit suffices ...
    let mut hi = 1u16;
    let mut after = loop {
        match attempt(hi) {
            Ok(x) => break x,
            Err(StepError::NotConverged { .. }) if hi < MAX_ITERATIONS => {
                hi = (2 * hi).min(MAX_ITERATIONS)
            }
            Err(e) => return Err(e),
        }
    };
    // ... then bisection between the last that failed and the first that did not.
    let mut lo = hi / 2;
    while hi - lo > 1 {
        let k = lo + (hi - lo) / 2;
        match attempt(k) {
            Ok(x) => (hi, after) = (k, x),
            Err(_) => lo = k,
        }
    }
    Ok((hi, after))
}

impl NotProven {
    /// The refusal a user reads, naming the state as `rollout --init` takes
    /// it; `key` names a setting (`max_iterations`, `tolerance`) as the
    /// user sets it (`--max-iterations`, `[[export]] max_iterations`).
    pub fn message(&self, settings: &str, limit: u16, key: &dyn Fn(&str) -> String) -> String {
        let n = self.state.len() / 2;
        let state = init_text(&self.state, n);
        let what = if self.step == 1 {
            self.start.0.to_string()
        } else {
            format!(
                "step {} of a rollout from {}, {}",
                self.step,
                self.start.0,
                init_text(&self.start.1, n)
            )
        };
        let from = format!("the implicit step from the state {state} ({what})");
        let smaller = "choose a smaller dt or more substeps (nothing was written)";
        match (self.needed, self.error, self.looser_tolerance) {
            (Some(k), _, _) => format!(
                "{from} needs {k} iterations to converge, more than the limit of {limit} \
                 ({settings}): set {} to at least {k} (nothing was written)",
                key("max_iterations")
            ),
            (None, StepError::NotConverged { .. }, Some(t)) => format!(
                "{from} does not converge within {MAX_ITERATIONS} iterations ({settings}): its \
                 iterates settle within f32 round-off above the tolerance, and converge with \
                 {} = {t:e}; set it, or {smaller}",
                key("tolerance")
            ),
            (None, StepError::NotConverged { .. }, None) => format!(
                "{from} does not converge within {MAX_ITERATIONS} iterations ({settings}): {smaller}"
            ),
            (None, e, _) => format!("{from} fails: {e} ({settings}): {smaller}"),
        }
    }
}

/// A flat state as `q1=..,..,p1=..` (shortest round-trip decimals).
pub fn init_text(x: &[f32], n: usize) -> String {
    x.iter()
        .enumerate()
        .map(|(i, v)| {
            let name = if i < n {
                format!("q{}", i + 1)
            } else {
                format!("p{}", i - n + 1)
            };
            format!("{name}={v}")
        })
        .collect::<Vec<_>>()
        .join(",")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_states_span_centre_faces_corners_and_inside() {
        let r = TrainingRange {
            lo: vec![-1.0, -2.0],
            hi: vec![1.0, 2.0],
            source: String::new(),
        };
        let s = r.states();
        // 1 centre, 2 x 2 face centres, 2^2 corners, the seeded ones.
        assert_eq!(s.len(), 1 + 4 + 4 + RANDOM_STATES);
        assert_eq!(s[0].1, vec![0.0, 0.0]);
        assert!(s
            .iter()
            .any(|(k, x)| *k == "a corner of the training range" && x == &vec![1.0, -2.0]));
        assert!(s
            .iter()
            .any(|(k, x)| *k == "a face centre of the training range" && x == &vec![0.0, 2.0]));
        for (_, x) in &s {
            assert!(x
                .iter()
                .zip(&r.lo)
                .zip(&r.hi)
                .all(|((v, a), b)| a <= v && v <= b));
        }
        assert_eq!(init_text(&[0.5, -1.0], 1), "q1=0.5,p1=-1");
    }
}
