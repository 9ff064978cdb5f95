//! The run plan handed to the firmware at build time (`KEEL_RUN_PLAN`): the
//! initial states and the number of steps. The byte layout is documented in
//! `firmware-example/src/run_plan.rs`; this module writes it.

use std::path::Path;

use anyhow::{ensure, Context, Result};

/// Initial states (each q1..qn then p1..pn) and steps per rollout.
#[derive(Debug, Clone)]
pub struct RunPlan {
    /// Degrees of freedom n.
    pub dof: usize,
    /// Steps per rollout.
    pub steps: u32,
    /// Initial states, each of length 2n.
    pub initial_states: Vec<Vec<f32>>,
}

impl RunPlan {
    /// Number of states a complete rollout logs (initial state included).
    pub fn state_count(&self) -> usize {
        self.initial_states.len() * (self.steps as usize + 1)
    }

    /// The plan's bytes.
    pub fn to_bytes(&self) -> Result<Vec<u8>> {
        ensure!(
            self.dof > 0,
            "run plan needs at least one degree of freedom"
        );
        let mut out = Vec::new();
        out.extend_from_slice(b"KRUN");
        out.extend_from_slice(&1u32.to_le_bytes());
        out.extend_from_slice(&(self.dof as u32).to_le_bytes());
        out.extend_from_slice(&(self.initial_states.len() as u32).to_le_bytes());
        out.extend_from_slice(&self.steps.to_le_bytes());
        for (i, s) in self.initial_states.iter().enumerate() {
            ensure!(
                s.len() == 2 * self.dof,
                "initial state {i} has {} values, expected {}",
                s.len(),
                2 * self.dof
            );
            for v in s {
                out.extend_from_slice(&v.to_le_bytes());
            }
        }
        Ok(out)
    }

    /// Write the plan to `path`.
    pub fn write(&self, path: &Path) -> Result<()> {
        std::fs::write(path, self.to_bytes()?)
            .with_context(|| format!("writing run plan {}", path.display()))
    }
}
