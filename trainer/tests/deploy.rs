//! Host deploy tools on fixture blobs (seeded weights, not trained models):
//! int8 export and its error bound, inspect's counts, rollout through the
//! runtime, and bit-for-bit comparison of trajectory files.

use std::process::Command;

use rand::{Rng, SeedableRng};
use visviva_runtime::format::Activation;
use visviva_runtime::{Integrator, Method};
use visviva_trainer::deploy::blob::{
    BlobModel, Bounds, Energy, Kinetic, Layer, Mlp, PortTerm, WeightKind, Weights,
};
use visviva_trainer::deploy::compare::{compare, Verdict};
use visviva_trainer::deploy::integrator::IntegratorOverrides;

fn mlp(rng: &mut rand_chacha::ChaCha8Rng, sizes: &[usize]) -> Mlp {
    let layers = sizes
        .windows(2)
        .map(|w| {
            let lim = (6.0 / (w[0] + w[1]) as f32).sqrt();
            Layer {
                inputs: w[0],
                outputs: w[1],
                weights: Weights::F32(
                    (0..w[0] * w[1])
                        .map(|_| rng.random_range(-lim..lim))
                        .collect(),
                ),
                bias: (0..w[1]).map(|_| rng.random_range(-0.1..0.1)).collect(),
            }
        })
        .collect();
    Mlp {
        activation: Activation::Tanh,
        layers,
    }
}

/// A separable fixture with a convex-ish potential: V = MLP + quadratic
/// is not expressible, so keep weights small and steps short.
fn fixture(general: bool) -> BlobModel {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(42);
    let energy = if general {
        Energy::General(mlp(&mut rng, &[2, 32, 32, 1]))
    } else {
        Energy::Separable {
            potential: mlp(&mut rng, &[1, 32, 32, 1]),
            kinetic: Kinetic::Quadratic(vec![1.0]),
        }
    };
    BlobModel {
        dof: 1,
        offset: vec![0.0, 0.0],
        scale: vec![1.0, 1.0],
        energy_scale: 1.0,
        energy,
        integrator: Integrator::new(
            if general {
                Method::ImplicitMidpoint
            } else {
                Method::StormerVerlet
            },
            0.01,
        ),
        dissipation: None,
        input: None,
        envelope: None,
    }
}

/// `deploy::export::export` with `steps` x `states` check rollouts and the
/// convergence proof over the blob's normalization range.
fn export_checked(
    src: &BlobModel,
    kind: WeightKind,
    ia: &IntegratorOverrides,
    steps: usize,
    states: usize,
) -> anyhow::Result<(Vec<u8>, visviva_trainer::deploy::export::ExportReport)> {
    let range = visviva_trainer::deploy::convergence::TrainingRange::of_normalization(
        &src.offset,
        &src.scale,
    );
    let check = visviva_trainer::deploy::export::ExportCheck {
        steps,
        states,
        range: &range,
        key: &|k: &str| format!("--{k}"),
    };
    visviva_trainer::deploy::export::export(src, kind, ia, &check)
}

#[test]
fn blob_model_round_trips() {
    for g in [false, true] {
        let m = fixture(g);
        let bytes = m.to_bytes().unwrap();
        assert_eq!(BlobModel::from_bytes(&bytes).unwrap(), m);
    }
}

