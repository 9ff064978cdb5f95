//! The exact Jacobian of one integrator step, by tangent propagation
//! through the method (no finite differences): `step_with_jacobian`
//! advances a state with the integrator's own step, one substep at a time,
//! and returns d x1 / d x0 over the 2n coordinates (q first, then p).
//!
//! * Stormer-Verlet and Yoshida-4: the product of the kick and drift shears
//!   [I 0; -h/2 V''(q) I] and [I h T''(p); 0 I] at the stage points.
//! * RK4: the stage tangents dk_s = Df(x_s) dx_s.
//! * Implicit midpoint and the discrete-gradient method: the implicit
//!   function theorem on the equation the method solves,
//!   F(x0, x1) = x1 - x0 - h f(gbar(x0, x1), q_m) = 0, at the converged x1:
//!   J = -(dF/dx1)^-1 dF/dx0. This is the Jacobian of the exact solution of
//!   that equation; the fixed-point iteration reaches it to its tolerance.
//!
//! Df = (J - R) H'' + d/dq[(J - R(q)) g + G(q) u] comes from [`Tangent`].

use crate::error::StepError;
use crate::integrate::{
    correction_share, correction_slopes, roundoff_level, Integrator, Method, YOSHIDA_W0, YOSHIDA_W1,
};
use crate::linalg::{self, Mat};
use crate::observer::ObserverError;
use crate::state::State;
use crate::tangent::Tangent;

/// Unit vector `c` over the 2n coordinates as (dq, dp).
fn unit<const D: usize>(c: usize, n: usize) -> ([f32; D], [f32; D]) {
    let (mut dq, mut dp) = ([0.0f32; D], [0.0f32; D]);
    if c < n {
        dq[c] = 1.0;
    } else {
        dp[c - n] = 1.0;
    }
    (dq, dp)
}

/// The Hessian H''(x) over the 2n coordinates, column by column.
pub fn hessian<const D: usize, const S: usize, H: Tangent<D> + ?Sized>(
    h: &H,
    x: &State<D>,
) -> Result<Mat<S>, StepError> {
    let n = x.dof();
    let mut m = [[0.0f32; S]; S];
    for c in 0..2 * n {
        let (dq, dp) = unit::<D>(c, n);
        let (mut oq, mut op) = ([0.0f32; D], [0.0f32; D]);
        h.hessian_vector(x, &dq, &dp, &mut oq, &mut op)?;
        for i in 0..n {
            m[i][c] = oq[i];
            m[n + i][c] = op[i];
        }
    }
    Ok(m)
}

/// B = (J - R(q)) as a matrix (the field is linear in the gradient; input
/// held at zero) and C = d f / d q at gradient `g` and input `u` (columns
/// past n are zero).
fn field_parts<const D: usize, const S: usize, H: Tangent<D> + ?Sized>(
    h: &H,
    q: &[f32; D],
    g: &([f32; D], [f32; D]),
    u: &[f32],
) -> (Mat<S>, Mat<S>) {
    let n = h.dof();
    let zeros = [0.0f32; crate::MAX_INPUTS];
    let none = &zeros[..h.inputs().min(zeros.len())];
    let (mut b, mut c) = ([[0.0f32; S]; S], [[0.0f32; S]; S]);
    for k in 0..2 * n {
        let (eq, ep) = unit::<D>(k, n);
        let (mut fq, mut fp) = ([0.0f32; D], [0.0f32; D]);
        h.field_from_gradient(q, &eq, &ep, none, &mut fq, &mut fp);
        for i in 0..n {
            b[i][k] = fq[i];
            b[n + i][k] = fp[i];
        }
        if k < n {
            h.field_coordinate_tangent(q, &g.0, &g.1, u, &eq, &mut fq, &mut fp);
            for i in 0..n {
                c[i][k] = fq[i];
                c[n + i][k] = fp[i];
            }
        }
    }
    (b, c)
}

