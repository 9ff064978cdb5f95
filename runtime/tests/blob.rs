//! The blob container and its validation: round trip, zero-copy borrowing,
//! and one test per refusal, each checking the typed error (no panics).

mod common;

use common::*;
use visviva_runtime::format::{
    self, Activation, EnergyDesc, F32Bytes, KineticDesc, FORMAT_VERSION,
};
use visviva_runtime::{BlobError, Integrator, Method, Model, Section, State, StepError};

fn sample() -> OwnedModel {
    separable(
        &mut XorShift64Star(11),
        2,
        &[16, 16],
        Activation::Tanh,
        Precision::F32,
        Method::StormerVerlet,
        0.01,
    )
}

type M<'a> = Model<'a, 8, 128>;

/// Recompute the CRC after editing bytes, so validation past it is reached.
fn reseal(b: &mut [u8]) {
    let end = b.len() - 4;
    let crc = crc::Crc::<u32>::new(&crc::CRC_32_ISO_HDLC).checksum(&b[4..end]);
    b[end..].copy_from_slice(&crc.to_le_bytes());
}

#[test]
fn round_trip_and_zero_copy() {
    let owned = sample();
    let blob = owned.blob().unwrap();
    let desc = format::decode(&blob).unwrap();
    assert_eq!(desc, owned.desc().unwrap());
    // The weight bytes are borrowed from the blob itself.
    let EnergyDesc::Separable { potential, .. } = &desc.energy else {
        panic!()
    };
    let format::WeightsDesc::F32Aligned(format::AlignedF32 { values: w, .. }) =
        potential.layers[0].weights
    else {
        panic!()
    };
    let range = blob.as_ptr_range();
    assert!(range.contains(&w.0.as_ptr()));
    let m: M = Model::from_bytes(&blob).unwrap();
    assert_eq!(m.integrator(), owned.integrator);
}

#[test]
fn crc_is_the_standard_crc32() {
    // CRC-32/ISO-HDLC check value for "123456789" is 0xCBF43926
    // (Greg Cook's CRC catalogue; also zlib's crc32).
    let c = crc::Crc::<u32>::new(&crc::CRC_32_ISO_HDLC);
    assert_eq!(c.checksum(b"123456789"), 0xCBF4_3926);
}

#[test]
fn refuses_truncated_magic_version_crc_and_trailing() {
    let blob = sample().blob().unwrap();
    for cut in [0, 3, 9, 10, blob.len() / 2, blob.len() - 1] {
        assert!(
            matches!(
                M::from_bytes(&blob[..cut]),
                Err(BlobError::Truncated { .. })
            ),
            "cut {cut}"
        );
    }
    let mut b = blob.clone();
    b[0] = b'X';
    assert_eq!(M::from_bytes(&b).unwrap_err(), BlobError::BadMagic);

    let mut b = blob.clone();
    b[4..6].copy_from_slice(&(FORMAT_VERSION + 1).to_le_bytes());
    assert_eq!(
        M::from_bytes(&b).unwrap_err(),
        BlobError::UnsupportedVersion {
            found: FORMAT_VERSION + 1,
            supported: FORMAT_VERSION
        }
    );

    let mut b = blob.clone();
    let mid = b.len() / 2;
    b[mid] ^= 0x10;
    assert!(matches!(
        M::from_bytes(&b),
        Err(BlobError::CrcMismatch { .. })
    ));

    let mut b = blob.clone();
    b.push(0);
    assert_eq!(M::from_bytes(&b).unwrap_err(), BlobError::TrailingBytes);

    // A payload that passes the CRC but is not a description.
    let mut b = blob.clone();
    b[10] = 0xff;
    b[11] = 0xff;
    reseal(&mut b);
    assert_eq!(M::from_bytes(&b).unwrap_err(), BlobError::Malformed);
}

