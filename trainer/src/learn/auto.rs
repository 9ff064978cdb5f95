//! `arch = "auto"` (the default): fit every energy structure the log
//! permits (separable, mechanical, general) on a short budget, score each by
//! the figure `check` reports (the median over the held-out trajectories of
//! the rollout's state relative RMSE, computed by [`crate::evidence::check`]),
//! and name the one with the smallest figure. A structure the plan refuses
//! (or whose short fit fails) is skipped with its reason, never an error.
//! Without held-out trajectories the same figure is taken on the training
//! trajectories and the choice says so ([`Basis::Training`]); when the log and
//! settings permit one structure only, it is chosen without a short fit
//! ([`Basis::OnlyPermitted`]).

use anyhow::{anyhow, bail, Result};
use serde::{Deserialize, Serialize};

use crate::data::dataset::Dataset;
use crate::deploy::blob::{BlobModel, HostModel};
use crate::evidence::check::{check, check_port, CheckSettings};
use crate::learn::fit::FitSettings;
use crate::learn::stage::FitOutcome;
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

/// What the choice rests on.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Basis {
    /// The held-out trajectories' state error (the check's figure).
    #[default]
    HeldOut,
    /// The training trajectories' state error: there were no held-out
    /// logs, so the figure favours the more flexible structure.
    Training,
    /// Only one structure planned; nothing was fitted to choose.
    OnlyPermitted,
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
    /// What the figures were measured on (or that there was nothing to
    /// compare).
    #[serde(default)]
    pub basis: Basis,
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
    // The state error is taken over each logged trajectory before the
    // check's long-horizon drift run, which this figure does not use: one
    // step of it is enough.
    let settings = CheckSettings {
        horizon_steps: Some(1),
        ..CheckSettings::default()
    };
    let r = check(&model, None, val, None, &settings)?;
    Ok(r.median_model.state_rel_rmse)
}

/// Fit each candidate with `fit` on the short budget and score it on
/// `scoring` (the held-out trajectories, or with `basis` =
/// [`Basis::Training`] the training ones). `plan` settles a structure's
/// model (a refusal skips it); `fit` runs the fit stage for a plan and
/// settings. When one structure plans, it is chosen without a fit.
pub fn select<P>(
    scoring: &Dataset,
    basis: Basis,
    settings: &FitSettings,
    plan: impl Fn(Arch) -> Result<P>,
    fit: impl Fn(&P, &FitSettings) -> Result<FitOutcome>,
) -> Result<Selection> {
    let short = short_settings(settings);
    let plans: Vec<(Arch, Result<P>)> = CANDIDATES.iter().map(|&a| (a, plan(a))).collect();
    let planned = plans.iter().filter(|(_, p)| p.is_ok()).count();
    if let Some(e) = common_refusal(&plans) {
        return Err(e);
    }
    let basis = if planned == 1 {
        Basis::OnlyPermitted
    } else {
        basis
    };
    let candidates: Vec<Candidate> = plans
        .into_iter()
        .map(|(arch, p)| match p {
            Ok(_) if basis == Basis::OnlyPermitted => Candidate {
                structure: arch_name(arch).into(),
                state_rel_rmse: None,
                skipped: None,
            },
            Ok(p) => score(arch, fit(&p, &short), scoring),
            Err(e) => skipped(arch, format!("{e:#}")),
        })
        .collect();
    let chosen = chosen_structure(&candidates, basis)?;
    Ok(Selection {
        chosen,
        short_budget: short.steps.unwrap_or(short.epochs),
        short_budget_in_steps: short.steps.is_some(),
        reused: false,
        basis,
        candidates,
    })
}

/// The refusal every candidate's plan gives, when they all give the same
/// one (a ReLU activation, masses that do not fit the log): it is the
/// user's setting, not the structure, that is wrong, so it is named alone.
fn common_refusal<P>(plans: &[(Arch, Result<P>)]) -> Option<anyhow::Error> {
    let reasons: Vec<String> = plans
        .iter()
        .map(|(_, p)| p.as_ref().err().map(|e| format!("{e:#}")))
        .collect::<Option<_>>()?;
    let first = reasons.first()?;
    reasons
        .iter()
        .all(|r| r == first)
        .then(|| anyhow!("{first}"))
}

/// A candidate from its short fit's outcome, scored on `scoring`.
fn score(arch: Arch, fitted: Result<FitOutcome>, scoring: &Dataset) -> Candidate {
    match fitted.and_then(|out| held_out_error(&out.blob, scoring)) {
        Ok(e) if e.is_finite() => Candidate {
            structure: arch_name(arch).into(),
            state_rel_rmse: Some(e),
            skipped: None,
        },
        Ok(e) => skipped(arch, format!("its state error is {e}")),
        Err(e) => skipped(arch, format!("{e:#}")),
    }
}

