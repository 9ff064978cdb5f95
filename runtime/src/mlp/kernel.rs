//! The dense kernels: y = W x + b and gx = W^T g, over weights read in
//! place as aligned `&[f32]` or as int8 bytes with per-row scales. Each
//! output keeps its own accumulator and sums in index order, exactly as the
//! byte-decoding kernels in `mlp.rs` do, so both give the same bits. Rows
//! go [`ROWS`] at a time (one load of `x[i]`, or one load and one store of
//! `gx[i]`, serves that many weights) and the inputs [`UNROLL`] at a time as
//! fixed-size chunks (one pointer step per row serves that many weights;
//! see bench/README.md, device cost on the emulated Cortex-M4F).

use crate::format::F32Bytes;

/// Rows per block.
const ROWS: usize = 8;
/// Inputs per unrolled inner step.
const UNROLL: usize = 8;

/// A stored weight as the kernels read it.
pub(super) trait Stored: Copy + Default {
    /// The weight's value before its row's scale.
    fn value(self) -> f32;
}

impl Stored for f32 {
    #[inline(always)]
    fn value(self) -> f32 {
        self
    }
}

/// An int8 weight, stored as its two's-complement byte.
impl Stored for u8 {
    #[inline(always)]
    fn value(self) -> f32 {
        (self as i8) as f32
    }
}

/// What turns a row's sum into the layer's output: `sum + b_j` for f32
/// weights, `sum s_j + b_j` for int8 weights with row scales `s_j`; and the
/// row's factor in the transposed product (1, or `s_j`).
#[derive(Clone, Copy)]
pub(super) struct RowScale<'a> {
    /// Per-row scales (int8), or `None` (f32: no scale, no multiply).
    pub scales: Option<F32Bytes<'a>>,
}

impl<'a> RowScale<'a> {
    /// f32 weights: no scale.
    pub const NONE: Self = Self { scales: None };

    /// int8 weights with these per-row scales.
    pub fn int8(scales: F32Bytes<'a>) -> Self {
        Self {
            scales: Some(scales),
        }
    }

    /// Row `j`'s output from its sum.
    #[inline(always)]
    fn output(self, j: usize, sum: f32, bias: F32Bytes<'_>) -> f32 {
        match self.scales {
            Some(s) => sum * s.get(j) + bias.get(j),
            None => sum + bias.get(j),
        }
    }

    /// Row `j`'s weight in the transposed product for adjoint `g`.
    #[inline(always)]
    fn adjoint(self, j: usize, g: f32) -> f32 {
        match self.scales {
            Some(s) => g * s.get(j),
            None => g,
        }
    }
}

/// The rows of a block of `ROWS ni` weights (empty past its end).
#[inline(always)]
fn rows<T: Stored>(block: &[T], ni: usize) -> [&[T]; ROWS] {
    core::array::from_fn(|b| block.get(b * ni..(b + 1) * ni).unwrap_or(&[]))
}

/// The leading `m` whole chunks of each row. Every row of a block holds
/// `ni` weights and the callers' `m` chunks cover at most `ni` inputs, so
/// the slice is in range (and its known length lets the compiler drop
/// most of the inner loop's bounds checks).
#[inline(always)]
fn chunked<T: Stored>(r: [&[T]; ROWS], m: usize) -> [&[[T; UNROLL]]; ROWS] {
    r.map(|row| &row.as_chunks::<UNROLL>().0[..m])
}

