//! Learned energy functions in normalized coordinates z: a general network
//! E(z), a separable sum T(z_p) + V(z_q), where T is a quadratic form with
//! a learned positive-definite matrix or a network, or a mechanical energy
//! 1/2 z_p^T M(z_q)^-1 z_p + V(z_q) (see `mechanical`).

use crate::error::{BlobError, Section};
use crate::format::{EnergyDesc, F32Bytes, KineticDesc};
use crate::mlp::Mlp;

mod mechanical;

pub use mechanical::Mechanical;

/// Kinetic energy of a separable model.
#[derive(Debug, Clone, Copy)]
pub enum Kinetic<'a, const W: usize> {
    /// 1/2 z^T L L^T z, L lower triangular stored row by row.
    Quadratic(F32Bytes<'a>),
    /// A network T(z).
    Network(Mlp<'a, W>),
}

/// A validated energy function.
#[derive(Debug, Clone, Copy)]
pub enum Energy<'a, const W: usize> {
    /// E(z) over all 2n coordinates.
    General(Mlp<'a, W>),
    /// T(z_p) + V(z_q).
    Separable {
        /// V over the n coordinates.
        potential: Mlp<'a, W>,
        /// T over the n momenta.
        kinetic: Kinetic<'a, W>,
    },
    /// 1/2 z_p^T (L(z_q) L(z_q)^T + eps I) z_p + V(z_q).
    Mechanical(Mechanical<'a, W>),
}

impl<'a, const W: usize> Energy<'a, W> {
    /// Validate the description for `n` degrees of freedom.
    pub fn validate(desc: &EnergyDesc<'a>, n: usize) -> Result<Self, BlobError> {
        let left_out = |section| Err(BlobError::NotInThisBuild { section });
        match desc {
            EnergyDesc::General(_) if !cfg!(feature = "general") => left_out(Section::General),
            EnergyDesc::Separable { .. } if !cfg!(feature = "separable") => {
                left_out(Section::Potential)
            }
            EnergyDesc::Mechanical { .. } if !cfg!(feature = "mechanical") => {
                left_out(Section::MassFactor)
            }
            EnergyDesc::Mechanical {
                factor,
                floor,
                potential,
            } => Ok(Self::Mechanical(Mechanical::validate(
                factor, *floor, potential, n,
            )?)),
            EnergyDesc::General(mlp) => Ok(Self::General(Mlp::validate(
                mlp,
                2 * n,
                1,
                Section::General,
            )?)),
            EnergyDesc::Separable { potential, kinetic } => {
                let potential = Mlp::validate(potential, n, 1, Section::Potential)?;
                let kinetic = match kinetic {
                    KineticDesc::Quadratic { cholesky } => {
                        validate_cholesky(*cholesky, n)?;
                        Kinetic::Quadratic(*cholesky)
                    }
                    KineticDesc::Network(mlp) => {
                        Kinetic::Network(Mlp::validate(mlp, n, 1, Section::Kinetic)?)
                    }
                };
                Ok(Self::Separable { potential, kinetic })
            }
        }
    }

    /// Whether the energy splits into T(p) + V(q).
    pub fn is_separable(&self) -> bool {
        matches!(self, Self::Separable { .. })
    }

    /// Multiply-accumulates of one potential and one kinetic gradient (for a
    /// general or mechanical model, one full gradient and zero).
    pub fn macs(&self, n: usize) -> (u32, u32) {
        match self {
            Self::General(m) => (m.macs_per_gradient(), 0),
            Self::Mechanical(m) => (m.macs(n), 0),
            Self::Separable { potential, kinetic } => {
                let t = match kinetic {
                    Kinetic::Quadratic(_) => (n * (n + 1)) as u32,
                    Kinetic::Network(m) => m.macs_per_gradient(),
                };
                (potential.macs_per_gradient(), t)
            }
        }
    }

    /// Number of learned parameters.
    pub fn parameters(&self, n: usize) -> u32 {
        match self {
            Self::General(m) => m.parameters(),
            Self::Mechanical(m) => m.parameters(),
            Self::Separable { potential, kinetic } => {
                potential.parameters()
                    + match kinetic {
                        Kinetic::Quadratic(_) => (n * (n + 1) / 2) as u32,
                        Kinetic::Network(m) => m.parameters(),
                    }
            }
        }
    }
}

impl<const W: usize> Kinetic<'_, W> {
    /// T(z) and, when `grad` is given, dT/dz into it.
    pub fn eval(&self, z: &[f32], grad: Option<&mut [f32]>) -> f32 {
        match self {
            Self::Network(m) => match grad {
                Some(g) => m.value_and_gradient(z, g),
                None => m.value(z),
            },
            Self::Quadratic(l) => quadratic(*l, z, grad),
        }
    }
}

/// 1/2 |L^T z|^2 and its gradient L (L^T z). `z.len()` is n <= D; the
/// factor's length was checked against n at validation.
fn quadratic(l: F32Bytes<'_>, z: &[f32], grad: Option<&mut [f32]>) -> f32 {
    const CAP: usize = crate::MAX_DOF_SUPPORTED;
    let n = z.len().min(CAP);
    let row = |i: usize| i * (i + 1) / 2;
    // u = L^T z: u_j = sum_{i >= j} L_ij z_i
    let mut u = [0.0f32; CAP];
    for j in 0..n {
        let mut acc = 0.0f32;
        for i in j..n {
            acc += l.get(row(i) + j) * z[i];
        }
        u[j] = acc;
    }
    let mut t = 0.0f32;
    for v in u.iter().take(n) {
        t += v * v;
    }
    if let Some(g) = grad {
        for (i, gi) in g.iter_mut().enumerate().take(n) {
            let mut acc = 0.0f32;
            for (j, uj) in u.iter().enumerate().take(i + 1) {
                acc += l.get(row(i) + j) * uj;
            }
            *gi = acc;
        }
    }
    0.5 * t
}

fn validate_cholesky(l: F32Bytes<'_>, n: usize) -> Result<(), BlobError> {
    let section = Section::InverseMass;
    if n > crate::MAX_DOF_SUPPORTED || l.0.len() != 4 * (n * (n + 1) / 2) {
        return Err(BlobError::ShapeMismatch { section, layer: 0 });
    }
    if !l.iter().all(f32::is_finite) {
        return Err(BlobError::NonFinite { section });
    }
    for i in 0..n {
        if l.get(i * (i + 1) / 2 + i) <= 0.0 {
            return Err(BlobError::NotPositive { section });
        }
    }
    for i in 0..n {
        for j in 0..=i {
            let v = l.get(i * (i + 1) / 2 + j);
            let ok = if i == j {
                crate::format::scale_in_range(v)
            } else {
                crate::format::offset_in_range(v)
            };
            if !ok {
                return Err(BlobError::OutOfRange { section });
            }
        }
    }
    Ok(())
}
