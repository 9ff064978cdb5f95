//! The networks' matrix products C = A B (or C += A B) on a register-blocked
//! micro-kernel in safe Rust, compiled for AVX-512 and AVX2+FMA as well and
//! picked at run time by the `multiversion` crate (no `unsafe` here).
//!
//! B and C are row-major (B's rows are read whole, so no packing); A is
//! row-major or the transpose of a row-major buffer (`zbar^T`, read in
//! place). A block of rows x columns of C lives in fixed-size arrays that
//! LLVM keeps in vector registers (AVX-512: 4 rows x 64 columns = 16 zmm);
//! for each k it broadcasts A(i, k) and adds it times B's row k with one
//! fused multiply-add per element.
//!
//! Bits: every element of C is one chain c <- fma(A(i,k), B(k,j), c) over k
//! in increasing order, starting from 0 (or from C's value when adding),
//! whatever the block sizes, the k-blocking or the vector width. The fused
//! multiply-add rounds once on every CPU (`f32::mul_add`: one instruction in
//! the FMA and AVX-512 variants, the C library's `fmaf` in the portable
//! one), so every variant gives the same bits on every CPU. (The AVX-512
//! variant runs where `multiversion` finds the Ice Lake set of AVX-512
//! extensions, its rule against slow early AVX-512; elsewhere AVX2+FMA.)
//!
//! Narrow products (fewer than 8 columns: a network's scalar output, its
//! first layer's input adjoint and weight gradient) use the same chains,
//! with A's column read as one vector when A is stored transposed. Operands
//! in any other layout go to ndarray's `general_mat_mul` (none of the
//! trainer's do).

use ndarray::linalg::general_mat_mul;
use ndarray::{ArrayView2, ArrayViewMut2};

/// Inner-dimension block: C's block is stored and reloaded every `KC` steps
/// of k so that the rows of B being streamed stay in cache (exact: the f32
/// accumulator round-trips through memory unchanged).
const KC: usize = 256;

/// Whether a product adds to C or overwrites it.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Store {
    /// C = A B.
    Overwrite,
    /// C += A B.
    Add,
}

/// A's elements in memory: row-major (`a[i * k_dim + k]`) or the transpose
/// of a row-major buffer (`a[k * m + i]`).
#[derive(Debug, Clone, Copy)]
enum Lhs<'a> {
    Rows(&'a [f32], usize),
    Columns(&'a [f32], usize),
}

/// A's elements, read a column of R rows at a time; one type per layout
/// so that each kernel is compiled for one.
trait Column: Copy {
    /// Whether A(i0..i0+R, k) is contiguous in memory.
    const CONTIGUOUS: bool;

    /// A(i0..i0+R, k).
    fn column<const R: usize>(self, i0: usize, k: usize) -> [f32; R];
}

/// Row-major A with `k` columns.
#[derive(Debug, Clone, Copy)]
struct RowMajor<'a>(&'a [f32], usize);

/// A stored as the row-major transpose, `m` rows of A per stored row.
#[derive(Debug, Clone, Copy)]
struct ColumnMajor<'a>(&'a [f32], usize);

impl Column for RowMajor<'_> {
    const CONTIGUOUS: bool = false;

    #[inline(always)]
    fn column<const R: usize>(self, i0: usize, k: usize) -> [f32; R] {
        std::array::from_fn(|r| self.0[(i0 + r) * self.1 + k])
    }
}

impl Column for ColumnMajor<'_> {
    const CONTIGUOUS: bool = true;

    #[inline(always)]
    fn column<const R: usize>(self, i0: usize, k: usize) -> [f32; R] {
        let col: &[f32; R] = self.0[k * self.1 + i0..][..R]
            .try_into()
            .expect("R elements");
        *col
    }
}

/// The shapes and memory of one product, checked.
#[derive(Debug, Clone, Copy)]
struct Operands<'a, A> {
    a: A,
    b: &'a [f32],
    m: usize,
    n: usize,
    k: usize,
}

