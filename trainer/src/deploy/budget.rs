//! The device budget: flash, RAM and step time of a blob against the
//! project's limits, with advice that changes the failing figure.

use crate::evidence::report::BudgetVerdict;
use crate::project::file::DeviceBudget;

pub fn budget_verdict(
    b: &DeviceBudget,
    bytes: usize,
    ram: usize,
    macs_per_step: u32,
) -> BudgetVerdict {
    let flash_ok = (b.flash_bytes > 0).then_some(bytes as u64 <= b.flash_bytes);
    let ram_ok = (b.ram_bytes > 0).then_some(ram as u64 <= b.ram_bytes);
    let cpm = if b.cycles_per_mac > 0.0 {
        b.cycles_per_mac
    } else {
        4.0
    };
    let step_time_s = (b.clock_hz > 0).then(|| macs_per_step as f64 * cpm / b.clock_hz as f64);
    let time_ok = match (step_time_s, b.control_period_s > 0.0) {
        (Some(t), true) => Some(t <= b.control_period_s),
        _ => None,
    };
    let mut advice = Vec::new();
    if flash_ok == Some(false) {
        advice.push(format!(
            "blob of {bytes} bytes exceeds the flash budget of {} bytes: export with int8 weights or narrow the hidden layers",
            b.flash_bytes
        ));
    }
    if ram_ok == Some(false) {
        advice.push(format!(
            "runtime needs about {ram} bytes of RAM, budget {}: narrow the widest layer (scratch grows with width)",
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
        flash_ok,
        ram_ok,
        step_time_s,
        time_ok,
        pass: advice.is_empty(),
        advice,
    }
}
