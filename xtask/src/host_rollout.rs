//! The host side of the device check: the reference rollout every device
//! state is compared with, bit for bit.
//!
//! [`HostRollout`] is the seam: today [`InProcess`] steps the blob with
//! `keel-runtime` linked into xtask. A second implementation can run the
//! `keel rollout` command and parse its CSV instead (Rust prints `f32` with
//! the shortest text that parses back to the same bits, so decimal CSV is
//! exact); nothing else in the check has to change.

use std::path::Path;

use anyhow::{anyhow, bail, Context, Result};
use keel_runtime::{Model, State};

use crate::device_check::{FIRMWARE_MAX_DOF, FIRMWARE_MAX_WIDTH};
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

/// `keel-runtime` in this process, with the firmware's const bounds.
pub struct InProcess;

type HostModel<'a> = Model<'a, FIRMWARE_MAX_DOF, FIRMWARE_MAX_WIDTH>;

fn bits(x: &State<FIRMWARE_MAX_DOF>) -> Vec<u32> {
    x.q().iter().chain(x.p()).map(|v| v.to_bits()).collect()
}

impl HostRollout for InProcess {
    fn describe(&self) -> String {
        format!(
            "keel-runtime in process (Model<{FIRMWARE_MAX_DOF}, {FIRMWARE_MAX_WIDTH}>, {})",
            std::env::consts::ARCH
        )
    }

    fn rollout(&self, blob: &Path, plan: &RunPlan) -> Result<Trajectories> {
        let bytes = std::fs::read(blob).with_context(|| format!("reading {}", blob.display()))?;
        let model = HostModel::from_bytes(&bytes)
            .map_err(|e| anyhow!("{}: blob refused on the host: {e}", blob.display()))?;
        let n = plan.dof;
        let mut out = Vec::with_capacity(plan.initial_states.len());
        for (s, init) in plan.initial_states.iter().enumerate() {
            let mut x = State::<FIRMWARE_MAX_DOF>::new(&init[..n], &init[n..])
                .map_err(|e| anyhow!("initial state {s}: {e}"))?;
            let mut traj = Vec::with_capacity(plan.steps as usize + 1);
            traj.push(bits(&x));
            for k in 1..=plan.steps {
                if let Err(e) = model.step(&mut x) {
                    bail!(
                        "{}: host step {k} from state {s} failed: {e}",
                        blob.display()
                    );
                }
                traj.push(bits(&x));
            }
            out.push(traj);
        }
        Ok(out)
    }
}

/// A plan for a blob without its own: a few states spread over the model's
/// normalization range (offset + c * scale, c in {0.5, -0.8, 1.2}).
pub fn default_plan(blob: &[u8], steps: u32) -> Result<RunPlan> {
    let desc = keel_runtime::format::decode(blob).map_err(|e| anyhow!("{e}"))?;
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
    Ok(RunPlan {
        dof: n,
        steps,
        initial_states,
    })
}
