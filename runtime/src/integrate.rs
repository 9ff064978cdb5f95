//! Time steppers: Stormer-Verlet and Yoshida's fourth-order composition for
//! separable systems, implicit midpoint for general ones, a discrete-gradient
//! method for damped and driven (port-Hamiltonian) systems, and classical
//! RK4 as a non-symplectic reference. All loops are bounded; a failed step
//! returns an error and leaves the state as it was.

use serde::{Deserialize, Serialize};

use crate::error::StepError;
use crate::hamiltonian::Hamiltonian;
use crate::state::State;

/// Largest number of substeps per step accepted in settings.
pub const MAX_SUBSTEPS: u16 = 1024;
/// Largest fixed-point iteration limit accepted for implicit midpoint.
pub const MAX_ITERATIONS: u16 = 1000;
/// Smallest time step accepted in settings, in seconds (with
/// [`MAX_SUBSTEPS`] the substep stays far above the subnormal range).
pub const MIN_DT: f32 = 1e-12;
/// Largest time step accepted in settings, in seconds (about 11.6 days).
pub const MAX_DT: f32 = 1e6;
/// Smallest relative tolerance accepted for the implicit methods.
pub const MIN_TOLERANCE: f32 = 1e-12;
/// Largest relative tolerance accepted for the implicit methods.
pub const MAX_TOLERANCE: f32 = 1.0;

/// Integration method. The discriminants are part of the blob format:
/// append new methods, never reorder.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum Method {
    /// Stormer-Verlet, kick-drift-kick (order 2, symplectic, separable only).
    StormerVerlet,
    /// Yoshida's 4th-order triple-jump composition of Stormer-Verlet
    /// (symplectic, separable only).
    Yoshida4,
    /// Implicit midpoint rule (order 2, symplectic, any Hamiltonian), solved by
    /// bounded fixed-point iteration.
    ImplicitMidpoint,
    /// Classical Runge-Kutta 4 (order 4, not symplectic; a reference).
    Rk4,
    /// Gonzalez's discrete-gradient method (order 2, any Hamiltonian):
    /// H(x1) - H(x0) = -h |L^T g|^2 + h g^T G u exactly for the discrete
    /// gradient g, so with R = L L^T and no input the energy never rises
    /// (up to round-off) and without R it is conserved. Solved by bounded
    /// fixed-point iteration. Format version 2.
    DiscreteGradient,
}

impl Method {
    /// True for methods that need H = T(p) + V(q).
    pub fn needs_separable(self) -> bool {
        matches!(self, Self::StormerVerlet | Self::Yoshida4)
    }

    /// Whether this build steps the method (its cargo feature is on).
    pub fn is_built(self) -> bool {
        match self {
            Self::StormerVerlet => cfg!(feature = "verlet"),
            Self::Yoshida4 => cfg!(feature = "yoshida4"),
            Self::ImplicitMidpoint => cfg!(feature = "midpoint"),
            Self::Rk4 => cfg!(feature = "rk4"),
            Self::DiscreteGradient => cfg!(feature = "discrete-gradient"),
        }
    }

    /// True for methods that step the whole field (J - R) dH/dx + G u;
    /// the explicit symplectic methods only step J dH/dx.
    pub fn handles_port_terms(self) -> bool {
        !self.needs_separable()
    }

    /// Gradient evaluations of one step of `substeps` substeps: for the
    /// separable methods (potential, kinetic) gradients, the potential one
    /// at the end of a Verlet stage reused by the next stage's first kick;
    /// for the others full gradients (for the implicit methods, the bound
    /// at `max_iterations`).
    pub fn gradient_calls(self, max_iterations: u16, substeps: u16) -> (u32, u32) {
        let s = substeps as u32;
        let it = max_iterations as u32;
        match self {
            Self::StormerVerlet => (s + 1, s),
            Self::Yoshida4 => (3 * s + 1, 3 * s),
            Self::ImplicitMidpoint => ((1 + it) * s, 0),
            Self::Rk4 => (4 * s, 0),
            // A gradient and an energy (a forward pass, half a gradient) per
            // iteration and for the start.
            Self::DiscreteGradient => ((3 * (1 + it)).div_ceil(2) * s, 0),
        }
    }
}

