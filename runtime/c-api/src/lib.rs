//! # visviva-c
//!
//! The C interface to `visviva-runtime`, for firmware written in C. The
//! caller allocates the model object ([`VvModel`], size and alignment fixed
//! at build time, so it can be a `static`); [`vv_model_init`] parses and
//! checks a blob in place (magic, version, CRC, bounds; the blob is not
//! copied and must outlive the model); [`vv_step`] and [`vv_step_driven`]
//! advance a state held in the caller's arrays. Every call returns a
//! [`VvStatus`]; [`vv_status_name`] gives its constant's name and
//! [`vv_status_message`] says what it means. No call panics across the
//! boundary or writes outside the buffers it is given: null and misaligned
//! pointers and short buffers are refused with a status.
//!
//! Build-time settings: [`VV_MAX_DOF`] degrees of freedom and
//! [`VV_MAX_WIDTH`] units in the widest layer (change them here and
//! regenerate `include/visviva.h` with the test `header`).
//!
//! This crate is the one place in the workspace with `unsafe` code; every
//! block says why it is sound.
#![no_std]
#![deny(unsafe_op_in_unsafe_fn)]
#![warn(missing_docs)]

use core::mem::{align_of, size_of};
use visviva_runtime::{BlobError, Model, State, StepError};

/// Most degrees of freedom a model may have in this build.
pub const VV_MAX_DOF: usize = 4;
/// Most units in any layer of a model in this build.
pub const VV_MAX_WIDTH: usize = 64;
/// 8-byte words of storage in a [`VvModel`]: at least the runtime's model
/// value at the bounds above on every target (checked at compile time).
pub const VV_MODEL_WORDS: usize = 192;

/// The runtime's model at this build's bounds.
type Inner = Model<'static, VV_MAX_DOF, VV_MAX_WIDTH>;

const _: () = assert!(size_of::<Inner>() <= 8 * VV_MODEL_WORDS);
const _: () = assert!(align_of::<Inner>() <= align_of::<u64>());

/// Marks an initialised [`VvModel`] ("VVMD").
const INITIALISED: u32 = 0x564D_4456;

/// A model object the caller allocates (zeroed, e.g. a `static`); only
/// [`vv_model_init`] fills it. The fields are shown so C can size it; only
/// the library reads or writes them.
#[repr(C)]
pub struct VvModel {
    /// Set once [`vv_model_init`] succeeded, 0 otherwise.
    pub tag: u32,
    /// Keeps `storage` 8-byte aligned on every target.
    pub pad: u32,
    /// The runtime's model value.
    pub storage: [u64; VV_MODEL_WORDS],
}

impl VvModel {
    /// A zeroed, uninitialised model object (for Rust callers and tests).
    pub const fn new() -> Self {
        Self {
            tag: 0,
            pad: 0,
            storage: [0; VV_MODEL_WORDS],
        }
    }
}

impl Default for VvModel {
    fn default() -> Self {
        Self::new()
    }
}

/// Outcome of every call.
#[repr(C)]
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum VvStatus {
    /// Success.
    Ok = 0,
    /// A pointer argument was null.
    NullPointer = 1,
    /// A pointer argument was not aligned for its type.
    Misaligned = 2,
    /// A buffer is shorter than the model needs.
    BufferTooShort = 3,
    /// The model object was never initialised (or its init failed).
    NotInitialised = 4,
    /// The blob is shorter than its header says.
    BlobTruncated = 10,
    /// The bytes are not a Visviva blob.
    BlobBadMagic = 11,
    /// The blob's format version is newer (or older) than this library reads.
    BlobUnsupportedVersion = 12,
    /// The blob's CRC-32 does not match its contents.
    BlobCrcMismatch = 13,
    /// The model has more degrees of freedom than this build's [`VV_MAX_DOF`].
    BlobTooManyDof = 14,
    /// The blob is damaged or describes an invalid model.
    BlobInvalid = 15,
    /// A layer of the model is wider than this build's [`VV_MAX_WIDTH`].
    BlobTooWide = 16,
    /// The state or the inputs do not match the model.
    StepMismatch = 20,
    /// The state is not finite.
    StepNonFinite = 21,
    /// The step diverged or its implicit solve did not converge; the state
    /// is unchanged.
    StepFailed = 22,
}

/// What one model costs.
#[repr(C)]
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct VvCost {
    /// Learned parameters.
    pub parameters: u32,
    /// Multiply-accumulates of one gradient.
    pub macs_per_gradient: u32,
    /// Multiply-accumulates of one step (implicit methods: at their limit).
    pub macs_per_step: u32,
}