/// The field Jacobian Df(x) = (J - R) H''(x) + d f / d q at input `u`.
fn field_jacobian<const D: usize, const S: usize, H: Tangent<D> + ?Sized>(
    h: &H,
    x: &State<D>,
    u: &[f32],
) -> Result<Mat<S>, StepError> {
    let k = 2 * x.dof();
    let mut g = ([0.0f32; D], [0.0f32; D]);
    h.gradient(x, &mut g.0, &mut g.1)?;
    let (b, c) = field_parts::<D, S, H>(h, &x.q, &g, u);
    let mut a = linalg::mul(&b, &hessian::<D, S, H>(h, x)?, k);
    for (row, crow) in a.iter_mut().zip(&c).take(k) {
        for (v, cv) in row.iter_mut().zip(crow).take(k) {
            *v += cv;
        }
    }
    Ok(a)
}

/// Advance `x` by one step of `it` (inputs `u`) and return the step's
/// Jacobian. The state follows `it.step_driven` substep by substep (the
/// same arithmetic as one call with all substeps). On error `x` is
/// unchanged.
pub fn step_with_jacobian<const D: usize, const S: usize, H: Tangent<D> + ?Sized>(
    h: &H,
    it: &Integrator,
    x: &mut State<D>,
    u: &[f32],
) -> Result<Mat<S>, ObserverError> {
    let n = x.dof();
    if 2 * n > S {
        return Err(ObserverError::Capacity {
            needed: (2 * n) as u32,
            capacity: S as u32,
        });
    }
    if !it.is_valid() {
        return Err(ObserverError::Step(StepError::BadSettings));
    }
    let hs = it.dt / it.substeps as f32;
    let sub = Integrator {
        dt: hs,
        substeps: 1,
        ..*it
    };
    let mut y = *x;
    let mut jac = linalg::identity::<S>(2 * n);
    for _ in 0..it.substeps {
        let y0 = y;
        sub.step_driven(h, &mut y, u)?;
        let js: Mat<S> = match it.method {
            Method::StormerVerlet => verlet_jacobian(h, &y0, &[hs])?,
            Method::Yoshida4 => {
                verlet_jacobian(h, &y0, &[YOSHIDA_W1 * hs, YOSHIDA_W0 * hs, YOSHIDA_W1 * hs])?
            }
            Method::Rk4 => rk4_jacobian(h, &y0, u, hs)?,
            Method::ImplicitMidpoint => implicit_jacobian(h, &y0, &y, u, hs, false)?,
            Method::DiscreteGradient => implicit_jacobian(h, &y0, &y, u, hs, true)?,
        };
        jac = linalg::mul(&js, &jac, 2 * n);
    }
    *x = y;
    Ok(jac)
}

/// Jacobian of kick-drift-kick Stormer-Verlet stages of sizes `steps`,
/// composed, from `x0` (the stage points are recomputed as the integrator
/// computes them).
fn verlet_jacobian<const D: usize, const S: usize, H: Tangent<D> + ?Sized>(
    ham: &H,
    x0: &State<D>,
    steps: &[f32],
) -> Result<Mat<S>, StepError> {
    let n = x0.dof();
    let mut x = *x0;
    let mut jac = linalg::identity::<S>(2 * n);
    let mut g = [0.0f32; D];
    ham.potential_gradient(&x.q, &mut g)?;
    for &h in steps {
        let half = 0.5 * h;
        kick(ham, &x, half, &mut jac)?;
        for i in 0..n {
            x.p[i] -= half * g[i];
        }
        // Drift: dq += h T''(p) dp at the half-step momenta.
        let t = hessian::<D, S, H>(ham, &x)?;
        let mut v = [0.0f32; D];
        ham.kinetic_gradient(&x.p, &mut v)?;
        for c in 0..2 * n {
            for i in 0..n {
                let mut acc = 0.0f32;
                for j in 0..n {
                    acc += t[n + i][n + j] * jac[n + j][c];
                }
                jac[i][c] += h * acc;
            }
        }
        for i in 0..n {
            x.q[i] += h * v[i];
        }
        ham.potential_gradient(&x.q, &mut g)?;
        kick(ham, &x, half, &mut jac)?;
        for i in 0..n {
            x.p[i] -= half * g[i];
        }
    }
    Ok(jac)
}