#[test]
fn refuses_models_beyond_the_const_bounds() {
    let mut rng = XorShift64Star(3);
    let big = separable(
        &mut rng,
        3,
        &[16],
        Activation::Tanh,
        Precision::F32,
        Method::StormerVerlet,
        0.01,
    );
    let blob = big.blob().unwrap();
    assert_eq!(
        Model::<2, 128>::from_bytes(&blob).unwrap_err(),
        BlobError::DofOutOfRange { dof: 3, max: 2 }
    );
    let wide = separable(
        &mut rng,
        1,
        &[64],
        Activation::Tanh,
        Precision::Int8,
        Method::StormerVerlet,
        0.01,
    );
    let blob = wide.blob().unwrap();
    assert_eq!(
        Model::<2, 32>::from_bytes(&blob).unwrap_err(),
        BlobError::TooWide {
            section: Section::Potential,
            layer: 0,
            width: 64,
            max: 32
        }
    );
    assert!(Model::<2, 64>::from_bytes(&blob).is_ok());
}

#[test]
fn refuses_relu_with_an_explanation() {
    let mut owned = sample();
    if let OwnedEnergy::Separable { potential, .. } = &mut owned.energy {
        potential.activation = Activation::Relu;
    }
    let err = M::from_bytes(&owned.blob().unwrap()).unwrap_err();
    assert_eq!(
        err,
        BlobError::ReluInEnergyNetwork {
            section: Section::Potential
        }
    );
    let text = err.to_string();
    assert!(
        text.contains("piecewise constant") && text.contains("discontinuous"),
        "{text}"
    );
}

#[test]
fn refuses_inconsistent_shapes_and_values() {
    let owned = sample();
    // Layer sizes that do not chain.
    let mut bad = owned.clone();
    if let OwnedEnergy::Separable { potential, .. } = &mut bad.energy {
        potential.layers[1].inputs = 15;
    }
    assert!(matches!(
        M::from_bytes(&bad.blob().unwrap()),
        Err(BlobError::ShapeMismatch {
            section: Section::Potential,
            ..
        })
    ));

    // A NaN weight.
    let mut bad = owned.clone();
    if let OwnedEnergy::Separable { potential, .. } = &mut bad.energy {
        potential.layers[0].w_bytes[0..4].copy_from_slice(&f32::NAN.to_le_bytes());
    }
    assert_eq!(
        M::from_bytes(&bad.blob().unwrap()).unwrap_err(),
        BlobError::NonFinite {
            section: Section::Potential
        }
    );

    // Zero scale, infinite offset, negative energy scale.
    let mut bad = owned.clone();
    bad.scale_bytes[0..4].copy_from_slice(&0.0f32.to_le_bytes());
    assert_eq!(
        M::from_bytes(&bad.blob().unwrap()).unwrap_err(),
        BlobError::NotPositive {
            section: Section::Normalization
        }
    );
    let mut bad = owned.clone();
    bad.offset_bytes[4..8].copy_from_slice(&f32::INFINITY.to_le_bytes());
    assert_eq!(
        M::from_bytes(&bad.blob().unwrap()).unwrap_err(),
        BlobError::NonFinite {
            section: Section::Normalization
        }
    );
    let mut bad = owned.clone();
    bad.energy_scale = -1.0;
    assert_eq!(
        M::from_bytes(&bad.blob().unwrap()).unwrap_err(),
        BlobError::NotPositive {
            section: Section::EnergyScale
        }
    );

    // A mass factor with a non-positive diagonal is not positive definite.
    let mut bad = owned.clone();
    if let OwnedEnergy::Separable {
        kinetic: OwnedKinetic::Quadratic(_, bytes),
        ..
    } = &mut bad.energy
    {
        bytes[0..4].copy_from_slice(&(-0.5f32).to_le_bytes());
    }
    assert_eq!(
        M::from_bytes(&bad.blob().unwrap()).unwrap_err(),
        BlobError::NotPositive {
            section: Section::InverseMass
        }
    );

    // Wrong factor length.
    let desc = owned.desc().unwrap();
    let mut desc2 = desc.clone();
    if let EnergyDesc::Separable { kinetic, .. } = &mut desc2.energy {
        *kinetic = KineticDesc::Quadratic {
            cholesky: F32Bytes(&[0, 0, 128, 63]),
        };
    }
    let blob = encode(&desc2);
    assert!(matches!(
        M::from_bytes(&blob),
        Err(BlobError::ShapeMismatch {
            section: Section::InverseMass,
            ..
        })
    ));
}

