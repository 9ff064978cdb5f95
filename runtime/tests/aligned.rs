//! Aligned weight matrices (format version 6): the encoder puts every f32
//! weight matrix at a multiple of 4 bytes from the blob's start, the reader
//! refuses one that is not there, and the aligned path, the packed layout
//! of versions 1 to 5 and a blob at an unaligned address step to the same
//! bits. Reference: the layout comment of `runtime/src/format.rs`.

mod common;

use common::*;
use visviva_runtime::format::{
    self, AlignedF32, EnergyDesc, ModelDesc, WeightsDesc, ALIGNED_VERSION, HEADER_LEN,
};
use visviva_runtime::{BlobError, Method, Model, State};

type M<'a> = Model<'a, 8, 128>;

/// A separable model with f32 weights: 2 degrees of freedom, 1-13-7-1
/// potential (odd widths, so packed matrices land at every offset mod 4).
fn sample() -> OwnedModel {
    separable(
        &mut XorShift64Star(5),
        2,
        &[13, 7],
        visviva_runtime::format::Activation::Tanh,
        Precision::F32,
        Method::StormerVerlet,
        0.01,
    )
}

/// The potential network's layers of a separable description.
fn potential_layers<'d, 'a>(desc: &'d ModelDesc<'a>) -> &'d [format::LayerDesc<'a>] {
    match &desc.energy {
        EnergyDesc::Separable { potential, .. } => &potential.layers,
        _ => panic!("expected a separable model"),
    }
}

/// The same description with every aligned matrix written packed (the
/// version 1 to 5 layout).
fn packed<'a>(desc: &ModelDesc<'a>) -> ModelDesc<'a> {
    let mut d = desc.clone();
    if let EnergyDesc::Separable { potential, .. } = &mut d.energy {
        for l in potential.layers.iter_mut() {
            if let WeightsDesc::F32Aligned(a) = l.weights {
                l.weights = WeightsDesc::F32(a.values);
            }
        }
    }
    d
}

/// Recompute the CRC after editing bytes.
fn reseal(b: &mut [u8]) {
    let end = b.len() - 4;
    let crc = format::checksum(&b[4..end]);
    b[end..].copy_from_slice(&crc.to_le_bytes());
}

/// Offsets (from the blob's start) of every aligned matrix's values.
fn aligned_offsets(blob: &[u8]) -> Vec<(usize, AlignedF32<'_>)> {
    let desc = format::decode(blob).unwrap();
    potential_layers(&desc)
        .iter()
        .filter_map(|l| match l.weights {
            WeightsDesc::F32Aligned(a) => {
                Some((a.values.0.as_ptr() as usize - blob.as_ptr() as usize, a))
            }
            _ => None,
        })
        .collect()
}

/// 200 Verlet steps from a fixed state; every state's bits.
fn rollout_bits(blob: &[u8]) -> Vec<u32> {
    let m: M = Model::from_bytes(blob).unwrap();
    let mut s = State::new(&[0.3, -0.2], &[0.1, 0.25]).unwrap();
    let mut bits = Vec::new();
    for _ in 0..200 {
        m.step(&mut s).unwrap();
        bits.extend(s.q().iter().chain(s.p()).map(|v| v.to_bits()));
    }
    bits
}

#[test]
fn f32_weights_are_written_aligned_as_version_6_with_zero_padding() {
    let blob = sample().blob().unwrap();
    assert_eq!(u16::from_le_bytes([blob[4], blob[5]]), ALIGNED_VERSION);
    let found = aligned_offsets(&blob);
    assert_eq!(found.len(), 3, "three aligned matrices");
    for (offset, a) in &found {
        assert_eq!(offset % 4, 0, "values at offset {offset}");
        assert!(a.pad() < 4);
        assert!(blob[offset - a.pad()..*offset].iter().all(|b| *b == 0));
    }
    // At least one matrix needed padding (odd widths).
    assert!(found.iter().any(|(_, a)| a.pad() > 0));
}

#[test]
fn packed_aligned_and_unaligned_address_step_to_the_same_bits() {
    let owned = sample();
    let aligned = owned.blob().unwrap();
    let packed_blob = encode(&packed(&owned.desc().unwrap()));
    assert!(u16::from_le_bytes([packed_blob[4], packed_blob[5]]) < ALIGNED_VERSION);
    assert_ne!(aligned, packed_blob);
    let reference = rollout_bits(&packed_blob);
    assert_eq!(rollout_bits(&aligned), reference);
    // The aligned blob one byte past a 4-byte boundary: still parses, reads
    // its weights through the byte path, same bits.
    let mut buf = vec![0u8; aligned.len() + 8];
    let start = (5 - buf.as_ptr() as usize % 4) % 4;
    buf[start..start + aligned.len()].copy_from_slice(&aligned);
    let at = &buf[start..start + aligned.len()];
    assert_eq!(at.as_ptr() as usize % 4, 1);
    assert_eq!(rollout_bits(at), reference);
}

/// The aligned blob with `extra` more padding bytes of value `fill` before
/// the first matrix's values (length prefix, payload length and CRC fixed).
fn repadded(blob: &[u8], extra: usize, fill: u8) -> Vec<u8> {
    let (offset, a) = aligned_offsets(blob)[0];
    let content = a.values.0.len() + a.pad();
    assert!(content + extra < 128, "one-byte length prefix");
    let prefix = offset - a.pad() - 1;
    assert_eq!(blob[prefix] as usize, content);
    let mut out = blob[..prefix].to_vec();
    out.push((content + extra) as u8);
    out.extend(std::iter::repeat_n(fill, extra));
    out.extend_from_slice(&blob[prefix + 1..]);
    let len = u32::from_le_bytes(out[6..HEADER_LEN].try_into().unwrap()) + extra as u32;
    out[6..HEADER_LEN].copy_from_slice(&len.to_le_bytes());
    reseal(&mut out);
    out
}

#[test]
fn a_matrix_off_its_alignment_or_with_non_zero_padding_is_malformed() {
    let blob = sample().blob().unwrap();
    for extra in 1..=3 {
        let bad = repadded(&blob, extra, 0);
        assert_eq!(
            M::from_bytes(&bad).err(),
            Some(BlobError::Malformed),
            "{extra}"
        );
        assert_eq!(format::decode(&bad).err(), Some(BlobError::Malformed));
    }
    let (offset, a) = aligned_offsets(&blob)[0];
    // Four more zero bytes keep the values aligned, but the string's length
    // then counts them as values: the matrix no longer fits its layer.
    let longer = repadded(&blob, 4, 0);
    assert!(M::from_bytes(&longer).is_err());
    if a.pad() > 0 {
        let mut bad = blob.clone();
        bad[offset - 1] = 7;
        reseal(&mut bad);
        assert_eq!(M::from_bytes(&bad).err(), Some(BlobError::Malformed));
    }
}

#[test]
fn a_version_6_layout_under_an_older_header_is_malformed() {
    let mut blob = sample().blob().unwrap();
    blob[4..6].copy_from_slice(&(ALIGNED_VERSION - 1).to_le_bytes());
    reseal(&mut blob);
    assert_eq!(M::from_bytes(&blob).err(), Some(BlobError::Malformed));
    assert_eq!(format::decode(&blob).err(), Some(BlobError::Malformed));
}