#[test]
fn the_training_envelope_survives_export_and_inspect_prints_it() {
    let mut m = fixture(false);
    m.envelope = Some(Bounds {
        lower: vec![-0.5, -2.0],
        upper: vec![0.75, 2.25],
    });
    let bytes = m.to_bytes().unwrap();
    // f32 weights aligned: version 6 (the envelope alone needs 4).
    assert_eq!(
        u16::from_le_bytes([bytes[4], bytes[5]]),
        visviva_runtime::format::ALIGNED_VERSION
    );
    assert_eq!(BlobModel::from_bytes(&bytes).unwrap(), m);
    // int8 export keeps the bounds as stored.
    let (int8, _) =
        export_checked(&m, WeightKind::Int8, &IntegratorOverrides::default(), 20, 2).unwrap();
    assert_eq!(BlobModel::from_bytes(&int8).unwrap().envelope, m.envelope);
    let r = visviva_trainer::deploy::inspect::inspect(&bytes).unwrap();
    assert_eq!(r.format_version, visviva_runtime::format::ALIGNED_VERSION);
    let rows = r.envelope.unwrap();
    let named: Vec<(&str, f32, f32)> = rows
        .iter()
        .map(|e| (e.coordinate.as_str(), e.lower, e.upper))
        .collect();
    assert_eq!(named, [("q1", -0.5, 0.75), ("p1", -2.0, 2.25)]);
    assert!(r
        .sections
        .iter()
        .any(|(n, b)| n == "training envelope" && *b == 19));
    let total: usize = r.sections.iter().map(|(_, b)| b).sum();
    assert_eq!(total, bytes.len());
    // A blob without the section: no envelope rows (version 6 for its
    // aligned f32 weights).
    let plain = fixture(false).to_bytes().unwrap();
    let r = visviva_trainer::deploy::inspect::inspect(&plain).unwrap();
    assert_eq!(
        (r.format_version, r.envelope),
        (visviva_runtime::format::ALIGNED_VERSION, None)
    );
}

#[test]
fn damped_driven_models_keep_their_port_terms_through_export() {
    // R = L L^T with L = diag(0, 0.3) (damping on p), G = (0, 1)^T.
    let mut m = fixture(true);
    m.integrator = Integrator::new(Method::DiscreteGradient, 0.01);
    m.dissipation = Some(PortTerm::Constant(vec![0.0, 0.0, 0.3]));
    m.input = Some((1, PortTerm::Constant(vec![0.0, 1.0])));
    let bytes = m.to_bytes().unwrap();
    // Constant port terms need format version 2; f32 weights aligned make
    // it 6.
    assert_eq!(
        u16::from_le_bytes([bytes[4], bytes[5]]),
        visviva_runtime::format::ALIGNED_VERSION
    );
    assert_eq!(BlobModel::from_bytes(&bytes).unwrap(), m);

    // G(q) as a network of q: version 3, round trip exact, and int8
    // export quantizes the port network like the energy network.
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(7);
    let mut net = m.clone();
    net.input = Some((1, PortTerm::Network(mlp(&mut rng, &[1, 6, 2]))));
    let net_bytes = net.to_bytes().unwrap();
    assert_eq!(
        u16::from_le_bytes([net_bytes[4], net_bytes[5]]),
        visviva_runtime::format::ALIGNED_VERSION
    );
    assert_eq!(BlobModel::from_bytes(&net_bytes).unwrap(), net);
    assert_eq!(net.parameters(), m.parameters() - 2 + (6 + 6 + 12 + 2));
    let (net_i8, r) = export_checked(
        &net,
        WeightKind::Int8,
        &IntegratorOverrides::default(),
        200,
        2,
    )
    .unwrap();
    let q = BlobModel::from_bytes(&net_i8).unwrap();
    let Some((1, PortTerm::Network(g))) = &q.input else {
        panic!("input network lost: {:?}", q.input)
    };
    assert_eq!(g.weight_kind(), WeightKind::Int8);
    assert_eq!(r.failed_rollouts, 0);
    let (i8_bytes, r) = export_checked(
        &m,
        WeightKind::Int8,
        &IntegratorOverrides::default(),
        200,
        2,
    )
    .unwrap();
    let q = BlobModel::from_bytes(&i8_bytes).unwrap();
    assert_eq!(
        (q.dissipation.clone(), q.input.clone()),
        (m.dissipation.clone(), m.input.clone())
    );
    assert_eq!(r.failed_rollouts, 0);
    // An explicit symplectic method would drop R and G: refused.
    let ia = IntegratorOverrides {
        integrator: Some(visviva_trainer::deploy::integrator::MethodName::Verlet),
        ..Default::default()
    };
    assert!(export_checked(&m, WeightKind::F32, &ia, 10, 1).is_err());
}