/// How a model is stepped: stored in the blob, overridable on the host.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct Integrator {
    /// The method.
    pub method: Method,
    /// Time step of one `step` call, in seconds.
    pub dt: f32,
    /// Substeps per step (the method runs with dt / substeps).
    pub substeps: u16,
    /// Iteration limit for implicit midpoint.
    pub max_iterations: u16,
    /// Relative tolerance for implicit midpoint: stop when every component
    /// changes by at most `tolerance * (1 + |x_i|)`.
    pub tolerance: f32,
}

/// Yoshida (1990) triple-jump weights: w1 = 1 / (2 - 2^(1/3)),
/// w0 = -2^(1/3) / (2 - 2^(1/3)).
#[cfg(feature = "yoshida4")]
pub(crate) const YOSHIDA_W1: f32 = 1.351_207_2;
#[cfg(feature = "yoshida4")]
pub(crate) const YOSHIDA_W0: f32 = -1.702_414_4;

impl Integrator {
    /// Settings with common defaults for `method` and step `dt`: one
    /// substep, 50 iterations, tolerance 1e-6.
    pub fn new(method: Method, dt: f32) -> Self {
        Self {
            method,
            dt,
            substeps: 1,
            max_iterations: 50,
            tolerance: 1e-6,
        }
    }

    /// Whether the numbers are in range.
    pub fn is_valid(&self) -> bool {
        (MIN_DT..=MAX_DT).contains(&self.dt)
            && (1..=MAX_SUBSTEPS).contains(&self.substeps)
            && (1..=MAX_ITERATIONS).contains(&self.max_iterations)
            && (MIN_TOLERANCE..=MAX_TOLERANCE).contains(&self.tolerance)
    }

    /// Advance `x` by `dt` with no input. On error `x` is unchanged.
    pub fn step<const D: usize, H: Hamiltonian<D> + ?Sized>(
        &self,
        h: &H,
        x: &mut State<D>,
    ) -> Result<(), StepError> {
        let zeros = [0.0f32; crate::MAX_INPUTS];
        self.step_driven(h, x, &zeros[..h.inputs().min(zeros.len())])
    }

    /// Advance `x` by `dt` with input `u` held constant over the step
    /// (`h.inputs()` values). On error `x` is unchanged.
    pub fn step_driven<const D: usize, H: Hamiltonian<D> + ?Sized>(
        &self,
        h: &H,
        x: &mut State<D>,
        u: &[f32],
    ) -> Result<(), StepError> {
        if !self.is_valid() {
            return Err(StepError::BadSettings);
        }
        if x.dof() != h.dof() {
            return Err(StepError::DofMismatch {
                model: h.dof() as u32,
                state: x.dof() as u32,
            });
        }
        if u.len() != h.inputs() {
            return Err(StepError::InputMismatch {
                model: h.inputs() as u32,
                given: u.len() as u32,
            });
        }
        if !x.is_finite() || !u.iter().all(|v| v.is_finite()) {
            return Err(StepError::NonFiniteState);
        }
        if self.method.needs_separable() && !h.is_separable() {
            return Err(StepError::NotSeparable);
        }
        if h.has_port_terms() && !self.method.handles_port_terms() {
            return Err(StepError::MethodIgnoresPortTerms);
        }
        let hs = self.dt / self.substeps as f32;
        let mut y = *x;
        // dV/dq at the current q, carried from one Verlet stage's last kick
        // to the next stage's first kick (same q, same bits).
        let mut dv: Option<[f32; D]> = None;
        #[cfg(not(any(feature = "verlet", feature = "yoshida4")))]
        let _ = &mut dv;
        for _ in 0..self.substeps {
            match self.method {
                #[cfg(feature = "verlet")]
                Method::StormerVerlet => verlet(h, &mut y, hs, &mut dv)?,
                #[cfg(feature = "yoshida4")]
                Method::Yoshida4 => {
                    verlet(h, &mut y, YOSHIDA_W1 * hs, &mut dv)?;
                    verlet(h, &mut y, YOSHIDA_W0 * hs, &mut dv)?;
                    verlet(h, &mut y, YOSHIDA_W1 * hs, &mut dv)?;
                }
                #[cfg(feature = "midpoint")]
                Method::ImplicitMidpoint => {
                    implicit_midpoint(h, &mut y, u, hs, self.max_iterations, self.tolerance)?
                }
                #[cfg(feature = "rk4")]
                Method::Rk4 => rk4(h, &mut y, u, hs)?,
                #[cfg(feature = "discrete-gradient")]
                Method::DiscreteGradient => {
                    discrete_gradient(h, &mut y, u, hs, self.max_iterations, self.tolerance)?
                }
                // A method this build leaves out (a model refuses it at
                // parse time; this covers other `Hamiltonian`s).
                #[allow(unreachable_patterns)]
                _ => return Err(StepError::BadSettings),
            }
            if !y.is_finite() {
                return Err(StepError::Diverged);
            }
        }
        *x = y;
        Ok(())
    }
}

