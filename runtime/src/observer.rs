//! An extended Kalman filter on the model itself: the prediction is the
//! model's own integrator step and the transition matrix is that step's
//! exact Jacobian (see `jacobian`). Measurements are any subset of
//! positions q_i and velocities v_i = dH/dp_i, each with its own noise
//! variance; a tick without a sample only predicts. The covariance update
//! is Joseph's form, processed one scalar measurement at a time (equal to
//! the batch update for independent noise) and symmetrized after every
//! step, so it stays symmetric positive definite in f32. The process noise
//! may grow with the energy of the estimate (a model's error usually grows
//! with the amplitude of the motion): Q_i(x) = Q0_i + Q1_i max(H(x) - H_ref,
//! 0), H at the state the step starts from. `S` bounds the state dimension
//! 2n; no heap, no panic.

use core::fmt;

use crate::error::StepError;
use crate::integrate::Integrator;
use crate::jacobian;
use crate::linalg::{self, Mat};
use crate::state::State;
use crate::tangent::Tangent;

/// Why an observer call failed. The observer is left unchanged.
#[allow(missing_docs)]
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum ObserverError {
    /// The model refused the state, input or step.
    Step(StepError),
    /// The state dimension 2n exceeds the observer's capacity `S`.
    Capacity { needed: u32, capacity: u32 },
    /// A noise variance (initial, process) at `index` is not finite and > 0
    /// (process noise may be 0).
    BadNoise { index: u32 },
    /// Measurement `index` names a coordinate past the model's, or has a
    /// non-finite value or a variance that is not finite and > 0.
    BadMeasurement { index: u32 },
    /// The innovation buffer is shorter than the measurement list.
    BufferTooShort { needed: u32, given: u32 },
    /// An innovation variance or covariance entry lost positivity or
    /// finiteness (the model diverged or the noise settings are extreme).
    NotPositiveDefinite,
    /// The implicit step's Jacobian equation is singular.
    SingularJacobian,
    /// The energy reference of the energy-scaled process noise is not
    /// finite, or the energy at the estimate is not finite.
    BadEnergy,
}

impl From<StepError> for ObserverError {
    fn from(e: StepError) -> Self {
        Self::Step(e)
    }
}

impl fmt::Display for ObserverError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match *self {
            Self::Step(e) => write!(f, "observer step: {e}"),
            Self::Capacity { needed, capacity } => write!(
                f,
                "the state has {needed} coordinates, the observer is built for at most {capacity}"
            ),
            Self::BadNoise { index } => {
                write!(f, "noise variance {index} must be finite and positive")
            }
            Self::BadMeasurement { index } => write!(
                f,
                "measurement {index}: coordinate out of range, value not finite, or variance not finite and positive"
            ),
            Self::BufferTooShort { needed, given } => {
                write!(f, "innovation buffer holds {given} values, {needed} needed")
            }
            Self::NotPositiveDefinite => {
                f.write_str("covariance lost positive definiteness or finiteness")
            }
            Self::SingularJacobian => f.write_str("the implicit step's Jacobian equation is singular"),
            Self::BadEnergy => f.write_str(
                "the energy reference or the energy at the estimate is not finite",
            ),
        }
    }
}

/// What a measurement observes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum Channel {
    /// Coordinate q_i.
    Position(u8),
    /// Velocity v_i = dH/dp_i.
    Velocity(u8),
}

/// One scalar measurement with its noise variance.
#[derive(Debug, Clone, Copy, PartialEq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct Measurement {
    /// What is measured.
    pub channel: Channel,
    /// The measured value.
    pub value: f32,
    /// Noise variance (finite, > 0).
    pub variance: f32,
}

/// Result of one update.
#[derive(Debug, Clone, Copy, PartialEq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct Update {
    /// Normalized innovation squared nu^T S^-1 nu (chi-square with `count`
    /// degrees of freedom for a consistent filter).
    pub nis: f32,
    /// Number of scalar measurements used.
    pub count: u32,
}

/// The extended Kalman filter over a [`Tangent`] model.
#[derive(Debug, Clone)]
pub struct Observer<'m, H: ?Sized, const D: usize, const S: usize> {
    model: &'m H,
    integrator: Integrator,
    x: State<D>,
    cov: Mat<S>,
    process: [f32; S],
    process_per_energy: [f32; S],
    energy_reference: f32,
    energy_scaled: bool,
    jac: Mat<S>,
}

// Index loops bounded by the active size: no slice length can panic.
#[allow(clippy::manual_memcpy)]
fn unflat<const D: usize, const S: usize>(v: &[f32; S], x: &mut State<D>) {
    let n = x.dof();
    for i in 0..n.min(S / 2) {
        x.q[i] = v[i];
        x.p[i] = v[n + i];
    }
}