/// The structure with the smallest figure (the one planned, for
/// [`Basis::OnlyPermitted`]); an error naming every reason when none has one.
fn chosen_structure(candidates: &[Candidate], basis: Basis) -> Result<String> {
    let best = if basis == Basis::OnlyPermitted {
        candidates.iter().find(|c| c.skipped.is_none())
    } else {
        candidates
            .iter()
            .filter_map(|c| c.state_rel_rmse.map(|e| (c, e)))
            .min_by(|a, b| a.1.total_cmp(&b.1))
            .map(|(c, _)| c)
    };
    match best {
        Some(c) => Ok(c.structure.clone()),
        None => {
            let reasons: Vec<String> = candidates.iter().map(|c| c.line(basis)).collect();
            bail!(
                "arch = \"auto\": no structure could be fitted:\n  {}",
                reasons.join("\n  ")
            )
        }
    }
}

fn skipped(arch: Arch, reason: String) -> Candidate {
    Candidate {
        structure: arch_name(arch).into(),
        state_rel_rmse: None,
        skipped: Some(reason),
    }
}

impl Basis {
    /// The figure's name in the command output and on the page.
    pub fn figure_name(self) -> &'static str {
        match self {
            Basis::Training => "training state error",
            Basis::HeldOut | Basis::OnlyPermitted => "held-out state error",
        }
    }
}

impl Candidate {
    /// The command output's line for this candidate; `basis` names its
    /// figure.
    pub fn line(&self, basis: Basis) -> String {
        let name = &self.structure;
        match (&self.state_rel_rmse, &self.skipped) {
            (Some(e), _) => format!("{name:<10} {} {e:.4e}", basis.figure_name()),
            (None, Some(r)) => format!("{name:<10} skipped: {r}"),
            (None, None) if basis == Basis::OnlyPermitted => {
                format!("{name:<10} the only structure permitted (not fitted to choose)")
            }
            (None, None) => format!("{name:<10} skipped"),
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
        let mut out = vec![self.rule()];
        out.extend(
            self.candidates
                .iter()
                .map(|c| format!("  {}", c.line(self.basis))),
        );
        out.push(format!("chosen: {} ({})", self.chosen, self.why()));
        out
    }

    /// The first line: how the structures were compared.
    fn rule(&self) -> String {
        let head = "arch = auto (the default; set arch to fix the structure)";
        let (n, unit, div) = (self.short_budget, self.budget_unit(), SHORT_BUDGET_DIVISOR);
        match self.basis {
            Basis::OnlyPermitted => format!(
                "{head}: the log and settings permit one structure, so none was fitted to \
                 choose:"
            ),
            Basis::HeldOut => format!(
                "{head}: each structure the log permits fitted for {n} {unit} (1/{div} of the \
                 budget, same seed and sizes), scored by the median held-out state relative \
                 RMSE (the figure check reports):"
            ),
            Basis::Training => format!(
                "{head}: each structure the log permits fitted for {n} {unit} (1/{div} of the \
                 budget, same seed and sizes), scored by the median state relative RMSE on the \
                 training trajectories (no held-out logs: this favours the more flexible \
                 structure; give held-out logs to choose on them):"
            ),
        }
    }

    /// Why the chosen structure was chosen, and what happens next.
    fn why(&self) -> String {
        let reason = match self.basis {
            Basis::HeldOut => "smallest held-out state error",
            Basis::Training => {
                "chosen on the training logs: no held-out logs; smallest training state error"
            }
            Basis::OnlyPermitted => "the only structure permitted",
        };
        if self.reused {
            format!("{reason}; reused from the last fit of the same logs and settings")
        } else {
            format!("{reason}; fitting it with the full budget")
        }
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
    fn one_permitted_structure_is_taken_without_a_fit() {
        let data = Dataset {
            dof: 1,
            inputs: 0,
            trajectories: vec![],
            derivatives: crate::data::dataset::DerivativeSource::Given,
        };
        let s = select(
            &data,
            Basis::HeldOut,
            &FitSettings::default(),
            |arch| match arch {
                Arch::Separable => Ok(()),
                _ => bail!("needs a separable energy"),
            },
            |_, _| panic!("no short fit when one structure is permitted"),
        )
        .unwrap();
        assert_eq!(
            (s.chosen.as_str(), s.basis),
            ("separable", Basis::OnlyPermitted)
        );
        assert!(s.lines()[1].contains("the only structure permitted"));
        assert_eq!(
            s.candidates[2].skipped.as_deref(),
            Some("needs a separable energy")
        );
    }

    #[test]
    fn a_refusal_every_structure_gives_is_named_alone() {
        let data = Dataset {
            dof: 1,
            inputs: 0,
            trajectories: vec![],
            derivatives: crate::data::dataset::DerivativeSource::Given,
        };
        let err = select(
            &data,
            Basis::HeldOut,
            &FitSettings::default(),
            |_| -> Result<()> { bail!("--activation = relu is refused") },
            |_, _| panic!("nothing planned, nothing fitted"),
        )
        .unwrap_err();
        assert_eq!(format!("{err:#}"), "--activation = relu is refused");
    }

    #[test]
    fn a_choice_recorded_before_the_basis_existed_reads_as_held_out() {
        let json = r#"{"candidates":[],"chosen":"general","short_budget":3,
            "short_budget_in_steps":false}"#;
        let s: Selection = serde_json::from_str(json).unwrap();
        assert_eq!((s.basis, s.reused), (Basis::HeldOut, false));
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
                basis: Basis::HeldOut,
            };
            assert_eq!(s.chosen_arch(), arch);
        }
    }
}
