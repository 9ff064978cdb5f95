//! `arch = "auto"`: fit every energy structure the log permits (separable,
//! mechanical, general) on a short budget, score each by the figure `check`
//! reports (the median over the held-out trajectories of the rollout's
//! state relative RMSE, computed by [`crate::evidence::check`]), and name
//! the one with the smallest figure. A structure the plan refuses (or whose
//! short fit fails) is skipped with its reason, never an error.

use anyhow::{anyhow, bail, Result};
use serde::{Deserialize, Serialize};

use crate::data::dataset::Dataset;
use crate::deploy::blob::{BlobModel, HostModel};
use crate::evidence::check::{check, check_port, CheckSettings};
use crate::learn::fit::FitSettings;
use crate::learn::stage::{FitOutcome, ModelPlan};
use crate::learn::structure::Arch;
use visviva_runtime::Hamiltonian;

/// The short budget is the configured one divided by this (at least one
/// epoch or step; trajectory matching's epochs too), with the same seed and
/// hidden sizes: our own choice,
/// enough for the structures to separate on the built-in systems.
pub const SHORT_BUDGET_DIVISOR: usize = 5;

/// The structures tried, in this order (a tie keeps the earlier, simpler).
pub const CANDIDATES: [Arch; 3] = [Arch::Separable, Arch::Mechanical, Arch::General];

/// One structure's outcome.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Candidate {
    /// The structure, in the project file's words.
    pub structure: String,
    /// Median held-out state relative RMSE of its short fit (`None` when
    /// skipped).
    pub state_rel_rmse: Option<f64>,
    /// Why it was skipped.
    pub skipped: Option<String>,
}

/// The choice and the evidence for it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Selection {
    /// Every structure tried, in [`CANDIDATES`] order.
    pub candidates: Vec<Candidate>,
    /// The structure chosen.
    pub chosen: String,
    /// Epochs of each short fit (or optimizer steps when the budget is
    /// given in steps).
    pub short_budget: usize,
    /// Whether `short_budget` counts optimizer steps.
    pub short_budget_in_steps: bool,
    /// Read back from the last run's fit of the same logs and settings.
    #[serde(default)]
    pub reused: bool,
}

/// The structure's name in the project file's words.
pub fn arch_name(arch: Arch) -> &'static str {
    match arch {
        Arch::Separable => "separable",
        Arch::Mechanical => "mechanical",
        Arch::General => "general",
        Arch::Auto => "auto",
    }
}

/// `settings` with the short budget (same seed, same everything else).
pub fn short_settings(settings: &FitSettings) -> FitSettings {
    let cut = |n: usize| (n / SHORT_BUDGET_DIVISOR).max(1);
    FitSettings {
        epochs: cut(settings.epochs),
        steps: settings.steps.map(cut),
        ..settings.clone()
    }
}

/// Trajectory matching's plan with its epochs cut like
/// [`short_settings`]'s.
pub fn short_trajectory(
    plan: Option<crate::learn::mode::TrajectoryPlan>,
) -> Option<crate::learn::mode::TrajectoryPlan> {
    plan.map(|p| crate::learn::mode::TrajectoryPlan {
        epochs: (p.epochs / SHORT_BUDGET_DIVISOR).max(1),
        ..p
    })
}

/// The figure `check` reports for the fitted `blob` on `val`: the median
/// over its trajectories of the state relative RMSE (conservative models
/// through [`check`], damped or driven ones through [`check_port`]).
pub fn held_out_error(blob: &[u8], val: &Dataset) -> Result<f64> {
    let model = HostModel::from_bytes(blob).map_err(|e| anyhow!("{e}"))?;
    if model.has_port_terms() {
        let parsed = BlobModel::from_bytes(blob).map_err(|e| anyhow!("{e}"))?;
        let r = check_port(&model, &parsed, val)?;
        let errors = r.rollouts.iter().map(|d| d.state_rel_rmse).collect();
        return Ok(crate::evidence::check::median(errors));
    }
    let r = check(&model, None, val, None, &CheckSettings::default())?;
    Ok(r.median_model.state_rel_rmse)
}

