//! Robustness: the runtime must return a typed error, never panic, for any
//! bytes and any state. A seeded mutation fuzzer runs 1,000,000 cases over
//! valid blobs of every kind (half of them with the CRC recomputed so the
//! decoder and validator see the damage), stepping every blob that parses
//! from random, extreme and non-finite states. A proptest property adds
//! arbitrary byte strings. (Mutation fuzzing as in AFL's havoc stage is
//! common practice.)

mod common;

use common::*;
use proptest::prelude::{any, proptest, ProptestConfig};
use visviva_runtime::format::{self, Activation, HEADER_LEN};
use visviva_runtime::{BlobError, Hamiltonian, Integrator, Method, Model, State};

fn seeds() -> Vec<Vec<u8>> {
    let mut rng = XorShift64Star(0xf22);
    let mut out = Vec::new();
    for kind in [Precision::F32, Precision::Int8] {
        for act in [Activation::Tanh, Activation::Softplus] {
            out.push(
                separable(&mut rng, 2, &[6, 5], act, kind, Method::StormerVerlet, 0.05)
                    .blob()
                    .unwrap(),
            );
            out.push(
                separable(&mut rng, 1, &[4], act, kind, Method::Yoshida4, 0.05)
                    .blob()
                    .unwrap(),
            );
            out.push(
                general(&mut rng, 2, &[6], act, kind, Method::ImplicitMidpoint, 0.05)
                    .blob()
                    .unwrap(),
            );
            out.push(
                general(&mut rng, 1, &[5, 3], act, kind, Method::Rk4, 0.05)
                    .blob()
                    .unwrap(),
            );
            out.push(
                general(&mut rng, 2, &[6], act, kind, Method::DiscreteGradient, 0.05)
                    .with_port(&mut rng, 0.3, 2)
                    .blob()
                    .unwrap(),
            );
            out.push(
                separable(&mut rng, 1, &[4], act, kind, Method::DiscreteGradient, 0.05)
                    .with_port(&mut rng, 0.3, 0)
                    .blob()
                    .unwrap(),
            );
            out.push(
                separable(&mut rng, 2, &[4], act, kind, Method::ImplicitMidpoint, 0.05)
                    .with_port_networks(&mut rng, 0.5, 1, 4, kind)
                    .blob()
                    .unwrap(),
            );
        }
    }
    out
}

fn reseal(b: &mut [u8]) {
    if b.len() < HEADER_LEN + 4 {
        return;
    }
    let end = b.len() - 4;
    let crc = crc::Crc::<u32>::new(&crc::CRC_32_ISO_HDLC).checksum(&b[4..end]);
    b[end..].copy_from_slice(&crc.to_le_bytes());
    let len = (end - HEADER_LEN) as u32;
    b[6..10].copy_from_slice(&len.to_le_bytes());
    let crc = crc::Crc::<u32>::new(&crc::CRC_32_ISO_HDLC).checksum(&b[4..end]);
    b[end..].copy_from_slice(&crc.to_le_bytes());
}

const SPECIAL: [f32; 8] = [
    0.0,
    -0.0,
    1e30,
    -1e30,
    f32::MIN_POSITIVE,
    f32::NAN,
    f32::INFINITY,
    f32::NEG_INFINITY,
];

fn mutate(rng: &mut XorShift64Star, b: &mut Vec<u8>) {
    for _ in 0..1 + rng.below(4) {
        match rng.below(6) {
            0 if !b.is_empty() => {
                let i = rng.below(b.len());
                b[i] ^= 1 << rng.below(8);
            }
            1 if !b.is_empty() => {
                let i = rng.below(b.len());
                b[i] = rng.next_u64() as u8;
            }
            2 if b.len() > 4 => {
                let i = rng.below(b.len() - 3);
                let v = SPECIAL[rng.below(SPECIAL.len())];
                b[i..i + 4].copy_from_slice(&v.to_le_bytes());
            }
            3 if !b.is_empty() => {
                let cut = rng.below(b.len());
                b.truncate(cut);
            }
            4 => {
                let i = rng.below(b.len() + 1);
                b.insert(i, rng.next_u64() as u8);
            }
            _ if !b.is_empty() => {
                let i = rng.below(b.len());
                b.remove(i);
            }
            _ => {}
        }
    }
}

fn random_state(rng: &mut XorShift64Star, n: usize) -> State<8> {
    let mut v = [0.0f32; 16];
    for x in v.iter_mut().take(2 * n) {
        *x = match rng.below(8) {
            0 => SPECIAL[rng.below(SPECIAL.len())],
            _ => rng.uniform(-3.0, 3.0) as f32,
        };
    }
    State::new(&v[..n], &v[n..2 * n]).unwrap()
}

