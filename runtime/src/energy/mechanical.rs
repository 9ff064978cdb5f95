//! The mechanical energy of a rigid linkage in normalized coordinates:
//! E(z_q, z_p) = 1/2 z_p^T (L(z_q) L(z_q)^T + eps I) z_p + V(z_q), with L
//! lower triangular from a network of z_q (diagonal through softplus, so
//! M^-1 is positive definite) and V a network. The gradient is analytic:
//! dE/dz_p = L L^T z_p + eps z_p, and dE/dz_q = dV/dz_q plus the factor
//! network's vector-Jacobian product with dE/dL_ij = z_p,i (L^T z_p)_j
//! (times sigmoid on the diagonal). One forward and one reverse pass per
//! network; fixed-order sums, no heap.

use crate::error::{BlobError, Section};
use crate::format::{self, MlpDesc, MAX_LAYERS};
use crate::math;
use crate::mlp::Mlp;

const CAP: usize = crate::MAX_DOF_SUPPORTED;

/// A validated mechanical energy.
#[derive(Debug, Clone, Copy)]
pub struct Mechanical<'a, const W: usize> {
    factor: Mlp<'a, W>,
    floor: f32,
    potential: Mlp<'a, W>,
}

/// Index of L_ij (i >= j) in the row-by-row packing.
#[inline(always)]
fn at(i: usize, j: usize) -> usize {
    i * (i + 1) / 2 + j
}

impl<'a, const W: usize> Mechanical<'a, W> {
    /// Validate the two networks and the floor for `n` degrees of freedom.
    pub fn validate(
        factor: &MlpDesc<'a>,
        floor: f32,
        potential: &MlpDesc<'a>,
        n: usize,
    ) -> Result<Self, BlobError> {
        let section = Section::MassFactor;
        if n > CAP {
            return Err(BlobError::ShapeMismatch { section, layer: 0 });
        }
        if !floor.is_finite() {
            return Err(BlobError::NonFinite { section });
        }
        if floor < 0.0 {
            return Err(BlobError::NotPositive { section });
        }
        if floor != 0.0 && !format::scale_in_range(floor) {
            return Err(BlobError::OutOfRange { section });
        }
        Ok(Self {
            factor: Mlp::validate(factor, n, n * (n + 1) / 2, section)?,
            floor,
            potential: Mlp::validate(potential, n, 1, Section::Potential)?,
        })
    }

    /// The factor network's raw outputs turned into L (softplus on the
    /// diagonal); `slope` receives dL/draw (sigmoid on the diagonal, 1 off
    /// it).
    fn factor_from_raw(raw: &[f32; W], n: usize, l: &mut [f32; W], slope: &mut [f32; W]) {
        for i in 0..n {
            for j in 0..=i {
                let k = at(i, j);
                if i == j {
                    l[k] = math::softplus(raw[k]);
                    slope[k] = math::sigmoid(raw[k]);
                } else {
                    l[k] = raw[k];
                    slope[k] = 1.0;
                }
            }
        }
    }

    /// u = L^T z_p (u_j = sum_{i >= j} L_ij z_i, in index order).
    fn project(l: &[f32; W], zp: &[f32], n: usize) -> [f32; CAP] {
        let mut u = [0.0f32; CAP];
        for (j, uj) in u.iter_mut().enumerate().take(n) {
            let mut acc = 0.0f32;
            for (i, zi) in zp.iter().enumerate().take(n).skip(j) {
                acc += l[at(i, j)] * zi;
            }
            *uj = acc;
        }
        u
    }

    /// 1/2 (|L^T z_p|^2 + eps |z_p|^2).
    fn kinetic(&self, u: &[f32; CAP], zp: &[f32], n: usize) -> f32 {
        let (mut uu, mut zz) = (0.0f32, 0.0f32);
        for (uj, zj) in u.iter().zip(zp).take(n) {
            uu += uj * uj;
            zz += zj * zj;
        }
        0.5 * (uu + self.floor * zz)
    }

