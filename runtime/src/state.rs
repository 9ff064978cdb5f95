//! The phase-space state x = (q, p) with a fixed capacity of `D` degrees of
//! freedom, of which the first `dof()` are in use.

use crate::error::StepError;

/// A phase-space point. `q` and `p` are public so callers can read and write
/// coordinates; the number of active degrees of freedom is fixed at creation.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct State<const D: usize> {
    dof: usize,
    /// Generalized coordinates; entries past `dof()` are ignored (kept 0).
    pub q: [f32; D],
    /// Conjugate momenta; entries past `dof()` are ignored (kept 0).
    pub p: [f32; D],
}

impl<const D: usize> State<D> {
    /// A state at the origin with `dof` degrees of freedom.
    pub fn zeros(dof: usize) -> Result<Self, StepError> {
        if dof == 0 || dof > D {
            return Err(StepError::DofMismatch {
                model: D as u32,
                state: dof as u32,
            });
        }
        Ok(Self {
            dof,
            q: [0.0; D],
            p: [0.0; D],
        })
    }

    /// A state from coordinate and momentum slices of equal length.
    pub fn new(q: &[f32], p: &[f32]) -> Result<Self, StepError> {
        if q.len() != p.len() {
            return Err(StepError::DofMismatch {
                model: q.len() as u32,
                state: p.len() as u32,
            });
        }
        let mut s = Self::zeros(q.len())?;
        s.q[..q.len()].copy_from_slice(q);
        s.p[..p.len()].copy_from_slice(p);
        Ok(s)
    }

    /// Number of active degrees of freedom.
    pub fn dof(&self) -> usize {
        self.dof
    }

    /// Active coordinates.
    pub fn q(&self) -> &[f32] {
        &self.q[..self.dof]
    }

    /// Active momenta.
    pub fn p(&self) -> &[f32] {
        &self.p[..self.dof]
    }

    /// True when every active entry is finite.
    pub fn is_finite(&self) -> bool {
        self.q().iter().chain(self.p()).all(|v| v.is_finite())
    }
}
