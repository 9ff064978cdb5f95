//! The model blob in its own flash region. `memory.x` reserves the region
//! `VV_MODEL` and places the output section `.vv_model` at its start;
//! this build puts the blob named by `VISVIVA_BLOB` there, but the firmware
//! reads the region through its linker symbols, never through the embedded
//! array, so a board can be re-flashed with other weights (written at the
//! region's address) without rebuilding. The blob's length comes from its own
//! header; erased or foreign bytes are refused by the runtime's checks.
//! The region starts at a 4-byte-aligned address (`memory.x` asserts it),
//! so the runtime reads the blob's f32 weight matrices in place.

use visviva_runtime::BlobError;

/// The blob chosen at build time, placed in `.vv_model` (kept by the
/// linker script even though no code refers to it).
#[used]
#[link_section = ".vv_model"]
static EMBEDDED_BLOB: [u8; include_bytes!(env!("VISVIVA_BLOB")).len()] =
    *include_bytes!(env!("VISVIVA_BLOB"));

extern "C" {
    static __vv_model_start: u8;
    static __vv_model_end: u8;
}

/// The whole reserved region, as flashed.
fn region() -> &'static [u8] {
    let start = core::ptr::addr_of!(__vv_model_start);
    let end = core::ptr::addr_of!(__vv_model_end);
    let len = (end as usize).saturating_sub(start as usize);
    // SAFETY: the linker script defines both symbols as the bounds of the
    // VV_MODEL flash region, which is mapped, read-only and never written
    // while the firmware runs.
    unsafe { core::slice::from_raw_parts(start, len) }
}

/// The blob at the start of the region: as many bytes as its header claims
/// (`visviva_runtime::blob_len`), for the runtime to validate. A header the
/// runtime cannot read, or a length past the region's end, is refused here.
pub fn blob() -> Result<&'static [u8], BlobError> {
    let region = region();
    let len = visviva_runtime::blob_len(region)?;
    region.get(..len).ok_or(BlobError::Truncated {
        needed: len as u32,
        found: region.len() as u32,
    })
}
