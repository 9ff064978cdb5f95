//! Inspection: what a blob holds and what it costs on a device (format
//! version, CRC status, architecture, weight storage, bytes per section,
//! runtime RAM and multiply-accumulates, the training envelope when the
//! blob carries one, and the runtime's own measured flash and stack for the
//! blob's configuration).

use anyhow::{anyhow, Result};
use serde::Serialize;
use visviva_runtime::format::{self, EnergyDesc, KineticDesc};

use crate::deploy::blob::{BlobModel, HostModel};
use crate::deploy::footprint::{self, RuntimeFootprint};
use crate::deploy::integrator::method_name;

/// Everything `inspect` reports.
#[derive(Debug, Serialize)]
pub struct Inspection {
    /// File size.
    pub bytes: usize,
    /// Format version.
    pub format_version: u16,
    /// "ok" when the CRC matches.
    pub crc: String,
    /// Degrees of freedom.
    pub dof: usize,
    /// Architecture label.
    pub architecture: String,
    /// Weight storage.
    pub weights: String,
    /// Learned parameters.
    pub parameters: usize,
    /// Bytes per section, in blob order.
    pub sections: Vec<(String, usize)>,
    /// Integrator and its settings.
    pub integrator: String,
    /// Time step (s).
    pub dt: f32,
    /// Substeps per step.
    pub substeps: u16,
    /// Implicit-midpoint iteration limit.
    pub max_iterations: u16,
    /// Implicit-midpoint tolerance.
    pub tolerance: f32,
    /// Widest layer (sets the runtime's width bound W).
    pub max_width: usize,
    /// Runtime RAM estimate in bytes: the `Model` value at the tightest
    /// bounds (D = dof, W = widest layer) plus network scratch on the stack
    /// during a gradient. The device check measures the real stack use.
    pub runtime_ram_bytes: usize,
    /// Multiply-accumulates of one gradient.
    pub macs_per_gradient: u32,
    /// Multiply-accumulates of one step (bound for implicit midpoint).
    pub macs_per_step: u32,
    /// Damping R = L L^T present (format version 2).
    pub damped: bool,
    /// Number of inputs u1..um (0 for an autonomous model).
    pub inputs: usize,
    /// Form of R: `constant` or `network <widths> <activation>` (of q).
    pub dissipation_form: Option<String>,
    /// Form of G, likewise.
    pub input_form: Option<String>,
    /// The training envelope (format version 4): per coordinate its name
    /// (q1..qn, p1..pn) and its lower and upper bound, as stored.
    pub envelope: Option<Vec<EnvelopeRow>>,
    /// The runtime's own flash, static RAM and stack for this blob's
    /// configuration (None when that configuration was not measured).
    pub runtime: Option<RuntimeFootprint>,
    /// Where `runtime` comes from.
    pub runtime_source: String,
}

/// One coordinate's bounds in the training envelope.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct EnvelopeRow {
    /// `q1`..`qn`, `p1`..`pn`.
    pub coordinate: String,
    /// Lower bound (physical units).
    pub lower: f32,
    /// Upper bound (physical units).
    pub upper: f32,
}

/// The envelope's rows for a model of `n` degrees of freedom.
fn envelope_rows(b: &crate::deploy::blob::Bounds, n: usize) -> Vec<EnvelopeRow> {
    b.lower
        .iter()
        .zip(&b.upper)
        .enumerate()
        .map(|(k, (lo, hi))| EnvelopeRow {
            coordinate: if k < n {
                format!("q{}", k + 1)
            } else {
                format!("p{}", k - n + 1)
            },
            lower: *lo,
            upper: *hi,
        })
        .collect()
}

fn postcard_len<T: Serialize>(v: &T) -> usize {
    postcard::to_allocvec(v).map(|b| b.len()).unwrap_or(0)
}

/// Inspect blob bytes.
pub fn inspect(bytes: &[u8]) -> Result<Inspection> {
    let (env, _) = format::open(bytes).map_err(|e| anyhow!("{e}"))?;
    let desc = format::decode(bytes).map_err(|e| anyhow!("{e}"))?;
    let model = BlobModel::from_bytes(bytes).map_err(|e| anyhow!("{e}"))?;
    let host = HostModel::from_bytes(bytes).map_err(|e| anyhow!("{e}"))?;
    let cost = host.cost();
    let mut sections = vec![("header".to_string(), format::HEADER_LEN)];
    sections.push((
        "normalization".into(),
        1 + postcard_len(&desc.offset) + postcard_len(&desc.scale) + 4,
    ));
    match &desc.energy {
        EnergyDesc::General(m) => sections.push(("energy network".into(), postcard_len(m) + 1)),
        EnergyDesc::Mechanical {
            factor,
            floor,
            potential,
        } => {
            // The variant tag goes with the first section.
            sections.push(("mass-factor network L(q)".into(), postcard_len(factor) + 1));
            sections.push(("mass floor".into(), postcard_len(floor)));
            sections.push(("potential network".into(), postcard_len(potential)));
        }
        EnergyDesc::Separable { potential, kinetic } => {
            sections.push(("potential network".into(), postcard_len(potential) + 1));
            let name = match kinetic {
                KineticDesc::Quadratic { .. } => "inverse-mass factor",
                KineticDesc::Network(_) => "kinetic network",
            };
            sections.push((name.into(), postcard_len(kinetic)));
        }
    }
    sections.push(("integrator".into(), postcard_len(&desc.integrator)));
    sections.push((
        "damping and input terms".into(),
        postcard_len(&desc.dissipation) + postcard_len(&desc.input),
    ));
    if let Some(e) = &desc.envelope {
        sections.push(("training envelope".into(), postcard_len(&Some(*e))));
    }
    sections.push(("crc".into(), format::TRAILER_LEN));
    let max_width = model
        .networks()
        .iter()
        .flat_map(|(_, m)| m.layers.iter())
        .map(|l| l.inputs.max(l.outputs))
        .max()
        .unwrap_or(1);
    let n = model.dof;
    // The host's Model value, less the unused tail of its four [f32; D]
    // arrays, plus the runtime's stack scratch at this model's width.
    let model_value =
        core::mem::size_of::<HostModel<'static>>() - 16 * (crate::deploy::blob::HOST_MAX_DOF - n);
    let scratch = (format::MAX_LAYERS + 4) * max_width * 4;
    let it = model.integrator;
    Ok(Inspection {
        bytes: bytes.len(),
        format_version: env.version,
        crc: "ok".into(),
        dof: n,
        architecture: model.architecture(),
        weights: format!("{:?}", model.weight_kind()).to_lowercase(),
        parameters: model.parameters(),
        sections,
        integrator: method_name(it.method).into(),
        dt: it.dt,
        substeps: it.substeps,
        max_iterations: it.max_iterations,
        tolerance: it.tolerance,
        max_width,
        runtime_ram_bytes: model_value + scratch,
        macs_per_gradient: cost.macs_per_gradient,
        macs_per_step: cost.macs_per_step,
        damped: model.dissipation.is_some(),
        inputs: model.input.as_ref().map_or(0, |(m, _)| *m),
        dissipation_form: model.dissipation.as_ref().map(|t| t.label()),
        input_form: model.input.as_ref().map(|(_, g)| g.label()),
        envelope: model.envelope.as_ref().map(|b| envelope_rows(b, n)),
        runtime: footprint::for_model(&desc),
        runtime_source: footprint::SOURCE.into(),
    })
}
