//! The learned model's second derivatives in physical units: the
//! Hessian-vector product of H (through the energy networks, or the exact
//! quadratic kinetic term) and the coordinate tangent of network port terms
//! L(q), G(q). With z_i = (x_i - o_i) / s_i and H = e E(z):
//! (H'' dx)_i = e (E''(z) dz)_i / s_i with dz_i = dx_i / s_i.
//! A mechanical model (M(q) from a network) gets its product from
//! `energy/mechanical.rs` (forward over reverse through the factor
//! network with a moving seed).
//! Momenta from velocities: p = M v for the energies whose velocity dH/dp
//! is linear in p (a quadratic kinetic term, and the mechanical energy at
//! a given q, where M(q)^-1 = L L^T + eps I is solved by pivoted
//! elimination).

use super::{Model, PortMatrix};
use crate::energy::{Energy, Kinetic};
use crate::error::StepError;
use crate::state::State;
use crate::tangent::Tangent;

/// Entries of a port matrix at `zq` and their tangent along `dzq` (zero for
/// a constant matrix).
fn entries_tangent<const W: usize>(
    m: &PortMatrix<'_, W>,
    zq: &[f32],
    dzq: &[f32],
) -> ([f32; W], [f32; W]) {
    let (mut e, mut de) = ([0.0f32; W], [0.0f32; W]);
    match m {
        PortMatrix::Constant(c) => {
            for (i, v) in e.iter_mut().enumerate().take(c.len()) {
                *v = c.get(i);
            }
        }
        PortMatrix::Network(net) => net.evaluate_tangent(zq, dzq, &mut e, &mut de),
    }
    (e, de)
}

impl<const D: usize, const W: usize> Model<'_, D, W> {
    /// Normalized coordinates of `q` and the normalized direction `dq`.
    fn normalized_q(&self, q: &[f32; D], dq: &[f32; D]) -> ([f32; D], [f32; D]) {
        let n = self.dof;
        let (mut z, mut dz) = ([0.0f32; D], [0.0f32; D]);
        Self::normalize(q, &self.offset_q, &self.scale_q, n, &mut z);
        for i in 0..n {
            dz[i] = dq[i] / self.scale_q[i];
        }
        (z, dz)
    }

    /// p = M v for a separable model with a quadratic kinetic term
    /// T = e/2 |L^T (p - o_p) / s_p|^2: v = dH/dp = e S^-1 L L^T S^-1 (p - o_p)
    /// with S = diag(s_p), solved by two triangular substitutions. `None`
    /// for models whose velocity is not linear in p (network kinetic term,
    /// general energy).
    pub fn momentum_from_velocity(&self, v: &[f32], p: &mut [f32]) -> Option<()> {
        let n = self.dof;
        let Energy::Separable {
            kinetic: Kinetic::Quadratic(l),
            ..
        } = &self.energy
        else {
            return None;
        };
        if v.len() < n || p.len() < n {
            return None;
        }
        let row = |i: usize| i * (i + 1) / 2;
        // L y = s v / e (forward), then L^T z = y (backward).
        let mut y = [0.0f32; D];
        for i in 0..n {
            let mut acc = self.scale_p[i] * v[i] / self.energy_scale;
            for (j, yj) in y.iter().enumerate().take(i) {
                acc -= l.get(row(i) + j) * yj;
            }
            y[i] = acc / l.get(row(i) + i);
        }
        let mut z = [0.0f32; D];
        for i in (0..n).rev() {
            let mut acc = y[i];
            for (k, zk) in z.iter().enumerate().take(n).skip(i + 1) {
                acc -= l.get(row(k) + i) * zk;
            }
            z[i] = acc / l.get(row(i) + i);
        }
        for i in 0..n {
            p[i] = self.offset_p[i] + self.scale_p[i] * z[i];
        }
        Some(())
    }
}

impl<const D: usize, const W: usize> Model<'_, D, W> {
    /// p = M(q) v at the coordinates `q`: the separable quadratic case of
    /// [`Model::momentum_from_velocity`], or for a mechanical energy
    /// v = e S^-1 A(z_q) S^-1 (p - o_p) with A = L L^T + eps I, solved for
    /// p. `None` for models whose velocity is not linear in p (network
    /// kinetic term, general energy), for non-finite input, or a singular
    /// solve.
    pub fn momentum_from_velocity_at(&self, q: &[f32], v: &[f32], p: &mut [f32]) -> Option<()> {
        let n = self.dof;
        let Energy::Mechanical(m) = &self.energy else {
            return self.momentum_from_velocity(v, p);
        };
        if !cfg!(feature = "mechanical") || q.len() < n || v.len() < n || p.len() < n {
            return None;
        }
        if q[..n].iter().chain(&v[..n]).any(|x| !x.is_finite()) {
            return None;
        }
        let mut zq = [0.0f32; D];
        for i in 0..n {
            zq[i] = (q[i] - self.offset_q[i]) / self.scale_q[i];
        }
        const CAP: usize = crate::MAX_DOF_SUPPORTED;
        let mut a = [[0.0f32; CAP]; CAP];
        if !m.inverse_mass(&zq[..n], &mut a) {
            return None;
        }
        // A z = S v / e, one right-hand side in column 0.
        let mut b = [[0.0f32; CAP]; CAP];
        for i in 0..n {
            b[i][0] = self.scale_p[i] * v[i] / self.energy_scale;
        }
        crate::linalg::solve(&mut a, &mut b, n)?;
        for i in 0..n {
            p[i] = self.offset_p[i] + self.scale_p[i] * b[i][0];
        }
        p[..n].iter().all(|x| x.is_finite()).then_some(())
    }
}