#[test]
fn int8_export_obeys_the_rounding_bound_and_shrinks_the_blob() {
    let src = fixture(false);
    let (f32_bytes, r32) = export_checked(
        &src,
        WeightKind::F32,
        &IntegratorOverrides::default(),
        1000,
        4,
    )
    .unwrap();
    let (i8_bytes, r8) = export_checked(
        &src,
        WeightKind::Int8,
        &IntegratorOverrides::default(),
        1000,
        4,
    )
    .unwrap();
    // Same weights and integrator: no deviation at all.
    assert_eq!(r32.max_state_deviation, 0.0);
    // A sanity bound for random fixture weights (not an accuracy claim):
    // the int8 trajectory departs from the f32 one, but stays the same
    // motion, well inside the normalized range of +-1.
    assert!(
        r8.max_state_deviation > 0.0 && r8.max_state_deviation < 0.25,
        "{}",
        r8.max_state_deviation
    );
    println!(
        "f32 {} bytes, int8 {} bytes, deviation {:.2e}",
        f32_bytes.len(),
        i8_bytes.len(),
        r8.max_state_deviation
    );
    assert!(i8_bytes.len() * 2 < f32_bytes.len());
    // Round-to-nearest with step s errs by at most s/2 per weight
    // (uniform quantizer bound; common practice).
    let q = BlobModel::from_bytes(&i8_bytes).unwrap();
    let (Energy::Separable { potential: a, .. }, Energy::Separable { potential: b, .. }) =
        (&src.energy, &q.energy)
    else {
        panic!()
    };
    for (la, lb) in a.layers.iter().zip(&b.layers) {
        let Weights::Int8 { scales, .. } = &lb.weights else {
            panic!("not int8")
        };
        for (k, (wa, wb)) in la.real_weights().iter().zip(lb.real_weights()).enumerate() {
            assert!((wa - wb).abs() <= 0.5 * scales[k / la.inputs] * 1.0001);
        }
    }
}

#[test]
fn export_refuses_an_explicit_method_for_a_general_model() {
    let src = fixture(true);
    let ia = IntegratorOverrides {
        integrator: Some(visviva_trainer::deploy::integrator::MethodName::Verlet),
        ..Default::default()
    };
    let err = export_checked(&src, WeightKind::F32, &ia, 10, 1).unwrap_err();
    assert!(format!("{err:#}").contains("separable"), "{err:#}");
}

#[test]
fn inspect_counts_match_the_shapes() {
    let bytes = fixture(true)
        .converted(WeightKind::Int8)
        .to_bytes()
        .unwrap();
    let r = visviva_trainer::deploy::inspect::inspect(&bytes).unwrap();
    let forward = 2 * 32 + 32 * 32 + 32;
    assert_eq!(r.macs_per_gradient as usize, 2 * forward);
    assert_eq!(r.weights, "int8");
    assert_eq!(r.sections.iter().map(|s| s.1).sum::<usize>(), bytes.len());
}

fn visviva() -> Command {
    Command::new(env!("CARGO_BIN_EXE_visviva"))
}

