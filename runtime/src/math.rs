//! Deterministic elementary functions for the activations.
//!
//! Every function here is built from IEEE-754 single-precision `+ - * /`,
//! comparisons, integer casts and bit manipulation only. Those operations are
//! correctly rounded on every conforming target, so the x86_64 host and a
//! Cortex-M4F compute the same bits. The one helper taken from `micromath` is
//! `floor`, an exact bit-level operation, called through its trait explicitly:
//! in a crate that links `std`, `x.floor()` would silently pick std's method.
//!
//! `tanh` is a rational half-angle value and the double-angle formula (see
//! [`tanh`]); its coefficients come from `runtime/tools/fit_tanh.py`
//! (numpy): a weighted minimax fit of the half-angle correction, by
//! linearised least squares iterated towards equal ripple
//! (Sanathanan-Koerner with Lawson's weights), 1.5e-8 relative in tanh
//! before rounding, then rounded to f32 and adjusted by a few ulp to
//! minimise the f32 program's own worst error over every f32 in [0.5, 9].
//! 25 emulated Cortex-M4F instructions per call against the
//! 51 of the `expm1` form it replaced (bench/README.md).
//!
//! Accuracy (measured by `tests/activation_accuracy.rs` against `f64` from
//! Rust's standard library, 2,000,001 points each): `tanh` within 1.08e-7
//! absolute over [-12, 12] (1.80 f32 ulp near 1; over every f32 in [0, 9.5]
//! 1.94 ulp, by a float32 simulation in numpy) and within 1.8e-7
//! relative for 0 < |x| <= 1; odd bit for bit, |tanh| <= 1; not monotone at
//! the last bit (neither was the `expm1` form): some consecutive f32 inputs
//! step down by up to 2 ulp. `exp` within 9.3e-8 relative over [-80, 80];
//! `softplus` and `sigmoid` within 2.4e-7 relative over [-30, 30].
//! `micromath`'s own `exp` was not used: it truncates its series after four
//! terms (about 1e-3 relative error) and is discontinuous where the binary
//! exponent changes, which would make the learned vector field jump.

use micromath::F32Ext;

/// High and low parts of ln 2 for Cody-Waite range reduction (the split used
/// by fdlibm, common practice): `LN2_HI` has trailing zero bits, so `k * LN2_HI`
/// is exact for the exponents reached here.
const LN2_HI: f32 = 6.931_457_5e-1;
const LN2_LO: f32 = 1.428_606_8e-6;
const INV_LN2: f32 = core::f32::consts::LOG2_E;
const HALF_LN2: f32 = 0.346_573_6;

/// `e^x`. Returns 0 below -87 (instead of a subnormal) and +inf above 88.
pub fn exp(x: f32) -> f32 {
    if x.is_nan() {
        return x;
    }
    if x > 88.0 {
        return f32::INFINITY;
    }
    if x < -87.0 {
        return 0.0;
    }
    // x = k ln2 + r, |r| <= ln2 / 2; the cast is exact since |k| <= 127.
    let k = F32Ext::floor(x * INV_LN2 + 0.5);
    let r = (x - k * LN2_HI) - k * LN2_LO;
    let er = 1.0 + expm1_series(r);
    er * pow2(k as i32)
}

/// `e^x - 1` without cancellation near zero.
pub fn expm1(x: f32) -> f32 {
    if x.abs() < HALF_LN2 {
        expm1_series(x)
    } else {
        exp(x) - 1.0
    }
}

/// Taylor series of `e^r - 1` to degree 9 (truncation error below 1e-10
/// relative for |r| <= ln 2 / 2).
#[inline(always)]
fn expm1_series(r: f32) -> f32 {
    const C: [f32; 9] = [
        1.0,
        1.0 / 2.0,
        1.0 / 6.0,
        1.0 / 24.0,
        1.0 / 120.0,
        1.0 / 720.0,
        1.0 / 5040.0,
        1.0 / 40320.0,
        1.0 / 362_880.0,
    ];
    let mut acc = C[8];
    let mut i = 8;
    while i > 0 {
        i -= 1;
        acc = C[i] + r * acc;
    }
    r * acc
}

/// `2^k` for `-126 <= k <= 127`, exactly, by building the exponent field.
#[inline(always)]
fn pow2(k: i32) -> f32 {
    let k = k.clamp(-126, 127);
    f32::from_bits(((k + 127) as u32) << 23)
}

/// Coefficients of `tanh`'s rational part N(y) / D(y), y = x^2, lowest
/// power first (D's leading 1 is implicit). Derived by
/// `runtime/tools/fit_tanh.py` (a weighted minimax fit, see the module doc).
const TANH_N: [f32; 3] = [-79.244_934, -0.926_881, -6.621_441e-5];
const TANH_D: [f32; 2] = [950.94, 106.215_836];
/// 9^2: for |x| > 9, tanh x rounds to +-1 in f32 (tanh 9 = 1 - 3.05e-8).
const TANH_SATURATION_SQ: f32 = 81.0;

/// Hyperbolic tangent.
///
/// For 0 < x^2 <= 81: u = x + x^3 N(x^2) / D(x^2) is 2 tanh(x / 2) (the
/// rational part only carries the small correction tanh(x/2) - x/2), and
/// tanh x = u / (1 + u^2 / 4), the double-angle formula 2T / (1 + T^2),
/// which damps the error of T by (1 - T^2) / (1 + T^2) where tanh
/// saturates and is at most 1 in magnitude for any u (1 + T^2 >= 2|T|, and
/// rounding keeps it so). Odd bit for bit: every step flips sign exactly
/// with x.
#[inline]
pub fn tanh(x: f32) -> f32 {
    let y = x * x;
    // Aside: y = 0 (x = +-0 or tiny, tanh x = x), y > 81 (infinities
    // too) and NaN.
    if !(y > 0.0 && y <= TANH_SATURATION_SQ) {
        return if y > TANH_SATURATION_SQ {
            1.0f32.copysign(x)
        } else {
            x
        };
    }
    let num = TANH_N[0] + y * (TANH_N[1] + y * TANH_N[2]);
    let den = TANH_D[0] + y * (TANH_D[1] + y);
    let u = x + (x * y) * (num / den);
    u / (1.0 + (u * 0.25) * u)
}

/// Logistic sigmoid `1 / (1 + e^-x)`, the derivative of softplus.
pub fn sigmoid(x: f32) -> f32 {
    if x >= 0.0 {
        1.0 / (1.0 + exp(-x))
    } else {
        let e = exp(x);
        e / (1.0 + e)
    }
}

/// `ln(1 + y)` for `0 <= y <= 1` through `2 atanh(y / (2 + y))`; the series
/// argument stays below 1/3, so twelve odd terms reach f32 precision.
fn ln1p_unit(y: f32) -> f32 {
    let s = y / (2.0 + y);
    let s2 = s * s;
    let mut acc = 1.0 / 23.0;
    let mut k: u32 = 11;
    while k > 0 {
        k -= 1;
        acc = 1.0 / (2 * k + 1) as f32 + s2 * acc;
    }
    2.0 * s * acc
}

/// Softplus `ln(1 + e^x)`, written as `max(x, 0) + ln(1 + e^-|x|)`.
pub fn softplus(x: f32) -> f32 {
    if x.is_nan() {
        return x;
    }
    let m = if x > 0.0 { x } else { 0.0 };
    m + ln1p_unit(exp(-x.abs()))
}
