//! Ending the program: success and failure exits through semihosting, the
//! panic handler, the HardFault handler, and the deliberate fault drills
//! (`VISVIVA_DRILL=panic|hardfault` at build time) that prove both handlers
//! make QEMU exit with a non-zero status.

use cortex_m::peripheral::SCB;
use cortex_m_rt::{exception, ExceptionFrame};
use cortex_m_semihosting::debug::{self, EXIT_FAILURE, EXIT_SUCCESS};

/// Exit the emulator (or debugger session) with status 0.
pub fn exit_success() -> ! {
    debug::exit(EXIT_SUCCESS);
    // Without a semihosting host the exit request does not stop the core:
    // reset instead of spinning.
    SCB::sys_reset()
}

/// Exit the emulator (or debugger session) with a non-zero status.
pub fn exit_failure() -> ! {
    debug::exit(EXIT_FAILURE);
    SCB::sys_reset()
}

/// Log `what` as an error and exit with a non-zero status.
pub fn fail(what: &str) -> ! {
    defmt::error!("visviva-fw error: {=str}", what);
    exit_failure()
}

/// Trigger the fault named by `VISVIVA_DRILL` (set when building), if any.
pub fn run_drill_if_requested() {
    match option_env!("VISVIVA_DRILL") {
        Some("panic") => {
            defmt::println!("visviva-fw drill: panic");
            panic!("deliberate panic drill");
        }
        Some("hardfault") => {
            defmt::println!("visviva-fw drill: hardfault");
            // A permanently undefined instruction: UsageFault, escalated to
            // HardFault because UsageFault is not enabled separately.
            cortex_m::asm::udf();
        }
        _ => {}
    }
}

#[panic_handler]
fn panic(info: &core::panic::PanicInfo) -> ! {
    defmt::error!("visviva-fw error: panic: {}", defmt::Display2Format(info));
    exit_failure()
}

#[exception]
unsafe fn HardFault(frame: &ExceptionFrame) -> ! {
    defmt::error!(
        "visviva-fw error: hard fault at pc={=u32:#010x} lr={=u32:#010x}",
        frame.pc(),
        frame.lr()
    );
    exit_failure()
}
