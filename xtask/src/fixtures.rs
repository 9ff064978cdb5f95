//! FIXTURE blobs for the device check: deterministic, seeded pseudo-random
//! weights (NOT trained models) encoded with `visviva_runtime::format::encode`,
//! plus deliberately defective blobs the firmware must refuse.
//!
//! Good fixtures: a separable 2-dof model (2-32-32-1 tanh potential,
//! quadratic kinetic energy) stepped with Stormer-Verlet, and a general 1-dof
//! model (2-32-32-1 tanh) stepped with implicit midpoint, each with `f32` and
//! with int8 weights. The networks are built as smooth wells (see
//! [`well_mlp`]) so trajectories oscillate inside the networks' nonlinear
//! range for all 10^4 steps instead of drifting into tanh saturation, where
//! the comparison would become trivial; `cargo xtask device` prints each
//! rollout's largest |x|.

use anyhow::{anyhow, Result};
use visviva_runtime::format::{
    self, Activation, EnergyDesc, F32Bytes, KineticDesc, LayerDesc, MlpDesc, ModelDesc,
    WeightsDesc, FORMAT_VERSION, HEADER_LEN, MAX_LAYERS, TRAILER_LEN,
};
use visviva_runtime::{Integrator, Method};

/// A named blob.
pub struct NamedBlob {
    /// Short name used for files and the report.
    pub name: String,
    /// The blob bytes.
    pub bytes: Vec<u8>,
}

/// A blob the firmware must refuse, and the error variant it must name.
pub struct BadBlob {
    /// The blob.
    pub blob: NamedBlob,
    /// `BlobError` variant name expected in the device log.
    pub expected_error: &'static str,
}

/// SplitMix64: a small, well-known generator (Steele, Lea, Flood 2014), so
/// fixtures are identical on every machine.
struct SplitMix64(u64);

impl SplitMix64 {
    fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// Uniform in [-1, 1).
    fn symmetric(&mut self) -> f32 {
        let unit = (self.next_u64() >> 40) as f32 / (1u64 << 24) as f32;
        2.0 * unit - 1.0
    }
}

/// Weight precision of a fixture.
#[derive(Clone, Copy, PartialEq, Eq)]
pub enum Precision {
    F32,
    Int8,
}

/// Owned storage for one layer, borrowed by the `LayerDesc` at encode time.
struct LayerData {
    inputs: usize,
    outputs: usize,
    weights: Vec<u8>,
    scales: Vec<u8>,
    bias: Vec<u8>,
    precision: Precision,
}

fn f32_bytes(values: &[f32]) -> Vec<u8> {
    values.iter().flat_map(|v| v.to_le_bytes()).collect()
}

/// A dense layer with uniform weights of magnitude up to `gain / sqrt(inputs)`.
fn random_layer(
    rng: &mut SplitMix64,
    inputs: usize,
    outputs: usize,
    gain: f32,
    precision: Precision,
) -> LayerData {
    let bound = gain / (inputs as f32).sqrt();
    let w: Vec<f32> = (0..inputs * outputs)
        .map(|_| bound * rng.symmetric())
        .collect();
    let b: Vec<f32> = (0..outputs).map(|_| 0.1 * rng.symmetric()).collect();
    layer_from(inputs, outputs, &w, &b, precision)
}

/// Quantize or store `w` (row-major `[outputs][inputs]`) and `b`.
fn layer_from(
    inputs: usize,
    outputs: usize,
    w: &[f32],
    b: &[f32],
    precision: Precision,
) -> LayerData {
    let (weights, scales) = match precision {
        Precision::F32 => (f32_bytes(w), Vec::new()),
        Precision::Int8 => {
            // Symmetric per-output-row quantization (common practice).
            let mut values = Vec::with_capacity(w.len());
            let mut scales = Vec::with_capacity(outputs);
            for row in w.chunks(inputs) {
                let max = row.iter().fold(0.0f32, |m, v| m.max(v.abs()));
                let scale = if max > 0.0 { max / 127.0 } else { 1.0 };
                scales.push(scale);
                values.extend(
                    row.iter()
                        .map(|v| (v / scale).round().clamp(-127.0, 127.0) as i8 as u8),
                );
            }
            (values, f32_bytes(&scales))
        }
    };
    LayerData {
        inputs,
        outputs,
        weights,
        scales,
        bias: f32_bytes(b),
        precision,
    }
}

