//! Shared by the gradient tests: an independent f64 re-implementation of
//! the trainer's networks and energies over any `num-dual` number type.

use ndarray::Array2;
use num_dual::DualNum;
use visviva_trainer::learn::hnn::{tri_index, EnergyArch, KineticArch, Objective};
use visviva_trainer::learn::net::{Activation, MlpShape};

/// Generic dense network, the same layout as the trainer's flat vector:
/// per layer W row-major [out][in], then b.
pub fn mlp_generic<T: DualNum<Primitive = f64> + Copy>(
    shape: &MlpShape,
    p: &[T],
    x: &[T],
    soft: bool,
) -> Vec<T> {
    let mut a: Vec<T> = x.to_vec();
    let mut off = 0;
    let layers = shape.layers();
    for k in 0..layers {
        let (i, o) = (shape.sizes[k], shape.sizes[k + 1]);
        let mut z = Vec::with_capacity(o);
        for r in 0..o {
            let mut acc = p[off + o * i + r];
            for c in 0..i {
                acc += p[off + r * i + c] * a[c];
            }
            z.push(acc);
        }
        off += o * i + o;
        a = if k + 1 < layers {
            z.into_iter()
                .map(|v| if soft { (v.exp() + 1.0).ln() } else { v.tanh() })
                .collect()
        } else {
            z
        };
    }
    a
}

/// E(z) for the architecture, generic scalar.
pub fn energy_generic<T: DualNum<Primitive = f64> + Copy>(
    arch: &EnergyArch,
    n: usize,
    p: &[T],
    z: &[T],
) -> T {
    match arch {
        EnergyArch::General(m) => mlp_generic(m, p, z, m.activation == Activation::Softplus)[0],
        EnergyArch::Separable { potential, kinetic } => {
            let np = potential.param_count();
            let soft = potential.activation == Activation::Softplus;
            let v = mlp_generic(potential, &p[..np], &z[..n], soft)[0];
            let pt = &p[np..];
            let t = match kinetic {
                KineticArch::Network(m) => mlp_generic(m, pt, &z[n..], soft)[0],
                KineticArch::Quadratic => {
                    // T = 1/2 |L^T z|^2, L_ii = exp(raw_ii).
                    let mut t = T::zero();
                    for j in 0..n {
                        let mut u = T::zero();
                        for i in j..n {
                            let raw = pt[tri_index(i, j)];
                            let lij = if i == j { raw.exp() } else { raw };
                            u += lij * z[n + i];
                        }
                        t += u * u * 0.5;
                    }
                    t
                }
            };
            v + t
        }
        EnergyArch::Mechanical { potential, factor } => {
            // 1/2 z_p^T (L L^T + eps I) z_p + V, L_ij the factor outputs row
            // by row, softplus ln(1 + e^x) on the diagonal; M^-1 formed
            // explicitly (the trainer never forms it).
            let np = potential.param_count();
            let soft = potential.activation == Activation::Softplus;
            let v = mlp_generic(potential, &p[..np], &z[..n], soft)[0];
            let raw = mlp_generic(factor, &p[np..], &z[..n], soft);
            let l = |i: usize, j: usize| {
                let r = raw[tri_index(i, j)];
                if i == j {
                    (r.exp() + 1.0).ln()
                } else {
                    r
                }
            };
            let eps = visviva_trainer::learn::mechanical::FLOOR as f64;
            let mut t = T::zero();
            for a in 0..n {
                for b in 0..n {
                    let mut minv = if a == b { T::from(eps) } else { T::zero() };
                    for k in 0..=a.min(b) {
                        minv += l(a, k) * l(b, k);
                    }
                    t += z[n + a] * minv * z[n + b] * 0.5;
                }
            }
            v + t
        }
    }
}

/// The trainer's own loss at parameters `p` (no gradient).
pub fn loss_f32(obj: &impl Objective, p: &[f32], z: &Array2<f32>, t: &Array2<f32>) -> f64 {
    let mut work = Default::default();
    obj.loss_sum(p, z.view(), t.view(), &mut work, None)
}

/// Central difference of the loss along direction `d`, step 2e-3: error
/// O(h^2) (textbook), h balanced against the f32 rounding of the loss.
pub fn central_difference(
    obj: &impl Objective,
    p: &[f32],
    d: &[f32],
    z: &Array2<f32>,
    t: &Array2<f32>,
) -> f64 {
    let h = 2e-3f32;
    let plus: Vec<f32> = p.iter().zip(d).map(|(a, b)| a + h * b).collect();
    let minus: Vec<f32> = p.iter().zip(d).map(|(a, b)| a - h * b).collect();
    (loss_f32(obj, &plus, z, t) - loss_f32(obj, &minus, z, t)) / (2.0 * h as f64)
}

/// The trainer's analytic gradient of `obj`'s loss at `p`.
pub fn loss_gradient(
    obj: &impl Objective,
    p: &[f32],
    z: &Array2<f32>,
    t: &Array2<f32>,
) -> Vec<f32> {
    let mut grad = vec![0.0f32; p.len()];
    let mut work = Default::default();
    obj.loss_sum(p, z.view(), t.view(), &mut work, Some(&mut grad));
    grad
}

/// From the products g_i d_i of a gradient and a direction: the
/// directional derivative g . d and its difference from `reference`
/// relative to sum |g_i d_i| (the scale of the sum's rounding).
pub fn directional_error(products: impl Iterator<Item = f64>, reference: f64) -> (f64, f64) {
    let (mut analytic, mut magnitude) = (0.0f64, 0.0f64);
    for v in products {
        analytic += v;
        magnitude += v.abs();
    }
    (
        analytic,
        (analytic - reference).abs() / magnitude.max(1e-12),
    )
}
