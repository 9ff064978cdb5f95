//! Command-line overrides of a blob's integrator settings, shared by every
//! command that steps a model (`export`, `rollout`, `check`).

use visviva_runtime::{Integrator, Method};

/// Integration method names on the command line.
#[derive(
    Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum, serde::Serialize, serde::Deserialize,
)]
#[serde(rename_all = "kebab-case")]
pub enum MethodArg {
    /// Stormer-Verlet (separable models).
    Verlet,
    /// Yoshida's 4th-order composition of Stormer-Verlet (separable models).
    Yoshida4,
    /// Implicit midpoint (any model).
    Midpoint,
    /// Classical Runge-Kutta 4 (not symplectic; a reference).
    Rk4,
    /// Discrete-gradient method (any model; exact energy balance, for damped
    /// and driven models).
    DiscreteGradient,
}

impl From<MethodArg> for Method {
    fn from(m: MethodArg) -> Self {
        match m {
            MethodArg::Verlet => Method::StormerVerlet,
            MethodArg::Yoshida4 => Method::Yoshida4,
            MethodArg::Midpoint => Method::ImplicitMidpoint,
            MethodArg::Rk4 => Method::Rk4,
            MethodArg::DiscreteGradient => Method::DiscreteGradient,
        }
    }
}

/// The command-line name of a method.
pub fn method_name(m: Method) -> &'static str {
    match m {
        Method::StormerVerlet => "verlet",
        Method::Yoshida4 => "yoshida4",
        Method::ImplicitMidpoint => "midpoint",
        Method::Rk4 => "rk4",
        Method::DiscreteGradient => "discrete-gradient",
    }
}

/// Optional overrides; anything not given keeps the blob's value.
#[derive(Debug, Clone, Default, clap::Args)]
pub struct IntegratorArgs {
    /// Integration method (default: the blob's).
    #[arg(long, value_enum)]
    pub integrator: Option<MethodArg>,
    /// Time step of one step in seconds (default: the blob's).
    #[arg(long)]
    pub dt: Option<f32>,
    /// Substeps per step (default: the blob's).
    #[arg(long)]
    pub substeps: Option<u16>,
    /// Iteration limit for implicit midpoint (default: the blob's).
    #[arg(long)]
    pub max_iterations: Option<u16>,
    /// Relative tolerance for implicit midpoint (default: the blob's).
    #[arg(long)]
    pub tolerance: Option<f32>,
}

impl IntegratorArgs {
    /// `base` with the given overrides applied.
    pub fn apply(&self, base: Integrator) -> Integrator {
        Integrator {
            method: self.integrator.map(Method::from).unwrap_or(base.method),
            dt: self.dt.unwrap_or(base.dt),
            substeps: self.substeps.unwrap_or(base.substeps),
            max_iterations: self.max_iterations.unwrap_or(base.max_iterations),
            tolerance: self.tolerance.unwrap_or(base.tolerance),
        }
    }
}
