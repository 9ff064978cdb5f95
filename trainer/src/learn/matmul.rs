//! Matrix products of the trainer's networks through the `gemm` crate,
//! which picks its kernels (AVX-512, AVX2+FMA, ...) at run time, behind the
//! signature of `ndarray::linalg::general_mat_mul`. One thread per call: a
//! fit's parallelism is the row split of its worker pool.

use gemm::Parallelism;
use ndarray::ArrayRef2;

/// c = alpha a b + beta c (with beta = 0, c is only written).
///
/// # Panics
/// When the shapes do not fit together.
pub fn mat_mul(
    alpha: f32,
    a: &ArrayRef2<f32>,
    b: &ArrayRef2<f32>,
    beta: f32,
    c: &mut ArrayRef2<f32>,
) {
    let ((m, k), (k2, n)) = (a.dim(), b.dim());
    assert!(
        k == k2 && c.dim() == (m, n),
        "matrix product of {m}x{k} and {k2}x{n} into {:?}",
        c.dim()
    );
    if m == 0 || n == 0 {
        return;
    }
    if k == 0 {
        c.map_inplace(|x| *x = if beta == 0.0 { 0.0 } else { beta * *x });
        return;
    }
    let (cs, rs) = (c.strides()[1], c.strides()[0]);
    let dst = c.as_mut_ptr();
    // SAFETY: the three pointers and their element strides come from
    // ndarray arrays of the shapes passed (m x k, k x n, m x n), so every
    // index gemm forms stays inside them; `c` is borrowed mutably while `a`
    // and `b` are shared borrows, so the destination aliases neither input.
    unsafe {
        gemm::gemm(
            m,
            n,
            k,
            dst,
            cs,
            rs,
            beta != 0.0,
            a.as_ptr(),
            a.strides()[1],
            a.strides()[0],
            b.as_ptr(),
            b.strides()[1],
            b.strides()[0],
            beta,
            alpha,
            false,
            false,
            false,
            Parallelism::None,
        );
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{Array2, ShapeBuilder};

    /// Reference: the textbook triple loop in f64.
    fn naive(a: &Array2<f32>, b: &Array2<f32>) -> Array2<f64> {
        let (m, k) = a.dim();
        let n = b.ncols();
        Array2::from_shape_fn((m, n), |(i, j)| {
            (0..k).map(|p| a[[i, p]] as f64 * b[[p, j]] as f64).sum()
        })
    }

    fn filled(rows: usize, cols: usize, seed: f32) -> Array2<f32> {
        Array2::from_shape_fn((rows, cols), |(i, j)| ((i * 7 + j * 3) as f32 * seed).sin())
    }

    /// Shapes of the networks' products (2 inputs, widths 64, one output,
    /// batches 1 and 37), transposed views and column-major destinations,
    /// beta 0 and 1, against the f64 triple loop within 1e-5 relative to
    /// the sum of |a_ip b_pj| (plus |beta c|): f32 rounding over at most 64
    /// terms stays below 64 x 6e-8 (textbook error bound of a sum).
    #[test]
    fn products_match_the_triple_loop() {
        for &(m, k, n) in &[
            (37, 2, 64),
            (37, 64, 64),
            (64, 37, 64),
            (37, 64, 1),
            (1, 64, 2),
            (64, 64, 2),
        ] {
            let a = filled(k, m, 0.37).reversed_axes();
            let b = filled(k, n, 0.91);
            let want = naive(&a.to_owned(), &b);
            let scale = naive(&a.mapv(f32::abs), &b.mapv(f32::abs));
            for beta in [0.0, 1.0] {
                let mut c = Array2::from_elem((m, n).f(), 0.5f32);
                mat_mul(1.0, &a, &b, beta, &mut c);
                for ((i, j), &got) in c.indexed_iter() {
                    let expect = want[[i, j]] + beta as f64 * 0.5;
                    let err = (got as f64 - expect).abs() / (scale[[i, j]] + beta as f64 * 0.5);
                    assert!(err < 1e-5, "{m}x{k}x{n} beta {beta} at ({i},{j}): {err:e}");
                }
            }
        }
    }
}
