//! What the observer needs beyond [`Hamiltonian`]: second derivatives. A
//! [`Tangent`] system gives the Hessian-vector product H''(x) dx and the
//! change of its port terms with the coordinates, so the exact Jacobian of
//! an integrator step can be propagated (see `jacobian`). Learned models
//! implement it analytically (forward-over-reverse through the networks).

use crate::error::StepError;
use crate::hamiltonian::Hamiltonian;
use crate::state::State;

/// A Hamiltonian system with analytic second derivatives.
pub trait Tangent<const D: usize>: Hamiltonian<D> {
    /// The Hessian-vector product: `oq` = H_qq dq + H_qp dp and
    /// `op` = H_pq dq + H_pp dp at `x` (first `dof()` entries).
    fn hessian_vector(
        &self,
        x: &State<D>,
        dq: &[f32; D],
        dp: &[f32; D],
        oq: &mut [f32; D],
        op: &mut [f32; D],
    ) -> Result<(), StepError>;

    /// The directional derivative along coordinates `dq`, at fixed gradient
    /// g = (gq, gp) and input `u`, of the field (J - R(q)) g + G(q) u:
    /// `fq`, `fp` receive d/de f(q + e dq). Zero (the default) when R and G
    /// do not depend on q.
    #[allow(clippy::too_many_arguments)]
    fn field_coordinate_tangent(
        &self,
        _q: &[f32; D],
        _gq: &[f32; D],
        _gp: &[f32; D],
        _u: &[f32],
        _dq: &[f32; D],
        fq: &mut [f32; D],
        fp: &mut [f32; D],
    ) {
        fq.iter_mut().chain(fp.iter_mut()).for_each(|v| *v = 0.0);
    }
}