fn exercise(m: &Model<'_, 8, 16>, rng: &mut XorShift64Star) {
    let n = m.dof();
    let mut s = random_state(rng, n);
    let _ = m.energy(&s);
    let (mut a, mut b) = ([0.0; 8], [0.0; 8]);
    let _ = m.gradient(&s, &mut a, &mut b);
    let _ = m.step(&mut s);
    let method = [
        Method::StormerVerlet,
        Method::Yoshida4,
        Method::ImplicitMidpoint,
        Method::Rk4,
    ][rng.below(4)];
    let it = Integrator {
        substeps: 1 + rng.below(3) as u16,
        max_iterations: 1 + rng.below(5) as u16,
        ..Integrator::new(method, rng.uniform(1e-4, 5.0) as f32)
    };
    if let Ok(m2) = m.with_integrator(it) {
        let _ = m2.step(&mut s);
    }
    let _ = m.cost();
}

#[test]
fn a_million_mutated_blobs_never_panic() {
    let seeds = seeds();
    let mut rng = XorShift64Star(0x1234_5678_9abc_def1);
    let cases = 1_000_000u32;
    let (mut parsed, mut resealed) = (0u32, 0u32);
    for k in 0..cases {
        let mut b = seeds[k as usize % seeds.len()].clone();
        mutate(&mut rng, &mut b);
        if k % 2 == 0 {
            reseal(&mut b);
            resealed += 1;
        }
        if let Ok(m) = Model::<8, 16>::from_bytes(&b) {
            parsed += 1;
            exercise(&m, &mut rng);
        }
    }
    println!("fuzz: {cases} mutated blobs ({resealed} with CRC recomputed), {parsed} still valid and stepped");
    // The mutations must reach past the checksum for the run to mean much.
    assert!(parsed > 10_000, "only {parsed} mutated blobs parsed");
}

/// `Model::from_bytes` decodes section by section (to keep the stack
/// small); the reference is `format::decode`, serde's derived decoder of
/// the whole description at once. On every mutated blob the whole-struct
/// decoder rejects, the section-by-section parse must give the same error,
/// and no blob the reference accepts may fail to decode section by section.
#[test]
fn section_by_section_parse_reports_what_the_whole_description_decoder_reports() {
    let seeds = seeds();
    let mut rng = XorShift64Star(0x5eed_f00d_0bad_cafe);
    let (mut rejected, mut accepted) = (0u32, 0u32);
    for k in 0..200_000u32 {
        let mut b = seeds[k as usize % seeds.len()].clone();
        mutate(&mut rng, &mut b);
        if k % 2 == 0 {
            reseal(&mut b);
        }
        let parsed = Model::<8, 16>::from_bytes(&b).map(|_| ());
        let reference = format::decode(&b).map(|_| ());
        match reference {
            Err(e) => {
                rejected += 1;
                assert_eq!(parsed, Err(e), "case {k}");
            }
            Ok(_) => {
                accepted += 1;
                let decoding_error = matches!(
                    parsed,
                    Err(BlobError::Malformed
                        | BlobError::TrailingBytes
                        | BlobError::Truncated { .. }
                        | BlobError::CrcMismatch { .. }
                        | BlobError::BadMagic
                        | BlobError::UnsupportedVersion { .. })
                );
                assert!(!decoding_error, "case {k}: {parsed:?}");
            }
        }
    }
    assert!(
        rejected > 10_000 && accepted > 10_000,
        "{rejected} rejected, {accepted} accepted"
    );
}

#[test]
fn untouched_seed_blobs_step_from_extreme_states() {
    let mut rng = XorShift64Star(77);
    for b in seeds() {
        let m = Model::<8, 16>::from_bytes(&b).unwrap();
        for _ in 0..2000 {
            exercise(&m, &mut rng);
        }
    }
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 20_000, ..ProptestConfig::default() })]
    #[test]
    fn arbitrary_bytes_never_panic(bytes in proptest::collection::vec(any::<u8>(), 0..400)) {
        let _ = Model::<8, 16>::from_bytes(&bytes);
        let mut with_magic = b"VVMB\x01\x00".to_vec();
        with_magic.extend_from_slice(&bytes);
        let _ = Model::<8, 16>::from_bytes(&with_magic);
        reseal(&mut with_magic);
        let _ = Model::<8, 16>::from_bytes(&with_magic);
    }
}
