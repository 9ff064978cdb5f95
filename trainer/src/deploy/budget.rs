//! The device budget: flash, RAM and step time of a blob plus the runtime
//! itself against the project's limits, with advice that changes the
//! failing figure: each proposed change is measured on the blob itself
//! (the int8 blob's size, the runtime's MAC count under another
//! integrator or iteration limit) and proposed only when it lowers that
//! figure. int8 weights, for instance, shrink the blob but leave the MAC
//! count as it is, and Stormer-Verlet is proposed only for a separable
//! model without port terms.

use anyhow::{anyhow, Result};
use visviva_runtime::{Hamiltonian, Integrator, Method};

use crate::deploy::blob::{BlobModel, HostModel, WeightKind};
use crate::deploy::convergence::ConvergenceProof;
use crate::deploy::footprint::RuntimeFootprint;
use crate::evidence::report::BudgetVerdict;
use crate::project::file::DeviceBudget;

/// Cycles per multiply-accumulate assumed when `[device] cycles_per_mac`
/// is not set: a Cortex-M4F-class figure from the device check's
/// instruction counts (measure your board).
pub const DEFAULT_CYCLES_PER_MAC: f64 = 4.0;

/// The cycles per multiply-accumulate the step-time estimate uses.
pub fn cycles_per_mac(b: &DeviceBudget) -> f64 {
    if b.cycles_per_mac > 0.0 {
        b.cycles_per_mac
    } else {
        DEFAULT_CYCLES_PER_MAC
    }
}

/// A change to the blob and the figure it gives (bytes or MAC per step).
#[derive(Debug, Clone, PartialEq)]
pub struct Choice {
    /// The change, as the user makes it.
    pub change: String,
    /// The figure after the change.
    pub figure: u64,
}

/// The changes that lower a blob's figures, measured on the blob.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Choices {
    /// Changes that lower the blob's size (bytes).
    pub flash: Vec<Choice>,
    /// Changes that lower the MAC count per step.
    pub step: Vec<Choice>,
}

impl Choices {
    /// What could lower the figures of the blob `bytes`: int8 weights for
    /// an f32 blob (its size); a lower iteration limit when the
    /// convergence proof needed fewer iterations, Stormer-Verlet for a
    /// separable model without port terms, and fewer substeps (each with
    /// its MAC count, kept only when lower than the blob's).
    pub fn of(bytes: &[u8], proof: Option<&ConvergenceProof>) -> Result<Self> {
        let blob = BlobModel::from_bytes(bytes).map_err(|e| anyhow!("{e}"))?;
        let model = HostModel::from_bytes(bytes).map_err(|e| anyhow!("{e}"))?;
        let mut flash = Vec::new();
        if blob.weight_kind() == WeightKind::F32 {
            let int8 = blob.converted(WeightKind::Int8).to_bytes()?.len() as u64;
            if int8 < bytes.len() as u64 {
                flash.push(Choice {
                    change: "weights = \"int8\"".into(),
                    figure: int8,
                });
            }
        }
        Ok(Self {
            flash,
            step: cheaper_steps(&model, proof),
        })
    }
}

/// Integrator changes that lower `model`'s MAC count per step.
fn cheaper_steps(model: &HostModel<'_>, proof: Option<&ConvergenceProof>) -> Vec<Choice> {
    let it = model.integrator();
    let now = model.cost().macs_per_step as u64;
    let mut options: Vec<(String, Integrator)> = Vec::new();
    if let Some(p) = proof.filter(|p| p.iterations_needed < it.max_iterations) {
        options.push((
            format!(
                "max_iterations = {} (the most the convergence proof over the training range needed)",
                p.iterations_needed
            ),
            Integrator {
                max_iterations: p.iterations_needed,
                ..it
            },
        ));
    }
    if model.is_separable() && !model.has_port_terms() && it.method != Method::StormerVerlet {
        options.push((
            "integrator = \"verlet\" (the model is separable)".into(),
            Integrator {
                method: Method::StormerVerlet,
                ..it
            },
        ));
    }
    if it.substeps > 1 {
        let fewer = it.substeps.div_ceil(2);
        options.push((
            format!("substeps = {fewer} (the export's check then judges the accuracy)"),
            Integrator {
                substeps: fewer,
                ..it
            },
        ));
    }
    options
        .into_iter()
        .filter_map(|(change, i)| {
            let figure = model.with_integrator(i).ok()?.cost().macs_per_step as u64;
            (figure < now).then_some(Choice { change, figure })
        })
        .collect()
}