/// Apply the kick shear dp -= half V''(q) dq to `jac` in place.
fn kick<const D: usize, const S: usize, H: Tangent<D> + ?Sized>(
    ham: &H,
    x: &State<D>,
    half: f32,
    jac: &mut Mat<S>,
) -> Result<(), StepError> {
    let n = x.dof();
    let v = hessian::<D, S, H>(ham, x)?;
    for c in 0..2 * n {
        for i in 0..n {
            let mut acc = 0.0f32;
            for j in 0..n {
                acc += v[i][j] * jac[j][c];
            }
            jac[n + i][c] -= half * acc;
        }
    }
    Ok(())
}

/// Jacobian of one classical RK4 step of size `h` from `x0`.
fn rk4_jacobian<const D: usize, const S: usize, H: Tangent<D> + ?Sized>(
    ham: &H,
    x0: &State<D>,
    u: &[f32],
    h: f32,
) -> Result<Mat<S>, StepError> {
    let n = x0.dof();
    let k = 2 * n;
    let weights = [0.5 * h, 0.5 * h, h];
    let mut stage = *x0;
    let mut dstage = linalg::identity::<S>(k);
    let mut sum = [[0.0f32; S]; S];
    for s in 0..4 {
        let a = field_jacobian::<D, S, H>(ham, &stage, u)?;
        let dk = linalg::mul(&a, &dstage, k);
        let w = if s == 0 || s == 3 { 1.0 } else { 2.0 };
        for i in 0..k {
            for j in 0..k {
                sum[i][j] += w * dk[i][j];
            }
        }
        if s < 3 {
            let (mut kq, mut kp) = ([0.0f32; D], [0.0f32; D]);
            ham.vector_field_driven(&stage, u, &mut kq, &mut kp)?;
            for i in 0..n {
                stage.q[i] = x0.q[i] + weights[s] * kq[i];
                stage.p[i] = x0.p[i] + weights[s] * kp[i];
            }
            dstage = linalg::identity::<S>(k);
            for i in 0..k {
                for j in 0..k {
                    dstage[i][j] += weights[s] * dk[i][j];
                }
            }
        }
    }
    let mut jac = linalg::identity::<S>(k);
    let sixth = h / 6.0;
    for i in 0..k {
        for j in 0..k {
            jac[i][j] += sixth * sum[i][j];
        }
    }
    Ok(jac)
}

/// A state as a vector over the 2n coordinates (q then p); also the
/// observer's.
// Index loops bounded by the active size: no slice length can panic.
#[allow(clippy::manual_memcpy)]
pub(crate) fn flat<const D: usize, const S: usize>(x: &State<D>) -> [f32; S] {
    let n = x.dof();
    let mut v = [0.0f32; S];
    for i in 0..n.min(S / 2) {
        v[i] = x.q[i];
        v[n + i] = x.p[i];
    }
    v
}

