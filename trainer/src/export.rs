//! Writing fitted models: the energy model as a `keel-runtime` blob (through
//! [`keel_runtime::format::encode`]), and the baseline vector field as a
//! trainer-only JSON file so it can be rolled out for comparison later.
//!
//! Weights pass through [`encode_weights`], the one place that decides their
//! stored precision; a per-output-channel symmetric int8 quantizer belongs
//! there as a second [`Precision`] variant.

use std::path::Path;

use anyhow::{bail, Context, Result};
use keel_runtime::format::{
    self, DissipationDesc, EnergyDesc, F32Bytes, InputDesc, KineticDesc, LayerDesc, MlpDesc,
    ModelDesc, WeightsDesc,
};
use keel_runtime::Integrator;

use crate::hnn::{
    cholesky_from_params, tri_index, BaselineModel, EnergyArch, EnergyModel, KineticArch,
};
use crate::net::MlpShape;

/// Stored precision of weight matrices.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum Precision {
    /// Little-endian f32, exactly the trained values.
    #[default]
    F32,
}

/// A weight matrix in its stored form (owned bytes).
#[derive(Debug, Clone)]
enum StoredWeights {
    F32(Vec<u8>),
}

/// One layer's owned bytes.
#[derive(Debug, Clone)]
struct StoredLayer {
    inputs: u16,
    outputs: u16,
    weights: StoredWeights,
    bias: Vec<u8>,
}

/// One network's owned bytes.
#[derive(Debug, Clone)]
struct StoredMlp {
    activation: format::Activation,
    layers: Vec<StoredLayer>,
}

fn f32_bytes(values: impl IntoIterator<Item = f32>) -> Vec<u8> {
    values.into_iter().flat_map(f32::to_le_bytes).collect()
}

/// Row-major `[outputs][inputs]` weights in the chosen precision.
fn encode_weights(w: &[f32], precision: Precision) -> StoredWeights {
    match precision {
        Precision::F32 => StoredWeights::F32(f32_bytes(w.iter().copied())),
    }
}

fn store_mlp(shape: &MlpShape, params: &[f32], precision: Precision) -> Result<StoredMlp> {
    if shape.layers() > format::MAX_LAYERS {
        bail!(
            "network has {} layers; the blob format allows at most {}",
            shape.layers(),
            format::MAX_LAYERS
        );
    }
    let mut layers = Vec::with_capacity(shape.layers());
    for k in 0..shape.layers() {
        let (w, b) = shape.layer(params, k);
        let (o, i) = w.dim();
        let wv: Vec<f32> = w.iter().copied().collect();
        layers.push(StoredLayer {
            inputs: u16::try_from(i).context("layer too wide")?,
            outputs: u16::try_from(o).context("layer too wide")?,
            weights: encode_weights(&wv, precision),
            bias: f32_bytes(b.iter().copied()),
        });
    }
    Ok(StoredMlp {
        activation: shape.activation.to_runtime(),
        layers,
    })
}

fn mlp_desc(m: &StoredMlp) -> MlpDesc<'_> {
    MlpDesc {
        activation: m.activation,
        layers: m
            .layers
            .iter()
            .map(|l| LayerDesc {
                inputs: l.inputs,
                outputs: l.outputs,
                weights: match &l.weights {
                    StoredWeights::F32(b) => WeightsDesc::F32(F32Bytes(b)),
                },
                bias: F32Bytes(&l.bias),
            })
            .collect(),
    }
}

/// The complete blob for `model`, stepped on the device with `integrator`.
pub fn energy_blob(
    model: &EnergyModel,
    integrator: Integrator,
    precision: Precision,
) -> Result<Vec<u8>> {
    let n = model.dof;
    let dof = u8::try_from(n).context("too many degrees of freedom for the blob format")?;
    let offset = f32_bytes(model.norm.offset.iter().copied());
    let scale = f32_bytes(model.norm.scale.iter().copied());
    let (first, second, cholesky) = match &model.arch {
        EnergyArch::General(m) => (store_mlp(m, &model.params, precision)?, None, None),
        EnergyArch::Separable { potential, kinetic } => {
            let (pv, pt) = model.params.split_at(potential.param_count());
            let v = store_mlp(potential, pv, precision)?;
            match kinetic {
                KineticArch::Quadratic => {
                    let l = cholesky_from_params(pt, n);
                    let mut packed = vec![0.0f32; n * (n + 1) / 2];
                    for i in 0..n {
                        for j in 0..=i {
                            packed[tri_index(i, j)] = l[[i, j]];
                        }
                    }
                    (v, None, Some(f32_bytes(packed)))
                }
                KineticArch::Network(m) => (v, Some(store_mlp(m, pt, precision)?), None),
            }
        }
    };
    let energy = match (&model.arch, &second, &cholesky) {
        (EnergyArch::General(_), _, _) => EnergyDesc::General(mlp_desc(&first)),
        (_, Some(t), _) => EnergyDesc::Separable {
            potential: mlp_desc(&first),
            kinetic: KineticDesc::Network(mlp_desc(t)),
        },
        (_, None, Some(c)) => EnergyDesc::Separable {
            potential: mlp_desc(&first),
            kinetic: KineticDesc::Quadratic {
                cholesky: F32Bytes(c),
            },
        },
        _ => bail!("internal: separable model without a kinetic term"),
    };
    let desc = ModelDesc {
        dof,
        offset: F32Bytes(&offset),
        scale: F32Bytes(&scale),
        energy_scale: model.norm.energy_scale,
        energy,
        integrator,
        dissipation: DissipationDesc::None,
        input: InputDesc::None,
    };
    // Weights dominate; postcard adds a few bytes of framing per field.
    let room = 4 * model.params.len() + 8 * n + 1024;
    let mut out = vec![0u8; room];
    let used = format::encode(&desc, &mut out)
        .map_err(|e| anyhow::anyhow!("could not encode the model blob: {e}"))?;
    out.truncate(used);
    // Refuse to hand out anything the runtime itself would not accept.
    keel_runtime::Model::<16, 128>::from_bytes(&out)
        .map_err(|e| anyhow::anyhow!("the encoded blob does not parse: {e}"))?;
    Ok(out)
}

/// Write the blob for `model` to `path` atomically; returns its size.
pub fn write_energy_blob(
    path: &Path,
    model: &EnergyModel,
    integrator: Integrator,
    precision: Precision,
) -> Result<usize> {
    let blob = energy_blob(model, integrator, precision)?;
    crate::atomic::write_atomic(path, &blob)
        .with_context(|| format!("writing model {}", path.display()))?;
    Ok(blob.len())
}

/// Write the baseline as JSON to `path` atomically.
pub fn write_baseline(path: &Path, model: &BaselineModel) -> Result<()> {
    let json = serde_json::to_vec(model).context("serializing the baseline")?;
    crate::atomic::write_atomic(path, &json)
        .with_context(|| format!("writing baseline {}", path.display()))
}

/// Read a baseline written by [`write_baseline`].
pub fn read_baseline(path: &Path) -> Result<BaselineModel> {
    let bytes = std::fs::read(path).with_context(|| format!("reading {}", path.display()))?;
    let m: BaselineModel = serde_json::from_slice(&bytes)
        .with_context(|| format!("{}: not a baseline file", path.display()))?;
    if m.shape.inputs() != 2 * m.dof
        || m.shape.outputs() != 2 * m.dof
        || m.params.len() != m.shape.param_count()
    {
        bail!(
            "{}: baseline shapes do not match its parameters",
            path.display()
        );
    }
    Ok(m)
}
