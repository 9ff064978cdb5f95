//! Health flags beside the observer, each a plain value; nothing stops
//! stepping. (1) The normalized innovation squared summed over a sliding
//! window of `N` updates against the two-sided chi-square interval for the
//! window's measurement count at a user-chosen false-alarm rate (quantiles
//! by the Wilson-Hilferty cube-root normal approximation from a small
//! table of normal quantiles); (2) out-of-envelope: the estimate outside
//! per-coordinate bounds, the blob's training envelope when it carries one
//! ([`Envelope::of_model_or`]), else bounds the caller passes; (3) for
//! damped or driven models the energy-balance
//! residual over the window: H(x_k) - H(x_(k-N)) minus the sum of
//! h g . f(g, u) = h (-|L^T g|^2 + g^T G u).

use crate::error::StepError;
use crate::format::TrainingEnvelope;
use crate::hamiltonian::Hamiltonian;
use crate::model::Model;
use crate::state::State;

/// Two-sided false-alarm rate of the NIS window test.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum FalseAlarm {
    /// 10 % (5 % per tail).
    TenPercent,
    /// 5 %.
    FivePercent,
    /// 1 %.
    OnePercent,
    /// 0.2 %.
    PointTwoPercent,
}

impl FalseAlarm {
    /// Standard normal quantile of the upper tail alpha / 2 (values as
    /// tabulated in the NIST/SEMATECH e-Handbook normal table, more digits
    /// from memory).
    pub fn normal_quantile(self) -> f32 {
        match self {
            Self::TenPercent => 1.644_854,
            Self::FivePercent => 1.959_964,
            Self::OnePercent => 2.575_829,
            Self::PointTwoPercent => 3.090_232,
        }
    }
}

/// Square root by Newton's method from a bit-level first guess (only
/// + - * / and bit operations, so it is bit-identical on every target).
fn sqrt(x: f32) -> f32 {
    if x.is_nan() || x <= 0.0 || !x.is_finite() {
        return if x == 0.0 { 0.0 } else { f32::NAN };
    }
    let mut y = f32::from_bits((x.to_bits() >> 1) + 0x1fbd_1df5);
    for _ in 0..4 {
        y = 0.5 * (y + x / y);
    }
    y
}

/// The chi-square quantile with `k` degrees of freedom at standard normal
/// quantile `z` (Wilson and Hilferty, PNAS 17, 1931):
/// k (1 - 2/(9k) + z sqrt(2/(9k)))^3.
pub fn chi_square_quantile(k: u32, z: f32) -> f32 {
    if k == 0 {
        return 0.0;
    }
    let a = 2.0 / (9.0 * k as f32);
    let c = 1.0 - a + z * sqrt(a);
    let c = if c > 0.0 { c } else { 0.0 };
    k as f32 * c * c * c
}

/// Per-coordinate bounds of the region a model was trained on.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Envelope<const D: usize> {
    /// Lower bounds of q and p.
    pub low: ([f32; D], [f32; D]),
    /// Upper bounds of q and p.
    pub high: ([f32; D], [f32; D]),
}

impl<const D: usize> Envelope<D> {
    /// The bounds a blob's training envelope states (q1..qn, p1..pn; with
    /// n = half its coordinates, at most `D` of them used).
    pub fn from_training(t: &TrainingEnvelope<'_>) -> Self {
        let n = t.coordinates() / 2;
        let mut e = Self {
            low: ([0.0; D], [0.0; D]),
            high: ([0.0; D], [0.0; D]),
        };
        for i in 0..n.min(D) {
            e.low.0[i] = t.lower.get(i);
            e.low.1[i] = t.lower.get(n + i);
            e.high.0[i] = t.upper.get(i);
            e.high.1[i] = t.upper.get(n + i);
        }
        e
    }

    /// The blob's training envelope when `model` carries one, else
    /// `fallback` (the caller's bounds).
    pub fn of_model_or<const W: usize>(model: &Model<'_, D, W>, fallback: Self) -> Self {
        model
            .envelope()
            .map_or(fallback, |t| Self::from_training(&t))
    }

    /// Whether every active coordinate of `x` lies within the bounds.
    pub fn contains(&self, x: &State<D>) -> bool {
        (0..x.dof()).all(|i| {
            (self.low.0[i]..=self.high.0[i]).contains(&x.q[i])
                && (self.low.1[i]..=self.high.1[i]).contains(&x.p[i])
        })
    }
}