/// dgbar/dx1 and dgbar/dx0 of the discrete gradient
/// gbar = g(m) + c W d, c = (H(x1) - H(x0) - g(m) . d) / (d . W d), with the
/// integrator's own share of the correction (`correction_share`: none at
/// the round-off level, all from twice it, a ramp between). Without it (and for implicit midpoint)
/// both are H''(m) / 2. Returns them with gbar.
#[allow(clippy::type_complexity)]
fn discrete_gradient_parts<const D: usize, const S: usize, H: Tangent<D> + ?Sized>(
    ham: &H,
    x0: &State<D>,
    x1: &State<D>,
    mid: &State<D>,
    corrected: bool,
) -> Result<(Mat<S>, Mat<S>, ([f32; D], [f32; D])), StepError> {
    let n = x0.dof();
    let k = 2 * n;
    let hm = hessian::<D, S, H>(ham, mid)?;
    let (mut gb1, mut gb0) = ([[0.0f32; S]; S], [[0.0f32; S]; S]);
    for i in 0..k {
        for j in 0..k {
            gb1[i][j] = 0.5 * hm[i][j];
            gb0[i][j] = 0.5 * hm[i][j];
        }
    }
    let mut gm = ([0.0f32; D], [0.0f32; D]);
    ham.gradient(mid, &mut gm.0, &mut gm.1)?;
    if !corrected {
        return Ok((gb1, gb0, gm));
    }
    let (h0, h1) = (ham.energy(x0)?, ham.energy(x1)?);
    let (mut wq, mut wp) = ([1.0f32; D], [1.0f32; D]);
    ham.metric(&mut wq, &mut wp);
    // The integrator's residual and its switch, in its order.
    let (mut gd, mut dwd) = (0.0f32, 0.0f32);
    for i in 0..n {
        let (dq, dp) = (x1.q[i] - x0.q[i], x1.p[i] - x0.p[i]);
        gd += gm.0[i] * dq;
        gd += gm.1[i] * dp;
        dwd += wq[i] * dq * dq;
        dwd += wp[i] * dp * dp;
    }
    let resid = h1 - h0 - gd;
    let noise = roundoff_level(h0, h1, ham.energy_term_size(), mid, &gm.0, &gm.1);
    let share = correction_share(resid, noise);
    if !(dwd > 0.0 && dwd.is_finite() && share > 0.0) {
        return Ok((gb1, gb0, gm));
    }
    let c = share * resid / dwd;
    // k = share * resid: its slopes in resid and in the round-off level.
    let (kr, kn) = correction_slopes(resid, noise);
    let (a, b) = (flat::<D, S>(x0), flat::<D, S>(x1));
    let (dn1, dn0) = roundoff_level_slopes::<D, S>(&hm, (h0, h1), mid, &gm, k);
    let mut w = [0.0f32; S];
    let mut d = [0.0f32; S];
    w[..n].copy_from_slice(&wq[..n]);
    w[n..2 * n].copy_from_slice(&wp[..n]);
    for i in 0..k {
        d[i] = b[i] - a[i];
    }
    let (mut g0, mut g1) = (([0.0f32; D], [0.0f32; D]), ([0.0f32; D], [0.0f32; D]));
    ham.gradient(x0, &mut g0.0, &mut g0.1)?;
    ham.gradient(x1, &mut g1.0, &mut g1.1)?;
    let at = |g: &([f32; D], [f32; D]), i: usize| if i < n { g.0[i] } else { g.1[i - n] };
    for i in 0..k {
        let mut hd = 0.0f32;
        for j in 0..k {
            hd += hm[i][j] * d[j];
        }
        // dc/dx1_i and dc/dx0_i.
        let wd = 2.0 * c * w[i] * d[i];
        let a1 = (kr * (at(&g1, i) - at(&gm, i) - 0.5 * hd) + kn * dn1(&g1, i) - wd) / dwd;
        let a0 = (kr * (at(&gm, i) - at(&g0, i) - 0.5 * hd) + kn * dn0(&g0, i) + wd) / dwd;
        for r in 0..k {
            gb1[r][i] += w[r] * d[r] * a1;
            gb0[r][i] += w[r] * d[r] * a0;
        }
        gb1[i][i] += c * w[i];
        gb0[i][i] -= c * w[i];
    }
    let mut gbar = gm;
    for i in 0..n {
        gbar.0[i] += c * wq[i] * d[i];
        gbar.1[i] += c * wp[i] * d[n + i];
    }
    Ok((gb1, gb0, gbar))
}