#[test]
fn refuses_bad_integrator_settings_and_explicit_methods_on_general_models() {
    let mut owned = sample();
    for it in [
        Integrator {
            dt: 0.0,
            ..owned.integrator
        },
        Integrator {
            dt: f32::NAN,
            ..owned.integrator
        },
        Integrator {
            substeps: 0,
            ..owned.integrator
        },
        Integrator {
            max_iterations: 0,
            ..owned.integrator
        },
        Integrator {
            tolerance: -1.0,
            ..owned.integrator
        },
    ] {
        owned.integrator = it;
        assert_eq!(
            M::from_bytes(&owned.blob().unwrap()).unwrap_err(),
            BlobError::BadIntegratorSettings
        );
    }
    let mut rng = XorShift64Star(5);
    for method in [Method::StormerVerlet, Method::Yoshida4] {
        let g = general(
            &mut rng,
            1,
            &[8],
            Activation::Tanh,
            Precision::F32,
            method,
            0.01,
        );
        assert_eq!(
            M::from_bytes(&g.blob().unwrap()).unwrap_err(),
            BlobError::MethodNeedsSeparableModel
        );
    }
    let g = general(
        &mut rng,
        1,
        &[8],
        Activation::Tanh,
        Precision::F32,
        Method::ImplicitMidpoint,
        0.01,
    );
    let blob = g.blob().unwrap();
    let m = M::from_bytes(&blob).unwrap();
    assert_eq!(
        m.with_integrator(Integrator::new(Method::Yoshida4, 0.01))
            .unwrap_err(),
        BlobError::MethodNeedsSeparableModel
    );
}

#[test]
fn step_errors_are_typed_and_leave_the_state_alone() {
    let mut rng = XorShift64Star(9);
    let g = general(
        &mut rng,
        2,
        &[16],
        Activation::Tanh,
        Precision::F32,
        Method::ImplicitMidpoint,
        0.01,
    );
    let blob = g.blob().unwrap();
    let m = M::from_bytes(&blob).unwrap();
    let mut s = State::<8>::new(&[0.1, 0.2], &[0.0, f32::NAN]).unwrap();
    let before = s;
    assert_eq!(m.step(&mut s), Err(StepError::NonFiniteState));
    assert_eq!(s.q, before.q);

    let mut s1 = State::<8>::new(&[0.1], &[0.0]).unwrap();
    assert_eq!(
        m.step(&mut s1),
        Err(StepError::DofMismatch { model: 2, state: 1 })
    );

    // A huge step with one iteration cannot converge.
    let m2 = m
        .with_integrator(Integrator {
            max_iterations: 1,
            tolerance: 1e-9,
            ..Integrator::new(Method::ImplicitMidpoint, 5.0)
        })
        .unwrap();
    let mut s2 = State::<8>::new(&[0.5, -0.5], &[0.3, 0.2]).unwrap();
    let before = s2;
    assert_eq!(
        m2.step(&mut s2),
        Err(StepError::NotConverged { iterations: 1 })
    );
    assert_eq!(s2, before);
}

#[test]
fn state_constructor_checks_sizes() {
    assert!(State::<2>::new(&[1.0, 2.0, 3.0], &[0.0, 0.0, 0.0]).is_err());
    assert!(State::<2>::new(&[1.0], &[0.0, 0.0]).is_err());
    assert!(State::<2>::zeros(0).is_err());
}

