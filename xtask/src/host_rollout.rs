//! The host side of the device check: the reference rollout every device
//! state is compared with, bit for bit.
//!
//! [`HostRollout`] is the seam: [`VisvivaCommand`] runs the user-facing
//! `visviva rollout --bits` command (the path a user follows) and parses its
//! CSV (Rust prints `f32` bit patterns exactly with `--bits`).

use std::path::{Path, PathBuf};
use std::process::Command;

use anyhow::{anyhow, bail, Context, Result};

use crate::run_plan::RunPlan;

/// Bit patterns of every state: `[initial state][step]` -> q1..qn, p1..pn.
pub type Trajectories = Vec<Vec<Vec<u32>>>;

/// Something that computes the reference rollout of a blob.
pub trait HostRollout {
    /// One-line description for the report.
    fn describe(&self) -> String;
    /// States 0..=steps from every initial state of `plan`.
    fn rollout(&self, blob: &Path, plan: &RunPlan) -> Result<Trajectories>;
}

/// The `visviva rollout` command of this workspace (built in release by
/// [`VisvivaCommand::build`]), one run per initial state, exact bit patterns.
pub struct VisvivaCommand {
    exe: PathBuf,
    work: PathBuf,
}

impl VisvivaCommand {
    /// Build `visviva` in release and use it, writing CSVs into `work`.
    pub fn build(root: &Path, work: &Path) -> Result<Self> {
        Ok(Self {
            exe: crate::tools::build_visviva(root)?,
            work: work.to_path_buf(),
        })
    }

    /// The `visviva` executable.
    pub fn exe(&self) -> &Path {
        &self.exe
    }
}

/// `q1=..,qn=..,p1=..` with shortest round-trip decimals (exact in f32).
fn init_spec(init: &[f32], n: usize) -> String {
    let mut parts = Vec::new();
    for (k, v) in init.iter().enumerate().take(2 * n) {
        let (c, i) = if k < n {
            ("q", k + 1)
        } else {
            ("p", k - n + 1)
        };
        parts.push(format!("{c}{i}={v}"));
    }
    parts.join(",")
}

impl HostRollout for VisvivaCommand {
    fn describe(&self) -> String {
        format!(
            "`{} rollout --bits` ({})",
            self.exe.display(),
            std::env::consts::ARCH
        )
    }

    fn rollout(&self, blob: &Path, plan: &RunPlan) -> Result<Trajectories> {
        let stem = blob
            .file_stem()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_default();
        let mut out = Vec::with_capacity(plan.initial_states.len());
        for (s, init) in plan.initial_states.iter().enumerate() {
            let csv = self.work.join(format!("{stem}.host-{s}.csv"));
            let mut cmd = Command::new(&self.exe);
            cmd.arg("rollout");
            if !plan.inputs.is_empty() {
                // Row k (t = (k-1) dt) holds the input of step k.
                let path = self.work.join(format!("{stem}.inputs.csv"));
                let m = plan.inputs[0].len();
                let mut text = String::from("t");
                for i in 1..=m {
                    text.push_str(&format!(",u{i}"));
                }
                text.push('\n');
                for (k, row) in plan.inputs.iter().enumerate() {
                    text.push_str(&k.to_string());
                    for v in row {
                        text.push_str(&format!(",{v}"));
                    }
                    text.push('\n');
                }
                std::fs::write(&path, text)
                    .with_context(|| format!("writing {}", path.display()))?;
                cmd.arg("--inputs").arg(&path);
            }
            let o = cmd
                .arg("--model")
                .arg(blob)
                .arg("--init")
                .arg(init_spec(init, plan.dof))
                .args(["--steps", &plan.steps.to_string(), "--bits", "--out"])
                .arg(&csv)
                .output()
                .with_context(|| format!("starting {}", self.exe.display()))?;
            if !o.status.success() {
                bail!(
                    "visviva rollout of {} from state {s} failed: {}",
                    blob.display(),
                    String::from_utf8_lossy(&o.stderr).trim()
                );
            }
            let (n, rows) = crate::golden_csv::read_one(&csv)?;
            if n != plan.dof {
                bail!("{}: {n} dof, the plan {}", csv.display(), plan.dof);
            }
            out.push(rows);
        }
        Ok(out)
    }
}

/// A plan for a blob without its own: a few states spread over the model's
/// normalization range (offset + c * scale, c in {0.5, -0.8, 1.2}).
pub fn default_plan(blob: &[u8], steps: u32) -> Result<RunPlan> {
    let desc = visviva_runtime::format::decode(blob).map_err(|e| anyhow!("{e}"))?;
    let n = desc.dof as usize;
    let offset: Vec<f32> = desc.offset.iter().collect();
    let scale: Vec<f32> = desc.scale.iter().collect();
    if offset.len() != 2 * n || scale.len() != 2 * n {
        bail!("normalization has the wrong length for {n} degrees of freedom");
    }
    let initial_states = [(0.5f32, 0.0f32), (-0.8, 0.3), (1.2, -0.6)]
        .iter()
        .map(|&(cq, cp)| {
            (0..2 * n)
                .map(|i| {
                    let c = if i < n { cq } else { cp };
                    offset[i] + c * scale[i]
                })
                .collect()
        })
        .collect();
    let inputs = match &desc.input {
        visviva_runtime::format::InputDesc::Constant { inputs, .. }
        | visviva_runtime::format::InputDesc::Network { inputs, .. } => {
            crate::run_plan::two_tone_inputs(steps, *inputs as usize, desc.integrator.dt)
        }
        visviva_runtime::format::InputDesc::None => Vec::new(),
    };
    Ok(RunPlan {
        dof: n,
        steps,
        initial_states,
        inputs,
    })
}
