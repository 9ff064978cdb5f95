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
            // Training envelopes (format version 4), on a conservative and
            // on a damped, driven blob.
            out.push(
                separable(&mut rng, 2, &[5], act, kind, Method::StormerVerlet, 0.05)
                    .with_envelope(&[-2.0, -1.0, -3.0, -0.5], &[2.0, 1.5, 3.0, 0.5])
                    .blob()
                    .unwrap(),
            );
            out.push(
                general(&mut rng, 1, &[4], act, kind, Method::DiscreteGradient, 0.05)
                    .with_port(&mut rng, 0.3, 1)
                    .with_envelope(&[-1.0, -1.0], &[1.0, 1.0])
                    .blob()
                    .unwrap(),
            );
            // Mechanical energies (format version 5), one with a training
            // envelope after its port terms.
            out.push(
                mechanical(
                    &mut rng,
                    2,
                    &[5],
                    act,
                    kind,
                    Method::ImplicitMidpoint,
                    0.05,
                    0.01,
                )
                .blob()
                .unwrap(),
            );
            out.push(
                mechanical(
                    &mut rng,
                    1,
                    &[4],
                    act,
                    kind,
                    Method::DiscreteGradient,
                    0.05,
                    0.0,
                )
                .with_port(&mut rng, 0.3, 1)
                .with_envelope(&[-1.0, -1.0], &[1.0, 1.0])
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
    if let Some(env) = m.envelope() {
        let _ = env.contains(&[s.q(), s.p()].concat());
    }
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

// ---------------------------------------------------------------------------
// Models of the sizes the tools build: the trainer parses blobs as
// `Model<16, 128>` (up to 16 degrees of freedom, layers up to 128 wide, up to
// `MAX_LAYERS` layers, up to `MAX_INPUTS` inputs), with every integrator,
// driven steps with fuzzed inputs, and subnormal and extreme states.

/// States and inputs the size fuzz draws from besides ordinary values:
/// subnormals, the edges of the f32 range, zeros and non-finite values.
const EXTREME: [f32; 14] = [
    0.0,
    -0.0,
    1e-45,
    -1e-45,
    1e-40,
    -3e-39,
    f32::MIN_POSITIVE,
    f32::MAX,
    -f32::MAX,
    1e19,
    -1e30,
    f32::NAN,
    f32::INFINITY,
    f32::NEG_INFINITY,
];

const METHODS: [Method; 5] = [
    Method::StormerVerlet,
    Method::Yoshida4,
    Method::ImplicitMidpoint,
    Method::Rk4,
    Method::DiscreteGradient,
];

/// A value: ordinary (within a few scales) most of the time, else extreme.
fn fuzz_value(rng: &mut XorShift64Star) -> f32 {
    match rng.below(6) {
        0 => EXTREME[rng.below(EXTREME.len())],
        1 => rng.uniform(-1e4, 1e4) as f32,
        _ => rng.uniform(-3.0, 3.0) as f32,
    }
}

/// Hidden widths: one to four layers, each 1..=128 wide, often 128.
fn hidden_widths(rng: &mut XorShift64Star) -> Vec<usize> {
    (0..1 + rng.below(4))
        .map(|_| match rng.below(3) {
            0 => 128,
            _ => 1 + rng.below(128),
        })
        .collect()
}

/// A random model within the tools' bounds: separable, general or mechanical, f32 or
/// int8, tanh or softplus, any method the energy kind allows, and port
/// terms (constant, or networks where their outputs fit in 128) for the
/// methods that step them. Returns the model and its widest hidden layer.
fn tool_sized_model(rng: &mut XorShift64Star) -> (OwnedModel, usize) {
    let dof = 1 + rng.below(16);
    let act = [Activation::Tanh, Activation::Softplus][rng.below(2)];
    let kind = [Precision::F32, Precision::Int8][rng.below(2)];
    let method = METHODS[rng.below(METHODS.len())];
    let hidden = hidden_widths(rng);
    let dt = [1e-3, 0.05, 0.5][rng.below(3)];
    let sep = method.needs_separable() || rng.below(2) == 0;
    // A mechanical factor L(q) has n (n + 1) / 2 outputs: it fits in 128
    // up to n = 15.
    let mech = !sep && dof <= 15 && rng.below(2) == 0;
    let mut m = if sep {
        separable(rng, dof, &hidden, act, kind, method, dt)
    } else if mech {
        let floor = [0.0, 1e-3][rng.below(2)];
        mechanical(rng, dof, &hidden, act, kind, method, dt, floor)
    } else {
        general(rng, dof, &hidden, act, kind, method, dt)
    };
    m.integrator.substeps = 1 + rng.below(4) as u16;
    m.integrator.max_iterations = 1 + rng.below(60) as u16;
    if method.handles_port_terms() && rng.below(3) > 0 {
        let n2 = 2 * dof;
        let inputs = rng.below(visviva_runtime::MAX_INPUTS + 1);
        let nets_fit = n2 * (n2 + 1) / 2 <= 128 && n2 * inputs <= 128;
        m = if nets_fit && rng.below(2) == 0 {
            let width = 1 + rng.below(128);
            m.with_port_networks(rng, 0.5, inputs, width, kind)
        } else {
            m.with_port(rng, 0.3, inputs)
        };
    }
    (m, hidden.iter().copied().max().unwrap_or(0))
}

/// One driven step from a fuzzed state with fuzzed inputs: an error must
/// leave the state bit for bit as it was, and success must give a finite
/// state.
fn fuzzed_step(model: &Model<'_, 16, 128>, rng: &mut XorShift64Star) -> bool {
    let n = model.dof();
    let mut v = [0.0f32; 32];
    v.iter_mut().take(2 * n).for_each(|x| *x = fuzz_value(rng));
    let mut s = State::<16>::new(&v[..n], &v[n..2 * n]).unwrap();
    let mut u = [0.0f32; visviva_runtime::MAX_INPUTS + 1];
    u.iter_mut().for_each(|x| *x = fuzz_value(rng));
    // Usually the model's input count; sometimes a wrong one.
    let m = match rng.below(8) {
        0 => rng.below(u.len() + 1),
        _ => model.inputs(),
    };
    let before = s;
    let _ = model.energy(&s);
    let ok = model.step_driven(&mut s, &u[..m]).is_ok();
    let q: Vec<u32> = s.q().iter().chain(s.p()).map(|x| x.to_bits()).collect();
    let q0: Vec<u32> = before
        .q()
        .iter()
        .chain(before.p())
        .map(|x| x.to_bits())
        .collect();
    if ok {
        assert!(
            s.is_finite(),
            "a step reported success with a non-finite state"
        );
    } else {
        assert_eq!(q, q0, "a failed step changed the state");
    }
    ok
}

#[test]
fn tool_sized_models_take_fuzzed_driven_steps_without_panic() {
    let mut rng = XorShift64Star(0x7001_5123_dead_beef);
    let models = 3_000u32;
    let steps_per_model = 12u32;
    let (mut built, mut stepped_ok, mut per_method) = (0u32, 0u32, [0u32; 5]);
    let mut attempted = 0u32;
    let mut max_width_seen = 0usize;
    for _ in 0..models {
        let (owned, widest) = tool_sized_model(&mut rng);
        max_width_seen = max_width_seen.max(widest);
        let b = owned.blob().unwrap();
        let model = Model::<16, 128>::from_bytes(&b).expect("a tool-sized fixture parses");
        built += 1;
        let k = METHODS
            .iter()
            .position(|m| *m == owned.integrator.method)
            .unwrap();
        per_method[k] += 1;
        for _ in 0..steps_per_model {
            stepped_ok += fuzzed_step(&model, &mut rng) as u32;
            attempted += 1;
        }
        // The same model under every other method it can take.
        for method in METHODS {
            if let Ok(other) = model.with_integrator(Integrator {
                method,
                ..owned.integrator
            }) {
                stepped_ok += fuzzed_step(&other, &mut rng) as u32;
                attempted += 1;
            }
        }
    }
    println!(
        "size fuzz: {built} models (dof 1..=16, widths up to {max_width_seen}; per stored method \
         verlet/yoshida4/midpoint/rk4/discrete-gradient {per_method:?}), {attempted} fuzzed driven steps, \
         {stepped_ok} succeeded"
    );
    assert_eq!(max_width_seen, 128);
    assert!(per_method.iter().all(|c| *c > 100), "{per_method:?}");
    // Ordinary states must step too, or the run only exercised refusals.
    assert!(stepped_ok > built, "only {stepped_ok} steps succeeded");
}
