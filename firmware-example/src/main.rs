//! Example Cortex-M4F firmware for Visviva: parses the one model blob placed in
//! the `.vv_model` flash region, steps it from fixed initial states, and
//! logs every state's exact `f32` bit patterns over defmt (semihosting), plus
//! instruction counts, FPU status and the stack high-water mark.
//!
//! Built and checked against the host by `cargo xtask device`; see README.md
//! for running it on a real board.
#![no_std]
#![no_main]

mod faults;
mod instr_clock;
mod model_region;
mod run_plan;
mod stack_watermark;

use cortex_m_rt::entry;
use defmt_semihosting as _;
use visviva_runtime::{BlobError, Model, State};

/// Most degrees of freedom this firmware accepts; a blob with more is refused.
pub const MAX_DOF: usize = 4;
/// Widest network layer this firmware accepts; a wider blob is refused.
pub const MAX_WIDTH: usize = 64;

/// The model type this firmware is built for.
type FirmwareModel<'a> = Model<'a, MAX_DOF, MAX_WIDTH>;

/// Address of the CPACR register (coprocessor access control).
const CPACR: *const u32 = 0xE000_ED88 as *const u32;

#[entry]
fn main() -> ! {
    defmt::println!(
        "visviva-fw bounds max_dof={=u32} max_width={=u32}",
        MAX_DOF as u32,
        MAX_WIDTH as u32
    );
    faults::run_drill_if_requested();

    // SAFETY: CPACR is an always-readable System Control Block register.
    let cpacr = unsafe { core::ptr::read_volatile(CPACR) };
    defmt::println!(
        "visviva-fw fpu cpacr={=u32:#010x} cp10_cp11_full_access={=bool}",
        cpacr,
        (cpacr >> 20) & 0xF == 0xF
    );

    let Some(peripherals) = cortex_m::Peripherals::take() else {
        faults::fail("core peripherals already taken")
    };
    let clock = instr_clock::InstrClock::start(peripherals.SYST);
    let calib = clock.calibrate();
    defmt::println!(
        "visviva-fw calib loop_instructions={=u32} ticks={=u32} overhead_ticks={=u32}",
        calib.loop_instructions,
        calib.loop_ticks,
        calib.overhead_ticks
    );

    let blob = model_region::blob().unwrap_or_else(|e| refuse_blob(e));
    let model = FirmwareModel::from_bytes(blob).unwrap_or_else(|e| refuse_blob(e));
    let cost = model.cost();
    let dof = model.dof();
    defmt::println!(
        "visviva-fw model dof={=u32} parameters={=u32} macs_per_step={=u32} blob_bytes={=u32}",
        dof as u32,
        cost.parameters,
        cost.macs_per_step,
        blob.len() as u32
    );

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

    let stack = stack_watermark::measure();
    defmt::println!(
        "visviva-fw stack used={=u32} size={=u32}",
        stack.used_bytes,
        stack.region_bytes
    );
    defmt::println!("visviva-fw done");
    faults::exit_success()
}

/// Log why the blob was refused (variant and sentence) and exit non-zero.
fn refuse_blob(e: BlobError) -> ! {
    defmt::error!(
        "visviva-fw error: blob refused: {} ({})",
        e,
        defmt::Display2Format(&e)
    );
    faults::exit_failure()
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
