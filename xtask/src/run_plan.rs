//! The run plan handed to the firmware at build time (`VISVIVA_RUN_PLAN`): the
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
    /// Inputs held over steps 1..=steps (empty for an autonomous model),
    /// each of the model's input count.
    pub inputs: Vec<Vec<f32>>,
}

/// The input sequence the device check drives a model with: for every
/// input, 0.3 sin(0.7 t) + 0.2 sin(2.3 t) (rad/s) at t = k dt, k = 1..=steps.
pub fn two_tone_inputs(steps: u32, m: usize, dt: f32) -> Vec<Vec<f32>> {
    (1..=steps)
        .map(|k| {
            let t = k as f32 * dt;
            vec![0.3 * (0.7 * t).sin() + 0.2 * (2.3 * t).sin(); m]
        })
        .collect()
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
        let m = self.inputs.first().map_or(0, Vec::len);
        ensure!(
            self.inputs.is_empty() || self.inputs.len() == self.steps as usize,
            "{} input rows for {} steps",
            self.inputs.len(),
            self.steps
        );
        let mut out = Vec::new();
        out.extend_from_slice(b"VRUN");
        out.extend_from_slice(&(if m > 0 { 2u32 } else { 1u32 }).to_le_bytes());
        out.extend_from_slice(&(self.dof as u32).to_le_bytes());
        out.extend_from_slice(&(self.initial_states.len() as u32).to_le_bytes());
        out.extend_from_slice(&self.steps.to_le_bytes());
        if m > 0 {
            out.extend_from_slice(&(m as u32).to_le_bytes());
        }
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
        for (k, row) in self.inputs.iter().enumerate() {
            ensure!(
                row.len() == m,
                "input row {k} has {} values, expected {m}",
                row.len()
            );
            for v in row {
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