/// One kick-drift-kick Stormer-Verlet step of size `h`. `dv` holds dV/dq
/// at `x.q` when known (it is then not recomputed) and returns it at the
/// new `x.q`.
#[cfg(any(feature = "verlet", feature = "yoshida4"))]
fn verlet<const D: usize, H: Hamiltonian<D> + ?Sized>(
    ham: &H,
    x: &mut State<D>,
    h: f32,
    dv: &mut Option<[f32; D]>,
) -> Result<(), StepError> {
    let n = x.dof();
    let half = 0.5 * h;
    let g = match dv.take() {
        Some(g) => g,
        None => {
            let mut g = [0.0f32; D];
            ham.potential_gradient(&x.q, &mut g)?;
            g
        }
    };
    for i in 0..n {
        x.p[i] -= half * g[i];
    }
    let mut v = [0.0f32; D];
    ham.kinetic_gradient(&x.p, &mut v)?;
    for i in 0..n {
        x.q[i] += h * v[i];
    }
    let mut g = [0.0f32; D];
    ham.potential_gradient(&x.q, &mut g)?;
    for i in 0..n {
        x.p[i] -= half * g[i];
    }
    *dv = Some(g);
    Ok(())
}

/// Bounded fixed-point iteration for an implicit step x1 = x0 + h F(x1):
/// starts from the explicit Euler guess x0 + h `f0`, and in each of at most
/// `max_iter` passes lets `field(mid, x1, fq, fp)` compute F (given the
/// midpoint (x0 + x1) / 2 and the current x1), until every component moves
/// by at most `tol * (1 + |x_i|)`.
#[cfg(any(feature = "midpoint", feature = "discrete-gradient"))]
fn fixed_point<const D: usize>(
    x: &mut State<D>,
    h: f32,
    max_iter: u16,
    tol: f32,
    f0: (&[f32; D], &[f32; D]),
    mut field: impl FnMut(&State<D>, &State<D>, &mut [f32; D], &mut [f32; D]) -> Result<(), StepError>,
) -> Result<(), StepError> {
    let n = x.dof();
    let x0 = *x;
    let mut x1 = x0;
    for i in 0..n {
        x1.q[i] = x0.q[i] + h * f0.0[i];
        x1.p[i] = x0.p[i] + h * f0.1[i];
    }
    let (mut fq, mut fp) = ([0.0f32; D], [0.0f32; D]);
    let mut mid = x0;
    for _ in 0..max_iter {
        for i in 0..n {
            mid.q[i] = 0.5 * (x0.q[i] + x1.q[i]);
            mid.p[i] = 0.5 * (x0.p[i] + x1.p[i]);
        }
        if !mid.is_finite() {
            return Err(StepError::Diverged);
        }
        field(&mid, &x1, &mut fq, &mut fp)?;
        let mut converged = true;
        for i in 0..n {
            let q = x0.q[i] + h * fq[i];
            let p = x0.p[i] + h * fp[i];
            converged &= (q - x1.q[i]).abs() <= tol * (1.0 + q.abs());
            converged &= (p - x1.p[i]).abs() <= tol * (1.0 + p.abs());
            x1.q[i] = q;
            x1.p[i] = p;
        }
        if converged {
            *x = x1;
            return Ok(());
        }
    }
    Err(StepError::NotConverged {
        iterations: max_iter,
    })
}

