//! How far a state lies from the states the model was trained on. A blob
//! carries the training states' per-coordinate mean and standard deviation
//! (its normalization); a state more than [`FAR_SIGMAS`] standard
//! deviations from the mean in any coordinate is outside anything the
//! model saw, and its prediction is an extrapolation. The threshold is
//! common practice for flagging outliers, not a derived bound.
//!
//! The training envelope a fitted blob stores (format version 4) and the
//! observer's fallback envelope from its tuning logs are both a range of
//! logged states widened by [`WIDEN`] of it on each side
//! ([`widened_range`]); [`training_bounds`] is the blob's.

use crate::data::dataset::Dataset;
use crate::deploy::blob::{BlobModel, Bounds};

/// Fraction of a coordinate's logged range (max - min) added below its
/// minimum and above its maximum: a state a little beyond the extremes
/// seen is still a state the model was fitted near. A setting, not a
/// derived bound.
pub const WIDEN: f64 = 0.1;

/// Per-coordinate minimum and maximum of every state of `logs` (q1..qn,
/// p1..pn), each moved outward by [`WIDEN`] of the range. Without states
/// the bounds are infinite (lower +inf, upper -inf).
pub fn widened_range(logs: &[&Dataset], n: usize) -> (Vec<f64>, Vec<f64>) {
    let (mut low, mut high) = (vec![f64::INFINITY; 2 * n], vec![f64::NEG_INFINITY; 2 * n]);
    for t in logs.iter().flat_map(|d| &d.trajectories) {
        for row in t.x.rows() {
            for c in 0..2 * n {
                low[c] = low[c].min(row[c]);
                high[c] = high[c].max(row[c]);
            }
        }
    }
    for c in 0..2 * n {
        let margin = WIDEN * (high[c] - low[c]);
        low[c] -= margin;
        high[c] += margin;
    }
    (low, high)
}

/// The training envelope a fitted blob stores: [`widened_range`] of the
/// training states, each bound rounded to the nearest `f32` and clamped to
/// the format's +-`MAX_OFFSET` (rounding is monotone, so every training
/// state, rounded to `f32` as the runtime holds it, lies inside). `None`
/// when the data hold a non-finite value or no state.
pub fn training_bounds(train: &Dataset) -> Option<Bounds> {
    let (low, high) = widened_range(&[train], train.dof);
    let limit = f64::from(visviva_runtime::format::MAX_OFFSET);
    let to_f32 = |v: &Vec<f64>| -> Option<Vec<f32>> {
        v.iter()
            .map(|x| x.is_finite().then(|| x.clamp(-limit, limit) as f32))
            .collect()
    };
    Some(Bounds {
        lower: to_f32(&low)?,
        upper: to_f32(&high)?,
    })
}

/// Standard deviations from the training mean beyond which a state counts
/// as far outside the training data.
pub const FAR_SIGMAS: f32 = 5.0;

/// The training states' mean and standard deviation per coordinate
/// (q1..qn, p1..pn).
#[derive(Debug, Clone, PartialEq)]
pub struct Envelope {
    offset: Vec<f32>,
    scale: Vec<f32>,
}

/// The first state found far outside the envelope.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FarState {
    /// Step index (0 = the initial state).
    pub step: usize,
    /// Coordinate index into q1..qn, p1..pn.
    pub coordinate: usize,
    /// Distance from the training mean in standard deviations.
    pub sigmas: f32,
}

impl Envelope {
    /// The envelope of a normalization's per-coordinate mean `offset` and
    /// standard deviation `scale`.
    pub fn new(offset: Vec<f32>, scale: Vec<f32>) -> Self {
        Self { offset, scale }
    }

    /// The envelope a blob's normalization describes.
    pub fn of(blob: &BlobModel) -> Self {
        Self {
            offset: blob.offset.clone(),
            scale: blob.scale.clone(),
        }
    }

    /// The coordinate farthest from the training mean, and how far (in
    /// standard deviations); a non-finite coordinate counts as infinitely
    /// far.
    pub fn farthest(&self, x: &[f32]) -> Option<(usize, f32)> {
        x.iter()
            .zip(self.offset.iter().zip(&self.scale))
            .map(|(v, (o, s))| {
                let d = ((v - o) / s).abs();
                if d.is_nan() {
                    f32::INFINITY
                } else {
                    d
                }
            })
            .enumerate()
            .max_by(|a, b| a.1.total_cmp(&b.1))
    }