/// The power g . f(g, u) = -|L^T g|^2 + g^T G u at `x` (zero for a
/// conservative, undriven model up to round-off).
pub fn power<const D: usize, H: Hamiltonian<D> + ?Sized>(
    h: &H,
    x: &State<D>,
    u: &[f32],
) -> Result<f32, StepError> {
    let (mut gq, mut gp) = ([0.0f32; D], [0.0f32; D]);
    h.gradient(x, &mut gq, &mut gp)?;
    let (mut fq, mut fp) = ([0.0f32; D], [0.0f32; D]);
    h.field_from_gradient(&x.q, &gq, &gp, u, &mut fq, &mut fp);
    let mut acc = 0.0f32;
    for i in 0..x.dof() {
        acc += gq[i] * fq[i];
        acc += gp[i] * fp[i];
    }
    Ok(acc)
}

/// The flags after one tick.
#[derive(Debug, Clone, Copy, PartialEq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct Health {
    /// NIS summed over the window.
    pub nis_sum: f32,
    /// Scalar measurements in the window (the chi-square's degrees of freedom).
    pub dof: u32,
    /// The window is full and its NIS sum exceeds the upper bound (the
    /// model predicts worse than its noise settings say).
    pub nis_high: bool,
    /// The window is full and its NIS sum is below the lower bound (noise
    /// settings too pessimistic).
    pub nis_low: bool,
    /// The estimate left the envelope.
    pub out_of_envelope: bool,
    /// Energy change over the window minus the change the port terms
    /// account for (0 until the window is full).
    pub energy_residual: f32,
    /// |energy_residual| exceeds the caller's threshold.
    pub energy_flag: bool,
}

/// Sliding-window health monitor over `N` ticks.
#[derive(Debug, Clone)]
pub struct Monitor<const N: usize> {
    alarm: FalseAlarm,
    energy_threshold: f32,
    nis: [f32; N],
    dof: [u32; N],
    energy: [f32; N],
    work: [f32; N],
    head: usize,
    filled: usize,
}

impl<const N: usize> Monitor<N> {
    /// A monitor with false-alarm rate `alarm` and energy-residual
    /// threshold `energy_threshold` (in the model's energy units).
    pub fn new(alarm: FalseAlarm, energy_threshold: f32) -> Self {
        Self {
            alarm,
            energy_threshold,
            nis: [0.0; N],
            dof: [0; N],
            energy: [0.0; N],
            work: [0.0; N],
            head: 0,
            filled: 0,
        }
    }

    /// Record one tick: the update's NIS and measurement count (0, 0 for a
    /// missed sample), the estimate's energy H(x_k), the step's expected
    /// energy change h g . f(g, u) (see [`power`]) and whether the estimate
    /// is inside the envelope. Returns the flags.
    pub fn record(&mut self, nis: f32, count: u32, energy: f32, work: f32, inside: bool) -> Health {
        if N == 0 {
            return Health {
                nis_sum: nis,
                dof: count,
                nis_high: false,
                nis_low: false,
                out_of_envelope: !inside,
                energy_residual: 0.0,
                energy_flag: false,
            };
        }
        // The oldest entry is overwritten: its energy starts the window.
        let oldest_energy = self.energy[self.head];
        self.nis[self.head] = nis;
        self.dof[self.head] = count;
        self.energy[self.head] = energy;
        self.work[self.head] = work;
        self.head = (self.head + 1) % N;
        let full = self.filled == N;
        self.filled = (self.filled + 1).min(N);
        let (mut sum, mut dof, mut w) = (0.0f32, 0u32, 0.0f32);
        for k in 0..N {
            sum += self.nis[k];
            dof += self.dof[k];
            w += self.work[k];
        }
        let z = self.alarm.normal_quantile();
        let window_full = self.filled == N && dof > 0;
        let residual = if full {
            energy - oldest_energy - w
        } else {
            0.0
        };
        Health {
            nis_sum: sum,
            dof,
            nis_high: window_full && sum > chi_square_quantile(dof, z),
            nis_low: window_full && sum < chi_square_quantile(dof, -z),
            out_of_envelope: !inside,
            energy_residual: residual,
            energy_flag: residual.is_nan() || residual.abs() > self.energy_threshold,
        }
    }
}
