//! Integrator names and settings as the user writes them (in `visviva.toml`
//! and on the command line) and their overrides of a blob's stored settings,
//! shared by every stage that steps a model (export, rollout, check).

use visviva_runtime::{Integrator, Method};

/// An integration method by its user-facing name.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum MethodName {
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

impl MethodName {
    /// Every name, in the order help texts list them.
    pub const ALL: [MethodName; 5] = [
        MethodName::Verlet,
        MethodName::Yoshida4,
        MethodName::Midpoint,
        MethodName::Rk4,
        MethodName::DiscreteGradient,
    ];

    /// The name as written in `visviva.toml` and on the command line.
    pub fn as_str(self) -> &'static str {
        method_name(self.into())
    }

    /// One line on what the method is for.
    pub fn description(self) -> &'static str {
        match self {
            MethodName::Verlet => "Stormer-Verlet (separable models)",
            MethodName::Yoshida4 => "Yoshida's 4th-order composition of Stormer-Verlet (separable models)",
            MethodName::Midpoint => "implicit midpoint (any model)",
            MethodName::Rk4 => "classical Runge-Kutta 4 (not symplectic; a reference)",
            MethodName::DiscreteGradient => {
                "discrete-gradient method (any model; exact energy balance, for damped and driven models)"
            }
        }
    }
}

impl From<MethodName> for Method {
    fn from(m: MethodName) -> Self {
        match m {
            MethodName::Verlet => Method::StormerVerlet,
            MethodName::Yoshida4 => Method::Yoshida4,
            MethodName::Midpoint => Method::ImplicitMidpoint,
            MethodName::Rk4 => Method::Rk4,
            MethodName::DiscreteGradient => Method::DiscreteGradient,
        }
    }
}

/// The user-facing name of a method.
pub fn method_name(m: Method) -> &'static str {
    match m {
        Method::StormerVerlet => "verlet",
        Method::Yoshida4 => "yoshida4",
        Method::ImplicitMidpoint => "midpoint",
        Method::Rk4 => "rk4",
        Method::DiscreteGradient => "discrete-gradient",
    }
}

/// The method a model gets when none is named: the discrete-gradient method
/// for damped or driven models, Stormer-Verlet for separable energies,
/// implicit midpoint otherwise.
pub fn default_method(separable: bool, port: bool) -> Method {
    if port {
        Method::DiscreteGradient
    } else if separable {
        Method::StormerVerlet
    } else {
        Method::ImplicitMidpoint
    }
}

/// Optional overrides of a blob's integrator; anything not given keeps the
/// blob's value.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct IntegratorOverrides {
    /// Integration method.
    pub integrator: Option<MethodName>,
    /// Time step of one step in seconds.
    pub dt: Option<f32>,
    /// Substeps per step.
    pub substeps: Option<u16>,
    /// Iteration limit of the implicit methods.
    pub max_iterations: Option<u16>,
    /// Relative tolerance of the implicit methods.
    pub tolerance: Option<f32>,
}

impl IntegratorOverrides {
    /// Refuse overrides out of their range before any work, each named by
    /// `name(key)` (e.g. `--dt`).
    pub fn check(&self, name: impl Fn(&str) -> String) -> anyhow::Result<()> {
        use visviva_runtime::integrate::{MAX_ITERATIONS, MAX_SUBSTEPS, MIN_TOLERANCE};
        if let Some(dt) = self.dt {
            crate::learn::stage::check_time_step(dt, &name("dt"))?;
        }
        if let Some(s) = self.substeps.filter(|s| !(1..=MAX_SUBSTEPS).contains(s)) {
            anyhow::bail!("{} = {s}: must be in 1..={MAX_SUBSTEPS}", name("substeps"));
        }
        if let Some(i) = self
            .max_iterations
            .filter(|i| !(1..=MAX_ITERATIONS).contains(i))
        {
            anyhow::bail!(
                "{} = {i}: must be in 1..={MAX_ITERATIONS}",
                name("max_iterations")
            );
        }
        if let Some(t) = self.tolerance.filter(|t| !(t.is_finite() && *t > 0.0)) {
            anyhow::bail!("{} = {t}: must be a finite number > 0", name("tolerance"));
        }
        if let Some(t) = self
            .tolerance
            .filter(|t| !(MIN_TOLERANCE..=1.0).contains(t))
        {
            anyhow::bail!(
                "{} = {t}: must lie in [{MIN_TOLERANCE:e}, 1], the range a blob can hold",
                name("tolerance")
            );
        }
        Ok(())
    }

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