impl<'a, A> Operands<'a, A> {
    fn with<L>(self, a: L) -> Operands<'a, L> {
        let Self { b, m, n, k, .. } = self;
        Operands { a, b, m, n, k }
    }
}

/// C = A B or C += A B. A may be in standard layout or the transposed view
/// of a standard-layout array; B and C must be in standard layout (ndarray
/// handles any other layout).
pub fn mat_mul(
    a: ArrayView2<'_, f32>,
    b: ArrayView2<'_, f32>,
    store: Store,
    c: &mut ArrayViewMut2<'_, f32>,
) {
    let (m, k) = a.dim();
    let (k2, n) = b.dim();
    assert!(
        k == k2 && c.dim() == (m, n),
        "product shapes {m}x{k} {k2}x{n} -> {:?}",
        c.dim()
    );
    let lhs = if a.is_standard_layout() {
        a.to_slice().map(|s| Lhs::Rows(s, k))
    } else if a.t().is_standard_layout() {
        a.t().to_slice().map(|s| Lhs::Columns(s, m))
    } else {
        None
    };
    match (lhs, b.to_slice(), c.as_slice_mut()) {
        (Some(a), Some(b), Some(c)) if m > 0 => kernel(Operands { a, b, m, n, k }, store, c),
        _ => {
            let beta = if store == Store::Add { 1.0 } else { 0.0 };
            general_mat_mul(1.0, &a, &b, beta, c)
        }
    }
}

/// The dispatch point: one variant per vector unit.
#[multiversion::multiversion(targets("x86_64+avx512f", "x86_64+avx2+fma"))]
fn kernel(ops: Operands<'_, Lhs<'_>>, store: Store, c: &mut [f32]) {
    if multiversion::target::target_cfg_f!(target_feature = "avx512f") {
        by_layout::<4, 64, 16>(ops, store, c)
    } else {
        by_layout::<3, 32, 8>(ops, store, c)
    }
}

/// One kernel per layout of A: rows of R x W blocks, narrow columns T rows
/// at a time.
#[inline(always)]
fn by_layout<const R: usize, const W: usize, const T: usize>(
    ops: Operands<'_, Lhs<'_>>,
    store: Store,
    c: &mut [f32],
) {
    match ops.a {
        Lhs::Rows(a, k) => drive::<R, W, T, _>(ops.with(RowMajor(a, k)), store, c),
        Lhs::Columns(a, m) => drive::<R, W, T, _>(ops.with(ColumnMajor(a, m)), store, c),
    }
}

/// All of C, k block by k block, then column panels of `W`, 16, 8 and 1
/// columns, each over all rows (single columns T rows at a time, or 64
/// where A's column is contiguous).
#[inline(always)]
fn drive<const R: usize, const W: usize, const T: usize, A: Column>(
    ops: Operands<'_, A>,
    store: Store,
    c: &mut [f32],
) {
    let mut k0 = 0;
    loop {
        let k1 = ops.k.min(k0 + KC);
        let add = store == Store::Add || k0 > 0;
        let mut j = 0;
        while ops.n - j >= W {
            panel::<R, W, A>(ops, (k0, k1), j, add, c);
            j += W;
        }
        while ops.n - j >= 16 {
            panel::<R, 16, A>(ops, (k0, k1), j, add, c);
            j += 16;
        }
        while ops.n - j >= 8 {
            panel::<R, 8, A>(ops, (k0, k1), j, add, c);
            j += 8;
        }
        while j < ops.n {
            if A::CONTIGUOUS {
                column::<64, A>(ops, (k0, k1), j, add, c);
            } else {
                panel::<T, 1, A>(ops, (k0, k1), j, add, c);
            }
            j += 1;
        }
        k0 = k1;
        if k1 == ops.k {
            break;
        }
    }
}

