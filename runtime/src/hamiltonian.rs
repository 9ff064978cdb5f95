//! The interface the integrators need from an energy function, so learned
//! models and analytic textbook systems are stepped by the same code.

use crate::error::StepError;
use crate::state::State;

/// A Hamiltonian H(q, p) with `dof()` degrees of freedom, capacity `D`.
///
/// The motion it defines is dq/dt = dH/dp, dp/dt = -dH/dq.
pub trait Hamiltonian<const D: usize> {
    /// Degrees of freedom n.
    fn dof(&self) -> usize;

    /// Whether H = T(p) + V(q), which the explicit symplectic methods need.
    fn is_separable(&self) -> bool;

    /// The energy H(x).
    fn energy(&self, x: &State<D>) -> Result<f32, StepError>;

    /// dH/dq into `dh_dq` and dH/dp into `dh_dp` (first `dof()` entries).
    fn gradient(
        &self,
        x: &State<D>,
        dh_dq: &mut [f32; D],
        dh_dp: &mut [f32; D],
    ) -> Result<(), StepError>;

    /// dV/dq for a separable H; depends on q only.
    fn potential_gradient(&self, _q: &[f32; D], _out: &mut [f32; D]) -> Result<(), StepError> {
        Err(StepError::NotSeparable)
    }

    /// dT/dp for a separable H; depends on p only.
    fn kinetic_gradient(&self, _p: &[f32; D], _out: &mut [f32; D]) -> Result<(), StepError> {
        Err(StepError::NotSeparable)
    }

    /// The vector field f(x) = J dH/dx: `dq` = dH/dp, `dp` = -dH/dq.
    fn vector_field(
        &self,
        x: &State<D>,
        dq: &mut [f32; D],
        dp: &mut [f32; D],
    ) -> Result<(), StepError> {
        let mut gq = [0.0; D];
        self.gradient(x, &mut gq, dq)?;
        for (o, g) in dp.iter_mut().zip(gq.iter()).take(self.dof()) {
            *o = -*g;
        }
        Ok(())
    }
}
