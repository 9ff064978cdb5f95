//! Quantization-aware fine-tuning (`learn::qat`) on a briefly fitted model
//! of a two-stage isolation mount (two masses on two springs in series,
//! textbook closed form):
//! * the fake-quantized weights of the forward pass are, bit for bit, the
//!   weights of the int8 blob the exporter writes, read back through the
//!   runtime's parser and dequantized by the rule `runtime/src/format.rs`
//!   states (`w[j][i] = scales[j] * values[j][i]`), and equal a plain f64
//!   re-implementation of symmetric per-row rounding (scale = max |w| / 127,
//!   round to nearest, clamp to +-127: common practice);
//! * the exported int8 blob of the fine-tuned model is exactly the
//!   quantization of its weights (`export_from` against `energy_blob`);
//! * the fine-tuned int8 model's derivative-matching loss on held-out
//!   states, evaluated through the runtime's own gradient of the int8 blob,
//!   is below that of the rounded f32 fit; a second fine-tuning with the
//!   same seed gives the same parameters.

use ndarray::Array2;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use visviva_runtime::{Hamiltonian, Integrator, Method, Model, State};
use visviva_trainer::data::dataset::{Dataset, DerivativeSource, Trajectory};
use visviva_trainer::deploy::blob::{BlobModel, WeightKind};
use visviva_trainer::deploy::convergence::TrainingRange;
use visviva_trainer::deploy::export::{export_from, ExportCheck};
use visviva_trainer::deploy::fitted_blob::{blob_model, energy_blob};
use visviva_trainer::deploy::integrator::IntegratorOverrides;
use visviva_trainer::learn::fit::{fit_model, ArchChoice, FitSettings};
use visviva_trainer::learn::hnn::{EnergyModel, Normalization};
use visviva_trainer::learn::net::Activation;
use visviva_trainer::learn::qat::{fake_quantize_into, fine_tune, weight_blocks, QatSettings};

const M: [f64; 2] = [0.2, 0.5];
const K: [f64; 2] = [50.0, 30.0];
const REST: [f64; 2] = [0.05, 0.12];

/// H = p1^2/2m1 + p2^2/2m2 + k1 (q1 - r1)^2/2 + k2 (q2 - q1 - (r2 - r1))^2/2
/// (textbook series springs); returns dx/dt = (dH/dp, -dH/dq).
fn rate(x: &[f64]) -> [f64; 4] {
    let s1 = x[0] - REST[0];
    let s2 = x[1] - x[0] - (REST[1] - REST[0]);
    [
        x[2] / M[0],
        x[3] / M[1],
        -(K[0] * s1 - K[1] * s2),
        -(K[1] * s2),
    ]
}

fn states(count: usize, seed: u64) -> Dataset {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut x = Array2::zeros((count, 4));
    let mut dx = Array2::zeros((count, 4));
    for r in 0..count {
        let s = [
            REST[0] + rng.random_range(-0.01..0.01),
            REST[1] + rng.random_range(-0.02..0.02),
            rng.random_range(-0.3..0.3),
            rng.random_range(-0.5..0.5),
        ];
        let d = rate(&s);
        for i in 0..4 {
            x[[r, i]] = s[i];
            dx[[r, i]] = d[i];
        }
    }
    Dataset {
        dof: 2,
        inputs: 0,
        trajectories: vec![Trajectory {
            id: "mount".into(),
            t: (0..count).map(|i| i as f64 * 1e-3).collect(),
            x,
            dx,
            u: Array2::zeros((count, 0)),
        }],
        derivatives: DerivativeSource::Given,
    }
}

/// A brief fit: general, or separable with a kinetic network (two
/// networks) or a quadratic kinetic term (exact for this system).
fn fitted(train: &Dataset, separable: bool, quadratic: bool) -> EnergyModel {
    let choice = ArchChoice {
        separable,
        quadratic_kinetic: quadratic,
        mechanical: false,
        hidden: vec![16, 16],
        activation: Activation::Tanh,
    };
    let settings = FitSettings {
        epochs: 150,
        batch: 64,
        quiet: true,
        ..FitSettings::default()
    };
    fit_model(
        train,
        None,
        &choice.build(2).unwrap(),
        &Default::default(),
        &settings,
    )
    .unwrap()
    .model
}

fn integrator(model: &EnergyModel) -> Integrator {
    let separable = matches!(
        model.arch,
        visviva_trainer::learn::hnn::EnergyArch::Separable { .. }
    );
    let method = if separable {
        Method::StormerVerlet
    } else {
        Method::ImplicitMidpoint
    };
    Integrator::new(method, 1e-3)
}

/// Symmetric per-row rounding in f64 (common practice): the scale rounded
/// to the blob's f32 once, value = round(w / scale) clamped to +-127.
fn reference_row(row: &[f32]) -> Vec<f32> {
    let max = row.iter().fold(0.0f64, |m, v| m.max(f64::from(v.abs())));
    let scale = if max > 0.0 { (max / 127.0) as f32 } else { 1.0 };
    row.iter()
        .map(|w| {
            // Stored as an integer (no sign of zero).
            let v = (f64::from(*w) / f64::from(scale))
                .round()
                .clamp(-127.0, 127.0) as i32;
            (f64::from(scale) * f64::from(v)) as f32
        })
        .collect()
}