impl<const D: usize, const W: usize> Tangent<D> for Model<'_, D, W> {
    fn hessian_vector(
        &self,
        x: &State<D>,
        dq: &[f32; D],
        dp: &[f32; D],
        oq: &mut [f32; D],
        op: &mut [f32; D],
    ) -> Result<(), StepError> {
        self.check(x)?;
        let n = self.dof;
        let (zq, dzq) = self.normalized_q(&x.q, dq);
        let (mut zp, mut dzp) = ([0.0f32; D], [0.0f32; D]);
        Self::normalize(&x.p, &self.offset_p, &self.scale_p, n, &mut zp);
        for i in 0..n {
            dzp[i] = dp[i] / self.scale_p[i];
        }
        let (mut hq, mut hp) = ([0.0f32; D], [0.0f32; D]);
        let mut g = [0.0f32; D];
        match &self.energy {
            Energy::General(m) => {
                let (mut z, mut dz) = ([0.0f32; 32], [0.0f32; 32]);
                let (mut gz, mut hz) = ([0.0f32; 32], [0.0f32; 32]);
                z[..n].copy_from_slice(&zq[..n]);
                z[n..2 * n].copy_from_slice(&zp[..n]);
                dz[..n].copy_from_slice(&dzq[..n]);
                dz[n..2 * n].copy_from_slice(&dzp[..n]);
                m.gradient_and_hvp(
                    &z[..2 * n],
                    &dz[..2 * n],
                    &mut gz[..2 * n],
                    &mut hz[..2 * n],
                );
                hq[..n].copy_from_slice(&hz[..n]);
                hp[..n].copy_from_slice(&hz[n..2 * n]);
            }
            Energy::Mechanical(m) => m.hessian_vector(
                &zq[..n],
                &zp[..n],
                &dzq[..n],
                &dzp[..n],
                &mut hq[..n],
                &mut hp[..n],
            ),
            Energy::Separable { potential, kinetic } => {
                potential.gradient_and_hvp(&zq[..n], &dzq[..n], &mut g[..n], &mut hq[..n]);
                match kinetic {
                    // T'' dz = L L^T dz, the quadratic's gradient at dz.
                    Kinetic::Quadratic(_) => {
                        kinetic.eval(&dzp[..n], Some(&mut hp[..n]));
                    }
                    Kinetic::Network(m) => {
                        m.gradient_and_hvp(&zp[..n], &dzp[..n], &mut g[..n], &mut hp[..n])
                    }
                }
            }
        }
        for i in 0..n {
            oq[i] = self.energy_scale * hq[i] / self.scale_q[i];
            op[i] = self.energy_scale * hp[i] / self.scale_p[i];
        }
        Ok(())
    }

    fn field_coordinate_tangent(
        &self,
        q: &[f32; D],
        gq: &[f32; D],
        gp: &[f32; D],
        u: &[f32],
        dq: &[f32; D],
        fq: &mut [f32; D],
        fp: &mut [f32; D],
    ) {
        let n = self.dof;
        let n2 = 2 * n;
        fq.iter_mut().chain(fp.iter_mut()).for_each(|v| *v = 0.0);
        let (zq, dzq) = self.normalized_q(q, dq);
        let at = |k: usize| if k < n { gq[k] } else { gp[k - n] };
        let mut acc = [0.0f32; 2 * crate::MAX_DOF_SUPPORTED];
        if let Some(l @ PortMatrix::Network(_)) = &self.dissipation {
            let (e, de) = entries_tangent(l, &zq[..n], &dzq[..n]);
            let li = |m: &[f32; W], i: usize, j: usize| m.get(i * (i + 1) / 2 + j).copied();
            let li = |m: &[f32; W], i: usize, j: usize| li(m, i, j).unwrap_or(f32::NAN);
            // d(L L^T g) = dL (L^T g) + L (dL^T g).
            let (mut v, mut dv) = ([0.0f32; 32], [0.0f32; 32]);
            for j in 0..n2 {
                for i in j..n2 {
                    v[j] += li(&e, i, j) * at(i);
                    dv[j] += li(&de, i, j) * at(i);
                }
            }
            for (i, a) in acc.iter_mut().enumerate().take(n2) {
                for j in 0..=i {
                    *a -= li(&de, i, j) * v[j] + li(&e, i, j) * dv[j];
                }
            }
        }
        if let Some((m, g @ PortMatrix::Network(_))) = &self.input {
            let (_, dg) = entries_tangent(g, &zq[..n], &dzq[..n]);
            for (i, a) in acc.iter_mut().enumerate().take(n2) {
                for (k, uk) in u.iter().enumerate().take(*m) {
                    *a += dg.get(i * m + k).copied().unwrap_or(f32::NAN) * uk;
                }
            }
        }
        fq[..n].copy_from_slice(&acc[..n]);
        fp[..n].copy_from_slice(&acc[n..n2]);
    }
}