/// y = W x + b, W row-major `[y.len()][ni]`, each row summed in index
/// order. `x` holds at most `ni` inputs (a shorter `x` sums its leading
/// columns).
#[inline]
pub(super) fn dense<T: Stored>(
    w: &[T],
    ni: usize,
    scale: RowScale<'_>,
    bias: F32Bytes<'_>,
    x: &[f32],
    y: &mut [f32],
) {
    let ni = ni.max(1);
    let x = x.get(..ni).unwrap_or(x);
    if let ([x0], true) = (x, ni == 1) {
        return dense_one_input(w, *x0, scale, bias, y);
    }
    let (head, tail) = x.as_chunks::<UNROLL>();
    let at = head.len() * UNROLL;
    let mut done = 0;
    for (block, ys) in w.chunks_exact(ROWS * ni).zip(y.chunks_exact_mut(ROWS)) {
        let r = rows(block, ni);
        let rc = chunked(r, head.len());
        let mut acc = [0.0f32; ROWS];
        for (k, xc) in head.iter().enumerate() {
            for (i, xi) in xc.iter().enumerate() {
                for (a, row) in acc.iter_mut().zip(&rc) {
                    *a += row[k][i].value() * xi;
                }
            }
        }
        for (i, xi) in tail.iter().enumerate() {
            for (a, row) in acc.iter_mut().zip(&r) {
                *a += row.get(at + i).copied().unwrap_or_default().value() * xi;
            }
        }
        for (b, (yj, a)) in ys.iter_mut().zip(acc).enumerate() {
            *yj = scale.output(done + b, a, bias);
        }
        done += ROWS;
    }
    for (j, (row, yj)) in w.chunks_exact(ni).zip(y.iter_mut()).enumerate().skip(done) {
        let mut acc = 0.0f32;
        for (c, xi) in row.iter().zip(x) {
            acc += c.value() * xi;
        }
        *yj = scale.output(j, acc, bias);
    }
}

/// [`dense`] of a one-input layer (a one-coordinate network's first
/// layer): y_j = (0 + w_j x) scaled plus b_j, the block path's operations
/// row by row without its set-up.
#[inline(always)]
fn dense_one_input<T: Stored>(
    w: &[T],
    x: f32,
    scale: RowScale<'_>,
    bias: F32Bytes<'_>,
    y: &mut [f32],
) {
    for (j, (yj, c)) in y.iter_mut().zip(w).enumerate() {
        let mut acc = 0.0f32;
        acc += c.value() * x;
        *yj = scale.output(j, acc, bias);
    }
}

/// [`dense_transpose`] of a one-input layer: `start` plus sum_j w_j g_j,
/// accumulated in index order.
#[inline(always)]
fn transpose_one_input<T: Stored>(w: &[T], scale: RowScale<'_>, g: &[f32], start: f32) -> f32 {
    let mut acc = start;
    for (j, (c, gj)) in w.iter().zip(g).enumerate() {
        acc += c.value() * scale.adjoint(j, *gj);
    }
    acc
}

/// gx += W^T g, accumulated over the rows j in index order for every
/// input (the caller zeroes `gx`).
#[inline]
pub(super) fn dense_transpose<T: Stored>(
    w: &[T],
    ni: usize,
    scale: RowScale<'_>,
    g: &[f32],
    gx: &mut [f32],
) {
    let ni = ni.max(1);
    let n = gx.len().min(ni);
    let gx = &mut gx[..n];
    if let ([gx0], true) = (&mut *gx, ni == 1) {
        *gx0 = transpose_one_input(w, scale, g, *gx0);
        return;
    }
    let mut done = 0;
    for (block, gs) in w.chunks_exact(ROWS * ni).zip(g.chunks_exact(ROWS)) {
        let r = rows(block, ni);
        let gb: [f32; ROWS] =
            core::array::from_fn(|b| scale.adjoint(done + b, gs.get(b).copied().unwrap_or(0.0)));
        let (head, tail) = gx.as_chunks_mut::<UNROLL>();
        let at = head.len() * UNROLL;
        let rc = chunked(r, head.len());
        for (k, oc) in head.iter_mut().enumerate() {
            for (i, o) in oc.iter_mut().enumerate() {
                let mut v = *o;
                for (row, gj) in rc.iter().zip(gb) {
                    v += row[k][i].value() * gj;
                }
                *o = v;
            }
        }
        for (i, o) in tail.iter_mut().enumerate() {
            let mut v = *o;
            for (row, gj) in r.iter().zip(gb) {
                v += row.get(at + i).copied().unwrap_or_default().value() * gj;
            }
            *o = v;
        }
        done += ROWS;
    }
    for (j, (gj, row)) in g.iter().zip(w.chunks_exact(ni)).enumerate().skip(done) {
        let gj = scale.adjoint(j, *gj);
        for (c, o) in row.iter().zip(gx.iter_mut()) {
            *o += c.value() * gj;
        }
    }
}