/// A confining `inputs`-32-32-1 tanh energy: 16 seeded random directions
/// u_i, each with a pair of first-layer units tanh(a_i (u_i.z) +- a_i c_i)
/// whose difference, weighted -A_i at the output, is a smooth well along
/// u_i; a near-diagonal second layer (gain 0.5, small random mixing) keeps
/// the tanh there mildly nonlinear. The sum over directions is a bounded well
/// around z = 0 of depth ~ sum A_i tanh(a_i c_i) / 2, so states that start
/// low in it oscillate for ever and stay in the networks' nonlinear range.
fn well_mlp(rng: &mut SplitMix64, inputs: usize, precision: Precision) -> Vec<LayerData> {
    const PAIRS: usize = 16;
    const HIDDEN: usize = 2 * PAIRS;
    let mut w1 = Vec::with_capacity(HIDDEN * inputs);
    let mut b1 = Vec::with_capacity(HIDDEN);
    let mut w3 = Vec::with_capacity(HIDDEN);
    for _ in 0..PAIRS {
        let mut u: Vec<f32> = (0..inputs).map(|_| rng.symmetric()).collect();
        let norm = u.iter().map(|v| v * v).sum::<f32>().sqrt().max(1e-3);
        u.iter_mut().for_each(|v| *v /= norm);
        let a = 1.0 + 0.5 * rng.symmetric();
        let c = 1.0 + 0.3 * rng.symmetric();
        let depth = 0.5 + 0.25 * rng.symmetric();
        for sign in [1.0f32, -1.0] {
            w1.extend(u.iter().map(|v| a * v));
            b1.push(sign * a * c);
            w3.push(-sign * depth);
        }
    }
    let mut w2 = Vec::with_capacity(HIDDEN * HIDDEN);
    for j in 0..HIDDEN {
        for i in 0..HIDDEN {
            let diagonal = if i == j { 0.5 } else { 0.0 };
            w2.push(diagonal + 0.02 * rng.symmetric());
        }
    }
    let b2: Vec<f32> = (0..HIDDEN).map(|_| 0.02 * rng.symmetric()).collect();
    vec![
        layer_from(inputs, HIDDEN, &w1, &b1, precision),
        layer_from(HIDDEN, HIDDEN, &w2, &b2, precision),
        layer_from(HIDDEN, 1, &w3, &[0.0], precision),
    ]
}

/// Which energy network a fixture gets.
#[derive(Clone, Copy)]
enum Net<'a> {
    /// The confining 32-32 well of [`well_mlp`] (good fixtures).
    Well,
    /// Uniform random layers of these hidden widths (shape-only fixtures).
    Random(&'a [usize]),
}

/// `[inputs, hidden.., 1]`.
fn widths(inputs: usize, hidden: &[usize]) -> Vec<usize> {
    let mut w = vec![inputs];
    w.extend_from_slice(hidden);
    w.push(1);
    w
}

/// Layers of widths `widths[0] -> widths[1] -> ... -> 1`.
fn random_mlp(rng: &mut SplitMix64, widths: &[usize], precision: Precision) -> Vec<LayerData> {
    widths
        .windows(2)
        .map(|w| random_layer(rng, w[0], w[1], 1.5, precision))
        .collect()
}

fn mlp_desc(layers: &[LayerData]) -> Result<MlpDesc<'_>> {
    let mut out = heapless::Vec::<LayerDesc<'_>, MAX_LAYERS>::new();
    for l in layers {
        let weights = match l.precision {
            Precision::F32 => WeightsDesc::F32(F32Bytes(&l.weights)),
            Precision::Int8 => WeightsDesc::Int8 {
                values: &l.weights,
                scales: F32Bytes(&l.scales),
            },
        };
        out.push(LayerDesc {
            inputs: l.inputs as u16,
            outputs: l.outputs as u16,
            weights,
            bias: F32Bytes(&l.bias),
        })
        .map_err(|_| anyhow!("more than {MAX_LAYERS} layers"))?;
    }
    Ok(MlpDesc {
        activation: Activation::Tanh,
        layers: out,
    })
}

fn encode(desc: &ModelDesc<'_>) -> Result<Vec<u8>> {
    let mut buf = vec![0u8; 1 << 20];
    let n = format::encode(desc, &mut buf).map_err(|e| anyhow!("encoding fixture: {e}"))?;
    buf.truncate(n);
    Ok(buf)
}

/// Separable fixture: `dof` coordinates, tanh potential network `net`,
/// quadratic kinetic energy, Stormer-Verlet.
fn separable(seed: u64, dof: usize, net: Net, precision: Precision) -> Result<Vec<u8>> {
    let mut rng = SplitMix64(seed);
    let potential = match net {
        Net::Well => well_mlp(&mut rng, dof, precision),
        Net::Random(hidden) => random_mlp(&mut rng, &widths(dof, hidden), precision),
    };
    // Cholesky factor of M^-1, row by row: unit diagonal, small coupling.
    let mut chol = Vec::new();
    for i in 0..dof {
        for j in 0..=i {
            chol.push(if i == j { 1.0 } else { 0.2 * rng.symmetric() });
        }
    }
    let offset = f32_bytes(&vec![0.0; 2 * dof]);
    let scale = f32_bytes(
        &(0..2 * dof)
            .map(|i| 0.5 + 0.25 * i as f32)
            .collect::<Vec<_>>(),
    );
    let cholesky = f32_bytes(&chol);
    let desc = ModelDesc {
        dof: dof as u8,
        offset: F32Bytes(&offset),
        scale: F32Bytes(&scale),
        energy_scale: 1.0,
        energy: EnergyDesc::Separable {
            potential: mlp_desc(&potential)?,
            kinetic: KineticDesc::Quadratic {
                cholesky: F32Bytes(&cholesky),
            },
        },
        integrator: Integrator::new(Method::StormerVerlet, 0.01),
        dissipation: format::DissipationDesc::None,
        input: format::InputDesc::None,
    };
    encode(&desc)
}

