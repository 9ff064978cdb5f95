//! The rollout run (the harness without the `observe` feature): every
//! initial state of the embedded run plan stepped `steps` times, every state
//! logged as exact `f32` bit patterns, and the SysTick ticks spent inside
//! `step_driven` summed.

use visviva_runtime::State;

use crate::instr_clock::InstrClock;
use crate::{faults, run_plan, FirmwareModel, MAX_DOF};

/// Run the embedded plan on `model`; logs the plan, every state and the
/// timing line, and exits non-zero on a refused plan or a failed step.
/// Inlined into `main`, where the loop lived before: the measured stack and
/// instructions per step stay as they were (as a call they moved by about
/// 180 B and 50 instructions per step).
#[inline(always)]
pub fn run(model: &FirmwareModel<'_>, clock: &InstrClock) {
    let dof = model.dof();
    let plan = match run_plan::RunPlan::parse(run_plan::EMBEDDED_PLAN) {
        Ok(p) => p,
        Err(e) => {
            defmt::error!("visviva-fw error: run plan refused: {}", e);
            faults::exit_failure()
        }
    };
    if plan.dof() != dof {
        defmt::error!(
            "visviva-fw error: run plan has {=u32} dof, model {=u32}",
            plan.dof() as u32,
            dof as u32
        );
        faults::exit_failure();
    }
    defmt::println!(
        "visviva-fw plan states={=u32} steps={=u32}",
        plan.states() as u32,
        plan.steps()
    );

    let mut step_ticks: u64 = 0;
    let mut bytes = [0u8; 8 * MAX_DOF];
    for s in 0..plan.states() {
        let mut q = [0.0f32; MAX_DOF];
        let mut p = [0.0f32; MAX_DOF];
        plan.initial_state(s, &mut q[..dof], &mut p[..dof]);
        let mut x = match State::<MAX_DOF>::new(&q[..dof], &p[..dof]) {
            Ok(x) => x,
            Err(e) => {
                defmt::error!("visviva-fw error: initial state {=u32}: {}", s as u32, e);
                faults::exit_failure()
            }
        };
        log_state(s as u32, 0, &x, &mut bytes);
        let mut u = [0.0f32; run_plan::MAX_INPUTS];
        let m = plan.inputs();
        for k in 1..=plan.steps() {
            plan.input(k, &mut u);
            let t0 = clock.now();
            let r = model.step_driven(&mut x, &u[..m]);
            let t1 = clock.now();
            step_ticks += u64::from(clock.elapsed(t0, t1));
            if let Err(e) = r {
                defmt::error!(
                    "visviva-fw error: step {=u32} of state {=u32} failed: {} ({})",
                    k,
                    s as u32,
                    e,
                    defmt::Display2Format(&e)
                );
                faults::exit_failure();
            }
            log_state(s as u32, k, &x, &mut bytes);
        }
    }
    let total_steps = plan.steps() * plan.states() as u32;
    defmt::println!(
        "visviva-fw timing steps={=u32} ticks={=u64}",
        total_steps,
        step_ticks
    );
}

/// Log one state as `x <state> <step> [bytes]`: the exact bit patterns of
/// q1..qn then p1..pn, each `f32` as 4 little-endian bytes.
fn log_state(s: u32, k: u32, x: &State<MAX_DOF>, bytes: &mut [u8; 8 * MAX_DOF]) {
    let n = x.dof();
    for i in 0..n {
        bytes[4 * i..4 * i + 4].copy_from_slice(&x.q[i].to_le_bytes());
        bytes[4 * (n + i)..4 * (n + i) + 4].copy_from_slice(&x.p[i].to_le_bytes());
    }
    defmt::println!("x {=u32} {=u32} {=[u8]}", s, k, &bytes[..8 * n]);
}
