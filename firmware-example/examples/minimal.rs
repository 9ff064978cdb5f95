//! The smallest Visviva firmware: find the model blob in its flash region,
//! parse it, step it and print the state. Copy this file with `memory.x`,
//! `build.rs` and `.cargo/config.toml`; build with
//! `VISVIVA_BLOB=/abs/path/model.vvb cargo build --release --example minimal`.
#![no_std]
#![no_main]

use cortex_m_semihosting::debug::{exit, EXIT_FAILURE, EXIT_SUCCESS};
use defmt_semihosting as _; // the log goes to the debugger (or QEMU)
use visviva_runtime::{blob_len, Model, State};

const DOF: usize = 4; // most degrees of freedom this firmware accepts
const WIDTH: usize = 64; // widest network layer it accepts

// The blob named by VISVIVA_BLOB, placed at the start of the model region
// (4-byte aligned, asserted in memory.x: f32 weights are then read in place).
#[used]
#[link_section = ".vv_model"]
static BLOB: [u8; include_bytes!(env!("VISVIVA_BLOB")).len()] =
    *include_bytes!(env!("VISVIVA_BLOB"));

extern "C" {
    static __vv_model_start: u8; // bounds of the region, from memory.x
    static __vv_model_end: u8;
}

#[cortex_m_rt::entry]
fn main() -> ! {
    let (start, end) = (&raw const __vv_model_start, &raw const __vv_model_end);
    // SAFETY: memory.x bounds a mapped flash region that nothing writes to.
    let region = unsafe { core::slice::from_raw_parts(start, end as usize - start as usize) };
    let blob = blob_len(region).map(|len| region.get(..len).unwrap_or(region));
    let model = blob
        .and_then(Model::<DOF, WIDTH>::from_bytes)
        .unwrap_or_else(|e| fail(e));
    let n = model.dof();
    let mut x = State::<DOF>::new(&[0.1; DOF][..n], &[0.0; DOF][..n]).unwrap_or_else(|e| fail(e));
    for _ in 0..1000 {
        model.step(&mut x).unwrap_or_else(|e| fail(e)); // a failed step leaves x unchanged
    }
    defmt::println!("after 1000 steps: q = {}, p = {}", &x.q[..n], &x.p[..n]);
    exit(EXIT_SUCCESS);
    cortex_m::peripheral::SCB::sys_reset() // no debugger to exit to: reset
}

fn fail(e: impl defmt::Format) -> ! {
    defmt::error!("visviva: {}", e);
    exit(EXIT_FAILURE);
    cortex_m::peripheral::SCB::sys_reset()
}

#[panic_handler]
fn panic(_: &core::panic::PanicInfo) -> ! {
    fail("panic")
}