#[test]
fn rollout_csv_compares_bit_for_bit_and_names_the_first_difference() {
    let dir = tempfile::tempdir().unwrap();
    let blob = dir.path().join("m.vvb");
    std::fs::write(&blob, fixture(false).to_bytes().unwrap()).unwrap();
    let a = dir.path().join("a.csv");
    let b = dir.path().join("b.csv");
    for (out, bits) in [(&a, true), (&b, false)] {
        let mut cmd = visviva();
        cmd.args(["rollout", "--model"])
            .arg(&blob)
            .args(["--init", "q1=0.5,p1=-0.1", "--steps", "200", "--out"])
            .arg(out);
        if bits {
            cmd.arg("--bits");
        }
        let st = cmd.status().unwrap();
        assert!(st.success());
    }
    // Hex bit patterns and shortest round-trip decimals hold the same bits.
    assert_eq!(compare(&a, &b, None).unwrap(), Verdict::Same { rows: 201 });
    // Change one value by one ulp at step 57.
    let text = std::fs::read_to_string(&b).unwrap();
    let mut lines: Vec<String> = text.lines().map(str::to_string).collect();
    let mut f: Vec<String> = lines[58].split(',').map(str::to_string).collect();
    let v: f32 = f[2].parse().unwrap();
    f[2] = f32::from_bits(v.to_bits() + 1).to_string();
    lines[58] = f.join(",");
    std::fs::write(&b, lines.join("\n") + "\n").unwrap();
    match compare(&a, &b, None).unwrap() {
        Verdict::Differs { step, column, .. } => assert_eq!((step, column.as_str()), (57, "p1")),
        v => panic!("{v:?}"),
    }
    assert!(matches!(
        compare(&a, &b, Some(1e-6)).unwrap(),
        Verdict::Same { .. }
    ));
    let st = visviva().arg("compare").arg(&a).arg(&b).status().unwrap();
    assert_eq!(st.code(), Some(1));
}

#[test]
fn rollout_rejects_bad_init_and_writes_nothing() {
    let dir = tempfile::tempdir().unwrap();
    let blob = dir.path().join("m.vvb");
    std::fs::write(&blob, fixture(false).to_bytes().unwrap()).unwrap();
    let out = dir.path().join("o.csv");
    for init in ["q1=0.5", "q1=0.5,p1=x", "q1=1,p1=0,q2=3", "q1=1,q1=2,p1=0"] {
        let o = visviva()
            .args(["rollout", "--model"])
            .arg(&blob)
            .args(["--init", init, "--steps", "5", "--out"])
            .arg(&out)
            .output()
            .unwrap();
        assert!(!o.status.success(), "{init}");
        assert!(
            String::from_utf8_lossy(&o.stderr).contains("--init"),
            "{init}"
        );
        assert!(!out.exists());
    }
}

#[test]
fn rollout_takes_an_input_sequence_for_driven_models() {
    let dir = tempfile::tempdir().unwrap();
    let mut m = fixture(true);
    m.integrator = Integrator::new(Method::DiscreteGradient, 0.01);
    m.dissipation = Some(PortTerm::Constant(vec![0.0, 0.0, 0.3]));
    m.input = Some((1, PortTerm::Constant(vec![0.0, 1.0])));
    let blob = dir.path().join("driven.vvb");
    std::fs::write(&blob, m.to_bytes().unwrap()).unwrap();
    let inputs = dir.path().join("u.csv");
    let rows: String = (0..50)
        .map(|k| format!("{},{}\n", k as f64 * 0.01, 0.5))
        .collect();
    std::fs::write(&inputs, format!("t,u1\n{rows}")).unwrap();
    let run = |extra: &[&str]| {
        visviva()
            .args(["rollout", "--model"])
            .arg(&blob)
            .args(["--init", "q1=0.1,p1=0", "--steps", "50"])
            .args(extra)
            .output()
            .unwrap()
    };
    // A driven model needs its inputs.
    let o = run(&[]);
    assert!(!o.status.success());
    assert!(String::from_utf8_lossy(&o.stderr).contains("--inputs"));
    let o = run(&["--inputs", inputs.to_str().unwrap()]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let csv = String::from_utf8_lossy(&o.stdout).to_string();
    assert_eq!(csv.lines().count(), 52);
    // A bad cell names file, line and column.
    std::fs::write(&inputs, "t,u1\n0,0.5\n0.01,x\n").unwrap();
    let o = run(&["--inputs", inputs.to_str().unwrap()]);
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        !o.status.success()
            && err.contains("u.csv")
            && err.contains("line 3")
            && err.contains("u1"),
        "{err}"
    );
}
