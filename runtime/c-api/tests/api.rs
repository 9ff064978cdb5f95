//! The C interface, called as C would call it: results bit-identical to the
//! runtime's own `Model`, and every refusal named by its status.

use std::path::Path;

use visviva_blob_support::owned::{OwnedEnergy, OwnedKinetic, OwnedMlp, OwnedModel};
use visviva_blob_support::quantize::Precision;
use visviva_blob_support::rng::SplitMix64;
use visviva_c::*;
use visviva_runtime::format::Activation;
use visviva_runtime::{Integrator, Method, Model, State};

fn demo_blob(project: &str, file: &str) -> Vec<u8> {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("../../models-demo");
    std::fs::read(root.join(project).join("out").join(file)).unwrap()
}

/// A random separable blob with `dof` coordinates and hidden width `width`.
fn random_blob(dof: usize, width: usize) -> Vec<u8> {
    let mut rng = SplitMix64(7);
    let potential = OwnedMlp::random(&mut rng, &[dof, width, 1], Activation::Tanh, Precision::F32);
    let mut l = vec![0.0f32; dof * (dof + 1) / 2];
    for i in 0..dof {
        l[i * (i + 1) / 2 + i] = 1.0;
    }
    OwnedModel::new(
        dof,
        vec![0.0; 2 * dof],
        vec![1.0; 2 * dof],
        1.0,
        OwnedEnergy::Separable {
            potential,
            kinetic: OwnedKinetic::quadratic(l),
        },
        Integrator::new(Method::StormerVerlet, 0.01),
    )
    .blob()
    .unwrap()
}

fn init(model: &mut VvModel, blob: &[u8]) -> VvStatus {
    // SAFETY: `model` is a valid VvModel and `blob` outlives every use in
    // the calling test.
    unsafe { vv_model_init(model, blob.as_ptr(), blob.len()) }
}

#[test]
fn c_steps_equal_the_runtime_bit_for_bit() {
    for (project, file, inputs) in [
        ("crane-sway", "crane-f32-verlet.vvb", 0usize),
        ("crane-sway", "crane-int8-verlet.vvb", 0),
        ("servo-drivetrain", "servo-int8-dgrad.vvb", 1),
    ] {
        let blob = demo_blob(project, file);
        let mut model = VvModel::new();
        assert_eq!(init(&mut model, &blob), VvStatus::Ok, "{file}");
        let reference = Model::<VV_MAX_DOF, VV_MAX_WIDTH>::from_bytes(&blob).unwrap();
        let n = reference.dof();
        // SAFETY: `model` was initialised above.
        assert_eq!(unsafe { vv_dof(&model) } as usize, n);
        assert_eq!(unsafe { vv_inputs(&model) } as usize, inputs);
        let mut cost = VvCost {
            parameters: 0,
            macs_per_gradient: 0,
            macs_per_step: 0,
        };
        assert_eq!(unsafe { vv_cost(&model, &mut cost) }, VvStatus::Ok);
        assert_eq!(cost.macs_per_step, reference.cost().macs_per_step);
        let (mut q, mut p) = (vec![0.1f32; n], vec![0.0f32; n]);
        let mut x = State::<VV_MAX_DOF>::new(&q, &p).unwrap();
        for k in 0..500 {
            let u = [0.02 * (k as f32 * 0.01).sin()];
            let status = if inputs == 0 {
                reference.step(&mut x).unwrap();
                // SAFETY: q and p hold n floats each.
                unsafe { vv_step(&model, q.as_mut_ptr(), p.as_mut_ptr(), n) }
            } else {
                reference.step_driven(&mut x, &u).unwrap();
                // SAFETY: q, p hold n floats, u one.
                unsafe { vv_step_driven(&model, q.as_mut_ptr(), p.as_mut_ptr(), n, u.as_ptr(), 1) }
            };
            assert_eq!(status, VvStatus::Ok);
            let bits = |v: &[f32]| v.iter().map(|f| f.to_bits()).collect::<Vec<_>>();
            assert_eq!(bits(&q), bits(x.q()), "{file} step {k}");
            assert_eq!(bits(&p), bits(x.p()), "{file} step {k}");
        }
    }
}

