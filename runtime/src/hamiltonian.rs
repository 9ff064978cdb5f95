//! The interface the integrators need from an energy function, so learned
//! models and analytic textbook systems are stepped by the same code. The
//! motion is the port-Hamiltonian field f = (J - R) dH/dx + G u; a
//! conservative, autonomous system has R = 0 and no inputs (the defaults).

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

    /// Number of inputs m (0 for an autonomous system).
    fn inputs(&self) -> usize {
        0
    }

    /// Whether the system has dissipation R or inputs G.
    fn has_port_terms(&self) -> bool {
        false
    }

    /// Weight of each coordinate in the metric the discrete-gradient method
    /// uses (1 by default; learned models use 1 / scale^2, so the metric is
    /// Euclidean in normalized coordinates).
    fn metric(&self, wq: &mut [f32; D], wp: &mut [f32; D]) {
        wq.iter_mut().chain(wp.iter_mut()).for_each(|w| *w = 1.0);
    }

    /// The size of the terms `energy` sums before they cancel to H, in
    /// energy units: its f32 round-off is a few eps times this whatever |H|
    /// is (the dot-product error bound, Higham, Accuracy and Stability of
    /// Numerical Algorithms, 2002, sec. 3.1). The discrete-gradient method
    /// keeps its difference-quotient correction only above that level. 0 by
    /// default (H evaluated without cancellation); learned models give
    /// their energy scale, the unit of the network's O(1) output.
    fn energy_term_size(&self) -> f32 {
        0.0
    }

    /// The field f = (J - R(q)) g + G(q) u for a given gradient g = (gq, gp),
    /// with R and G taken at coordinates `q`: `fq`, `fp` receive dq/dt and
    /// dp/dt. `u` holds `inputs()` values. The default is the conservative
    /// J g.
    fn field_from_gradient(
        &self,
        _q: &[f32; D],
        gq: &[f32; D],
        gp: &[f32; D],
        _u: &[f32],
        fq: &mut [f32; D],
        fp: &mut [f32; D],
    ) {
        for i in 0..self.dof().min(D) {
            fq[i] = gp[i];
            fp[i] = -gq[i];
        }
    }

    /// The vector field f(x) = (J - R) dH/dx + G u (for an autonomous,
    /// conservative system, J dH/dx: `dq` = dH/dp, `dp` = -dH/dq).
    fn vector_field_driven(
        &self,
        x: &State<D>,
        u: &[f32],
        dq: &mut [f32; D],
        dp: &mut [f32; D],
    ) -> Result<(), StepError> {
        let (mut gq, mut gp) = ([0.0; D], [0.0; D]);
        self.gradient(x, &mut gq, &mut gp)?;
        self.field_from_gradient(&x.q, &gq, &gp, u, dq, dp);
        Ok(())
    }

    /// The vector field with no input, f(x) = (J - R) dH/dx.
    fn vector_field(
        &self,
        x: &State<D>,
        dq: &mut [f32; D],
        dp: &mut [f32; D],
    ) -> Result<(), StepError> {
        let zeros = [0.0f32; crate::MAX_INPUTS];
        self.vector_field_driven(x, &zeros[..self.inputs().min(zeros.len())], dq, dp)
    }
}