/// Columns j0..j0+W of C, rows in blocks of R then one by one.
#[inline(always)]
fn panel<const R: usize, const W: usize, A: Column>(
    ops: Operands<'_, A>,
    ks: (usize, usize),
    j0: usize,
    add: bool,
    c: &mut [f32],
) {
    let mut i = 0;
    while ops.m - i >= R {
        block::<R, W, A>(ops, ks, (i, j0), add, c);
        i += R;
    }
    while i < ops.m {
        block::<1, W, A>(ops, ks, (i, j0), add, c);
        i += 1;
    }
}

/// Column j of C, T rows at a time, with A's column read as one vector
/// and B(k, j) broadcast (the same fused multiply-adds as [`block`], so the
/// same bits); rows past the last multiple of T one by one.
#[inline(always)]
fn column<const T: usize, A: Column>(
    ops: Operands<'_, A>,
    (k0, k1): (usize, usize),
    j: usize,
    add: bool,
    c: &mut [f32],
) {
    let n = ops.n;
    let mut i0 = 0;
    while ops.m - i0 >= T {
        let mut acc = [0.0f32; T];
        if add {
            acc = std::array::from_fn(|r| c[(i0 + r) * n + j]);
        }
        for k in k0..k1 {
            let (a, b) = (ops.a.column::<T>(i0, k), ops.b[k * n + j]);
            for r in 0..T {
                acc[r] = a[r].mul_add(b, acc[r]);
            }
        }
        for (r, v) in acc.iter().enumerate() {
            c[(i0 + r) * n + j] = *v;
        }
        i0 += T;
    }
    while i0 < ops.m {
        block::<1, 1, A>(ops, (k0, k1), (i0, j), add, c);
        i0 += 1;
    }
}