/// Judge a blob of `bytes` bytes with RAM estimate `ram` and
/// `macs_per_step`; `runtime` is the runtime's own measured footprint for
/// the blob's configuration (flash added to the blob; its stack plus static
/// RAM used when larger than the estimate); `choices` the changes that
/// lower the blob's figures, proposed when their figure fails.
pub fn budget_verdict(
    b: &DeviceBudget,
    bytes: usize,
    ram: usize,
    macs_per_step: u32,
    runtime: Option<&RuntimeFootprint>,
    choices: &Choices,
) -> BudgetVerdict {
    let runtime_flash = runtime.map_or(0, |r| r.flash_bytes);
    let flash_needed = bytes as u64 + runtime_flash;
    let ram_needed = runtime.map_or(ram as u64, |r| {
        (ram as u64).max(r.stack_bytes + r.static_ram_bytes)
    });
    let flash_ok = (b.flash_bytes > 0).then_some(flash_needed <= b.flash_bytes);
    let ram_ok = (b.ram_bytes > 0).then_some(ram_needed <= b.ram_bytes);
    let cpm = cycles_per_mac(b);
    let step_time_s = (b.clock_hz > 0).then(|| macs_per_step as f64 * cpm / b.clock_hz as f64);
    let time_ok = match (step_time_s, b.control_period_s > 0.0) {
        (Some(t), true) => Some(t <= b.control_period_s),
        _ => None,
    };
    let step_time = |macs: u64| macs as f64 * cpm / b.clock_hz.max(1) as f64;
    let mut advice = Vec::new();
    if flash_ok == Some(false) {
        let options: Vec<String> = choices
            .flash
            .iter()
            .map(|c| format!("{} (blob {} bytes)", c.change, c.figure))
            .chain(["narrower hidden layers".to_string()])
            .collect();
        advice.push(format!(
            "blob of {bytes} bytes plus runtime of {runtime_flash} bytes exceeds the flash budget of {} bytes; what lowers it: {}",
            b.flash_bytes,
            options.join("; ")
        ));
    }
    if ram_ok == Some(false) {
        advice.push(format!(
            "runtime needs about {ram_needed} bytes of RAM, budget {}: narrow the widest layer (scratch grows with width)",
            b.ram_bytes
        ));
    }
    if time_ok == Some(false) {
        let options: Vec<String> = choices
            .step
            .iter()
            .map(|c| {
                format!(
                    "{}: {} MAC/step, about {:.3e} s",
                    c.change,
                    c.figure,
                    step_time(c.figure)
                )
            })
            .chain(["narrower hidden layers (fewer MAC per gradient)".to_string()])
            .collect();
        advice.push(format!(
            "estimated step time {:.3e} s ({macs_per_step} MAC/step) exceeds the control period {} s; what lowers it: {}",
            step_time_s.unwrap_or(0.0),
            b.control_period_s,
            options.join("; ")
        ));
    }
    BudgetVerdict {
        flash_needed_bytes: flash_needed,
        ram_needed_bytes: ram_needed,
        flash_ok,
        ram_ok,
        step_time_s,
        time_ok,
        pass: advice.is_empty(),
        advice,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn device(flash: u64, ram: u64) -> DeviceBudget {
        DeviceBudget {
            flash_bytes: flash,
            ram_bytes: ram,
            clock_hz: 0,
            control_period_s: 0.0,
            cycles_per_mac: 0.0,
        }
    }

    #[test]
    fn flash_and_ram_judge_the_blob_plus_the_runtime() {
        let runtime = RuntimeFootprint {
            config: "conservative-verlet-f32".into(),
            flash_bytes: 13_000,
            static_ram_bytes: 100,
            stack_bytes: 6_000,
        };
        // A 5000-byte blob fits 16 KiB alone but not with 13000 bytes of runtime.
        let alone = budget_verdict(
            &device(16_384, 4_096),
            5_000,
            3_000,
            0,
            None,
            &Choices::default(),
        );
        assert_eq!(alone.flash_ok, Some(true));
        assert_eq!(alone.ram_ok, Some(true));
        let with = budget_verdict(
            &device(16_384, 4_096),
            5_000,
            3_000,
            0,
            Some(&runtime),
            &Choices::default(),
        );
        assert_eq!(with.flash_needed_bytes, 18_000);
        assert_eq!(with.flash_ok, Some(false));
        // The measured stack plus static RAM exceeds the 3000-byte estimate.
        assert_eq!(with.ram_needed_bytes, 6_100);
        assert_eq!(with.ram_ok, Some(false));
        assert!(with.advice[0].contains("plus runtime of 13000 bytes"));
    }
}