fn blob_status(e: BlobError) -> VvStatus {
    match e {
        BlobError::Truncated { .. } => VvStatus::BlobTruncated,
        BlobError::BadMagic => VvStatus::BlobBadMagic,
        BlobError::UnsupportedVersion { .. } => VvStatus::BlobUnsupportedVersion,
        BlobError::CrcMismatch { .. } => VvStatus::BlobCrcMismatch,
        BlobError::DofOutOfRange { .. } => VvStatus::BlobTooManyDof,
        BlobError::TooWide { .. } => VvStatus::BlobTooWide,
        _ => VvStatus::BlobInvalid,
    }
}

fn step_status(e: StepError) -> VvStatus {
    match e {
        StepError::DofMismatch { .. } | StepError::InputMismatch { .. } => VvStatus::StepMismatch,
        StepError::NonFiniteState => VvStatus::StepNonFinite,
        _ => VvStatus::StepFailed,
    }
}

/// Whether `p` is non-null and aligned for `T`.
fn usable<T>(p: *const T) -> Result<(), VvStatus> {
    if p.is_null() {
        Err(VvStatus::NullPointer)
    } else if !(p as usize).is_multiple_of(align_of::<T>()) {
        Err(VvStatus::Misaligned)
    } else {
        Ok(())
    }
}

/// The initialised model behind `model`, or why there is none.
///
/// # Safety
/// `model` must be null or point to a `VvModel` the caller owns.
unsafe fn inner<'m>(model: *const VvModel) -> Result<&'m Inner, VvStatus> {
    usable(model)?;
    // SAFETY: non-null and aligned (checked above); the caller guarantees it
    // points to a VvModel, and only shared access happens here.
    let m = unsafe { &*model };
    if m.tag != INITIALISED {
        return Err(VvStatus::NotInitialised);
    }
    // SAFETY: the tag is set only by vv_model_init after it wrote a valid
    // `Inner` into `storage`, which is large and aligned enough for it
    // (compile-time assertions above).
    Ok(unsafe { &*(m.storage.as_ptr() as *const Inner) })
}

/// Parse and check the blob at `blob` (`len` bytes) into `model`. The blob
/// is not copied: it must stay unchanged for as long as `model` is used.
/// Place it at a 4-byte-aligned address: its f32 weights are then read in
/// place (anywhere else they are decoded byte by byte, to the same bits).
/// On any error `model` is left uninitialised.
///
/// # Safety
/// `model` must be null or point to writable memory for a `VvModel`;
/// `blob` must be null or point to `len` readable bytes that outlive every
/// use of `model`.
#[no_mangle]
pub unsafe extern "C" fn vv_model_init(
    model: *mut VvModel,
    blob: *const u8,
    len: usize,
) -> VvStatus {
    if let Err(s) = usable(model as *const VvModel) {
        return s;
    }
    if blob.is_null() {
        return VvStatus::NullPointer;
    }
    // SAFETY: `model` is non-null and aligned; the caller gives us
    // exclusive access to it for this call.
    let m = unsafe { &mut *model };
    m.tag = 0;
    // SAFETY: the caller guarantees `len` readable bytes at `blob` that live
    // as long as the model is used (the 'static here is that contract).
    let bytes: &'static [u8] = unsafe { core::slice::from_raw_parts(blob, len) };
    match Inner::from_bytes(bytes) {
        Ok(parsed) => {
            // SAFETY: `storage` is large and aligned enough for `Inner`
            // (compile-time assertions above) and holds no value that
            // needs dropping (`Inner` is `Copy`).
            unsafe { core::ptr::write(m.storage.as_mut_ptr() as *mut Inner, parsed) };
            m.tag = INITIALISED;
            VvStatus::Ok
        }
        Err(e) => blob_status(e),
    }
}

/// Degrees of freedom of an initialised model (0 if it is not one).
///
/// # Safety
/// `model` must be null or point to a `VvModel`.
#[no_mangle]
pub unsafe extern "C" fn vv_dof(model: *const VvModel) -> u32 {
    // SAFETY: forwarded contract.
    unsafe { inner(model) }.map_or(0, |m| m.dof() as u32)
}