    /// E at (z_q, z_p), both of length n.
    pub fn value(&self, zq: &[f32], zp: &[f32]) -> f32 {
        let n = zq.len().min(zp.len()).min(CAP);
        if n * (n + 1) / 2 > W {
            return f32::NAN; // refused at validation (the factor is too wide)
        }
        let (mut raw, mut l, mut slope) = ([0.0f32; W], [0.0f32; W], [0.0f32; W]);
        self.factor.evaluate(zq, &mut raw);
        Self::factor_from_raw(&raw, n, &mut l, &mut slope);
        let u = Self::project(&l, zp, n);
        self.kinetic(&u, zp, n) + self.potential.value(zq)
    }

    /// E at (z_q, z_p) and its gradient: dE/dz_q into `gq`, dE/dz_p into
    /// `gp` (length n each).
    pub fn value_and_gradient(
        &self,
        zq: &[f32],
        zp: &[f32],
        gq: &mut [f32],
        gp: &mut [f32],
    ) -> f32 {
        let n = zq.len().min(zp.len()).min(CAP).min(gq.len()).min(gp.len());
        if n * (n + 1) / 2 > W {
            return f32::NAN; // refused at validation (the factor is too wide)
        }
        let mut tape = [[0.0f32; W]; MAX_LAYERS];
        let (mut raw, mut l, mut slope) = ([0.0f32; W], [0.0f32; W], [0.0f32; W]);
        self.factor.evaluate_taped(zq, &mut tape, &mut raw);
        Self::factor_from_raw(&raw, n, &mut l, &mut slope);
        let u = Self::project(&l, zp, n);
        // dE/dz_p = L u + eps z_p.
        for (i, g) in gp.iter_mut().enumerate().take(n) {
            let mut acc = 0.0f32;
            for (j, uj) in u.iter().enumerate().take(i + 1) {
                acc += l[at(i, j)] * uj;
            }
            *g = acc + self.floor * zp[i];
        }
        // dE/draw_ij = z_p,i u_j dL_ij/draw_ij, pulled back to z_q.
        let mut seed = [0.0f32; W];
        for i in 0..n {
            for j in 0..=i {
                let k = at(i, j);
                seed[k] = zp[i] * u[j] * slope[k];
            }
        }
        let mut gv = [0.0f32; CAP];
        let v = self.potential.value_and_gradient(zq, &mut gv[..n]);
        self.factor
            .pullback(&tape, &seed[..n * (n + 1) / 2], &mut gq[..n]);
        for (g, dv) in gq.iter_mut().zip(&gv).take(n) {
            *g += dv;
        }
        self.kinetic(&u, zp, n) + v
    }

    /// The Hessian-vector product of E along (dz_q, dz_p): into `hq`, `hp`
    /// (length n each). Forward over reverse, with u = L^T z_p and
    /// a_ij = z_p,i u_j s_ij (the factor network's seed, s = dL/draw):
    /// * d(dE/dz_p) = dL u + L du + eps dz_p, du = dL^T z_p + L^T dz_p;
    /// * d(dE/dz_q) = d(J^T a) + V'' dz_q, the factor network's pullback
    ///   with the seed moving at da_ij = (dz_p,i u_j + z_p,i du_j) s_ij +
    ///   z_p,i u_j ds_ij, where dL_ij = s_ij draw_ij, ds_ii = s_ii (1 - s_ii)
    ///   draw_ii (0 off the diagonal) and draw = J dz_q.
    ///
    /// Kept out of line: its buffers then occupy the stack only while a
    /// mechanical model is differentiated, not in every caller's frame.
    #[cfg(feature = "observer")]
    #[inline(never)]
    pub fn hessian_vector(
        &self,
        zq: &[f32],
        zp: &[f32],
        dzq: &[f32],
        dzp: &[f32],
        hq: &mut [f32],
        hp: &mut [f32],
    ) {
        let n = zq.len().min(zp.len()).min(CAP).min(hq.len()).min(hp.len());
        if n * (n + 1) / 2 > W {
            hq.iter_mut()
                .chain(hp.iter_mut())
                .for_each(|v| *v = f32::NAN);
            return; // refused at validation (the factor is too wide)
        }
        let (mut raw, mut draw) = ([0.0f32; W], [0.0f32; W]);
        self.factor.evaluate_tangent(zq, dzq, &mut raw, &mut draw);
        let (mut l, mut slope) = ([0.0f32; W], [0.0f32; W]);
        Self::factor_from_raw(&raw, n, &mut l, &mut slope);
        let mut dl = [0.0f32; W];
        for k in 0..n * (n + 1) / 2 {
            dl[k] = slope[k] * draw[k];
        }
        let u = Self::project(&l, zp, n);
        let (du_l, du_p) = (Self::project(&dl, zp, n), Self::project(&l, dzp, n));
        let mut du = [0.0f32; CAP];
        for j in 0..n {
            du[j] = du_l[j] + du_p[j];
        }
        for i in 0..n {
            let mut acc = 0.0f32;
            for j in 0..=i {
                acc += dl[at(i, j)] * u[j] + l[at(i, j)] * du[j];
            }
            hp[i] = acc + self.floor * dzp[i];
        }
        let (seed, dseed) = self.moving_seed(zp, dzp, &u, &du, &slope, &draw, n);
        let k = n * (n + 1) / 2;
        let (mut g, mut hv) = ([0.0f32; CAP], [0.0f32; CAP]);
        self.factor.pullback_and_tangent(
            zq,
            dzq,
            &seed[..k],
            &dseed[..k],
            &mut g[..n],
            &mut hv[..n],
        );
        let (mut gv, mut hvv) = ([0.0f32; CAP], [0.0f32; CAP]);
        self.potential
            .gradient_and_hvp(zq, dzq, &mut gv[..n], &mut hvv[..n]);
        for i in 0..n {
            hq[i] = hv[i] + hvv[i];
        }
    }

