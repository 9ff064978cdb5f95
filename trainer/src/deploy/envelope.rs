//! How far a state lies from the states the model was trained on. A blob
//! carries the training states' per-coordinate mean and standard deviation
//! (its normalization); a state more than [`FAR_SIGMAS`] standard
//! deviations from the mean in any coordinate is outside anything the
//! model saw, and its prediction is an extrapolation. The threshold is
//! common practice for flagging outliers, not a derived bound.

use crate::deploy::blob::BlobModel;

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
