//! Prints the blob size and the multiply-accumulates per gradient and per
//! step of a 2-64-64-1 energy model (1 degree of freedom, general
//! architecture) with f32 and int8 weights. Weights are seeded fixtures: only
//! the shapes matter here.
//!
//! Run: `cargo run -p visviva-runtime --example model_cost`

use visviva_runtime::format::{
    self, Activation, AlignedF32, DissipationDesc, EnergyDesc, F32Bytes, InputDesc, LayerDesc,
    MlpDesc, ModelDesc, WeightsDesc,
};
use visviva_runtime::{Integrator, Method, Model};

fn main() {
    let sizes = [2usize, 64, 64, 1];
    for int8 in [false, true] {
        let mut bufs = Vec::new();
        for w in sizes.windows(2) {
            let (ni, no) = (w[0], w[1]);
            let weights: Vec<u8> = if int8 {
                (0..ni * no).map(|k| (k % 251) as u8).collect()
            } else {
                (0..ni * no)
                    .flat_map(|k| ((k % 17) as f32 * 0.01).to_le_bytes())
                    .collect()
            };
            let scales: Vec<u8> = (0..no).flat_map(|_| 0.01f32.to_le_bytes()).collect();
            let bias: Vec<u8> = (0..no).flat_map(|_| 0.0f32.to_le_bytes()).collect();
            bufs.push((ni, no, weights, scales, bias));
        }
        let mut layers = heapless::Vec::new();
        for (ni, no, weights, scales, bias) in &bufs {
            let weights = if int8 {
                WeightsDesc::Int8 {
                    values: weights,
                    scales: F32Bytes(scales),
                }
            } else {
                WeightsDesc::F32Aligned(AlignedF32::new(weights))
            };
            let layer = LayerDesc {
                inputs: *ni as u16,
                outputs: *no as u16,
                weights,
                bias: F32Bytes(bias),
            };
            layers.push(layer).expect("three layers fit");
        }
        let ones: Vec<u8> = [1.0f32, 1.0].iter().flat_map(|v| v.to_le_bytes()).collect();
        let zeros: Vec<u8> = [0.0f32, 0.0].iter().flat_map(|v| v.to_le_bytes()).collect();
        let desc = ModelDesc {
            dof: 1,
            offset: F32Bytes(&zeros),
            scale: F32Bytes(&ones),
            energy_scale: 1.0,
            energy: EnergyDesc::General(MlpDesc {
                activation: Activation::Tanh,
                layers,
            }),
            integrator: Integrator::new(Method::ImplicitMidpoint, 0.01),
            dissipation: DissipationDesc::None,
            input: InputDesc::None,
            envelope: None,
        };
        let mut buf = vec![0u8; 64 * 1024];
        let len = format::encode(&desc, &mut buf).expect("fits");
        let model: Model<'_, 1, 64> = Model::from_bytes(&buf[..len]).expect("valid");
        let cost = model.cost();
        println!(
            "2-64-64-1 {}: blob {} bytes, {} parameters ({:.2} bytes/parameter), {} MAC per gradient, \
             {} MAC per implicit-midpoint step at most ({} iterations)",
            if int8 { "int8" } else { "f32 " },
            len,
            cost.parameters,
            len as f64 / cost.parameters as f64,
            cost.macs_per_gradient,
            cost.macs_per_step,
            desc.integrator.max_iterations,
        );
    }
}
