//! Example Cortex-M4F firmware for Visviva: parses the one model blob placed in
//! the `.vv_model` flash region, steps it from fixed initial states, and
//! logs every state's exact `f32` bit patterns over defmt (semihosting), plus
//! instruction counts, FPU status and the stack high-water mark. Built with
//! the `observe` feature it runs the runtime's observer and health monitor
//! over an embedded measurement sequence instead (`observe.rs`), logging
//! every estimate's bits.
//!
//! Built and checked against the host by `cargo xtask device`; see README.md
//! for running it on a real board.
#![no_std]
#![no_main]

mod faults;
mod instr_clock;
mod model_region;
#[cfg(feature = "observe")]
mod observe;
#[cfg(feature = "observe")]
mod observe_plan;
#[cfg(not(feature = "observe"))]
mod rollouts;
#[cfg(not(feature = "observe"))]
mod run_plan;
mod stack_watermark;

use cortex_m_rt::entry;
use defmt_semihosting as _;
use visviva_runtime::{BlobError, Model};

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

    #[cfg(not(feature = "observe"))]
    rollouts::run(&model, &clock);
    #[cfg(feature = "observe")]
    observe::run(&model, &clock);

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
