//! The runtime's own footprint: the smallest useful firmware (find the blob
//! in its flash region with `blob_len`, parse it, step it, read the state),
//! with no logging framework and bounds D = 2, W = 32. `cargo xtask device`
//! (and `cargo xtask footprint`) builds it once per configuration, each with
//! only the runtime features that configuration needs (`fp-*` features in
//! Cargo.toml), in the `footprint` profile (opt-level "z", LTO, one codegen
//! unit, panic = "abort"), reads flash and static RAM from the ELF and runs
//! it in QEMU for the painted-stack high-water mark.
//!
//! To end QEMU it reports through semihosting: one line
//! `footprint stack <bytes> state <hex bits of q1..qn p1..pn>`, then exit.
//! Those few hundred bytes of reporting are part of the measured flash.
#![no_std]
#![no_main]

use cortex_m_semihosting::{debug, hio};
use visviva_runtime::{blob_len, Model, State, MAX_INPUTS};

// The harness's stack measurement (its `region_bytes` is not reported here).
#[allow(dead_code)]
#[path = "../src/stack_watermark.rs"]
mod stack_watermark;

const DOF: usize = 2; // most degrees of freedom this firmware accepts
const WIDTH: usize = 32; // widest network layer it accepts
/// Steps taken from (q_i = 0.3, p_i = -0.2); the check repeats them on the
/// host and compares the final state bit for bit.
const STEPS: u32 = 100;
/// Every input u_k of a driven model, held over every step.
const INPUT: f32 = 0.25;

// The blob named by VISVIVA_BLOB, placed at the start of the model region.
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
    let result = run(region);
    let stack = stack_watermark::measure().used_bytes;
    report(stack, result.as_ref().ok());
    halt(result.is_ok())
}

/// Parse the blob at the start of `region` and take [`STEPS`] steps.
#[inline(never)]
fn run(region: &[u8]) -> Result<State<DOF>, ()> {
    let len = blob_len(region).map_err(drop)?;
    let model = Model::<DOF, WIDTH>::from_bytes(region.get(..len).ok_or(())?).map_err(drop)?;
    let n = model.dof();
    let mut x = State::<DOF>::new(&[0.3; DOF][..n], &[-0.2; DOF][..n]).map_err(drop)?;
    let u = [INPUT; MAX_INPUTS];
    let u = u.get(..model.inputs()).ok_or(())?;
    for _ in 0..STEPS {
        model.step_driven(&mut x, u).map_err(drop)?; // a failed step leaves x unchanged
    }
    Ok(x)
}

/// One line on the host's stdout, formatted by hand (no `core::fmt`).
fn report(stack: u32, state: Option<&State<DOF>>) {
    let mut line = [0u8; 160];
    let mut len = 0;
    let mut put = |bytes: &[u8]| {
        for &b in bytes {
            if let Some(slot) = line.get_mut(len) {
                *slot = b;
                len += 1;
            }
        }
    };
    put(b"footprint stack ");
    put(&hex(stack));
    put(b" state");
    if let Some(x) = state {
        for v in x.q.iter().take(x.dof()).chain(x.p.iter().take(x.dof())) {
            put(b" ");
            put(&hex(v.to_bits()));
        }
    } else {
        put(b" failed");
    }
    put(b"\n");
    if let Ok(mut out) = hio::hstdout() {
        let _ = out.write_all(line.get(..len).unwrap_or(&[]));
    }
}

/// Eight lower-case hex digits.
fn hex(v: u32) -> [u8; 8] {
    let mut out = [0u8; 8];
    for (i, o) in out.iter_mut().enumerate() {
        let nibble = (v >> (28 - 4 * i)) & 0xf;
        *o = b"0123456789abcdef"[nibble as usize];
    }
    out
}

/// End QEMU through semihosting; on a board without a debugger, stop here.
fn halt(ok: bool) -> ! {
    debug::exit(if ok {
        debug::EXIT_SUCCESS
    } else {
        debug::EXIT_FAILURE
    });
    loop {
        cortex_m::asm::wfi();
    }
}

#[panic_handler]
fn panic(_: &core::panic::PanicInfo) -> ! {
    halt(false)
}