/// A blob cut out of a larger flash region by its header alone. The layout
/// (10-byte header: magic, u16 version, u32 payload length; 4-byte CRC
/// trailer) is the one `format.rs` documents; the encoder's own output
/// length is the reference for a good blob.
#[test]
fn blob_len_reads_the_total_length_from_the_header() {
    let blob = sample().blob().unwrap();
    assert_eq!(visviva_runtime::blob_len(&blob), Ok(blob.len()));
    // Only the header is read: the first 10 bytes suffice, and erased flash
    // (0xFF) after the blob is ignored.
    assert_eq!(
        visviva_runtime::blob_len(&blob[..format::HEADER_LEN]),
        Ok(blob.len())
    );
    let mut region = blob.clone();
    region.resize(blob.len() + 4096, 0xFF);
    let len = visviva_runtime::blob_len(&region).unwrap();
    assert_eq!(&region[..len], &blob[..]);
    assert!(M::from_bytes(&region[..len]).is_ok());
}

#[test]
fn blob_len_refuses_a_short_header() {
    let blob = sample().blob().unwrap();
    for cut in 0..format::HEADER_LEN {
        assert_eq!(
            visviva_runtime::blob_len(&blob[..cut]),
            Err(BlobError::Truncated {
                needed: (format::HEADER_LEN + format::TRAILER_LEN) as u32,
                found: cut as u32,
            }),
            "header cut at {cut} bytes"
        );
    }
}

#[test]
fn blob_len_refuses_a_wrong_magic_and_erased_flash() {
    let mut blob = sample().blob().unwrap();
    let erased = vec![0xFFu8; 64];
    assert_eq!(visviva_runtime::blob_len(&erased), Err(BlobError::BadMagic));
    blob[3] ^= 0x01;
    assert_eq!(visviva_runtime::blob_len(&blob), Err(BlobError::BadMagic));
}

#[test]
fn blob_len_refuses_an_unreadable_version() {
    let mut blob = sample().blob().unwrap();
    blob[4..6].copy_from_slice(&(FORMAT_VERSION + 1).to_le_bytes());
    assert_eq!(
        visviva_runtime::blob_len(&blob),
        Err(BlobError::UnsupportedVersion {
            found: FORMAT_VERSION + 1,
            supported: FORMAT_VERSION,
        })
    );
}

#[test]
fn blob_len_refuses_a_length_beyond_32_bits() {
    let mut header = sample().blob().unwrap()[..format::HEADER_LEN].to_vec();
    let extra = (format::HEADER_LEN + format::TRAILER_LEN) as u32;
    // The largest payload whose blob still fits in u32::MAX bytes...
    header[6..10].copy_from_slice(&(u32::MAX - extra).to_le_bytes());
    assert_eq!(visviva_runtime::blob_len(&header), Ok(u32::MAX as usize));
    // ...and one byte more, up to the largest the field can state.
    for payload_len in [u32::MAX - extra + 1, u32::MAX] {
        header[6..10].copy_from_slice(&payload_len.to_le_bytes());
        assert_eq!(
            visviva_runtime::blob_len(&header),
            Err(BlobError::LengthOutOfRange { payload_len })
        );
    }
}

/// An edit of a fixture model.
type Edit = Box<dyn Fn(&mut OwnedModel)>;