#[test]
fn bad_blobs_are_refused_with_their_status() {
    let good = demo_blob("crane-sway", "crane-f32-verlet.vvb");
    let mut model = VvModel::new();
    let mut corrupted = good.clone();
    let mid = corrupted.len() / 2;
    corrupted[mid] ^= 0x40;
    assert_eq!(init(&mut model, &corrupted), VvStatus::BlobCrcMismatch);
    assert_eq!(
        init(&mut model, &good[..good.len() - 1]),
        VvStatus::BlobTruncated
    );
    assert_eq!(
        init(&mut model, b"not a blob at all"),
        VvStatus::BlobBadMagic
    );
    let mut newer = good.clone();
    newer[4..6].copy_from_slice(&99u16.to_le_bytes());
    assert_eq!(init(&mut model, &newer), VvStatus::BlobUnsupportedVersion);
    assert_eq!(
        init(&mut model, &random_blob(VV_MAX_DOF + 1, 8)),
        VvStatus::BlobTooManyDof
    );
    assert_eq!(
        init(&mut model, &random_blob(1, 2 * VV_MAX_WIDTH)),
        VvStatus::BlobTooWide
    );
    // A failed init leaves the object unusable, not half-usable.
    let (mut q, mut p) = ([0.1f32], [0.0f32]);
    // SAFETY: q and p hold one float each.
    let s = unsafe { vv_step(&model, q.as_mut_ptr(), p.as_mut_ptr(), 1) };
    assert_eq!(s, VvStatus::NotInitialised);
    assert_eq!(init(&mut model, &random_blob(2, 16)), VvStatus::Ok);
}

/// Version 4 blobs (with the training envelope) initialise and step like
/// the same model without it; an envelope the runtime refuses is
/// `BlobInvalid`.
#[test]
fn blobs_with_a_training_envelope_are_accepted_and_bad_ones_refused() {
    let lower: Vec<u8> = [-1.0f32, -1.0, -2.0, -2.0]
        .iter()
        .flat_map(|v| v.to_le_bytes())
        .collect();
    let upper: Vec<u8> = [1.0f32, 1.0, 2.0, 2.0]
        .iter()
        .flat_map(|v| v.to_le_bytes())
        .collect();
    let plain = random_blob(2, 16);
    let mut with = visviva_runtime::format::decode(&plain).unwrap();
    with.envelope = Some(visviva_runtime::format::TrainingEnvelope {
        lower: visviva_runtime::format::F32Bytes(&lower),
        upper: visviva_runtime::format::F32Bytes(&upper),
    });
    let blob = visviva_blob_support::encode(&with).unwrap();
    // f32 weights aligned: version 6 (the envelope alone needs 4).
    assert_eq!(
        u16::from_le_bytes([blob[4], blob[5]]),
        visviva_runtime::format::ALIGNED_VERSION
    );
    let (mut a, mut b) = (VvModel::new(), VvModel::new());
    assert_eq!(init(&mut a, &blob), VvStatus::Ok);
    assert_eq!(init(&mut b, &plain), VvStatus::Ok);
    let (mut qa, mut pa, mut qb, mut pb) =
        ([0.3f32, -0.2], [0.1f32, 0.0], [0.3f32, -0.2], [0.1f32, 0.0]);
    for _ in 0..100 {
        // SAFETY: the q and p arrays hold two floats each.
        unsafe {
            assert_eq!(
                vv_step(&a, qa.as_mut_ptr(), pa.as_mut_ptr(), 2),
                VvStatus::Ok
            );
            assert_eq!(
                vv_step(&b, qb.as_mut_ptr(), pb.as_mut_ptr(), 2),
                VvStatus::Ok
            );
        }
    }
    assert_eq!((qa, pa), (qb, pb));
    // Lower above upper: refused as an invalid blob.
    with.envelope = Some(visviva_runtime::format::TrainingEnvelope {
        lower: visviva_runtime::format::F32Bytes(&upper),
        upper: visviva_runtime::format::F32Bytes(&lower),
    });
    let inverted = visviva_blob_support::encode(&with).unwrap();
    assert_eq!(init(&mut a, &inverted), VvStatus::BlobInvalid);
}