/// Number of inputs of an initialised model (0 if undriven or not one).
///
/// # Safety
/// `model` must be null or point to a `VvModel`.
#[no_mangle]
pub unsafe extern "C" fn vv_inputs(model: *const VvModel) -> u32 {
    // SAFETY: forwarded contract.
    unsafe { inner(model) }.map_or(0, |m| m.inputs() as u32)
}

/// Write what the model costs into `cost`.
///
/// # Safety
/// `model` must be null or point to a `VvModel`; `cost` null or writable.
#[no_mangle]
pub unsafe extern "C" fn vv_cost(model: *const VvModel, cost: *mut VvCost) -> VvStatus {
    // SAFETY: forwarded contract.
    let m = match unsafe { inner(model) } {
        Ok(m) => m,
        Err(s) => return s,
    };
    if let Err(s) = usable(cost as *const VvCost) {
        return s;
    }
    let c = m.cost();
    // SAFETY: `cost` is non-null and aligned; the caller gives it writable.
    unsafe {
        cost.write(VvCost {
            parameters: c.parameters,
            macs_per_gradient: c.macs_per_gradient,
            macs_per_step: c.macs_per_step,
        })
    };
    VvStatus::Ok
}

/// One step of an undriven model (a driven one is refused with
/// `StepMismatch`: use [`vv_step_driven`]) with its stored integrator. `q` and `p` hold `n`
/// floats each, `n` at least the model's degrees of freedom (only the first
/// `dof` are read and written). On an error the state is unchanged.
///
/// # Safety
/// `model` must be null or point to a `VvModel`; `q` and `p` null or
/// pointing to `n` floats each, not overlapping.
#[no_mangle]
pub unsafe extern "C" fn vv_step(
    model: *const VvModel,
    q: *mut f32,
    p: *mut f32,
    n: usize,
) -> VvStatus {
    // SAFETY: forwarded contract; no inputs.
    unsafe { step_with(model, q, p, n, core::ptr::null(), 0) }
}

/// One step of a driven model with inputs `u` (`m` floats, at least the
/// model's inputs) held over the step; otherwise as [`vv_step`].
///
/// # Safety
/// As [`vv_step`]; `u` null or pointing to `m` floats.
#[no_mangle]
pub unsafe extern "C" fn vv_step_driven(
    model: *const VvModel,
    q: *mut f32,
    p: *mut f32,
    n: usize,
    u: *const f32,
    m: usize,
) -> VvStatus {
    if let Err(s) = usable(u) {
        return s;
    }
    // SAFETY: forwarded contract.
    unsafe { step_with(model, q, p, n, u, m) }
}

/// The shared body of the step calls (`u` null means no inputs).
///
/// # Safety
/// As [`vv_step_driven`], except that `u` may be null when `m` is 0.
unsafe fn step_with(
    model: *const VvModel,
    q: *mut f32,
    p: *mut f32,
    n: usize,
    u: *const f32,
    m: usize,
) -> VvStatus {
    // SAFETY: forwarded contract.
    let model = match unsafe { inner(model) } {
        Ok(x) => x,
        Err(s) => return s,
    };
    for ptr in [q as *const f32, p as *const f32] {
        if let Err(s) = usable(ptr) {
            return s;
        }
    }
    let dof = model.dof();
    if u.is_null() && model.inputs() > 0 {
        // A driven model needs its inputs: no implicit u = 0.
        return VvStatus::StepMismatch;
    }
    if n < dof || (!u.is_null() && m < model.inputs()) {
        return VvStatus::BufferTooShort;
    }
    // SAFETY: q and p are non-null, aligned, and the caller guarantees `n`
    // floats each (n >= dof checked above); they do not overlap.
    let (qs, ps) = unsafe {
        (
            core::slice::from_raw_parts_mut(q, dof),
            core::slice::from_raw_parts_mut(p, dof),
        )
    };
    let mut x = match State::<VV_MAX_DOF>::new(qs, ps) {
        Ok(x) => x,
        Err(e) => return step_status(e),
    };
    let result = if u.is_null() {
        model.step(&mut x)
    } else {
        // SAFETY: non-null and aligned (checked by the caller of this
        // function), `m` floats guaranteed by the caller, read only.
        let us = unsafe { core::slice::from_raw_parts(u, model.inputs().min(m)) };
        model.step_driven(&mut x, us)
    };
    match result {
        Ok(()) => {
            qs.copy_from_slice(x.q());
            ps.copy_from_slice(x.p());
            VvStatus::Ok
        }
        Err(e) => step_status(e),
    }
}

