//! Whether the fitted energy structure underfits the plain baseline by a
//! clear margin on the held-out logs, and which structure to try instead.
//! A separable energy H = T(p) + V(q) cannot hold a kinetic energy that
//! depends on the positions (a linkage, a crane with a rolling trolley);
//! the mechanical structure cannot hold one that is not quadratic in the
//! momenta; the general energy can hold both but has the most to learn
//! from the same logs, so a machine with a simpler structure is often
//! fitted better by that structure.

use serde::{Deserialize, Serialize};

use crate::deploy::blob::{BlobModel, Energy};
use crate::evidence::report::Evidence;

/// A model whose held-out state error is more than this many times the
/// baseline's is flagged: our own choice, well outside the spread between
/// runs of the demos' ratios, so a flag means the structure, not the seed.
pub const CLEAR_MARGIN: f64 = 1.5;

/// The flag: the structure, how far it is behind, and what to try.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Underfit {
    /// The fitted structure, in the project file's words.
    pub structure: String,
    /// The model's state error over the baseline's (medians over the
    /// held-out trajectories).
    pub ratio: f64,
    /// What to try instead, in the project file's words.
    pub try_instead: String,
}

/// The flag for `model` when its state error is more than
/// [`CLEAR_MARGIN`] times the baseline's; `None` without a baseline.
pub fn underfit(
    model: &BlobModel,
    model_error: f64,
    baseline_error: Option<f64>,
) -> Option<Underfit> {
    let structure = match model.energy {
        Energy::Separable { .. } => "separable",
        Energy::Mechanical { .. } => "mechanical",
        Energy::General(_) => "general",
    };
    flag(structure, model_error, baseline_error)
}

/// [`underfit`] on the medians of a check's evidence (conservative or
/// damped/driven).
pub fn underfit_evidence(model: &BlobModel, evidence: &Evidence) -> Option<Underfit> {
    match evidence {
        Evidence::Check(c) => underfit(
            model,
            c.median_model.state_rel_rmse,
            c.median_baseline.as_ref().map(|b| b.state_rel_rmse),
        ),
        Evidence::Port(p) => underfit(
            model,
            p.median_model_state_rel_rmse,
            p.median_baseline_state_rel_rmse,
        ),
    }
}

fn flag(structure: &str, model_error: f64, baseline_error: Option<f64>) -> Option<Underfit> {
    let baseline_error = baseline_error.filter(|b| b.is_finite() && *b > 0.0)?;
    if !model_error.is_finite() || model_error <= CLEAR_MARGIN * baseline_error {
        return None;
    }
    Some(Underfit {
        structure: structure.into(),
        ratio: model_error / baseline_error,
        try_instead: try_instead(structure).into(),
    })
}

/// The other structures, each with the machines it suits.
fn try_instead(structure: &str) -> &'static str {
    match structure {
        "separable" => {
            "arch = \"mechanical\" (a kinetic energy that depends on the positions, as in a \
             linkage) or arch = \"general\""
        }
        "mechanical" => {
            "arch = \"general\" (an energy that is not quadratic in the momenta), or arch = \
             \"separable\" if the kinetic energy does not depend on the positions"
        }
        _ => {
            "arch = \"separable\" (a kinetic energy that does not depend on the positions) or \
             arch = \"mechanical\" (one quadratic in the momenta), which have less to learn; \
             or more epochs"
        }
    }
}

impl Underfit {
    /// The command output's line.
    pub fn message(&self) -> String {
        format!(
            "warning: the {} energy model's held-out state error is {:.1} times the plain \
             baseline's: this structure underfits the logs; try {}",
            self.structure, self.ratio, self.try_instead
        )
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn flags_only_beyond_the_margin() {
        assert_eq!(flag("general", 1.5, Some(1.0)), None);
        assert_eq!(flag("general", 9.0, None), None);
        assert_eq!(flag("general", f64::NAN, Some(1.0)), None);
        assert_eq!(flag("general", 9.0, Some(0.0)), None);
        let u = flag("separable", 3.0, Some(1.5)).unwrap();
        assert_eq!(u.ratio, 2.0);
        assert!(u.message().contains("2.0 times the plain baseline's"));
    }

    #[test]
    fn each_structure_is_sent_to_the_others() {
        for (s, others) in [
            ("separable", ["mechanical", "general"]),
            ("mechanical", ["general", "separable"]),
            ("general", ["separable", "mechanical"]),
        ] {
            let u = flag(s, 2.0, Some(1.0)).unwrap();
            for o in others {
                assert!(
                    u.try_instead.contains(&format!("arch = \"{o}\"")),
                    "{s}: {o}"
                );
            }
            assert!(!u.try_instead.contains(&format!("arch = \"{s}\"")), "{s}");
        }
    }
}
