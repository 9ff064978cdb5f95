//! What the runtime itself costs on the device, next to the blob: flash,
//! static RAM and stack of the minimal firmware
//! (`firmware-example/examples/footprint.rs`, Cortex-M4F, size-optimised
//! release, bounds D = 2, W = 32, only the runtime features the
//! configuration uses) as `cargo xtask footprint` measured them. The numbers
//! live in `footprint.csv` beside this file; the device check fails when a
//! new measurement differs from them by more than its stated margin.

use serde::Serialize;
use visviva_runtime::format::{
    DissipationDesc, EnergyDesc, InputDesc, KineticDesc, MlpDesc, ModelDesc, WeightsDesc,
};
use visviva_runtime::Method;

/// The committed measurements: `config,flash_bytes,static_ram_bytes,stack_bytes`.
const TABLE: &str = include_str!("footprint.csv");

/// Where the numbers come from, for `inspect` and the report.
pub const SOURCE: &str = "measured by `cargo xtask footprint` on the minimal firmware \
(firmware-example/examples/footprint.rs: parse, step, read the state; no logging), \
thumbv7em-none-eabihf, size-optimised release with LTO, bounds D = 2, W = 32, only the \
runtime features the configuration uses; stack by painting in QEMU mps2-an386; \
committed in trainer/src/deploy/footprint.csv";

/// The runtime's own cost for one configuration.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct RuntimeFootprint {
    /// Configuration name (model kind, integrator, weights).
    pub config: String,
    /// Flash: code, constants and the vector table, without the blob.
    pub flash_bytes: u64,
    /// Static RAM (`.data` + `.bss`).
    pub static_ram_bytes: u64,
    /// Stack high-water mark while parsing and stepping.
    pub stack_bytes: u64,
}

/// Every row of the committed table (rows that do not parse are skipped;
/// a unit test keeps the table well-formed).
pub fn table() -> Vec<RuntimeFootprint> {
    TABLE
        .lines()
        .filter(|l| !l.trim().is_empty() && !l.starts_with('#') && !l.starts_with("config,"))
        .filter_map(|l| {
            let f: Vec<&str> = l.split(',').map(str::trim).collect();
            let [config, flash, ram, stack] = f.as_slice() else {
                return None;
            };
            Some(RuntimeFootprint {
                config: config.to_string(),
                flash_bytes: flash.parse().ok()?,
                static_ram_bytes: ram.parse().ok()?,
                stack_bytes: stack.parse().ok()?,
            })
        })
        .collect()
}

/// The measured configuration a blob runs in, by its energy kind,
/// integrator, weight storage and port terms; None when that combination
/// was not measured.
pub fn config_name(desc: &ModelDesc<'_>) -> Option<&'static str> {
    let port = desc.dissipation != DissipationDesc::None || desc.input != InputDesc::None;
    let int8 = any_int8(desc);
    let method = desc.integrator.method;
    match (&desc.energy, method, port, int8) {
        (EnergyDesc::Separable { .. }, Method::StormerVerlet, false, false) => {
            Some("conservative-verlet-f32")
        }
        (EnergyDesc::Separable { .. }, Method::StormerVerlet, false, true) => {
            Some("conservative-verlet-int8")
        }
        (EnergyDesc::General(_), Method::ImplicitMidpoint, false, false) => {
            Some("general-midpoint-f32")
        }
        (EnergyDesc::General(_), Method::DiscreteGradient, true, false) => {
            Some("damped-driven-dgrad-f32")
        }
        _ => None,
    }
}

fn any_int8(desc: &ModelDesc<'_>) -> bool {
    let int8 = |m: &MlpDesc<'_>| {
        m.layers
            .iter()
            .any(|l| matches!(l.weights, WeightsDesc::Int8 { .. }))
    };
    let energy = match &desc.energy {
        EnergyDesc::General(m) => int8(m),
        EnergyDesc::Mechanical {
            factor, potential, ..
        } => int8(factor) || int8(potential),
        EnergyDesc::Separable { potential, kinetic } => {
            int8(potential) || matches!(kinetic, KineticDesc::Network(k) if int8(k))
        }
    };
    let dissipation = matches!(&desc.dissipation, DissipationDesc::Network(m) if int8(m));
    let input = matches!(&desc.input, InputDesc::Network { net, .. } if int8(net));
    energy || dissipation || input
}

/// The committed footprint of the blob's configuration, if measured.
pub fn for_model(desc: &ModelDesc<'_>) -> Option<RuntimeFootprint> {
    let name = config_name(desc)?;
    table().into_iter().find(|r| r.config == name)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn committed_table_has_the_four_configurations_with_nonzero_sizes() {
        // The table is data from `cargo xtask footprint`; this only keeps
        // it readable (the device check compares it with a measurement).
        let rows = table();
        let names: Vec<&str> = rows.iter().map(|r| r.config.as_str()).collect();
        assert_eq!(
            names,
            [
                "conservative-verlet-f32",
                "conservative-verlet-int8",
                "general-midpoint-f32",
                "damped-driven-dgrad-f32"
            ]
        );
        assert!(rows.iter().all(|r| r.flash_bytes > 0 && r.stack_bytes > 0));
    }
}
