//! The runtime's deterministic elementary functions against Rust's standard
//! library evaluated in f64 (a general-purpose reference; its `tanh`/`exp`
//! are the platform libm's, accurate to about 1 ulp). The measured maxima are
//! the numbers quoted in `runtime/src/math.rs` and DEVELOPERS.md.

use visviva_runtime::math;

fn sweep(lo: f64, hi: f64, n: usize) -> impl Iterator<Item = f32> {
    (0..=n).map(move |k| (lo + (hi - lo) * k as f64 / n as f64) as f32)
}

#[test]
fn tanh_max_abs_error_over_its_range() {
    let mut worst = (0.0f64, 0.0f32);
    for x in sweep(-12.0, 12.0, 2_000_000) {
        let e = (math::tanh(x) as f64 - (x as f64).tanh()).abs();
        if e > worst.0 {
            worst = (e, x);
        }
    }
    println!("tanh: max abs error {:.2e} at x = {}", worst.0, worst.1);
    assert!(worst.0 < 1.5e-7, "tanh error {:e} at {}", worst.0, worst.1);
    // Odd symmetry, saturation and the exact zero.
    assert_eq!(math::tanh(0.0), 0.0);
    assert_eq!(math::tanh(20.0), 1.0);
    assert_eq!(math::tanh(-3.5), -math::tanh(3.5));
}

/// `tanh` by its defining formula tanh a = expm1(2a) / (expm1(2a) + 2)
/// through the general `math::expm1` (the form `math::tanh` used before its
/// range-specialised `expm1`).
fn tanh_by_expm1(x: f32) -> f32 {
    let a = x.abs();
    if a > 9.0 {
        return 1.0f32.copysign(x);
    }
    let e = math::expm1(2.0 * a);
    (e / (e + 2.0)).copysign(x)
}

#[test]
fn tanh_equals_its_expm1_formula_bit_for_bit() {
    // Every 61st f32 from 0 to 9.5 (about 18 million), both signs.
    let top = 9.5f32.to_bits();
    for bits in (0..=top).step_by(61).chain([top, 9.0f32.to_bits()]) {
        for x in [f32::from_bits(bits), -f32::from_bits(bits)] {
            assert_eq!(
                math::tanh(x).to_bits(),
                tanh_by_expm1(x).to_bits(),
                "x = {x:e}"
            );
        }
    }
}

#[test]
fn exp_max_rel_error() {
    let mut worst = 0.0f64;
    for x in sweep(-80.0, 80.0, 2_000_000) {
        let r = (x as f64).exp();
        worst = worst.max((math::exp(x) as f64 - r).abs() / r);
    }
    println!("exp: max rel error {worst:.2e}");
    assert!(worst < 1.5e-7, "exp rel error {worst:e}");
}

#[test]
fn softplus_and_sigmoid_max_errors() {
    let (mut sp, mut sg) = (0.0f64, 0.0f64);
    for x in sweep(-30.0, 30.0, 1_000_000) {
        let xd = x as f64;
        let sp_ref = xd.max(0.0) + (-xd.abs()).exp().ln_1p();
        let sg_ref = 1.0 / (1.0 + (-xd).exp());
        sp = sp.max((math::softplus(x) as f64 - sp_ref).abs() / sp_ref.max(1e-30));
        sg = sg.max((math::sigmoid(x) as f64 - sg_ref).abs() / sg_ref);
    }
    println!("softplus: max rel error {sp:.2e}; sigmoid: max rel error {sg:.2e}");
    assert!(sp < 4e-7 && sg < 4e-7, "softplus {sp:e}, sigmoid {sg:e}");
}

#[test]
fn non_finite_inputs_propagate_without_panic() {
    assert!(math::tanh(f32::NAN).is_nan());
    assert_eq!(math::tanh(f32::INFINITY), 1.0);
    assert!(math::exp(f32::NAN).is_nan());
    assert_eq!(math::exp(f32::INFINITY), f32::INFINITY);
    assert_eq!(math::exp(f32::NEG_INFINITY), 0.0);
    assert!(math::softplus(f32::NAN).is_nan());
}
