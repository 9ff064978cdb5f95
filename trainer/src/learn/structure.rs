//! The model structure as the user names it, in `visviva.toml` and on the
//! command line alike (one vocabulary), and its one translation into the
//! trainer's choice: the single place where an energy activation is refused.

use anyhow::{bail, Result};
use serde::{Deserialize, Serialize};

use crate::learn::fit::ArchChoice;
use crate::learn::net::Activation;

/// Energy structure.
#[derive(Debug, Clone, Copy, Deserialize, Serialize, PartialEq, Eq)]
#[serde(rename_all = "lowercase")]
pub enum Arch {
    /// H = T(p) + V(q): explicit symplectic stepping on the device.
    Separable,
    /// H(q, p) over all coordinates: needs an implicit method on the device.
    General,
    /// H = 1/2 p^T M(q)^-1 p + V(q): a rigid linkage, whose mass matrix
    /// depends on the angles; needs an implicit method on the device.
    Mechanical,
    /// Each of the above that the log permits, fitted on a short budget;
    /// the one with the smallest held-out state error is kept (see
    /// [`crate::learn::auto`]).
    Auto,
}

/// Kinetic term of a separable model.
#[derive(Debug, Clone, Copy, Deserialize, Serialize, PartialEq, Eq)]
#[serde(rename_all = "lowercase")]
pub enum KineticKind {
    /// 1/2 p^T M^-1 p with a learned constant M^-1.
    Quadratic,
    /// A network T(p).
    Network,
}

/// Hidden activation.
#[derive(Debug, Clone, Copy, Deserialize, Serialize, PartialEq, Eq)]
#[serde(rename_all = "lowercase")]
pub enum ActivationName {
    /// tanh (default).
    Tanh,
    /// softplus.
    Softplus,
    /// Refused for energy networks, with the reason.
    Relu,
}

/// The activation of an energy network; `setting` names where the user
/// chose it (a flag or a project key) for the refusal.
pub fn energy_activation(name: ActivationName, setting: &str) -> Result<Activation> {
    match name {
        ActivationName::Tanh => Ok(Activation::Tanh),
        ActivationName::Softplus => Ok(Activation::Softplus),
        ActivationName::Relu => bail!(
            "{setting} = relu is refused for energy networks: ReLU's derivative is piecewise \
             constant, so the vector field dq/dt = dH/dp, dp/dt = -dH/dq would be discontinuous \
             (and its second derivative, which training needs, is zero almost everywhere); use \
             tanh or softplus"
        ),
    }
}

/// The trainer's structure choice from the user's names.
pub fn arch_choice(
    arch: Arch,
    kinetic: KineticKind,
    hidden: &[usize],
    activation: ActivationName,
    activation_setting: &str,
) -> Result<ArchChoice> {
    if arch == Arch::Auto {
        bail!(
            "arch = \"auto\" names no single structure: it is settled by fitting each \
             candidate (crate::learn::auto) before a plan is made"
        );
    }
    Ok(ArchChoice {
        separable: arch == Arch::Separable,
        quadratic_kinetic: kinetic == KineticKind::Quadratic,
        mechanical: arch == Arch::Mechanical,
        hidden: hidden.to_vec(),
        activation: energy_activation(activation, activation_setting)?,
    })
}