fn check_noise(v: &[f32], k: usize, allow_zero: bool) -> Result<(), ObserverError> {
    for i in 0..k {
        let ok = v
            .get(i)
            .is_some_and(|s| s.is_finite() && (*s > 0.0 || (allow_zero && *s == 0.0)));
        if !ok {
            return Err(ObserverError::BadNoise { index: i as u32 });
        }
    }
    Ok(())
}

impl<'m, H: Tangent<D> + ?Sized, const D: usize, const S: usize> Observer<'m, H, D, S> {
    /// An observer at estimate `x0` with diagonal initial covariance
    /// `initial` and diagonal process noise per step `process` (2n values
    /// each, q then p; process noise may be 0), stepping with `integrator`
    /// (for a [`crate::Model`], its own: `model.integrator()`).
    pub fn new(
        model: &'m H,
        integrator: Integrator,
        x0: State<D>,
        initial: &[f32],
        process: &[f32],
    ) -> Result<Self, ObserverError> {
        let n = model.dof();
        if x0.dof() != n {
            return Err(StepError::DofMismatch {
                model: n as u32,
                state: x0.dof() as u32,
            }
            .into());
        }
        if 2 * n > S {
            return Err(ObserverError::Capacity {
                needed: (2 * n) as u32,
                capacity: S as u32,
            });
        }
        if !x0.is_finite() {
            return Err(StepError::NonFiniteState.into());
        }
        check_noise(initial, 2 * n, false)?;
        check_noise(process, 2 * n, true)?;
        let mut cov = [[0.0f32; S]; S];
        let mut q = [0.0f32; S];
        for i in 0..2 * n {
            cov[i][i] = initial[i];
            q[i] = process[i];
        }
        Ok(Self {
            model,
            integrator,
            x: x0,
            cov,
            process: q,
            process_per_energy: [0.0; S],
            energy_reference: 0.0,
            energy_scaled: false,
            jac: linalg::identity(2 * n),
        })
    }

    /// Let the process noise grow with the energy: from now on each step
    /// adds Q_i = process_i + per_energy_i max(H(x) - reference, 0) with
    /// H(x) the model's energy at the state the step starts from
    /// (`per_energy`: 2n variances per unit of energy, q then p, each finite
    /// and >= 0; `reference`: finite, in the model's energy units). All
    /// zeros switch it off. On an error nothing changes.
    pub fn set_energy_scaled_process(
        &mut self,
        per_energy: &[f32],
        reference: f32,
    ) -> Result<(), ObserverError> {
        let k = 2 * self.x.dof();
        check_noise(per_energy, k, true)?;
        if !reference.is_finite() {
            return Err(ObserverError::BadEnergy);
        }
        let mut slope = [0.0f32; S];
        for (i, s) in slope.iter_mut().enumerate().take(k) {
            *s = per_energy[i];
        }
        self.energy_scaled = slope.iter().any(|v| *v > 0.0);
        self.process_per_energy = slope;
        self.energy_reference = reference;
        Ok(())
    }

    /// max(H(x) - reference, 0) at the estimate (0 when the process noise
    /// is not energy-scaled, without evaluating H).
    fn energy_excess(&self) -> Result<f32, ObserverError> {
        if !self.energy_scaled {
            return Ok(0.0);
        }
        let e = self.model.energy(&self.x)? - self.energy_reference;
        if !e.is_finite() {
            return Err(ObserverError::BadEnergy);
        }
        Ok(if e > 0.0 { e } else { 0.0 })
    }

    /// The current estimate.
    pub fn state(&self) -> &State<D> {
        &self.x
    }

    /// The estimate's covariance (leading 2n x 2n block, q then p).
    pub fn covariance(&self) -> &Mat<S> {
        &self.cov
    }

    /// The Jacobian of the last predicted step (identity before the first).
    pub fn jacobian(&self) -> &Mat<S> {
        &self.jac
    }

    /// Predict one step with input `u` (`inputs()` values): x <- step(x),
    /// P <- F P F^T + Q with F the step's exact Jacobian and Q at the
    /// state the step starts from.
    pub fn predict(&mut self, u: &[f32]) -> Result<(), ObserverError> {
        let k = 2 * self.x.dof();
        let excess = self.energy_excess()?;
        let mut x = self.x;
        let f: Mat<S> = jacobian::step_with_jacobian(self.model, &self.integrator, &mut x, u)?;
        let fp = linalg::mul(&f, &self.cov, k);
        let mut cov = linalg::mul_transposed(&fp, &f, k);
        for (i, row) in cov.iter_mut().enumerate().take(k) {
            row[i] += self.process[i] + self.process_per_energy[i] * excess;
        }
        linalg::symmetrize(&mut cov, k);
        if !cov
            .iter()
            .take(k)
            .all(|r| r.iter().take(k).all(|v| v.is_finite()))
        {
            return Err(ObserverError::NotPositiveDefinite);
        }
        self.x = x;
        self.cov = cov;
        self.jac = f;
        Ok(())
    }

