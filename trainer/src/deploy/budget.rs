//! The device budget: flash, RAM and step time of a blob plus the runtime
//! itself against the project's limits, with advice that changes the
//! failing figure.

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

/// Judge a blob of `bytes` bytes with RAM estimate `ram` and
/// `macs_per_step`; `runtime` is the runtime's own measured footprint for
/// the blob's configuration (flash added to the blob; its stack plus static
/// RAM used when larger than the estimate).
pub fn budget_verdict(
    b: &DeviceBudget,
    bytes: usize,
    ram: usize,
    macs_per_step: u32,
    runtime: Option<&RuntimeFootprint>,
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
    let mut advice = Vec::new();
    if flash_ok == Some(false) {
        advice.push(format!(
            "blob of {bytes} bytes plus runtime of {runtime_flash} bytes exceeds the flash budget of {} bytes: export with int8 weights or narrow the hidden layers",
            b.flash_bytes
        ));
    }
    if ram_ok == Some(false) {
        advice.push(format!(
            "runtime needs about {ram_needed} bytes of RAM, budget {}: narrow the widest layer (scratch grows with width)",
            b.ram_bytes
        ));
    }
    if time_ok == Some(false) {
        advice.push(format!(
            "estimated step time {:.3e} s exceeds the control period {} s: narrow the network, use int8, a larger time step or fewer substeps, or Stormer-Verlet instead of implicit midpoint",
            step_time_s.unwrap_or(0.0),
            b.control_period_s
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
        let alone = budget_verdict(&device(16_384, 4_096), 5_000, 3_000, 0, None);
        assert_eq!(alone.flash_ok, Some(true));
        assert_eq!(alone.ram_ok, Some(true));
        let with = budget_verdict(&device(16_384, 4_096), 5_000, 3_000, 0, Some(&runtime));
        assert_eq!(with.flash_needed_bytes, 18_000);
        assert_eq!(with.flash_ok, Some(false));
        // The measured stack plus static RAM exceeds the 3000-byte estimate.
        assert_eq!(with.ram_needed_bytes, 6_100);
        assert_eq!(with.ram_ok, Some(false));
        assert!(with.advice[0].contains("plus runtime of 13000 bytes"));
    }
}