#[test]
fn null_misaligned_and_short_arguments_are_refused() {
    let blob = demo_blob("servo-drivetrain", "servo-f32-dgrad.vvb");
    let mut model = VvModel::new();
    // SAFETY: null pointers are what is being tested; nothing is read.
    unsafe {
        assert_eq!(
            vv_model_init(std::ptr::null_mut(), blob.as_ptr(), blob.len()),
            VvStatus::NullPointer
        );
        assert_eq!(
            vv_model_init(&mut model, std::ptr::null(), 10),
            VvStatus::NullPointer
        );
    }
    // A model object one byte off its alignment.
    let mut raw = vec![0u64; VV_MODEL_WORDS + 2];
    let off = (raw.as_mut_ptr() as *mut u8).wrapping_add(1) as *mut VvModel;
    // SAFETY: the pointer is refused before it is dereferenced.
    assert_eq!(
        unsafe { vv_model_init(off, blob.as_ptr(), blob.len()) },
        VvStatus::Misaligned
    );
    assert_eq!(init(&mut model, &blob), VvStatus::Ok);
    let (mut q, mut p) = ([0.1f32; 2], [0.0f32; 2]);
    let u = [0.5f32];
    // SAFETY: buffers are as long as stated (the short cases state less).
    unsafe {
        assert_eq!(
            vv_step_driven(&model, q.as_mut_ptr(), p.as_mut_ptr(), 1, u.as_ptr(), 1),
            VvStatus::BufferTooShort
        );
        assert_eq!(
            vv_step_driven(&model, q.as_mut_ptr(), p.as_mut_ptr(), 2, u.as_ptr(), 0),
            VvStatus::BufferTooShort
        );
        assert_eq!(
            vv_step_driven(
                &model,
                q.as_mut_ptr(),
                std::ptr::null_mut(),
                2,
                u.as_ptr(),
                1
            ),
            VvStatus::NullPointer
        );
        assert_eq!(
            vv_step_driven(
                &model,
                q.as_mut_ptr(),
                p.as_mut_ptr(),
                2,
                std::ptr::null(),
                1
            ),
            VvStatus::NullPointer
        );
        // A driven model stepped without inputs is a mismatch, not a guess.
        assert_eq!(
            vv_step(&model, q.as_mut_ptr(), p.as_mut_ptr(), 2),
            VvStatus::StepMismatch
        );
        q[0] = f32::NAN;
        assert_eq!(
            vv_step_driven(&model, q.as_mut_ptr(), p.as_mut_ptr(), 2, u.as_ptr(), 1),
            VvStatus::StepNonFinite
        );
        assert_eq!(vv_dof(std::ptr::null()), 0);
        let mut cost = std::mem::zeroed::<VvCost>();
        assert_eq!(vv_cost(std::ptr::null(), &mut cost), VvStatus::NullPointer);
    }
}

const ALL_STATUSES: [VvStatus; 15] = [
    VvStatus::Ok,
    VvStatus::NullPointer,
    VvStatus::Misaligned,
    VvStatus::BufferTooShort,
    VvStatus::NotInitialised,
    VvStatus::BlobTruncated,
    VvStatus::BlobBadMagic,
    VvStatus::BlobUnsupportedVersion,
    VvStatus::BlobCrcMismatch,
    VvStatus::BlobTooManyDof,
    VvStatus::BlobInvalid,
    VvStatus::BlobTooWide,
    VvStatus::StepMismatch,
    VvStatus::StepNonFinite,
    VvStatus::StepFailed,
];

#[test]
fn every_status_has_a_message() {
    use std::ffi::CStr;
    for s in ALL_STATUSES {
        // SAFETY: the library returns static NUL-terminated strings.
        let text = unsafe { CStr::from_ptr(vv_status_message(s)) };
        assert!(!text.to_bytes().is_empty(), "{s:?}");
    }
}

#[test]
fn status_names_are_the_header_constants() {
    use std::ffi::CStr;
    // The enum constants cbindgen wrote into the committed header
    // (`VV_STATUS_X = n,`), which C code compares statuses against.
    let header =
        std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("include/visviva.h"))
            .unwrap();
    let constants: Vec<(String, i64)> = header
        .lines()
        .filter_map(|l| {
            let (name, value) = l.trim().trim_end_matches(',').split_once(" = ")?;
            name.starts_with("VV_STATUS_")
                .then(|| (name.to_string(), value.parse().ok()))
                .and_then(|(n, v)| Some((n, v?)))
        })
        .collect();
    assert_eq!(constants.len(), ALL_STATUSES.len());
    for s in ALL_STATUSES {
        // SAFETY: the library returns static NUL-terminated strings.
        let name = unsafe { CStr::from_ptr(vv_status_name(s)) }
            .to_str()
            .unwrap();
        assert!(
            constants.contains(&(name.to_string(), s as i64)),
            "{s:?} is named {name}, not a header constant with value {}",
            s as i64
        );
    }
}

#[test]
fn crc_matches_the_catalogue_check_value() {
    // CRC-32/ISO-HDLC of the ASCII string "123456789" is 0xCBF43926: the
    // check value of the CRC catalogue (reveng.sourceforge.io, "CRC-32";
    // value recalled from memory, also asserted by the runtime's tests).
    let s = b"123456789";
    // SAFETY: nine readable bytes.
    assert_eq!(unsafe { vv_crc32(s.as_ptr(), s.len()) }, 0xCBF4_3926);
}