/// General fixture: H(q, p) as one tanh network, implicit midpoint.
fn general(seed: u64, dof: usize, net: Net, precision: Precision) -> Result<Vec<u8>> {
    general_with(seed, dof, net, precision, false)
}

/// General fixture, optionally damped and driven: R = L L^T with L acting on
/// the momenta (0.3 on each diagonal entry of the p block), G = 1 on each
/// momentum from input u1, stepped by the discrete-gradient method.
fn general_with(
    seed: u64,
    dof: usize,
    net: Net,
    precision: Precision,
    driven: bool,
) -> Result<Vec<u8>> {
    let mut rng = SplitMix64(seed);
    let net = match net {
        Net::Well => well_mlp(&mut rng, 2 * dof, precision),
        Net::Random(hidden) => random_mlp(&mut rng, &widths(2 * dof, hidden), precision),
    };
    let offset = f32_bytes(&vec![0.1; 2 * dof]);
    let scale = f32_bytes(&vec![0.8; 2 * dof]);
    let n2 = 2 * dof;
    let factor: Vec<f32> = (0..n2)
        .flat_map(|i| (0..=i).map(move |j| if i == j && i >= dof { 0.3 } else { 0.0 }))
        .collect();
    let g: Vec<f32> = (0..n2).map(|i| if i >= dof { 1.0 } else { 0.0 }).collect();
    let (factor, g) = (f32_bytes(&factor), f32_bytes(&g));
    let desc = ModelDesc {
        dof: dof as u8,
        offset: F32Bytes(&offset),
        scale: F32Bytes(&scale),
        energy_scale: 0.5,
        energy: EnergyDesc::General(mlp_desc(&net)?),
        integrator: Integrator::new(
            if driven {
                Method::DiscreteGradient
            } else {
                Method::ImplicitMidpoint
            },
            0.01,
        ),
        dissipation: if driven {
            format::DissipationDesc::Constant {
                factor: F32Bytes(&factor),
            }
        } else {
            format::DissipationDesc::None
        },
        input: if driven {
            format::InputDesc::Constant {
                inputs: 1,
                matrix: F32Bytes(&g),
            }
        } else {
            format::InputDesc::None
        },
    };
    encode(&desc)
}

/// Damped, driven fixture whose port terms are networks of q (format
/// version 3): L(q) (2n x 2n packed, n (2n + 1) outputs) and G(q) (2n x 1)
/// as one-hidden-layer tanh networks of z_q, discrete-gradient method.
fn driven_q_networks(seed: u64, dof: usize, precision: Precision) -> Result<Vec<u8>> {
    let mut rng = SplitMix64(seed);
    let energy = well_mlp(&mut rng, 2 * dof, precision);
    let n2 = 2 * dof;
    let l_net = random_mlp(&mut rng, &[dof, 6, n2 * (n2 + 1) / 2], precision);
    let g_net = random_mlp(&mut rng, &[dof, 6, n2], precision);
    let offset = f32_bytes(&vec![0.1; n2]);
    let scale = f32_bytes(&vec![0.8; n2]);
    let desc = ModelDesc {
        dof: dof as u8,
        offset: F32Bytes(&offset),
        scale: F32Bytes(&scale),
        energy_scale: 0.5,
        energy: EnergyDesc::General(mlp_desc(&energy)?),
        integrator: Integrator::new(Method::DiscreteGradient, 0.01),
        dissipation: format::DissipationDesc::Network(mlp_desc(&l_net)?),
        input: format::InputDesc::Network {
            inputs: 1,
            net: mlp_desc(&g_net)?,
        },
    };
    encode(&desc)
}

