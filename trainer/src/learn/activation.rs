//! Hidden-layer activations of the trainer's networks, evaluated over whole
//! rows of pre-activations at once (value, first and second derivative).
//!
//! `tanh` here is branch-free so that the row loop vectorizes: it computes
//! exactly the runtime's `math::tanh` (the same `+ - * /` in the same order:
//! a rational half-angle value and the double-angle formula), with the
//! runtime's early return turned into a select. The trainer therefore
//! fits with bit for bit the activation the exported model is evaluated
//! with. The derivatives come from the value: s' = 1 - t^2,
//! s'' = -2 t (1 - t^2). No allocation: callers hand in the rows.

use serde::{Deserialize, Serialize};

/// Hidden-layer activations usable in energy networks (smooth ones only).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum Activation {
    /// Hyperbolic tangent.
    Tanh,
    /// Softplus ln(1 + e^x).
    Softplus,
}

impl Activation {
    /// The runtime's matching activation.
    pub fn to_runtime(self) -> visviva_runtime::format::Activation {
        match self {
            Self::Tanh => visviva_runtime::format::Activation::Tanh,
            Self::Softplus => visviva_runtime::format::Activation::Softplus,
        }
    }

    /// Value, first and second derivative at `a`.
    #[inline]
    pub fn eval(self, a: f32) -> (f32, f32, f32) {
        match self {
            Self::Tanh => tanh_and_derivatives(a),
            Self::Softplus => softplus_and_derivatives(a),
        }
    }

    /// `eval` over a row: `v[i], d1[i], d2[i]` = value, first and second
    /// derivative at `z[i]`. The slices must have equal lengths.
    pub fn eval_rows(self, z: &[f32], v: &mut [f32], d1: &mut [f32], d2: &mut [f32]) {
        assert!(
            z.len() == v.len() && z.len() == d1.len() && z.len() == d2.len(),
            "activation rows of unequal lengths"
        );
        match self {
            Self::Tanh => tanh_rows(z, v, d1, d2),
            Self::Softplus => rows_with(z, v, d1, d2, softplus_and_derivatives),
        }
    }
}

/// The tanh row loop compiled for the widest vector unit the CPU has
/// (picked at run time by the `multiversion` crate, so no `unsafe` here).
/// Only `+ - * /`, comparisons, selects and bit operations, which round the
/// same at every vector width, so every variant gives the same bits.
#[multiversion::multiversion(targets("x86_64+avx512f", "x86_64+avx2"))]
fn tanh_rows(z: &[f32], v: &mut [f32], d1: &mut [f32], d2: &mut [f32]) {
    rows_with(z, v, d1, d2, tanh_and_derivatives)
}

/// The element loop, one function per activation so each one inlines and
/// (for tanh) vectorizes.
#[inline(always)]
fn rows_with(
    z: &[f32],
    v: &mut [f32],
    d1: &mut [f32],
    d2: &mut [f32],
    f: impl Fn(f32) -> (f32, f32, f32),
) {
    for (((&z, v), d1), d2) in z.iter().zip(v).zip(d1).zip(d2) {
        (*v, *d1, *d2) = f(z);
    }
}

#[inline(always)]
fn tanh_and_derivatives(a: f32) -> (f32, f32, f32) {
    let t = tanh(a);
    let d = 1.0 - t * t;
    (t, d, -2.0 * t * d)
}

fn softplus_and_derivatives(a: f32) -> (f32, f32, f32) {
    // max(a, 0) + ln(1 + e^-|a|): no overflow for large |a|.
    let v = a.max(0.0) + (-a.abs()).exp().ln_1p();
    let s = if a >= 0.0 {
        1.0 / (1.0 + (-a).exp())
    } else {
        let e = a.exp();
        e / (1.0 + e)
    };
    (v, s, s * (1.0 - s))
}

/// The runtime's coefficients and limit (`runtime/src/math.rs`), repeated
/// so the two compute the same bits (`runtime/tools/fit_tanh.py` derives
/// them).
const TANH_N: [f32; 3] = [-79.244_934, -0.926_881, -6.621_441e-5];
const TANH_D: [f32; 2] = [950.94, 106.215_836];
/// 9^2: beyond |x| = 9, tanh rounds to +-1 in f32 (tanh 9 = 1 - 3.05e-8).
const TANH_SATURATION_SQ: f32 = 81.0;