/// The fake-quantized forward weights of `model` equal the exported int8
/// blob's dequantized weights and the f64 re-implementation, bit for bit.
fn assert_rounding_matches_export(model: &EnergyModel) {
    let blocks = weight_blocks(model);
    let mut rounded = Vec::new();
    fake_quantize_into(&model.params, &blocks, &mut rounded);
    let bytes = energy_blob(model, integrator(model), WeightKind::Int8).unwrap();
    let blob = BlobModel::from_bytes(&bytes).unwrap();
    let layers: Vec<_> = blob
        .networks()
        .into_iter()
        .flat_map(|(_, m)| m.layers.clone())
        .collect();
    assert_eq!(layers.len(), blocks.len());
    for (b, layer) in blocks.iter().zip(&layers) {
        let ours = &rounded[b.offset..b.offset + b.outputs * b.inputs];
        let exported = layer.real_weights();
        let bits = |v: &[f32]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
        assert_eq!(bits(ours), bits(&exported), "block at {}", b.offset);
        let original = &model.params[b.offset..b.offset + b.outputs * b.inputs];
        let reference: Vec<f32> = original.chunks(b.inputs).flat_map(reference_row).collect();
        assert_eq!(
            bits(ours),
            bits(&reference),
            "f64 reference, block at {}",
            b.offset
        );
        // Rounding moved the weights (the check is not of an identity).
        assert!(ours.iter().zip(original).any(|(a, b)| a != b));
    }
}

#[test]
fn fake_quantization_is_the_exporters_rounding() {
    let train = states(400, 1);
    for (separable, quadratic) in [(false, false), (true, false), (true, true)] {
        assert_rounding_matches_export(&fitted(&train, separable, quadratic));
    }
}

/// Mean over `data`'s rows and the four components of the squared
/// difference between the runtime's J dH/dx of `bytes` and the true rate,
/// each divided by the rate's RMS (the fit's loss, evaluated on the
/// device's arithmetic).
fn runtime_loss(bytes: &[u8], data: &Dataset, rate_scale: &[f32]) -> f64 {
    let model = Model::<8, 128>::from_bytes(bytes).unwrap();
    let t = &data.trajectories[0];
    let mut total = 0.0;
    for (x, dx) in t.x.rows().into_iter().zip(t.dx.rows()) {
        let s = State::<8>::new(&[x[0] as f32, x[1] as f32], &[x[2] as f32, x[3] as f32]).unwrap();
        let (mut gq, mut gp) = ([0.0f32; 8], [0.0f32; 8]);
        model.gradient(&s, &mut gq, &mut gp).unwrap();
        let field = [gp[0], gp[1], -gq[0], -gq[1]];
        for i in 0..4 {
            let e = (f64::from(field[i]) - dx[i]) / f64::from(rate_scale[i]);
            total += e * e / 4.0;
        }
    }
    total / t.x.nrows() as f64
}

#[test]
fn fine_tuned_int8_beats_the_rounded_fit_and_is_its_exact_quantization() {
    let (train, val) = (states(400, 1), states(200, 7));
    let model = fitted(&train, true, true);
    let settings = QatSettings::new(3, 1);
    let (tuned, summary) = fine_tune(&model, &train, Some(&val), &settings).unwrap();
    println!("{summary:?}");
    assert_eq!(summary.steps, settings.steps);
    assert!(summary.kept, "{summary:?}");
    assert!(
        summary.loss_fine_tuned < summary.loss_rounded,
        "{summary:?}"
    );
    assert_rounding_matches_export(&tuned);
    // Seeded: a second fine-tuning gives the same parameters, bit for bit.
    let (again, summary_again) = fine_tune(&model, &train, Some(&val), &settings).unwrap();
    assert_eq!(again, tuned);
    assert_eq!(summary_again, summary);

    // The loss through the runtime's gradient of each int8 blob.
    let rate_scale = Normalization::from_data(&train, false).unwrap().rate_scale;
    let it = integrator(&model);
    let before = energy_blob(&model, it, WeightKind::Int8).unwrap();
    let after = energy_blob(&tuned, it, WeightKind::Int8).unwrap();
    let (lb, la) = (
        runtime_loss(&before, &val, &rate_scale),
        runtime_loss(&after, &val, &rate_scale),
    );
    println!("runtime loss on held-out states: rounded f32 fit {lb:.4e}, fine-tuned int8 {la:.4e}");
    assert!(la < lb, "fine-tuned {la} vs rounded {lb}");

    // The export of the fine-tuned weights is their quantization, bit for
    // bit, whatever model it is measured against.
    let range = TrainingRange::of_dataset(&train);
    let check = ExportCheck {
        steps: 10,
        states: 2,
        range: &range,
        key: &|k: &str| k.to_string(),
    };
    let (src, weights) = (blob_model(&model, it), blob_model(&tuned, it));
    let none = IntegratorOverrides::default();
    let (bytes, _) = export_from(&src, &weights, WeightKind::Int8, &none, &check).unwrap();
    assert_eq!(bytes, after);
}