    /// `Some` when `x`, the state of step `step`, lies beyond
    /// [`FAR_SIGMAS`].
    pub fn far(&self, step: usize, x: &[f32]) -> Option<FarState> {
        self.farthest(x)
            .filter(|&(_, d)| d > FAR_SIGMAS)
            .map(|(coordinate, sigmas)| FarState {
                step,
                coordinate,
                sigmas,
            })
    }
}

impl FarState {
    /// The warning a user reads (`dof` names the coordinate).
    pub fn warning(&self, dof: usize) -> String {
        let name = if self.coordinate < dof {
            format!("q{}", self.coordinate + 1)
        } else {
            format!("p{}", self.coordinate - dof + 1)
        };
        let when = if self.step == 0 {
            "the initial state".to_string()
        } else {
            format!("the state of step {}", self.step)
        };
        format!(
            "warning: {when} lies far outside the training data ({name} is {:.1} standard deviations from the training mean; more than {FAR_SIGMAS} counts as outside): the prediction from there on is an extrapolation the model was never checked on",
            self.sigmas
        )
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::data::dataset::{DerivativeSource, Trajectory};
    use ndarray::{array, Array2};

    fn log(x: Array2<f64>) -> Dataset {
        let rows = x.nrows();
        Dataset {
            dof: x.ncols() / 2,
            inputs: 0,
            trajectories: vec![Trajectory {
                id: "0".into(),
                t: (0..rows).map(|k| k as f64).collect(),
                dx: Array2::zeros(x.dim()),
                u: Array2::zeros((rows, 0)),
                x,
            }],
            derivatives: DerivativeSource::Given,
        }
    }

    #[test]
    fn the_training_envelope_is_the_range_widened_by_a_tenth_on_each_side() {
        // q in [-1, 3] (range 4, margin 0.4), p in [2, 2.5] (range 0.5,
        // margin 0.05); hand-computed.
        let data = log(array![[-1.0, 2.0], [3.0, 2.5], [0.0, 2.2]]);
        let b = training_bounds(&data).unwrap();
        assert_eq!(b.lower, [-1.4f32, 1.95]);
        assert_eq!(b.upper, [3.4f32, 2.55]);
        // A coordinate that never moves keeps one value on both sides.
        let still = log(array![[0.1, 1.0], [0.1, 2.0]]);
        let b = training_bounds(&still).unwrap();
        assert_eq!((b.lower[0], b.upper[0]), (0.1f32, 0.1f32));
        // Bounds beyond the format's range are clamped; NaN gives none.
        let huge = log(array![[-1e30, 0.0], [1e30, 1.0]]);
        let b = training_bounds(&huge).unwrap();
        assert_eq!((b.lower[0], b.upper[0]), (-1e18f32, 1e18f32));
        assert!(training_bounds(&log(array![[f64::NAN, 0.0]])).is_none());
    }

    fn envelope() -> Envelope {
        Envelope {
            offset: vec![1.0, 0.0],
            scale: vec![2.0, 0.5],
        }
    }

    #[test]
    fn distance_is_counted_in_standard_deviations_per_coordinate() {
        let e = envelope();
        assert_eq!(e.farthest(&[1.0, 0.25]), Some((1, 0.5)));
        assert_eq!(e.farthest(&[5.0, 0.5]), Some((0, 2.0)));
        assert_eq!(e.farthest(&[1.0, -1.5]), Some((1, 3.0)));
    }

    #[test]
    fn only_states_beyond_the_threshold_are_far() {
        let e = envelope();
        assert_eq!(e.far(3, &[11.0, 0.0]), None);
        let far = e.far(3, &[11.5, 0.0]).unwrap();
        assert_eq!((far.step, far.coordinate), (3, 0));
        assert!(far.warning(1).contains("q1 is 5.2 standard deviations"));
        let nan = e.far(0, &[1.0, f32::NAN]).unwrap();
        assert!(nan.warning(1).starts_with("warning: the initial state"));
        assert!(nan.warning(1).contains("p1"));
    }
}
