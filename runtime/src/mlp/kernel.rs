//! The dense kernels over aligned f32 weights (`&[f32]` read in place):
//! y = W x + b and gx = W^T g. Each output keeps its own accumulator and
//! sums in index order, exactly as the byte-decoding kernels in `mlp.rs`
//! do, so both give the same bits. Rows go [`ROWS`] at a time (one load of
//! `x[i]`, or one load and one store of `gx[i]`, serves that many weights)
//! and the inputs [`UNROLL`] at a time as fixed-size chunks (one pointer
//! step per row serves that many weights; see bench/README.md, device cost
//! on the emulated Cortex-M4F).

use crate::format::F32Bytes;

/// Rows per block.
const ROWS: usize = 8;
/// Inputs per unrolled inner step.
const UNROLL: usize = 8;

/// The rows of a block of `ROWS ni` weights (empty past its end).
#[inline(always)]
fn rows(block: &[f32], ni: usize) -> [&[f32]; ROWS] {
    core::array::from_fn(|b| block.get(b * ni..(b + 1) * ni).unwrap_or(&[]))
}

/// The leading `m` whole chunks of each row. Every row of a block holds
/// `ni` weights and the callers' `m` chunks cover at most `ni` inputs, so
/// the slice is in range (and its known length lets the compiler drop
/// most of the inner loop's bounds checks).
#[inline(always)]
fn chunked(r: [&[f32]; ROWS], m: usize) -> [&[[f32; UNROLL]]; ROWS] {
    r.map(|row| &row.as_chunks::<UNROLL>().0[..m])
}

/// y = W x + b, W row-major `[y.len()][ni]`, each row summed in index
/// order. `x` holds at most `ni` inputs (a shorter `x` sums its leading
/// columns).
#[inline]
pub(super) fn dense(w: &[f32], ni: usize, bias: F32Bytes<'_>, x: &[f32], y: &mut [f32]) {
    let ni = ni.max(1);
    let x = x.get(..ni).unwrap_or(x);
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
                    *a += row[k][i] * xi;
                }
            }
        }
        for (i, xi) in tail.iter().enumerate() {
            for (a, row) in acc.iter_mut().zip(&r) {
                *a += row.get(at + i).copied().unwrap_or(0.0) * xi;
            }
        }
        for (b, (yj, a)) in ys.iter_mut().zip(acc).enumerate() {
            *yj = a + bias.get(done + b);
        }
        done += ROWS;
    }
    for (j, (row, yj)) in w.chunks_exact(ni).zip(y.iter_mut()).enumerate().skip(done) {
        let mut acc = 0.0f32;
        for (c, xi) in row.iter().zip(x) {
            acc += c * xi;
        }
        *yj = acc + bias.get(j);
    }
}

/// gx += W^T g, accumulated over the rows j in index order for every
/// input (the caller zeroes `gx`).
#[inline]
pub(super) fn dense_transpose(w: &[f32], ni: usize, g: &[f32], gx: &mut [f32]) {
    let ni = ni.max(1);
    let n = gx.len().min(ni);
    let gx = &mut gx[..n];
    let mut done = 0;
    for (block, gs) in w.chunks_exact(ROWS * ni).zip(g.chunks_exact(ROWS)) {
        let r = rows(block, ni);
        let gb: [f32; ROWS] = core::array::from_fn(|b| gs.get(b).copied().unwrap_or(0.0));
        let (head, tail) = gx.as_chunks_mut::<UNROLL>();
        let at = head.len() * UNROLL;
        let rc = chunked(r, head.len());
        for (k, oc) in head.iter_mut().enumerate() {
            for (i, o) in oc.iter_mut().enumerate() {
                let mut v = *o;
                for (row, gj) in rc.iter().zip(gb) {
                    v += row[k][i] * gj;
                }
                *o = v;
            }
        }
        for (i, o) in tail.iter_mut().enumerate() {
            let mut v = *o;
            for (row, gj) in r.iter().zip(gb) {
                v += row.get(at + i).copied().unwrap_or(0.0) * gj;
            }
            *o = v;
        }
        done += ROWS;
    }
    for (gj, row) in g.iter().zip(w.chunks_exact(ni)).skip(done) {
        for (c, o) in row.iter().zip(gx.iter_mut()) {
            *o += c * gj;
        }
    }
}