/// One implicit midpoint step x1 = x0 + h f((x0 + x1) / 2).
#[cfg(feature = "midpoint")]
fn implicit_midpoint<const D: usize, H: Hamiltonian<D> + ?Sized>(
    ham: &H,
    x: &mut State<D>,
    u: &[f32],
    h: f32,
    max_iter: u16,
    tol: f32,
) -> Result<(), StepError> {
    let (mut fq, mut fp) = ([0.0f32; D], [0.0f32; D]);
    ham.vector_field_driven(x, u, &mut fq, &mut fp)?;
    fixed_point(x, h, max_iter, tol, (&fq, &fp), |mid, _, fq, fp| {
        ham.vector_field_driven(mid, u, fq, fp)
    })
}

/// One classical fourth-order Runge-Kutta step.
#[cfg(feature = "rk4")]
fn rk4<const D: usize, H: Hamiltonian<D> + ?Sized>(
    ham: &H,
    x: &mut State<D>,
    u: &[f32],
    h: f32,
) -> Result<(), StepError> {
    let n = x.dof();
    let x0 = *x;
    let mut k = [([0.0f32; D], [0.0f32; D]); 4];
    let mut stage = x0;
    let weights = [0.5 * h, 0.5 * h, h];
    for s in 0..4 {
        let (kq, kp) = &mut k[s];
        ham.vector_field_driven(&stage, u, kq, kp)?;
        if s < 3 {
            for i in 0..n {
                stage.q[i] = x0.q[i] + weights[s] * kq[i];
                stage.p[i] = x0.p[i] + weights[s] * kp[i];
            }
        }
    }
    let sixth = h / 6.0;
    for i in 0..n {
        x.q[i] = x0.q[i] + sixth * (k[0].0[i] + 2.0 * k[1].0[i] + 2.0 * k[2].0[i] + k[3].0[i]);
        x.p[i] = x0.p[i] + sixth * (k[0].1[i] + 2.0 * k[1].1[i] + 2.0 * k[2].1[i] + k[3].1[i]);
    }
    Ok(())
}

/// One step of Gonzalez's discrete-gradient method (Gonzalez, J. Nonlinear
/// Sci. 6, 1996; McLachlan, Quispel & Robidoux, Phil. Trans. R. Soc. A 357,
/// 1999): x1 = x0 + h f(gbar), f(g) = (J - R) g + G u, with the discrete
/// gradient gbar = dH/dx(m) + c W d, m = (x0 + x1) / 2, d = x1 - x0,
/// c = (H(x1) - H(x0) - dH/dx(m) . d) / (d . W d), W the system's metric.
/// Then gbar . d = H(x1) - H(x0) holds by construction. Where the
/// residual the correction divides is at f32 round-off (`roundoff_level`),
/// the correction is faded out (`correction_share`) towards the midpoint
/// gradient, gbar's limit as x1 -> x0, so the identity holds to within that
/// round-off. Fixed-point iteration from the explicit Euler guess, at most
/// `max_iter` times.
#[cfg(feature = "discrete-gradient")]
fn discrete_gradient<const D: usize, H: Hamiltonian<D> + ?Sized>(
    ham: &H,
    x: &mut State<D>,
    u: &[f32],
    h: f32,
    max_iter: u16,
    tol: f32,
) -> Result<(), StepError> {
    let n = x.dof();
    let x0 = *x;
    let h0 = ham.energy(&x0)?;
    let (mut wq, mut wp) = ([1.0f32; D], [1.0f32; D]);
    ham.metric(&mut wq, &mut wp);
    let (mut gq, mut gp) = ([0.0f32; D], [0.0f32; D]);
    let (mut fq, mut fp) = ([0.0f32; D], [0.0f32; D]);
    ham.gradient(&x0, &mut gq, &mut gp)?;
    ham.field_from_gradient(&x0.q, &gq, &gp, u, &mut fq, &mut fp);
    fixed_point(x, h, max_iter, tol, (&fq, &fp), |mid, x1, fq, fp| {
        let (mut gq, mut gp) = ([0.0f32; D], [0.0f32; D]);
        ham.gradient(mid, &mut gq, &mut gp)?;
        let h1 = ham.energy(x1)?;
        // c = (H1 - H0 - g . d) / (d . W d), accumulated in index order.
        let (mut gd, mut dwd) = (0.0f32, 0.0f32);
        for i in 0..n {
            let (dq, dp) = (x1.q[i] - x0.q[i], x1.p[i] - x0.p[i]);
            gd += gq[i] * dq;
            gd += gp[i] * dp;
            dwd += wq[i] * dq * dq;
            dwd += wp[i] * dp * dp;
        }
        let resid = h1 - h0 - gd;
        let level = roundoff_level(h0, h1, ham.energy_term_size(), mid, &gq, &gp);
        let share = correction_share(resid, level);
        if dwd > 0.0 && dwd.is_finite() && share > 0.0 {
            let c = share * resid / dwd;
            for i in 0..n {
                gq[i] += c * wq[i] * (x1.q[i] - x0.q[i]);
                gp[i] += c * wp[i] * (x1.p[i] - x0.p[i]);
            }
        }
        ham.field_from_gradient(&mid.q, &gq, &gp, u, fq, fp);
        Ok(())
    })
}

