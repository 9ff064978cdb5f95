//! FIXTURE blobs for the device check: deterministic, seeded pseudo-random
//! weights (NOT trained models) built with `visviva-blob-support`,
//! plus deliberately defective blobs the firmware must refuse.
//!
//! Good fixtures: a separable 2-dof model (2-32-32-1 tanh potential,
//! quadratic kinetic energy) stepped with Stormer-Verlet, and a general 1-dof
//! model (2-32-32-1 tanh) stepped with implicit midpoint, each with `f32` and
//! with int8 weights. The networks are built as smooth wells (see
//! [`well_mlp`]) so trajectories oscillate inside the networks' nonlinear
//! range for all 10^4 steps instead of drifting into tanh saturation, where
//! the comparison would become trivial; `cargo xtask device` prints each
//! rollout's largest |x|. One separable fixture also carries a training
//! envelope (format version 4), so the section's parse runs on the
//! emulator; a fixture whose envelope is inverted must be refused.

use anyhow::Result;
use visviva_blob_support::{
    Generator, OwnedEnergy, OwnedKinetic, OwnedLayer, OwnedMlp, OwnedModel, Precision, SplitMix64,
};
use visviva_runtime::format::{Activation, FORMAT_VERSION, HEADER_LEN, TRAILER_LEN};
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

/// A confining `inputs`-32-32-1 tanh energy: 16 seeded random directions
/// u_i, each with a pair of first-layer units tanh(a_i (u_i.z) +- a_i c_i)
/// whose difference, weighted -A_i at the output, is a smooth well along
/// u_i; a near-diagonal second layer (gain 0.5, small random mixing) keeps
/// the tanh there mildly nonlinear. The sum over directions is a bounded well
/// around z = 0 of depth ~ sum A_i tanh(a_i c_i) / 2, so states that start
/// low in it oscillate for ever and stay in the networks' nonlinear range.
fn well_mlp(rng: &mut SplitMix64, inputs: usize, precision: Precision) -> OwnedMlp {
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
    tanh_mlp(vec![
        OwnedLayer::new(inputs, HIDDEN, &w1, &b1, precision),
        OwnedLayer::new(HIDDEN, HIDDEN, &w2, &b2, precision),
        OwnedLayer::new(HIDDEN, 1, &w3, &[0.0], precision),
    ])
}

