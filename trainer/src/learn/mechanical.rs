//! The mechanical energy's kinetic term for training, row by row:
//! T(z_q, z_p) = 1/2 z_p^T (L L^T + eps I) z_p with L = L(z_q) lower
//! triangular, its n (n + 1) / 2 entries the factor network's outputs row by
//! row (softplus on the diagonal, so M^-1 is positive definite), as the
//! runtime evaluates it (`visviva_runtime::format::EnergyDesc::Mechanical`).
//!
//! With w = L^T z_p and s_ij = dL_ij / draw_ij (sigmoid on the diagonal,
//! 1 off it):
//! * dT/dz_p = L w + eps z_p;
//! * dT/dz_q = J^T a, the factor network's vector-Jacobian product with
//!   a_ij = z_p,i w_j s_ij (= dT/draw_ij);
//! * for a loss with r = dl/d(dE/dz) (r_q, r_p halves), the factor network's
//!   parameter gradient is the double-backprop term of r_q . J^T a at fixed
//!   a (`net::backprop_input_gradient_loss`) plus an output backprop with
//!   cotangent c = c_p + c_q on raw: c_p,ij = (r_p,i w_j + z_p,i (L^T r_p)_j)
//!   s_ij from dT/dz_p, and, with t = J r_q and
//!   beta_j = sum_{i >= j} t_ij z_p,i s_ij, c_q,ij = beta_j z_p,i s_ij +
//!   [i = j] t_ii z_p,i w_i s_ii (1 - s_ii) from a's dependence on raw.

use ndarray::{Array1, Array2, ArrayView1, ArrayView2};

use crate::learn::hnn::tri_index;
use crate::learn::net::Activation;

/// The floor eps on the diagonal of M^-1 (normalized units): keeps M^-1
/// positive definite however small the softplus diagonal gets.
pub const FLOOR: f32 = 1e-3;

/// L, dL/draw and w = L^T z_p of one row.
struct RowFactor {
    l: Vec<f32>,
    slope: Vec<f32>,
    /// d slope / d raw on the diagonal (s (1 - s)); 0 off it.
    curve: Vec<f32>,
    w: Vec<f32>,
}

impl RowFactor {
    fn new(raw: ArrayView1<'_, f32>, zp: ArrayView1<'_, f32>, n: usize) -> Self {
        let k = n * (n + 1) / 2;
        let (mut l, mut slope, mut curve) = (vec![0.0; k], vec![1.0; k], vec![0.0; k]);
        for i in 0..n {
            let d = tri_index(i, i);
            let (v, s, c) = Activation::Softplus.eval(raw[d]);
            (l[d], slope[d], curve[d]) = (v, s, c);
            for j in 0..i {
                l[tri_index(i, j)] = raw[tri_index(i, j)];
            }
        }
        let w = (0..n)
            .map(|j| (j..n).map(|i| l[tri_index(i, j)] * zp[i]).sum())
            .collect();
        Self { l, slope, curve, w }
    }

    /// L^T v.
    fn lt(&self, v: ArrayView1<'_, f32>, n: usize) -> Vec<f32> {
        (0..n)
            .map(|j| (j..n).map(|i| self.l[tri_index(i, j)] * v[i]).sum())
            .collect()
    }
}

/// Per row: T, dT/dz_p (rows x n) and the factor network's output seed a
/// (rows x n (n + 1) / 2), from the factor outputs `raw` and momenta `zp`.
pub fn kinetic(
    raw: ArrayView2<'_, f32>,
    zp: ArrayView2<'_, f32>,
    n: usize,
) -> (Array1<f32>, Array2<f32>, Array2<f32>) {
    let rows = raw.nrows();
    let mut e = Array1::zeros(rows);
    let mut up = Array2::zeros((rows, n));
    let mut seed = Array2::zeros((rows, n * (n + 1) / 2));
    for b in 0..rows {
        let zb = zp.row(b);
        let f = RowFactor::new(raw.row(b), zb, n);
        let ww: f32 = f.w.iter().map(|v| v * v).sum();
        let zz: f32 = zb.iter().map(|v| v * v).sum();
        e[b] = 0.5 * (ww + FLOOR * zz);
        for i in 0..n {
            let lw: f32 = (0..=i).map(|j| f.l[tri_index(i, j)] * f.w[j]).sum();
            up[[b, i]] = lw + FLOOR * zb[i];
            for j in 0..=i {
                let k = tri_index(i, j);
                seed[[b, k]] = zb[i] * f.w[j] * f.slope[k];
            }
        }
    }
    (e, up, seed)
}

/// The cotangent c = c_p + c_q on the factor network's outputs (see the
/// module doc), from `raw`, `zp`, `rp` = dl/d(dT/dz_p) and the tangent
/// `t` = J r_q.
pub fn factor_cotangent(
    raw: ArrayView2<'_, f32>,
    zp: ArrayView2<'_, f32>,
    rp: ArrayView2<'_, f32>,
    t: ArrayView2<'_, f32>,
    n: usize,
) -> Array2<f32> {
    let rows = raw.nrows();
    let mut c = Array2::zeros((rows, n * (n + 1) / 2));
    for b in 0..rows {
        let (zb, rb, tb) = (zp.row(b), rp.row(b), t.row(b));
        let f = RowFactor::new(raw.row(b), zb, n);
        let ltr = f.lt(rb, n);
        let beta: Vec<f32> = (0..n)
            .map(|j| {
                (j..n)
                    .map(|i| {
                        let k = tri_index(i, j);
                        tb[k] * zb[i] * f.slope[k]
                    })
                    .sum()
            })
            .collect();
        for i in 0..n {
            for j in 0..=i {
                let k = tri_index(i, j);
                let from_p = (rb[i] * f.w[j] + zb[i] * ltr[j]) * f.slope[k];
                let mut from_q = beta[j] * zb[i] * f.slope[k];
                if i == j {
                    from_q += tb[k] * zb[i] * f.w[i] * f.curve[k];
                }
                c[[b, k]] = from_p + from_q;
            }
        }
    }
    c
}

/// M^-1 = L L^T + eps I (normalized units) from one row of factor outputs.
pub fn inverse_mass(raw: ArrayView1<'_, f32>, n: usize) -> Array2<f64> {
    let zeros = Array1::zeros(n);
    let f = RowFactor::new(raw, zeros.view(), n);
    Array2::from_shape_fn((n, n), |(a, b)| {
        let s: f64 = (0..=a.min(b))
            .map(|k| f.l[tri_index(a, k)] as f64 * f.l[tri_index(b, k)] as f64)
            .sum();
        s + if a == b { FLOOR as f64 } else { 0.0 }
    })
}