    /// The factor network's seed a_ij = z_p,i u_j s_ij and its tangent
    /// (see [`Self::hessian_vector`]).
    #[cfg(feature = "observer")]
    #[allow(clippy::too_many_arguments)]
    fn moving_seed(
        &self,
        zp: &[f32],
        dzp: &[f32],
        u: &[f32; CAP],
        du: &[f32; CAP],
        slope: &[f32; W],
        draw: &[f32; W],
        n: usize,
    ) -> ([f32; W], [f32; W]) {
        let (mut seed, mut dseed) = ([0.0f32; W], [0.0f32; W]);
        for i in 0..n {
            for j in 0..=i {
                let k = at(i, j);
                let ds = if i == j {
                    slope[k] * (1.0 - slope[k]) * draw[k]
                } else {
                    0.0
                };
                seed[k] = zp[i] * u[j] * slope[k];
                dseed[k] = (dzp[i] * u[j] + zp[i] * du[j]) * slope[k] + zp[i] * u[j] * ds;
            }
        }
        (seed, dseed)
    }

    /// The inverse mass matrix A = L(z_q) L(z_q)^T + eps I in normalized
    /// coordinates (dE/dz_p = A z_p) into the leading n x n block of `a`;
    /// `false` when the factor is too wide for W (refused at validation).
    pub fn inverse_mass(&self, zq: &[f32], a: &mut [[f32; CAP]; CAP]) -> bool {
        let n = zq.len().min(CAP);
        if n * (n + 1) / 2 > W {
            return false;
        }
        let (mut raw, mut l, mut slope) = ([0.0f32; W], [0.0f32; W], [0.0f32; W]);
        self.factor.evaluate(zq, &mut raw);
        Self::factor_from_raw(&raw, n, &mut l, &mut slope);
        for i in 0..n {
            for j in 0..n {
                let mut acc = 0.0f32;
                for k in 0..=i.min(j) {
                    acc += l[at(i, k)] * l[at(j, k)];
                }
                a[i][j] = acc + if i == j { self.floor } else { 0.0 };
            }
        }
        true
    }

    /// Multiply-accumulates of one gradient (both networks forward and
    /// back, plus the quadratic form).
    pub fn macs(&self, n: usize) -> u32 {
        self.factor.macs_per_gradient() + self.potential.macs_per_gradient() + (2 * n * n) as u32
    }

    /// Learned parameters of both networks.
    pub fn parameters(&self) -> u32 {
        self.factor.parameters() + self.potential.parameters()
    }
}
