//! Host cost of the runtime's hot paths: one energy gradient dH/dx and one
//! integrator step, for seeded FIXTURE models (random weights, not trained)
//! with f32 and int8 weights at hidden widths 16, 32, 64 and 128 (two hidden
//! tanh layers). Two structures: a general 1-dof energy 2-W-W-1 stepped with
//! implicit midpoint (the structure the trainer benchmark fits), and a
//! separable 1-dof energy (1-W-W-1 potential, quadratic kinetic term)
//! stepped with Stormer-Verlet. Host numbers only: the device cost is
//! measured in the emulator by `cargo xtask device`.

use std::hint::black_box;
use std::time::Duration;

use criterion::{criterion_group, criterion_main, BenchmarkId, Criterion};
use visviva_runtime::format::{
    encode, Activation, DissipationDesc, EnergyDesc, F32Bytes, InputDesc, KineticDesc, LayerDesc,
    MlpDesc, ModelDesc, WeightsDesc,
};
use visviva_runtime::{Hamiltonian, Integrator, Method, Model, State};

const WIDTHS: [usize; 4] = [16, 32, 64, 128];

/// SplitMix64 (Steele, Lea, Flood 2014) for reproducible weights.
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
        (self.next_u64() >> 40) as f32 / (1u64 << 23) as f32 - 1.0
    }
}

#[derive(Clone, Copy, PartialEq, Eq)]
enum Precision {
    F32,
    Int8,
}

impl Precision {
    fn name(self) -> &'static str {
        match self {
            Precision::F32 => "f32",
            Precision::Int8 => "int8",
        }
    }
}

/// Owned bytes of one layer (weights, per-row scales for int8, biases).
struct LayerBytes {
    inputs: usize,
    outputs: usize,
    weights: Vec<u8>,
    scales: Vec<u8>,
    bias: Vec<u8>,
}

fn f32_bytes(v: &[f32]) -> Vec<u8> {
    v.iter().flat_map(|x| x.to_le_bytes()).collect()
}

/// Weights uniform in +-1/sqrt(inputs), biases in +-0.1; int8 with symmetric
/// per-output-row scales (common practice).
fn layer(rng: &mut SplitMix64, inputs: usize, outputs: usize, precision: Precision) -> LayerBytes {
    let bound = 1.0 / (inputs as f32).sqrt();
    let w: Vec<f32> = (0..inputs * outputs)
        .map(|_| bound * rng.symmetric())
        .collect();
    let b: Vec<f32> = (0..outputs).map(|_| 0.1 * rng.symmetric()).collect();
    let (weights, scales) = match precision {
        Precision::F32 => (f32_bytes(&w), Vec::new()),
        Precision::Int8 => {
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
    LayerBytes {
        inputs,
        outputs,
        weights,
        scales,
        bias: f32_bytes(&b),
    }
}

fn mlp_desc<'a>(layers: &'a [LayerBytes], precision: Precision) -> MlpDesc<'a> {
    let mut v = heapless::Vec::new();
    for l in layers {
        let weights = match precision {
            Precision::F32 => WeightsDesc::F32(F32Bytes(&l.weights)),
            Precision::Int8 => WeightsDesc::Int8 {
                values: &l.weights,
                scales: F32Bytes(&l.scales),
            },
        };
        let pushed = v.push(LayerDesc {
            inputs: l.inputs as u16,
            outputs: l.outputs as u16,
            weights,
            bias: F32Bytes(&l.bias),
        });
        assert!(pushed.is_ok(), "too many layers");
    }
    MlpDesc {
        activation: Activation::Tanh,
        layers: v,
    }
}

/// A 1-dof fixture blob: general (2-W-W-1, implicit midpoint) or separable
/// (1-W-W-1 potential, quadratic kinetic term, Stormer-Verlet).
fn fixture_blob(general: bool, width: usize, precision: Precision) -> Vec<u8> {
    let mut rng = SplitMix64(0x5eed_0000 + width as u64 + 1000 * u64::from(general));
    let inputs = if general { 2 } else { 1 };
    let layers = vec![
        layer(&mut rng, inputs, width, precision),
        layer(&mut rng, width, width, precision),
        layer(&mut rng, width, 1, precision),
    ];
    let offset = f32_bytes(&[0.0, 0.0]);
    let scale = f32_bytes(&[1.0, 1.0]);
    let cholesky = f32_bytes(&[1.0]);
    let (energy, method) = if general {
        (
            EnergyDesc::General(mlp_desc(&layers, precision)),
            Method::ImplicitMidpoint,
        )
    } else {
        (
            EnergyDesc::Separable {
                potential: mlp_desc(&layers, precision),
                kinetic: KineticDesc::Quadratic {
                    cholesky: F32Bytes(&cholesky),
                },
            },
            Method::StormerVerlet,
        )
    };
    let desc = ModelDesc {
        dof: 1,
        offset: F32Bytes(&offset),
        scale: F32Bytes(&scale),
        energy_scale: 1.0,
        energy,
        integrator: Integrator::new(method, 0.01),
        dissipation: DissipationDesc::None,
        input: InputDesc::None,
    };
    let mut out = vec![0u8; 4 * 4 * (3 * width * width + 64) + 1024];
    let used = encode(&desc, &mut out).expect("fixture fits its buffer");
    out.truncate(used);
    out
}

fn bench_models(c: &mut Criterion) {
    for (general, kind) in [(true, "general-midpoint"), (false, "separable-verlet")] {
        let mut group = c.benchmark_group(format!("runtime/{kind}"));
        group.warm_up_time(Duration::from_millis(300));
        group.measurement_time(Duration::from_secs(1));
        for precision in [Precision::F32, Precision::Int8] {
            for width in WIDTHS {
                let blob = fixture_blob(general, width, precision);
                let model: Model<'_> = Model::from_bytes(&blob).expect("fixture blob parses");
                let x0 = State::<8>::new(&[0.3], &[-0.2]).expect("1-dof state");
                let id = format!("{}/w{width}", precision.name());
                group.bench_function(BenchmarkId::new("gradient", &id), |b| {
                    let (mut gq, mut gp) = ([0.0f32; 8], [0.0f32; 8]);
                    b.iter(|| {
                        model
                            .gradient(black_box(&x0), &mut gq, &mut gp)
                            .expect("finite state");
                        black_box((gq[0], gp[0]))
                    })
                });
                group.bench_function(BenchmarkId::new("step", &id), |b| {
                    b.iter(|| {
                        let mut x = black_box(x0);
                        model.step(&mut x).expect("step succeeds");
                        black_box(x)
                    })
                });
            }
        }
        group.finish();
    }
}

criterion_group!(benches, bench_models);
criterion_main!(benches);