#[cfg(test)]
mod tests {
    //! The blocked kernels against the definition written as plain loops
    //! (each output summed in index order), bit for bit, at widths that
    //! exercise whole blocks, partial blocks and the unrolled chunks' tails.
    extern crate std;

    use super::*;

    /// Deterministic values in [-1, 1) (a 32-bit linear congruential
    /// generator, Numerical Recipes' constants, from memory).
    fn values(n: usize, seed: u32) -> impl Iterator<Item = f32> {
        let mut s = seed;
        (0..n).map(move |_| {
            s = s.wrapping_mul(1_664_525).wrapping_add(1_013_904_223);
            (s >> 8) as f32 / (1u32 << 23) as f32 - 1.0
        })
    }

    fn bytes(v: &[f32]) -> std::vec::Vec<u8> {
        v.iter().flat_map(|x| x.to_le_bytes()).collect()
    }

    const SHAPES: [(usize, usize); 6] = [(1, 32), (2, 64), (13, 9), (64, 64), (32, 1), (17, 24)];

    fn check<T: Stored>(weights: &[T], ni: usize, no: usize, scales: Option<&[u8]>) {
        let x: std::vec::Vec<f32> = values(ni, 7).collect();
        let g: std::vec::Vec<f32> = values(no, 11).collect();
        let b = bytes(&values(no, 13).collect::<std::vec::Vec<_>>());
        let (bias, s) = (F32Bytes(&b), scales.map(F32Bytes));
        let scale = RowScale { scales: s };
        let factor = |j: usize| s.map_or(1.0, |s| s.get(j));
        let mut y = std::vec![0.0f32; no];
        dense(weights, ni, scale, bias, &x, &mut y);
        for (j, yj) in y.iter().enumerate() {
            let mut acc = 0.0f32;
            for (i, xi) in x.iter().enumerate() {
                acc += weights[j * ni + i].value() * xi;
            }
            let want = if s.is_some() {
                acc * factor(j) + bias.get(j)
            } else {
                acc + bias.get(j)
            };
            assert_eq!(
                yj.to_bits(),
                want.to_bits(),
                "y[{j}], {ni} inputs, {no} outputs"
            );
        }
        let mut gx = std::vec![0.0f32; ni];
        dense_transpose(weights, ni, scale, &g, &mut gx);
        for (i, gxi) in gx.iter().enumerate() {
            let mut acc = 0.0f32;
            for (j, gj) in g.iter().enumerate() {
                let gj = if s.is_some() { gj * factor(j) } else { *gj };
                acc += weights[j * ni + i].value() * gj;
            }
            assert_eq!(
                gxi.to_bits(),
                acc.to_bits(),
                "gx[{i}], {ni} inputs, {no} outputs"
            );
        }
    }

    #[test]
    fn f32_kernels_equal_the_plain_loops_bit_for_bit() {
        for (ni, no) in SHAPES {
            let w: std::vec::Vec<f32> = values(ni * no, 3).collect();
            check(&w, ni, no, None);
        }
    }

    #[test]
    fn int8_kernels_equal_the_plain_loops_bit_for_bit() {
        for (ni, no) in SHAPES {
            let w: std::vec::Vec<u8> = values(ni * no, 5)
                .map(|v| (v * 127.0) as i8 as u8)
                .collect();
            let s = bytes(
                &values(no, 17)
                    .map(|v| 0.01 + 0.001 * v)
                    .collect::<std::vec::Vec<_>>(),
            );
            check(&w, ni, no, Some(&s));
        }
    }
}
