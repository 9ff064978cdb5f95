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
use visviva_blob_support::{
    OwnedEnergy, OwnedKinetic, OwnedLayer, OwnedMlp, OwnedModel, Precision, SplitMix64,
};
use visviva_runtime::format::Activation;
use visviva_runtime::{Hamiltonian, Integrator, Method, Model, State};

const WIDTHS: [usize; 4] = [16, 32, 64, 128];

/// A 1-dof fixture blob: general (2-W-W-1, implicit midpoint) or separable
/// (1-W-W-1 potential, quadratic kinetic term, Stormer-Verlet). Weights
/// uniform in +-1/sqrt(inputs), biases in +-0.1; int8 with symmetric
/// per-output-row scales (common practice).
fn fixture_blob(general: bool, width: usize, precision: Precision) -> Vec<u8> {
    let mut rng = SplitMix64(0x5eed_0000 + width as u64 + 1000 * u64::from(general));
    let inputs = if general { 2 } else { 1 };
    let net = OwnedMlp {
        activation: Activation::Tanh,
        layers: [(inputs, width), (width, width), (width, 1)]
            .into_iter()
            .map(|(i, o)| OwnedLayer::random_uniform(&mut rng, i, o, 1.0, precision))
            .collect(),
    };
    let (energy, method) = if general {
        (OwnedEnergy::General(net), Method::ImplicitMidpoint)
    } else {
        let kinetic = OwnedKinetic::quadratic(vec![1.0]);
        let energy = OwnedEnergy::Separable {
            potential: net,
            kinetic,
        };
        (energy, Method::StormerVerlet)
    };
    let it = Integrator::new(method, 0.01);
    OwnedModel::new(1, vec![0.0; 2], vec![1.0; 2], 1.0, energy, it)
        .blob()
        .expect("fixture encodes")
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
