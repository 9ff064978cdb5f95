//! The training envelope (format version 4): its bytes against the postcard
//! wire format written out by hand, the round trip, one test per refusal
//! (typed errors, no panics), and the monitor's out-of-envelope flag on the
//! blob's bounds.

mod common;

use common::*;
use visviva_runtime::format::{self, Activation, TrainingEnvelope, ENVELOPE_VERSION};
use visviva_runtime::monitor::{Envelope, FalseAlarm, Monitor};
use visviva_runtime::{BlobError, Method, Model, Section, State};

type M<'a> = Model<'a, 4, 16>;

const LOWER: [f32; 4] = [-1.5, -0.25, -3.0, -2.0];
const UPPER: [f32; 4] = [1.5, 0.75, 3.0, 2.5];

/// int8 weights: they need no alignment, so the blob is version 1 and
/// version 4 with the envelope (f32 weights would make both version 6).
fn plain() -> OwnedModel {
    separable(
        &mut XorShift64Star(404),
        2,
        &[6],
        Activation::Tanh,
        Precision::Int8,
        Method::StormerVerlet,
        0.01,
    )
}

fn with_bounds(lower: &[f32], upper: &[f32]) -> Vec<u8> {
    plain().with_envelope(lower, upper).blob().unwrap()
}

fn le(v: &[f32]) -> Vec<u8> {
    v.iter().flat_map(|x| x.to_le_bytes()).collect()
}

/// Set the header's version and recompute the CRC.
fn with_version(mut b: Vec<u8>, version: u16) -> Vec<u8> {
    b[4..6].copy_from_slice(&version.to_le_bytes());
    reseal(&mut b);
    b
}

/// Recompute the header's payload length and the CRC after editing.
fn reseal(b: &mut [u8]) {
    let end = b.len() - 4;
    let len = (end - format::HEADER_LEN) as u32;
    b[6..10].copy_from_slice(&len.to_le_bytes());
    let crc = crc::Crc::<u32>::new(&crc::CRC_32_ISO_HDLC).checksum(&b[4..end]);
    b[end..].copy_from_slice(&crc.to_le_bytes());
}

#[test]
fn the_section_is_a_postcard_option_after_the_older_payload() {
    // Postcard's wire format (its specification, docs.rs/postcard): an
    // Option is a 0x00 / 0x01 tag before the value, a byte string a varint
    // length before the bytes, a struct its fields in order. So the version
    // 4 payload is the version 1 payload, 0x01, 16, the lower bounds' 16
    // bytes, 16, the upper bounds' 16 bytes; the CRC is CRC-32/ISO-HDLC.
    let old = plain().blob().unwrap();
    assert_eq!(u16::from_le_bytes([old[4], old[5]]), 1);
    let mut expected = old[..old.len() - 4].to_vec();
    expected[4..6].copy_from_slice(&ENVELOPE_VERSION.to_le_bytes());
    expected.extend_from_slice(&[0x01, 16]);
    expected.extend_from_slice(&le(&LOWER));
    expected.push(16);
    expected.extend_from_slice(&le(&UPPER));
    expected.extend_from_slice(&[0; 4]);
    reseal(&mut expected);
    let blob = with_bounds(&LOWER, &UPPER);
    assert_eq!(blob, expected);
    // A separable int8 blob with an envelope needs version 4, not the
    // newest (5 added the mechanical energy, 6 aligned f32 weights).
    assert_eq!(ENVELOPE_VERSION, 4);
    assert_eq!(u16::from_le_bytes([blob[4], blob[5]]), 4);
    assert_eq!(format::FORMAT_VERSION, 6);
}

#[test]
fn round_trip_keeps_the_bounds_borrowed_from_the_blob() {
    let owned = plain().with_envelope(&LOWER, &UPPER);
    let blob = owned.blob().unwrap();
    let desc = format::decode(&blob).unwrap();
    assert_eq!(desc, owned.desc().unwrap());
    assert_eq!(desc.needed_version(), 4);
    let m: M = Model::from_bytes(&blob).unwrap();
    let env: TrainingEnvelope<'_> = m.envelope().unwrap();
    assert_eq!(env.coordinates(), 4);
    assert_eq!(env.lower.iter().collect::<Vec<_>>(), LOWER);
    assert_eq!(env.upper.iter().collect::<Vec<_>>(), UPPER);
    assert!(blob.as_ptr_range().contains(&env.lower.0.as_ptr()));
    // A blob without the section has none, and steps exactly as before.
    let old = plain().blob().unwrap();
    let m_old: M = Model::from_bytes(&old).unwrap();
    assert!(m_old.envelope().is_none());
    let (mut a, mut b) = (
        State::<4>::new(&[0.3, -0.1], &[0.2, 0.4]).unwrap(),
        State::<4>::new(&[0.3, -0.1], &[0.2, 0.4]).unwrap(),
    );
    for _ in 0..50 {
        m.step(&mut a).unwrap();
        m_old.step(&mut b).unwrap();
    }
    assert_eq!(a, b);
}