fn tanh_mlp(layers: Vec<OwnedLayer>) -> OwnedMlp {
    OwnedMlp {
        activation: Activation::Tanh,
        layers,
    }
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
fn random_mlp(rng: &mut SplitMix64, widths: &[usize], precision: Precision) -> OwnedMlp {
    tanh_mlp(
        widths
            .windows(2)
            .map(|w| OwnedLayer::random_uniform(rng, w[0], w[1], 1.5, precision))
            .collect(),
    )
}

/// Which network a fixture gets, for `inputs` inputs.
fn energy_net(rng: &mut SplitMix64, inputs: usize, net: Net, precision: Precision) -> OwnedMlp {
    match net {
        Net::Well => well_mlp(rng, inputs, precision),
        Net::Random(hidden) => random_mlp(rng, &widths(inputs, hidden), precision),
    }
}

/// Separable fixture: `dof` coordinates, tanh potential network `net`,
/// quadratic kinetic energy, Stormer-Verlet.
fn separable(seed: u64, dof: usize, net: Net, precision: Precision) -> Result<Vec<u8>> {
    Ok(separable_model(seed, dof, net, precision).blob()?)
}

/// [`separable`] with a training envelope (format version 4): every
/// coordinate within +-`half_width` (an inverted one when negative).
fn separable_with_envelope(
    seed: u64,
    dof: usize,
    precision: Precision,
    half_width: f32,
) -> Result<Vec<u8>> {
    let bound: Vec<f32> = (0..2 * dof)
        .map(|k| half_width * (1.0 + k as f32))
        .collect();
    let lower: Vec<f32> = bound.iter().map(|b| -b).collect();
    Ok(separable_model(seed, dof, Net::Well, precision)
        .with_envelope(&lower, &bound)
        .blob()?)
}

/// The owned model of [`separable`].
fn separable_model(seed: u64, dof: usize, net: Net, precision: Precision) -> OwnedModel {
    let mut rng = SplitMix64(seed);
    let potential = energy_net(&mut rng, dof, net, precision);
    // Cholesky factor of M^-1, row by row: unit diagonal, small coupling.
    let mut chol = Vec::new();
    for i in 0..dof {
        for j in 0..=i {
            chol.push(if i == j { 1.0 } else { 0.2 * rng.symmetric() });
        }
    }
    let scale = (0..2 * dof).map(|i| 0.5 + 0.25 * i as f32).collect();
    let energy = OwnedEnergy::Separable {
        potential,
        kinetic: OwnedKinetic::quadratic(chol),
    };
    let it = Integrator::new(Method::StormerVerlet, 0.01);
    OwnedModel::new(dof, vec![0.0; 2 * dof], scale, 1.0, energy, it)
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
    let energy = OwnedEnergy::General(energy_net(&mut rng, 2 * dof, net, precision));
    let n2 = 2 * dof;
    let method = if driven {
        Method::DiscreteGradient
    } else {
        Method::ImplicitMidpoint
    };
    let it = Integrator::new(method, 0.01);
    let model = OwnedModel::new(dof, vec![0.1; n2], vec![0.8; n2], 0.5, energy, it);
    if !driven {
        return Ok(model.blob()?);
    }
    let factor: Vec<f32> = (0..n2)
        .flat_map(|i| (0..=i).map(move |j| if i == j && i >= dof { 0.3 } else { 0.0 }))
        .collect();
    let g: Vec<f32> = (0..n2).map(|i| if i >= dof { 1.0 } else { 0.0 }).collect();
    Ok(model.with_constant_port(&factor, Some((1, &g))).blob()?)
}

/// Damped, driven fixture whose port terms are networks of q (format
/// version 3): L(q) (2n x 2n packed, n (2n + 1) outputs) and G(q) (2n x 1)
/// as one-hidden-layer tanh networks of z_q, discrete-gradient method.
fn driven_q_networks(seed: u64, dof: usize, precision: Precision) -> Result<Vec<u8>> {
    let mut rng = SplitMix64(seed);
    let energy = OwnedEnergy::General(well_mlp(&mut rng, 2 * dof, precision));
    let n2 = 2 * dof;
    let l_net = random_mlp(&mut rng, &[dof, 6, n2 * (n2 + 1) / 2], precision);
    let g_net = random_mlp(&mut rng, &[dof, 6, n2], precision);
    let it = Integrator::new(Method::DiscreteGradient, 0.01);
    let mut model = OwnedModel::new(dof, vec![0.1; n2], vec![0.8; n2], 0.5, energy, it);
    model.dissipation_net = Some(l_net);
    model.input_net = Some((1, g_net));
    Ok(model.blob()?)
}

/// The good fixture blobs: separable and general, f32 and int8, two
/// damped, driven models (their names contain `driven`): constant port
/// terms, and port terms that are networks of q; and the separable f32
/// model with a training envelope.
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
        NamedBlob {
            name: "fixture-separable-verlet-envelope-f32".into(),
            bytes: separable_with_envelope(0x5EED_0001, 2, Precision::F32, 2.0)?,
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
        BadBlob {
            blob: NamedBlob {
                name: "bad-inverted-envelope".into(),
                bytes: separable_with_envelope(0x5EED_0001, 2, Precision::F32, -1.0)?,
            },
            expected_error: "EnvelopeInverted",
        },
    ])
}

#[cfg(test)]
mod tests {
    use super::*;
    use visviva_runtime::{BlobError, Model};

    #[test]
    fn the_envelope_fixtures_parse_and_refuse_as_the_device_check_expects() {
        let good = good_fixtures().unwrap();
        let env = good
            .iter()
            .find(|b| b.name == "fixture-separable-verlet-envelope-f32")
            .unwrap();
        // f32 weights aligned: version 6 (the envelope alone needs 4).
        assert_eq!(
            u16::from_le_bytes([env.bytes[4], env.bytes[5]]),
            visviva_runtime::format::ALIGNED_VERSION
        );
        let m = Model::<2, 32>::from_bytes(&env.bytes).unwrap();
        assert_eq!(m.envelope().unwrap().upper.get(3), 8.0);
        let bad = bad_fixtures(2, 32).unwrap();
        let inverted = bad.iter().find(|b| b.expected_error == "EnvelopeInverted");
        assert_eq!(
            Model::<2, 32>::from_bytes(&inverted.unwrap().blob.bytes).unwrap_err(),
            BlobError::EnvelopeInverted { coordinate: 0 }
        );
    }

    #[test]
    fn crc_used_for_the_version_fixture_is_the_standard_crc32() {
        // CRC-32/ISO-HDLC check value over "123456789" is 0xCBF43926
        // (Greg Cook's CRC catalogue; also the crc crate's own check field).
        let crc = crc::Crc::<u32>::new(&crc::CRC_32_ISO_HDLC);
        assert_eq!(crc.checksum(b"123456789"), 0xCBF4_3926);
    }
}