/// Hyperbolic tangent, branch-free, equal bit for bit to the runtime's
/// `math::tanh`: u = x + x^3 N(x^2) / D(x^2) = 2 tanh(x/2), then
/// tanh x = u / (1 + u^2 / 4), the same operations in the same order; the
/// runtime's early return (x^2 = 0, x^2 > 81 or NaN) becomes a select.
#[inline(always)]
pub fn tanh(x: f32) -> f32 {
    let y = x * x;
    let num = TANH_N[0] + y * (TANH_N[1] + y * TANH_N[2]);
    let den = TANH_D[0] + y * (TANH_D[1] + y);
    let u = x + (x * y) * (num / den);
    let t = u / (1.0 + (u * 0.25) * u);
    let edge = if y > TANH_SATURATION_SQ {
        1.0f32.copysign(x)
    } else {
        x
    };
    if y > 0.0 && y <= TANH_SATURATION_SQ {
        t
    } else {
        edge
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// 2,000,001 evenly spaced points over [-12, 12] (the runtime's accuracy
    /// test uses the same grid).
    fn grid() -> impl Iterator<Item = f32> {
        (0..=2_000_000).map(|i| (-12.0 + 24.0 * i as f64 / 2_000_000.0) as f32)
    }

    /// Reference: f64 `tanh` of Rust's standard library. Measured max abs
    /// error 1.09e-7 (1.83 f32 ulp near 1); asserted 1.19e-7, two ulp, the
    /// runtime's bound for its `math::tanh`.
    #[test]
    fn tanh_within_two_ulp_of_one_of_f64_tanh() {
        let worst = grid()
            .map(|x| (tanh(x) as f64 - (x as f64).tanh()).abs())
            .fold(0.0, f64::max);
        println!("max |tanh - f64 tanh| over [-12, 12]: {worst:.3e}");
        assert!(worst < 2.0 * 5.960_464_5e-8, "{worst:e}");
    }

    /// The runtime's `math::tanh` (the exported model's activation): the
    /// same bits everywhere, saturation and signed zeros included.
    #[test]
    fn tanh_equals_the_runtime_bit_for_bit() {
        let specials = [
            0.0,
            -0.0,
            9.0,
            -9.0,
            9.000_001,
            f32::INFINITY,
            f32::NEG_INFINITY,
            1e-30,
            1e-45,
        ];
        for x in grid().chain(specials) {
            let want = visviva_runtime::math::tanh(x);
            assert_eq!(tanh(x).to_bits(), want.to_bits(), "x = {x:e}");
        }
        assert!(tanh(f32::NAN).is_nan());
    }

    /// Reference: the closed forms tanh' = 1 - tanh^2 and
    /// tanh'' = -2 tanh (1 - tanh^2) in f64 (textbook identities).
    #[test]
    fn row_derivatives_match_the_closed_forms() {
        let z: Vec<f32> = grid().step_by(97).collect();
        let n = z.len();
        let (mut v, mut d1, mut d2) = (vec![0.0; n], vec![0.0; n], vec![0.0; n]);
        Activation::Tanh.eval_rows(&z, &mut v, &mut d1, &mut d2);
        let mut worst = (0.0f64, 0.0f64);
        for i in 0..n {
            let t = (z[i] as f64).tanh();
            let (s1, s2) = (1.0 - t * t, -2.0 * t * (1.0 - t * t));
            worst.0 = worst.0.max((d1[i] as f64 - s1).abs());
            worst.1 = worst.1.max((d2[i] as f64 - s2).abs());
            assert_eq!(v[i], tanh(z[i]));
        }
        println!("max error of tanh' {:.3e}, tanh'' {:.3e}", worst.0, worst.1);
        assert!(worst.0 < 4e-7 && worst.1 < 1e-6, "{worst:?}");
    }

    /// Softplus rows equal the element-wise evaluation; reference values
    /// ln 2, 1/2, 1/4 at 0 (closed forms).
    #[test]
    fn softplus_rows_equal_elementwise() {
        let z: Vec<f32> = (-40..=40).map(|i| i as f32 * 0.75).collect();
        let n = z.len();
        let (mut v, mut d1, mut d2) = (vec![0.0; n], vec![0.0; n], vec![0.0; n]);
        Activation::Softplus.eval_rows(&z, &mut v, &mut d1, &mut d2);
        for i in 0..n {
            assert_eq!((v[i], d1[i], d2[i]), Activation::Softplus.eval(z[i]));
        }
        let (v0, s0, c0) = Activation::Softplus.eval(0.0);
        assert!((v0 - std::f32::consts::LN_2).abs() < 1e-7);
        assert_eq!((s0, c0), (0.5, 0.25));
    }
}