/// The micro-kernel: C(i0..i0+R, j0..j0+W) (+)= A(i0.., k0..k1) B(k0..k1, j0..),
/// accumulated in registers.
#[inline(always)]
fn block<const R: usize, const W: usize, A: Column>(
    ops: Operands<'_, A>,
    (k0, k1): (usize, usize),
    (i0, j0): (usize, usize),
    add: bool,
    c: &mut [f32],
) {
    let n = ops.n;
    let mut acc = [[0.0f32; W]; R];
    if add {
        for (r, row) in acc.iter_mut().enumerate() {
            row.copy_from_slice(&c[(i0 + r) * n + j0..][..W]);
        }
    }
    for k in k0..k1 {
        let b: &[f32; W] = ops.b[k * n + j0..][..W].try_into().expect("W elements");
        let a = ops.a.column::<R>(i0, k);
        for r in 0..R {
            for j in 0..W {
                acc[r][j] = a[r].mul_add(b[j], acc[r][j]);
            }
        }
    }
    for (r, row) in acc.iter().enumerate() {
        c[(i0 + r) * n + j0..][..W].copy_from_slice(row);
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::Array2;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    fn random(rng: &mut ChaCha8Rng, rows: usize, cols: usize) -> Array2<f32> {
        Array2::from_shape_fn((rows, cols), |_| rng.random_range(-1.0f32..1.0))
    }

    /// The portable chain the module doc defines: per element, fma over k
    /// in increasing order from 0 (or from C).
    fn chain(a: ArrayView2<'_, f32>, b: ArrayView2<'_, f32>, c: &mut Array2<f32>, store: Store) {
        for ((i, j), cij) in c.indexed_iter_mut() {
            let mut s = if store == Store::Add { *cij } else { 0.0 };
            for k in 0..a.ncols() {
                s = a[(i, k)].mul_add(b[(k, j)], s);
            }
            *cij = s;
        }
    }

    /// Shapes of the trainer's products (batch x 64 x 64, the first layer's
    /// 2 inputs, the output layer's single row, the weight gradients with
    /// the batch as inner dimension, longer than one k block, the first
    /// layer's with 2 columns), widths that are not a multiple of the
    /// vector width, and an empty inner dimension.
    const SHAPES: [(usize, usize, usize); 12] = [
        (64, 256, 2),
        (70, 300, 1),
        (4, 0, 16),
        (256, 64, 64),
        (13, 64, 64),
        (256, 2, 64),
        (256, 1, 64),
        (64, 600, 64),
        (1, 300, 64),
        (7, 9, 8),
        (10, 5, 27),
        (5, 3, 100),
    ];

    fn same_bits(x: &Array2<f32>, y: &Array2<f32>) -> bool {
        x.iter().zip(y).all(|(p, q)| p.to_bits() == q.to_bits())
    }

    fn operands<'a>(a: ArrayView2<'a, f32>, b: ArrayView2<'a, f32>) -> Operands<'a, Lhs<'a>> {
        let (m, k) = a.dim();
        let lhs = match a.to_slice() {
            Some(s) => Lhs::Rows(s, k),
            None => Lhs::Columns(a.reversed_axes().to_slice().unwrap(), m),
        };
        let (b, n) = (b.to_slice().unwrap(), b.ncols());
        Operands { a: lhs, b, m, n, k }
    }

    /// The dispatched kernel (AVX-512 on this machine, AVX2+FMA or portable
    /// elsewhere) and both block shapes compiled without dispatch equal the
    /// fma chain of the module doc bit for bit, for A in both layouts and
    /// both modes.
    #[test]
    fn dispatched_product_equals_the_portable_chain_bit_for_bit() {
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        for (m, k, n) in SHAPES {
            let a = random(&mut rng, m, k);
            let at = random(&mut rng, k, m);
            let b = random(&mut rng, k, n);
            let c0 = random(&mut rng, m, n);
            for lhs in [a.view(), at.t()] {
                for store in [Store::Overwrite, Store::Add] {
                    let (mut got, mut want) = (c0.clone(), c0.clone());
                    mat_mul(lhs, b.view(), store, &mut got.view_mut());
                    chain(lhs, b.view(), &mut want, store);
                    assert!(same_bits(&got, &want), "{m}x{k}x{n} {store:?}");
                    // Both block shapes compiled without dispatch (portable).
                    let ops = operands(lhs, b.view());
                    for blocks in [by_layout::<4, 64, 16>, by_layout::<3, 32, 8>] {
                        let mut portable = c0.clone();
                        blocks(ops, store, portable.as_slice_mut().unwrap());
                        assert!(same_bits(&portable, &want), "{m}x{k}x{n} {store:?}");
                    }
                }
            }
        }
    }

    /// Reference: the textbook triple loop in f64. Tolerance: each output is
    /// k rounded fused multiply-adds of terms below 1 in size, so its error
    /// is below gamma_k (|c| + sum |a b|), gamma_k = k u / (1 - k u),
    /// u = 2^-24 (standard bound, Higham,
    /// "Accuracy and Stability of Numerical Algorithms", sec. 3.1; stated
    /// from memory); asserted against that bound per element.
    #[test]
    fn product_matches_the_f64_triple_loop() {
        let mut rng = ChaCha8Rng::seed_from_u64(12);
        for (m, k, n) in SHAPES {
            let a = random(&mut rng, k, m);
            let b = random(&mut rng, k, n);
            let c0 = random(&mut rng, m, n);
            let mut got = c0.clone();
            mat_mul(a.t(), b.view(), Store::Add, &mut got.view_mut());
            let mut worst = 0.0f64;
            for ((i, j), &g) in got.indexed_iter() {
                let (mut s, mut size) = (c0[(i, j)] as f64, c0[(i, j)].abs() as f64);
                for kk in 0..k {
                    let t = a[(kk, i)] as f64 * b[(kk, j)] as f64;
                    s += t;
                    size += t.abs();
                }
                let ku = k as f64 * f32::EPSILON as f64 / 2.0;
                let bound = ku / (1.0 - ku) * size;
                worst = worst.max((g as f64 - s).abs() / bound.max(f64::MIN_POSITIVE));
                assert!((g as f64 - s).abs() <= bound, "{m}x{k}x{n} at ({i},{j})");
            }
            println!("{m}x{k}x{n}: largest error / bound {worst:.3}");
        }
    }
}
