//! The integrator flags shared by every command that steps a model
//! (`export`, `rollout`, `check`), and the clap value lists of the library's
//! named choices (integrator, weight storage).

use clap::builder::PossibleValue;

use crate::deploy::blob::WeightKind;
use crate::deploy::integrator::{IntegratorOverrides, MethodName};

/// Optional overrides; anything not given keeps the blob's value.
#[derive(Debug, Clone, Default, clap::Args)]
pub struct IntegratorArgs {
    /// Integration method (default: the blob's).
    #[arg(long, value_enum)]
    pub integrator: Option<MethodName>,
    /// Time step of one step in seconds (default: the blob's).
    #[arg(long)]
    pub dt: Option<f32>,
    /// Substeps per step (default: the blob's).
    #[arg(long)]
    pub substeps: Option<u16>,
    /// Iteration limit for the implicit methods (default: the blob's).
    #[arg(long)]
    pub max_iterations: Option<u16>,
    /// Relative tolerance for the implicit methods (default: the blob's).
    #[arg(long)]
    pub tolerance: Option<f32>,
}

impl IntegratorArgs {
    /// The flags as the library's overrides.
    pub fn overrides(&self) -> IntegratorOverrides {
        IntegratorOverrides {
            integrator: self.integrator,
            dt: self.dt,
            substeps: self.substeps,
            max_iterations: self.max_iterations,
            tolerance: self.tolerance,
        }
    }
}

impl clap::ValueEnum for MethodName {
    fn value_variants<'a>() -> &'a [Self] {
        &MethodName::ALL
    }

    fn to_possible_value(&self) -> Option<PossibleValue> {
        Some(PossibleValue::new(self.as_str()).help(self.description()))
    }
}

impl clap::ValueEnum for WeightKind {
    fn value_variants<'a>() -> &'a [Self] {
        &[WeightKind::F32, WeightKind::Int8]
    }

    fn to_possible_value(&self) -> Option<PossibleValue> {
        Some(match self {
            WeightKind::F32 => PossibleValue::new("f32").help("Little-endian f32"),
            WeightKind::Int8 => PossibleValue::new("int8")
                .help("Symmetric int8 per output channel, f32 scales and biases"),
        })
    }
}