/// The f32 round-off level of the discrete gradient's residual
/// H(x1) - H(x0) - dH/dx(m) . d:
/// 8 eps (|H(x0)| + |H(x1)| + 2 E_t + 2 sum |m_i g_i|) with g = dH/dx(m) and
/// E_t the size of the terms H is summed from (`energy_term_size`). The
/// energies carry the network's arbitrary constant and are sums of terms
/// that cancel, so |H| and E_t, not the energy change, set the first parts
/// (with |H| alone the level vanished where H crosses zero); the last is the
/// energy's sensitivity to the rounding of its f32 inputs (the condition of
/// evaluating H: a relative change eps in each coordinate moves H by up to
/// eps sum |x_i dH/dx_i|, Higham, Accuracy and Stability of Numerical
/// Algorithms, 2002, sec. 1.6), which dominates where |H| is small against
/// its slope, e.g. near a zero of H or near rest far from the origin.
#[cfg(feature = "discrete-gradient")]
pub(crate) fn roundoff_level<const D: usize>(
    h0: f32,
    h1: f32,
    terms: f32,
    mid: &State<D>,
    gq: &[f32; D],
    gp: &[f32; D],
) -> f32 {
    let inputs = input_sensitivity(mid, gq, gp);
    8.0 * f32::EPSILON * (h0.abs() + h1.abs() + 2.0 * terms + 2.0 * inputs)
}

/// sum |m_i g_i| over the 2n coordinates of `mid`, in index order.
#[cfg(feature = "discrete-gradient")]
pub(crate) fn input_sensitivity<const D: usize>(
    mid: &State<D>,
    gq: &[f32; D],
    gp: &[f32; D],
) -> f32 {
    let mut s = 0.0f32;
    for i in 0..mid.dof() {
        s += (mid.q[i] * gq[i]).abs();
        s += (mid.p[i] * gp[i]).abs();
    }
    s
}

/// The share of the difference-quotient correction c W d, c = resid / (d . W d),
/// the discrete gradient keeps: none while |resid| is at most the round-off
/// level `noise` (it is then noise, amplified by 1 / |d|, and the midpoint
/// gradient, the discrete gradient's limit as x1 -> x0, is kept), all of it
/// from twice that level, and a linear ramp between. A hard switch at one
/// level made the fixed-point map jump by noise / |d| there, and iterates
/// whose residual sat at the level alternated between the two branches
/// without converging (measured on the damped demo blobs); the ramp keeps
/// the map continuous. Outside the ramp the step is Gonzalez's; inside it
/// the energy identity still holds to within 2 `noise`. A NaN residual
/// keeps no correction.
#[cfg(feature = "discrete-gradient")]
pub(crate) fn correction_share(resid: f32, noise: f32) -> f32 {
    let r = resid.abs();
    if r.partial_cmp(&noise) != Some(core::cmp::Ordering::Greater) {
        0.0 // at or below the level, or NaN
    } else if r >= 2.0 * noise {
        1.0
    } else {
        (r - noise) / noise
    }
}

/// The slopes of k = `correction_share`(resid, noise) * resid with respect
/// to resid and to noise (for the step's exact Jacobian): (share, 0) off the
/// ramp, (share + |resid| / noise, -resid |resid| / noise^2) on it.
#[cfg(feature = "observer")]
pub(crate) fn correction_slopes(resid: f32, noise: f32) -> (f32, f32) {
    let share = correction_share(resid, noise);
    let r = resid.abs();
    if share > 0.0 && share < 1.0 {
        (share + r / noise, -resid * r / (noise * noise))
    } else {
        (share, 0.0)
    }
}
