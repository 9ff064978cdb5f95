//! Arguments shared by several commands: the integrator flags of every
//! command that steps a model (`export`, `rollout`, `check`), and the clap
//! value lists of the library's named choices (integrator, weight storage,
//! energy structure, kinetic term, activation).

use clap::builder::PossibleValue;

use crate::deploy::blob::WeightKind;
use crate::deploy::integrator::{IntegratorOverrides, MethodName};
use crate::learn::mode::FitMode;
use crate::learn::structure::{ActivationName, Arch, KineticKind};

/// Optional overrides; anything not given keeps the blob's value.
#[derive(Debug, Clone, Default, clap::Args)]
pub struct IntegratorArgs {
    /// Integration method (default: the blob's).
    #[arg(long, value_enum)]
    pub integrator: Option<MethodName>,
    /// Time step of one step in seconds (default: the blob's).
    #[arg(long, value_name = "SECONDS")]
    pub dt: Option<f32>,
    /// Substeps per step (default: the blob's).
    #[arg(long, value_name = "N")]
    pub substeps: Option<u16>,
    /// Iteration limit for the implicit methods (default: the blob's).
    #[arg(long, value_name = "N")]
    pub max_iterations: Option<u16>,
    /// Relative tolerance for the implicit methods (default: the blob's).
    #[arg(long, value_name = "REL")]
    pub tolerance: Option<f32>,
}

impl IntegratorArgs {
    /// The flags as the library's overrides, each refused when out of its
    /// range (naming the flag).
    pub fn checked_overrides(&self) -> anyhow::Result<IntegratorOverrides> {
        let o = self.overrides();
        o.check(|key| format!("--{}", key.replace('_', "-")))?;
        Ok(o)
    }

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

impl clap::ValueEnum for Arch {
    fn value_variants<'a>() -> &'a [Self] {
        &[Arch::Separable, Arch::General, Arch::Mechanical, Arch::Auto]
    }

    fn to_possible_value(&self) -> Option<PossibleValue> {
        Some(match self {
            Arch::Separable => PossibleValue::new("separable")
                .help("H = T(p) + V(q): explicit symplectic stepping on the device"),
            Arch::General => PossibleValue::new("general")
                .help("H(q, p) over all coordinates: needs an implicit method on the device"),
            Arch::Mechanical => PossibleValue::new("mechanical").help(
                "H = 1/2 p^T M(q)^-1 p + V(q): a linkage whose mass matrix depends on the \
                 angles; needs an implicit method on the device",
            ),
            Arch::Auto => PossibleValue::new("auto").help(
                "the default: each structure the log permits fitted on a fifth of the budget; \
                 the one with the smallest held-out state error (training state error, said \
                 so, when nothing is held out) is fitted with the full budget",
            ),
        })
    }
}

impl clap::ValueEnum for KineticKind {
    fn value_variants<'a>() -> &'a [Self] {
        &[KineticKind::Quadratic, KineticKind::Network]
    }

    fn to_possible_value(&self) -> Option<PossibleValue> {
        Some(match self {
            KineticKind::Quadratic => PossibleValue::new("quadratic")
                .help("T = 1/2 p^T M^-1 p with a learned constant inverse mass matrix"),
            KineticKind::Network => PossibleValue::new("network").help("T(p) as a network"),
        })
    }
}

impl clap::ValueEnum for ActivationName {
    fn value_variants<'a>() -> &'a [Self] {
        &[
            ActivationName::Tanh,
            ActivationName::Softplus,
            ActivationName::Relu,
        ]
    }

    fn to_possible_value(&self) -> Option<PossibleValue> {
        Some(match self {
            ActivationName::Tanh => PossibleValue::new("tanh").help("hyperbolic tangent"),
            ActivationName::Softplus => PossibleValue::new("softplus").help("ln(1 + e^x)"),
            ActivationName::Relu => {
                PossibleValue::new("relu").help("refused for energy networks (see the message)")
            }
        })
    }
}

impl clap::ValueEnum for FitMode {
    fn value_variants<'a>() -> &'a [Self] {
        &[FitMode::Derivative, FitMode::Trajectory]
    }

    fn to_possible_value(&self) -> Option<PossibleValue> {
        Some(match self {
            FitMode::Derivative => PossibleValue::new("derivative")
                .help("match dx/dt (given or estimated) with J dH/dx"),
            FitMode::Trajectory => PossibleValue::new("trajectory")
                .help("match logged positions with rollouts through the device's integrator"),
        })
    }
}