    /// Correct the estimate with `meas` (any subset of channels, possibly
    /// empty: a missed sample). `innov` receives each measurement's
    /// innovation z - h(x) at the predicted state. Scalar measurements are
    /// processed in order with Joseph's covariance form, linearized at the
    /// predicted state, which equals the batch update; the NIS is the sum
    /// of the scalar terms nu_k^2 / s_k.
    pub fn update(
        &mut self,
        meas: &[Measurement],
        innov: &mut [f32],
    ) -> Result<Update, ObserverError> {
        let n = self.x.dof();
        let k = 2 * n;
        if innov.len() < meas.len() {
            return Err(ObserverError::BufferTooShort {
                needed: meas.len() as u32,
                given: innov.len() as u32,
            });
        }
        for (i, m) in meas.iter().enumerate() {
            let c = match m.channel {
                Channel::Position(c) | Channel::Velocity(c) => c as usize,
            };
            if c >= n || !m.value.is_finite() || !m.variance.is_finite() || m.variance <= 0.0 {
                return Err(ObserverError::BadMeasurement { index: i as u32 });
            }
        }
        let xp = jacobian::flat::<D, S>(&self.x);
        let (mut gq, mut gp) = ([0.0f32; D], [0.0f32; D]);
        let mut hess = [[0.0f32; S]; S];
        if meas
            .iter()
            .any(|m| matches!(m.channel, Channel::Velocity(_)))
        {
            self.model.gradient(&self.x, &mut gq, &mut gp)?;
            hess = jacobian::hessian::<D, S, H>(self.model, &self.x)?;
        }
        let mut xc = xp;
        let mut cov = self.cov;
        let mut nis = 0.0f32;
        for (idx, m) in meas.iter().enumerate() {
            let mut row = [0.0f32; S];
            let predicted = match m.channel {
                Channel::Position(c) => {
                    row[c as usize] = 1.0;
                    xp[c as usize]
                }
                Channel::Velocity(c) => {
                    row[..k].copy_from_slice(&hess[n + c as usize][..k]);
                    gp[c as usize]
                }
            };
            let z0 = m.value - predicted;
            innov[idx] = z0;
            let mut nu = z0;
            for i in 0..k {
                nu -= row[i] * (xc[i] - xp[i]);
            }
            nis += scalar_update(&mut cov, &mut xc, &row, nu, m.variance, k)?;
        }
        let mut x = self.x;
        unflat(&xc, &mut x);
        if !x.is_finite() || !nis.is_finite() {
            return Err(ObserverError::NotPositiveDefinite);
        }
        self.x = x;
        self.cov = cov;
        Ok(Update {
            nis,
            count: meas.len() as u32,
        })
    }
}

/// One scalar Kalman update with row `h`, innovation `nu` and variance `r`,
/// Joseph's form P <- (I - K h) P (I - K h)^T + r K K^T, symmetrized.
/// Returns nu^2 / s.
fn scalar_update<const S: usize>(
    cov: &mut Mat<S>,
    x: &mut [f32; S],
    h: &[f32; S],
    nu: f32,
    r: f32,
    k: usize,
) -> Result<f32, ObserverError> {
    // ph = P h^T, hp = h P (equal for a symmetric P; both kept exact).
    let (mut ph, mut hp) = ([0.0f32; S], [0.0f32; S]);
    for i in 0..k {
        let (mut a, mut b) = (0.0f32, 0.0f32);
        for j in 0..k {
            a += cov[i][j] * h[j];
            b += h[j] * cov[j][i];
        }
        ph[i] = a;
        hp[i] = b;
    }
    let mut s = r;
    for i in 0..k {
        s += h[i] * ph[i];
    }
    if s.is_nan() || s <= 0.0 || !s.is_finite() {
        return Err(ObserverError::NotPositiveDefinite);
    }
    let mut gain = [0.0f32; S];
    for i in 0..k {
        gain[i] = ph[i] / s;
        x[i] += gain[i] * nu;
    }
    // A = (I - K h) P, then P = A - (A h^T) K^T + r K K^T.
    let mut a = *cov;
    for i in 0..k {
        for j in 0..k {
            a[i][j] -= gain[i] * hp[j];
        }
    }
    for i in 0..k {
        let mut ah = 0.0f32;
        for j in 0..k {
            ah += a[i][j] * h[j];
        }
        for j in 0..k {
            cov[i][j] = a[i][j] - ah * gain[j] + r * gain[i] * gain[j];
        }
    }
    linalg::symmetrize(cov, k);
    Ok(nu * nu / s)
}
