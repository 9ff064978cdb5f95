//! Writing fitted models: the energy model as a `visviva-runtime` blob (through
//! the owned blob mirror [`crate::deploy::blob::BlobModel`], the one encoder on the
//! host), and the baseline vector field as a trainer-only JSON file so it can
//! be rolled out for comparison later.

use std::path::Path;

use anyhow::{bail, Context, Result};
use visviva_runtime::Integrator;

use crate::data::dataset::Dataset;
use crate::deploy::blob::{BlobModel, Energy, Kinetic, Layer, Mlp, PortTerm, WeightKind, Weights};
use crate::learn::hnn::{
    cholesky_from_params, tri_index, BaselineModel, EnergyArch, EnergyModel, KineticArch,
    PhysicalTerm,
};
use crate::learn::net::MlpShape;

fn blob_mlp(shape: &MlpShape, params: &[f32]) -> Mlp {
    let layers = (0..shape.layers())
        .map(|k| {
            let (w, b) = shape.layer(params, k);
            let (o, i) = w.dim();
            Layer {
                inputs: i,
                outputs: o,
                weights: Weights::F32(w.iter().copied().collect()),
                bias: b.iter().copied().collect(),
            }
        })
        .collect();
    Mlp {
        activation: shape.activation.to_runtime(),
        layers,
    }
}

/// A port term in physical units as the blob's owned mirror holds it.
fn port_term(t: PhysicalTerm) -> PortTerm {
    match t {
        PhysicalTerm::Constant(v) => PortTerm::Constant(v),
        PhysicalTerm::Network { shape, params } => PortTerm::Network(blob_mlp(&shape, &params)),
    }
}

/// The fitted model as an owned blob description with f32 weights.
pub fn blob_model(model: &EnergyModel, integrator: Integrator) -> BlobModel {
    let n = model.dof;
    let energy = match &model.arch {
        EnergyArch::General(m) => Energy::General(blob_mlp(m, &model.params)),
        EnergyArch::Mechanical { potential, factor } => {
            let (pv, pf) = model.params.split_at(potential.param_count());
            Energy::Mechanical {
                factor: blob_mlp(factor, pf),
                floor: crate::learn::mechanical::FLOOR,
                potential: blob_mlp(potential, pv),
            }
        }
        EnergyArch::Separable { potential, kinetic } => {
            let (pv, pt) = model.params.split_at(potential.param_count());
            let kinetic = match kinetic {
                KineticArch::Quadratic => {
                    let l = cholesky_from_params(pt, n);
                    let mut packed = vec![0.0f32; n * (n + 1) / 2];
                    for i in 0..n {
                        for j in 0..=i {
                            packed[tri_index(i, j)] = l[[i, j]];
                        }
                    }
                    Kinetic::Quadratic(packed)
                }
                KineticArch::Network(m) => Kinetic::Network(blob_mlp(m, pt)),
            };
            Energy::Separable {
                potential: blob_mlp(potential, pv),
                kinetic,
            }
        }
    };
    BlobModel {
        dof: n,
        offset: model.norm.offset.clone(),
        scale: model.norm.scale.clone(),
        energy_scale: model.norm.energy_scale,
        energy,
        integrator,
        dissipation: model
            .port
            .as_ref()
            .and_then(|p| p.physical_dissipation(n, &model.norm))
            .map(port_term),
        input: model
            .port
            .as_ref()
            .and_then(|p| p.physical_input(n, &model.norm))
            .map(|(m, g)| (m, port_term(g))),
        envelope: None,
    }
}

/// The complete blob for `model`, stepped on the device with `integrator`,
/// weights stored as `kind`. The bytes are checked by the runtime's parser.
pub fn energy_blob(
    model: &EnergyModel,
    integrator: Integrator,
    kind: WeightKind,
) -> Result<Vec<u8>> {
    blob_model(model, integrator).converted(kind).to_bytes()
}

/// [`energy_blob`] carrying the training envelope of `train`, the data the
/// model was fitted on ([`crate::deploy::envelope::training_bounds`];
/// none when the data hold a non-finite value). Every blob a fit writes
/// is made here.
pub fn fitted_energy_blob(
    model: &EnergyModel,
    integrator: Integrator,
    kind: WeightKind,
    train: &Dataset,
) -> Result<Vec<u8>> {
    let mut blob = blob_model(model, integrator).converted(kind);
    blob.envelope = crate::deploy::envelope::training_bounds(train);
    blob.to_bytes()
}

/// Write the blob for `model` to `path` atomically; returns its size.
pub fn write_energy_blob(
    path: &Path,
    model: &EnergyModel,
    integrator: Integrator,
    kind: WeightKind,
) -> Result<usize> {
    let blob = energy_blob(model, integrator, kind)?;
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
    if m.shape.inputs() != 2 * m.dof + m.input_scale.len()
        || m.input_scale.iter().any(|s| !(s.is_finite() && *s > 0.0))
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
