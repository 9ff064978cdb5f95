//! Deterministic elementary functions for the activations.
//!
//! Every function here is built from IEEE-754 single-precision `+ - * /`,
//! comparisons, integer casts and bit manipulation only. Those operations are
//! correctly rounded on every conforming target, so the x86_64 host and a
//! Cortex-M4F compute the same bits. The one helper taken from `micromath` is
//! `floor`, an exact bit-level operation, called through its trait explicitly:
//! in a crate that links `std`, `x.floor()` would silently pick std's method.
//!
//! Accuracy (measured by `tests/activation_accuracy.rs` against `f64` from
//! Rust's standard library, 2,000,001 points each): `tanh` within 8.9e-8
//! absolute over [-12, 12] (about one f32 ulp near 1); `exp` within 9.3e-8
//! relative over [-80, 80]; `softplus` and `sigmoid` within 2.4e-7 relative
//! over [-30, 30].
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

/// Hyperbolic tangent.
#[inline]
pub fn tanh(x: f32) -> f32 {
    let a = x.abs();
    // One comparison for both exits: tanh(9) = 1 - 3.05e-8 rounds to 1.0
    // in f32, and NaN stays NaN.
    match a.partial_cmp(&9.0) {
        Some(core::cmp::Ordering::Greater) => return 1.0f32.copysign(x),
        None => return x,
        _ => {}
    }
    let e = expm1_tanh(2.0 * a);
    (e / (e + 2.0)).copysign(x)
}

/// [`expm1`] for `0 <= y <= 18`, the range [`tanh`] reaches, with the same
/// operations and bits: there `exp`'s range checks never fire and the
/// rounding `floor(y / ln 2 + 1/2)` of a positive number equals its
/// truncation to an integer, which is one conversion instead of
/// `micromath`'s bit-level `floor` (`tests/activation_accuracy.rs` checks
/// the two agree bit for bit).
#[inline(always)]
fn expm1_tanh(y: f32) -> f32 {
    if y < HALF_LN2 {
        return expm1_series(y);
    }
    let k = (y * INV_LN2 + 0.5) as i32;
    let kf = k as f32;
    let r = (y - kf * LN2_HI) - kf * LN2_LO;
    let er = 1.0 + expm1_series(r);
    // 0 <= k <= 26 here: 2^k without `pow2`'s clamp, the same bits.
    er * f32::from_bits(((k + 127) as u32) << 23) - 1.0
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