/// Values that are finite but no fitted model can mean: subnormal or
/// absurdly large scales, offsets, inverse-mass entries, int8 row scales,
/// time steps and tolerances. Each is refused with its section named, and
/// the edges of every documented range (`format`'s table) still parse.
/// (The subnormal range of f32 ends at 2^-126 = 1.1754944e-38, IEEE 754.)
#[test]
fn refuses_subnormal_and_out_of_range_values_naming_the_section() {
    let owned = sample();
    let out_of_range = |section| BlobError::OutOfRange { section };
    let norm = Section::Normalization;
    let cases: [(&str, Edit, BlobError); 8] = [
        (
            "subnormal q scale",
            Box::new(|m| m.scale_bytes[0..4].copy_from_slice(&1e-40f32.to_le_bytes())),
            out_of_range(norm),
        ),
        (
            "p scale 1e30",
            Box::new(|m| m.scale_bytes[8..12].copy_from_slice(&1e30f32.to_le_bytes())),
            out_of_range(norm),
        ),
        (
            "offset -1e20",
            Box::new(|m| m.offset_bytes[4..8].copy_from_slice(&(-1e20f32).to_le_bytes())),
            out_of_range(norm),
        ),
        (
            "subnormal energy scale",
            Box::new(|m| m.energy_scale = 1e-39),
            out_of_range(Section::EnergyScale),
        ),
        (
            "subnormal inverse-mass diagonal",
            Box::new(|m| {
                if let OwnedEnergy::Separable {
                    kinetic: OwnedKinetic::Quadratic(_, bytes),
                    ..
                } = &mut m.energy
                {
                    bytes[0..4].copy_from_slice(&1e-42f32.to_le_bytes());
                }
            }),
            out_of_range(Section::InverseMass),
        ),
        (
            "inverse-mass entry 1e25 off the diagonal",
            Box::new(|m| {
                if let OwnedEnergy::Separable {
                    kinetic: OwnedKinetic::Quadratic(_, bytes),
                    ..
                } = &mut m.energy
                {
                    bytes[4..8].copy_from_slice(&1e25f32.to_le_bytes());
                }
            }),
            out_of_range(Section::InverseMass),
        ),
        (
            "subnormal time step",
            Box::new(|m| m.integrator.dt = 1e-41),
            BlobError::BadIntegratorSettings,
        ),
        (
            "time step 1e9 s",
            Box::new(|m| m.integrator.dt = 1e9),
            BlobError::BadIntegratorSettings,
        ),
    ];
    for (what, edit, want) in cases {
        let mut bad = owned.clone();
        edit(&mut bad);
        assert_eq!(
            M::from_bytes(&bad.blob().unwrap()).unwrap_err(),
            want,
            "{what}"
        );
    }
    for it in [
        Integrator {
            tolerance: 1e-40,
            ..owned.integrator
        },
        Integrator {
            tolerance: 2.0,
            ..owned.integrator
        },
    ] {
        let mut bad = owned.clone();
        bad.integrator = it;
        assert_eq!(
            M::from_bytes(&bad.blob().unwrap()).unwrap_err(),
            BlobError::BadIntegratorSettings
        );
    }

    // An int8 network with a subnormal row scale.
    let mut rng = XorShift64Star(12);
    let mut q = separable(
        &mut rng,
        1,
        &[4],
        Activation::Tanh,
        Precision::Int8,
        Method::StormerVerlet,
        0.01,
    );
    if let OwnedEnergy::Separable { potential, .. } = &mut q.energy {
        potential.layers[0].s_bytes[0..4].copy_from_slice(&1e-40f32.to_le_bytes());
    }
    assert_eq!(
        M::from_bytes(&q.blob().unwrap()).unwrap_err(),
        out_of_range(Section::Potential)
    );

    // The edges of each range are accepted.
    let mut edge = owned.clone();
    edge.scale_bytes[0..4].copy_from_slice(&format::MIN_SCALE.to_le_bytes());
    edge.scale_bytes[4..8].copy_from_slice(&format::MAX_SCALE.to_le_bytes());
    edge.offset_bytes[0..4].copy_from_slice(&(-format::MAX_OFFSET).to_le_bytes());
    edge.energy_scale = format::MAX_SCALE;
    edge.integrator.dt = visviva_runtime::integrate::MIN_DT;
    edge.integrator.tolerance = 1.0;
    M::from_bytes(&edge.blob().unwrap()).unwrap();
    edge.integrator.dt = visviva_runtime::integrate::MAX_DT;
    M::from_bytes(&edge.blob().unwrap()).unwrap();
}