#[test]
fn refuses_non_finite_out_of_range_inverted_and_miscounted_bounds() {
    let section = Section::Envelope;
    let mut nan = LOWER;
    nan[2] = f32::NAN;
    let mut inf = UPPER;
    inf[0] = f32::INFINITY;
    let mut huge = UPPER;
    huge[3] = 1e19;
    let cases: [(Vec<u8>, BlobError); 6] = [
        (with_bounds(&nan, &UPPER), BlobError::NonFinite { section }),
        (with_bounds(&LOWER, &inf), BlobError::NonFinite { section }),
        (
            with_bounds(&LOWER, &huge),
            BlobError::OutOfRange { section },
        ),
        (
            // Lower above upper at p1 (coordinate 2).
            with_bounds(&[-1.5, -0.25, 3.5, -2.0], &UPPER),
            BlobError::EnvelopeInverted { coordinate: 2 },
        ),
        (
            with_bounds(&LOWER[..3], &UPPER[..3]),
            BlobError::EnvelopeCount {
                found: 3,
                expected: 4,
            },
        ),
        (
            with_bounds(&LOWER, &[UPPER, UPPER].concat()),
            BlobError::EnvelopeCount {
                found: 4,
                expected: 4,
            },
        ),
    ];
    for (k, (blob, error)) in cases.iter().enumerate() {
        assert_eq!(M::from_bytes(blob).unwrap_err(), *error, "case {k}");
        assert!(!error.to_string().is_empty());
    }
    // Equal bounds (a coordinate that never moved in training) are fine.
    assert!(M::from_bytes(&with_bounds(&LOWER, &LOWER)).is_ok());
}

#[test]
fn a_header_older_than_the_section_is_refused() {
    let blob = with_bounds(&LOWER, &UPPER);
    for old in [1, 2, 3] {
        let b = with_version(blob.clone(), old);
        assert_eq!(M::from_bytes(&b).unwrap_err(), BlobError::Malformed);
        assert_eq!(format::decode(&b).unwrap_err(), BlobError::Malformed);
    }
    assert!(M::from_bytes(&with_version(blob, 4)).is_ok());
}

#[test]
fn bytes_after_the_section_and_bad_tags_are_refused() {
    let blob = with_bounds(&LOWER, &UPPER);
    let mut extra = blob.clone();
    extra.insert(extra.len() - 4, 0);
    reseal(&mut extra);
    assert_eq!(M::from_bytes(&extra).unwrap_err(), BlobError::TrailingBytes);
    // An Option tag other than 0 or 1 after the port terms.
    let mut old = plain().blob().unwrap();
    old.insert(old.len() - 4, 2);
    let old = with_version(old, 4);
    assert_eq!(M::from_bytes(&old).unwrap_err(), BlobError::Malformed);
    // Cut inside the section.
    let mut cut = blob.clone();
    cut.drain(cut.len() - 10..cut.len() - 4);
    reseal(&mut cut);
    assert_eq!(M::from_bytes(&cut).unwrap_err(), BlobError::Malformed);
}

#[test]
fn the_flag_is_raised_outside_the_blobs_envelope_and_not_inside() {
    let blob = with_bounds(&LOWER, &UPPER);
    let m: M = Model::from_bytes(&blob).unwrap();
    // The caller's bounds, deliberately different, are not used.
    let caller = Envelope::<4> {
        low: ([-100.0; 4], [-100.0; 4]),
        high: ([100.0; 4], [100.0; 4]),
    };
    let env = Envelope::of_model_or(&m, caller);
    assert_eq!(env, Envelope::from_training(&m.envelope().unwrap()));
    let mut monitor: Monitor<5> = Monitor::new(FalseAlarm::FivePercent, f32::INFINITY);
    let inside = State::<4>::new(&[1.4, 0.0], &[-2.9, 2.4]).unwrap();
    let on_bounds = State::<4>::new(&[-1.5, 0.75], &[3.0, -2.0]).unwrap();
    let outside_q = State::<4>::new(&[1.6, 0.0], &[0.0, 0.0]).unwrap();
    let outside_p = State::<4>::new(&[0.0, 0.0], &[0.0, 2.6]).unwrap();
    for (x, out) in [
        (inside, false),
        (on_bounds, false),
        (outside_q, true),
        (outside_p, true),
    ] {
        let h = monitor.record(2.0, 2, 0.0, 0.0, env.contains(&x));
        assert_eq!(h.out_of_envelope, out, "{x:?}");
        let flat = [x.q(), x.p()].concat();
        assert_eq!(m.envelope().unwrap().contains(&flat), !out);
    }
    // Without the section the caller's bounds are the envelope.
    let old = plain().blob().unwrap();
    let m_old: M = Model::from_bytes(&old).unwrap();
    let env = Envelope::of_model_or(&m_old, caller);
    assert_eq!(env, caller);
    assert!(env.contains(&outside_q));
}