/// A static, NUL-terminated message for a status.
#[no_mangle]
pub extern "C" fn vv_status_message(status: VvStatus) -> *const core::ffi::c_char {
    let text: &'static core::ffi::CStr = match status {
        VvStatus::Ok => c"ok",
        VvStatus::NullPointer => c"a pointer argument is null",
        VvStatus::Misaligned => c"a pointer argument is misaligned for its type",
        VvStatus::BufferTooShort => c"a buffer is shorter than the model needs",
        VvStatus::NotInitialised => c"the model object is not initialised",
        VvStatus::BlobTruncated => c"the blob is shorter than its header says",
        VvStatus::BlobBadMagic => c"not a Visviva model blob",
        VvStatus::BlobUnsupportedVersion => {
            c"the blob's format version is not readable by this library"
        }
        VvStatus::BlobCrcMismatch => c"the blob's CRC-32 does not match its contents",
        VvStatus::BlobTooManyDof => {
            c"the model has more degrees of freedom than this build (VV_MAX_DOF)"
        }
        VvStatus::BlobInvalid => c"the blob is damaged or describes an invalid model",
        VvStatus::BlobTooWide => c"a layer of the model is wider than this build (VV_MAX_WIDTH)",
        VvStatus::StepMismatch => c"the state or inputs do not match the model",
        VvStatus::StepNonFinite => c"the state is not finite",
        VvStatus::StepFailed => c"the step failed (diverged or not converged); state unchanged",
    };
    text.as_ptr()
}

/// The name of a status's constant in the header (e.g.
/// `"VV_STATUS_BLOB_CRC_MISMATCH"`), static and NUL-terminated, for logs.
#[no_mangle]
pub extern "C" fn vv_status_name(status: VvStatus) -> *const core::ffi::c_char {
    let text: &'static core::ffi::CStr = match status {
        VvStatus::Ok => c"VV_STATUS_OK",
        VvStatus::NullPointer => c"VV_STATUS_NULL_POINTER",
        VvStatus::Misaligned => c"VV_STATUS_MISALIGNED",
        VvStatus::BufferTooShort => c"VV_STATUS_BUFFER_TOO_SHORT",
        VvStatus::NotInitialised => c"VV_STATUS_NOT_INITIALISED",
        VvStatus::BlobTruncated => c"VV_STATUS_BLOB_TRUNCATED",
        VvStatus::BlobBadMagic => c"VV_STATUS_BLOB_BAD_MAGIC",
        VvStatus::BlobUnsupportedVersion => c"VV_STATUS_BLOB_UNSUPPORTED_VERSION",
        VvStatus::BlobCrcMismatch => c"VV_STATUS_BLOB_CRC_MISMATCH",
        VvStatus::BlobTooManyDof => c"VV_STATUS_BLOB_TOO_MANY_DOF",
        VvStatus::BlobInvalid => c"VV_STATUS_BLOB_INVALID",
        VvStatus::BlobTooWide => c"VV_STATUS_BLOB_TOO_WIDE",
        VvStatus::StepMismatch => c"VV_STATUS_STEP_MISMATCH",
        VvStatus::StepNonFinite => c"VV_STATUS_STEP_NON_FINITE",
        VvStatus::StepFailed => c"VV_STATUS_STEP_FAILED",
    };
    text.as_ptr()
}

/// The CRC-32 a blob's trailer uses (catalogue check value 0xCBF43926 for
/// "123456789"); 0 for a null pointer.
///
/// # Safety
/// `bytes` must be null or point to `len` readable bytes.
#[no_mangle]
pub unsafe extern "C" fn vv_crc32(bytes: *const u8, len: usize) -> u32 {
    if bytes.is_null() {
        return 0;
    }
    // SAFETY: non-null; the caller guarantees `len` readable bytes.
    visviva_runtime::format::checksum(unsafe { core::slice::from_raw_parts(bytes, len) })
}

/// Halt on a panic in a C firmware's static library (the runtime never
/// panics on any input; this only satisfies `no_std` linking).
#[cfg(all(feature = "panic-halt", not(test)))]
#[panic_handler]
fn panic(_: &core::panic::PanicInfo) -> ! {
    loop {
        core::hint::spin_loop();
    }
}

/// The unwinding personality the host's precompiled `core` refers to; with
/// `panic = "abort"` nothing unwinds, so it is never called (embedded
/// targets' `core` does not refer to it).
#[cfg(all(feature = "panic-halt", not(test)))]
#[no_mangle]
extern "C" fn rust_eh_personality() {}