/// The slopes of the integrator's round-off level
/// 8 eps (|H0| + |H1| + 2 E_t + 2 sum |m_i g_i(m)|) in x1 and in x0, as functions of
/// the end's gradient and the coordinate: 8 eps (sign(H) g_end_j +
/// sign(m_j) |g_j| + (H''(m) s)_j) with s_i = |m_i| sign(g_i) (H'' is
/// symmetric; m moves by half of either end).
#[allow(clippy::type_complexity)]
fn roundoff_level_slopes<const D: usize, const S: usize>(
    hm: &Mat<S>,
    (h0, h1): (f32, f32),
    mid: &State<D>,
    gm: &([f32; D], [f32; D]),
    k: usize,
) -> (
    impl Fn(&([f32; D], [f32; D]), usize) -> f32,
    impl Fn(&([f32; D], [f32; D]), usize) -> f32,
) {
    let n = k / 2;
    let sign = |e: f32| if e < 0.0 { -1.0f32 } else { 1.0 };
    let (m, g) = (flat::<D, S>(mid), {
        let mut g = [0.0f32; S];
        g[..n].copy_from_slice(&gm.0[..n]);
        g[n..k].copy_from_slice(&gm.1[..n]);
        g
    });
    let mut common = [0.0f32; S];
    for j in 0..k {
        let mut hs = 0.0f32;
        for i in 0..k {
            hs += hm[j][i] * m[i].abs() * sign(g[i]);
        }
        common[j] = sign(m[j]) * g[j].abs() + hs;
    }
    let e8 = 8.0 * f32::EPSILON;
    let at = move |g: &([f32; D], [f32; D]), i: usize| if i < n { g.0[i] } else { g.1[i - n] };
    let (s1, s0) = (sign(h1), sign(h0));
    (
        move |g1: &([f32; D], [f32; D]), j: usize| e8 * (s1 * at(g1, j) + common[j]),
        move |g0: &([f32; D], [f32; D]), j: usize| e8 * (s0 * at(g0, j) + common[j]),
    )
}

/// Jacobian of x1 = x0 + h f(gbar, q_m) at the converged `x1` (implicit
/// function theorem): (I - h(B dgbar/dx1 + C/2)) J = I + h(B dgbar/dx0 + C/2)
/// with B = J - R(q_m), C = df/dq_m. `corrected` selects the discrete
/// gradient; otherwise gbar = dH/dx(m) (implicit midpoint).
fn implicit_jacobian<const D: usize, const S: usize, H: Tangent<D> + ?Sized>(
    ham: &H,
    x0: &State<D>,
    x1: &State<D>,
    u: &[f32],
    h: f32,
    corrected: bool,
) -> Result<Mat<S>, ObserverError> {
    let n = x0.dof();
    let k = 2 * n;
    let mut mid = *x0;
    for i in 0..n {
        mid.q[i] = 0.5 * (x0.q[i] + x1.q[i]);
        mid.p[i] = 0.5 * (x0.p[i] + x1.p[i]);
    }
    let (gb1, gb0, gbar) = discrete_gradient_parts::<D, S, H>(ham, x0, x1, &mid, corrected)?;
    let (b, c) = field_parts::<D, S, H>(ham, &mid.q, &gbar, u);
    let (a1, a0) = (linalg::mul(&b, &gb1, k), linalg::mul(&b, &gb0, k));
    let mut lhs = linalg::identity::<S>(k);
    let mut rhs = linalg::identity::<S>(k);
    for i in 0..k {
        for j in 0..k {
            lhs[i][j] -= h * (a1[i][j] + 0.5 * c[i][j]);
            rhs[i][j] += h * (a0[i][j] + 0.5 * c[i][j]);
        }
    }
    linalg::solve(&mut lhs, &mut rhs, k).ok_or(ObserverError::SingularJacobian)?;
    Ok(rhs)
}