/// The good fixture blobs: separable and general, f32 and int8, and two
/// damped, driven models (their names contain `driven`): constant port
/// terms, and port terms that are networks of q.
pub fn good_fixtures() -> Result<Vec<NamedBlob>> {
    Ok(vec![
        NamedBlob {
            name: "fixture-separable-verlet-f32".into(),
            bytes: separable(0x5EED_0001, 2, Net::Well, Precision::F32)?,
        },
        NamedBlob {
            name: "fixture-separable-verlet-int8".into(),
            bytes: separable(0x5EED_0001, 2, Net::Well, Precision::Int8)?,
        },
        NamedBlob {
            name: "fixture-general-midpoint-f32".into(),
            bytes: general(0x5EED_0002, 1, Net::Well, Precision::F32)?,
        },
        NamedBlob {
            name: "fixture-general-midpoint-int8".into(),
            bytes: general(0x5EED_0002, 1, Net::Well, Precision::Int8)?,
        },
        NamedBlob {
            name: "fixture-driven-dgrad-f32".into(),
            bytes: general_with(0x5EED_0003, 1, Net::Well, Precision::F32, true)?,
        },
        NamedBlob {
            name: "fixture-driven-qnet-dgrad-int8".into(),
            bytes: driven_q_networks(0x5EED_0005, 1, Precision::Int8)?,
        },
    ])
}

/// Blobs the firmware (bounds `max_dof`, `max_width`) must refuse.
pub fn bad_fixtures(max_dof: usize, max_width: usize) -> Result<Vec<BadBlob>> {
    let good = separable(0x5EED_0001, 2, Net::Well, Precision::F32)?;

    let mut corrupted = good.clone();
    let mid = HEADER_LEN + (corrupted.len() - HEADER_LEN - TRAILER_LEN) / 2;
    corrupted[mid] ^= 0x10;

    // A newer format version with a CRC that matches, so the version is the
    // only defect.
    let mut newer = good;
    newer[4..6].copy_from_slice(&(FORMAT_VERSION + 1).to_le_bytes());
    let end = newer.len() - TRAILER_LEN;
    let crc = crc::Crc::<u32>::new(&crc::CRC_32_ISO_HDLC).checksum(&newer[4..end]);
    newer[end..].copy_from_slice(&crc.to_le_bytes());

    Ok(vec![
        BadBlob {
            blob: NamedBlob {
                name: format!("bad-too-many-dof-{}", max_dof + 1),
                bytes: separable(0x5EED_0003, max_dof + 1, Net::Random(&[8]), Precision::F32)?,
            },
            expected_error: "DofOutOfRange",
        },
        BadBlob {
            blob: NamedBlob {
                name: format!("bad-too-wide-{}", 2 * max_width),
                bytes: general(
                    0x5EED_0004,
                    1,
                    Net::Random(&[2 * max_width]),
                    Precision::F32,
                )?,
            },
            expected_error: "TooWide",
        },
        BadBlob {
            blob: NamedBlob {
                name: "bad-corrupted-crc".into(),
                bytes: corrupted,
            },
            expected_error: "CrcMismatch",
        },
        BadBlob {
            blob: NamedBlob {
                name: format!("bad-newer-format-v{}", FORMAT_VERSION + 1),
                bytes: newer,
            },
            expected_error: "UnsupportedVersion",
        },
    ])
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn splitmix64_matches_published_sequence() {
        // Rosetta Code, "Pseudo-random numbers/Splitmix64": the first five
        // outputs for seed 1234567.
        let mut rng = SplitMix64(1234567);
        let expected = [
            6457827717110365317u64,
            3203168211198807973,
            9817491932198370423,
            4593380528125082431,
            16408922859458223821,
        ];
        for want in expected {
            assert_eq!(rng.next_u64(), want);
        }
    }

    #[test]
    fn crc_used_for_the_version_fixture_is_the_standard_crc32() {
        // CRC-32/ISO-HDLC check value over "123456789" is 0xCBF43926
        // (Greg Cook's CRC catalogue; also the crc crate's own check field).
        let crc = crc::Crc::<u32>::new(&crc::CRC_32_ISO_HDLC);
        assert_eq!(crc.checksum(b"123456789"), 0xCBF4_3926);
    }

    #[test]
    fn int8_rows_reconstruct_within_half_a_step() {
        // Symmetric per-row quantization (common practice): every value
        // dequantizes to within scale / 2 of the original, and the row's
        // largest magnitude maps to +-127.
        let w = [0.5f32, -1.27, 0.0, 0.3, 2.0, -0.7];
        let layer = layer_from(3, 2, &w, &[0.0, 0.0], Precision::Int8);
        for (r, row) in w.chunks(3).enumerate() {
            let scale = f32::from_le_bytes(layer.scales[4 * r..4 * r + 4].try_into().unwrap());
            let max = row.iter().fold(0.0f32, |m, v| m.max(v.abs()));
            assert_eq!(scale, max / 127.0);
            for (i, v) in row.iter().enumerate() {
                let q = layer.weights[3 * r + i] as i8;
                assert!(q.unsigned_abs() <= 127);
                assert!((f32::from(q) * scale - v).abs() <= scale / 2.0 + 1e-7);
            }
        }
    }
}
