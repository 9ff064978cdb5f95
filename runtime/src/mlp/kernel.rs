//! The dense kernels over aligned f32 weights (`&[f32]` read in place):
//! y = W x + b and gx = W^T g. Each output keeps its own accumulator and
//! sums in index order, exactly as the byte-decoding kernels in `mlp.rs`
//! do, so both give the same bits. Rows go [`ROWS`] at a time (one load of
//! `x[i]` or of `gx[i]` serves that many weights) and the inputs [`UNROLL`]
//! at a time (one pointer step per row serves that many weights; see
//! bench/README.md, device cost).

use crate::format::F32Bytes;

/// Rows per block.
const ROWS: usize = 4;
/// Inputs per unrolled inner step.
const UNROLL: usize = 4;

/// The four rows of a block of `4 ni` weights.
#[inline(always)]
fn rows(block: &[f32], ni: usize) -> [&[f32]; ROWS] {
    let (r0, rest) = block.split_at(ni.min(block.len()));
    let (r1, rest) = rest.split_at(ni.min(rest.len()));
    let (r2, r3) = rest.split_at(ni.min(rest.len()));
    [r0, r1, r2, r3]
}

/// `acc[b] += r[b][i] * x[i]` for every i of the step, in index order.
#[inline(always)]
fn forward_step(acc: &mut [f32; ROWS], r: [&[f32]; ROWS], x: &[f32]) {
    for (i, xi) in x.iter().enumerate() {
        for (a, row) in acc.iter_mut().zip(r) {
            *a += row[i] * xi;
        }
    }
}

/// y = W x + b, W row-major `[y.len()][ni]`, each row summed in index
/// order. `x` holds at most `ni` inputs (a shorter `x` sums its leading
/// columns).
#[inline]
pub(super) fn dense(w: &[f32], ni: usize, bias: F32Bytes<'_>, x: &[f32], y: &mut [f32]) {
    let ni = ni.max(1);
    let n = x.len().min(ni);
    let (xs, xt) = x[..n].split_at(n - n % UNROLL);
    let mut done = 0;
    for (block, ys) in w.chunks_exact(ROWS * ni).zip(y.chunks_exact_mut(ROWS)) {
        let r = rows(block, ni);
        let mut acc = [0.0f32; ROWS];
        for (k, xc) in xs.chunks_exact(UNROLL).enumerate() {
            let at = k * UNROLL;
            forward_step(&mut acc, r.map(|row| &row[at..at + UNROLL]), xc);
        }
        let at = xs.len();
        forward_step(&mut acc, r.map(|row| &row[at..at + xt.len()]), xt);
        for (b, (yj, a)) in ys.iter_mut().zip(acc).enumerate() {
            *yj = a + bias.get(done + b);
        }
        done += ROWS;
    }
    for (j, (row, yj)) in w.chunks_exact(ni).zip(y.iter_mut()).enumerate().skip(done) {
        let mut acc = 0.0f32;
        for (c, xi) in row.iter().zip(&x[..n]) {
            acc += c * xi;
        }
        *yj = acc + bias.get(j);
    }
}

/// `gx[i] += r[0][i] g[0] + ... + r[3][i] g[3]`, added in row order, for
/// every i of the step.
#[inline(always)]
fn transpose_step(gx: &mut [f32], r: [&[f32]; ROWS], g: [f32; ROWS]) {
    for (i, o) in gx.iter_mut().enumerate() {
        let mut v = *o;
        for (row, gb) in r.iter().zip(g) {
            v += row[i] * gb;
        }
        *o = v;
    }
}

/// gx += W^T g, accumulated over the rows j in index order for every
/// input (the caller zeroes `gx`).
#[inline]
pub(super) fn dense_transpose(w: &[f32], ni: usize, g: &[f32], gx: &mut [f32]) {
    let ni = ni.max(1);
    let n = gx.len().min(ni);
    let gx = &mut gx[..n];
    let split = n - n % UNROLL;
    let mut done = 0;
    for (block, gs) in w.chunks_exact(ROWS * ni).zip(g.chunks_exact(ROWS)) {
        let r = rows(block, ni);
        let gb = [gs[0], gs[1], gs[2], gs[3]];
        let (head, tail) = gx.split_at_mut(split);
        for (k, oc) in head.chunks_exact_mut(UNROLL).enumerate() {
            let at = k * UNROLL;
            transpose_step(oc, r.map(|row| &row[at..at + UNROLL]), gb);
        }
        transpose_step(tail, r.map(|row| &row[split..split + tail.len()]), gb);
        done += ROWS;
    }
    for (gj, row) in g.iter().zip(w.chunks_exact(ni)).skip(done) {
        for (c, o) in row.iter().zip(gx.iter_mut()) {
            *o += c * gj;
        }
    }
}