/// Fit each candidate with `fit` on the short budget and score it on `val`.
/// `plan` settles a structure's model (a refusal skips it); `fit` runs the
/// fit stage for a plan and settings.
pub fn select(
    val: &Dataset,
    settings: &FitSettings,
    plan: impl Fn(Arch) -> Result<ModelPlan>,
    fit: impl Fn(&ModelPlan, &FitSettings) -> Result<FitOutcome>,
) -> Result<Selection> {
    let short = short_settings(settings);
    let candidates: Vec<Candidate> = CANDIDATES
        .iter()
        .map(|&arch| {
            let scored = plan(arch)
                .and_then(|p| fit(&p, &short))
                .and_then(|out| held_out_error(&out.blob, val));
            match scored {
                Ok(e) if e.is_finite() => Candidate {
                    structure: arch_name(arch).into(),
                    state_rel_rmse: Some(e),
                    skipped: None,
                },
                Ok(e) => skipped(arch, format!("its held-out state error is {e}")),
                Err(e) => skipped(arch, format!("{e:#}")),
            }
        })
        .collect();
    let Some(best) = candidates
        .iter()
        .filter_map(|c| c.state_rel_rmse.map(|e| (c, e)))
        .min_by(|a, b| a.1.total_cmp(&b.1))
    else {
        let reasons: Vec<String> = candidates.iter().map(Candidate::line).collect();
        bail!(
            "arch = \"auto\": no structure could be fitted:\n  {}",
            reasons.join("\n  ")
        );
    };
    Ok(Selection {
        chosen: best.0.structure.clone(),
        short_budget: short.steps.unwrap_or(short.epochs),
        short_budget_in_steps: short.steps.is_some(),
        reused: false,
        candidates,
    })
}

fn skipped(arch: Arch, reason: String) -> Candidate {
    Candidate {
        structure: arch_name(arch).into(),
        state_rel_rmse: None,
        skipped: Some(reason),
    }
}

impl Candidate {
    /// The command output's line for this candidate.
    pub fn line(&self) -> String {
        match (&self.state_rel_rmse, &self.skipped) {
            (Some(e), _) => format!("{:<10} held-out state error {e:.4e}", self.structure),
            (None, Some(r)) => format!("{:<10} skipped: {r}", self.structure),
            (None, None) => format!("{:<10} skipped", self.structure),
        }
    }
}

impl Selection {
    /// The chosen structure as an [`Arch`].
    pub fn chosen_arch(&self) -> Arch {
        CANDIDATES
            .into_iter()
            .find(|a| arch_name(*a) == self.chosen)
            .unwrap_or(Arch::General)
    }

    /// What the short budget counts, in words.
    pub fn budget_unit(&self) -> &'static str {
        match (self.short_budget_in_steps, self.short_budget) {
            (true, 1) => "optimizer step",
            (true, _) => "optimizer steps",
            (false, 1) => "epoch",
            (false, _) => "epochs",
        }
    }

    /// The command output's lines: the rule, each candidate and the choice.
    pub fn lines(&self) -> Vec<String> {
        let unit = self.budget_unit();
        let mut out = vec![format!(
            "arch = auto: each structure the log permits fitted for {} {unit} (1/{} of the \
             budget, same seed and sizes), scored by the median held-out state relative RMSE \
             (the figure check reports):",
            self.short_budget, SHORT_BUDGET_DIVISOR
        )];
        out.extend(self.candidates.iter().map(|c| format!("  {}", c.line())));
        out.push(if self.reused {
            format!(
                "chosen: {} (smallest held-out state error; reused from the last fit of the \
                 same logs and settings)",
                self.chosen
            )
        } else {
            format!(
                "chosen: {} (smallest held-out state error); fitting it with the full budget",
                self.chosen
            )
        });
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_short_budget_is_a_fifth_and_at_least_one() {
        let s = FitSettings {
            epochs: 1000,
            seed: 7,
            ..FitSettings::default()
        };
        let short = short_settings(&s);
        assert_eq!((short.epochs, short.steps, short.seed), (200, None, 7));
        let tiny = short_settings(&FitSettings {
            epochs: 3,
            steps: Some(4),
            ..FitSettings::default()
        });
        assert_eq!((tiny.epochs, tiny.steps), (1, Some(1)));
    }

    #[test]
    fn every_candidate_names_itself_and_round_trips() {
        for arch in CANDIDATES {
            let s = Selection {
                candidates: vec![],
                chosen: arch_name(arch).into(),
                short_budget: 1,
                short_budget_in_steps: false,
                reused: false,
            };
            assert_eq!(s.chosen_arch(), arch);
        }
    }
}
