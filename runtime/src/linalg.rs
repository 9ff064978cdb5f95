//! Small dense matrices on the stack for the observer: `[[f32; S]; S]` with
//! the leading `k` rows and columns in use. Products sum in index order;
//! the solver is Gaussian elimination with partial pivoting (bounded loops,
//! a zero pivot is reported, never divided by).

/// A square matrix of capacity `S`.
pub type Mat<const S: usize> = [[f32; S]; S];

/// The `k` x `k` identity (zeros elsewhere).
pub fn identity<const S: usize>(k: usize) -> Mat<S> {
    let mut m = [[0.0f32; S]; S];
    for (i, row) in m.iter_mut().enumerate().take(k) {
        row[i] = 1.0;
    }
    m
}

/// a b over the leading `k` x `k` block.
pub fn mul<const S: usize>(a: &Mat<S>, b: &Mat<S>, k: usize) -> Mat<S> {
    let mut c = [[0.0f32; S]; S];
    for i in 0..k {
        for j in 0..k {
            let mut acc = 0.0f32;
            for l in 0..k {
                acc += a[i][l] * b[l][j];
            }
            c[i][j] = acc;
        }
    }
    c
}

/// a b^T over the leading `k` x `k` block.
pub fn mul_transposed<const S: usize>(a: &Mat<S>, b: &Mat<S>, k: usize) -> Mat<S> {
    let mut c = [[0.0f32; S]; S];
    for i in 0..k {
        for j in 0..k {
            let mut acc = 0.0f32;
            for l in 0..k {
                acc += a[i][l] * b[j][l];
            }
            c[i][j] = acc;
        }
    }
    c
}

/// Replace `m` by (m + m^T) / 2 over the leading block.
pub fn symmetrize<const S: usize>(m: &mut Mat<S>, k: usize) {
    for i in 0..k {
        for j in 0..i {
            let v = 0.5 * (m[i][j] + m[j][i]);
            m[i][j] = v;
            m[j][i] = v;
        }
    }
}

/// Solve a x = b for the `k` columns of `b` in place (a is destroyed).
/// `None` when a pivot is zero or not finite.
pub fn solve<const S: usize>(a: &mut Mat<S>, b: &mut Mat<S>, k: usize) -> Option<()> {
    for col in 0..k {
        let mut piv = col;
        for r in col + 1..k {
            if a[r][col].abs() > a[piv][col].abs() {
                piv = r;
            }
        }
        let p = a[piv][col];
        if p == 0.0 || !p.is_finite() {
            return None;
        }
        a.swap(col, piv);
        b.swap(col, piv);
        for r in col + 1..k {
            let f = a[r][col] / p;
            for c in col..k {
                a[r][c] -= f * a[col][c];
            }
            for c in 0..k {
                b[r][c] -= f * b[col][c];
            }
        }
    }
    for col in (0..k).rev() {
        let p = a[col][col];
        for c in 0..k {
            let mut acc = b[col][c];
            for j in col + 1..k {
                acc -= a[col][j] * b[j][c];
            }
            b[col][c] = acc / p;
        }
    }
    Some(())
}

/// Positive-definiteness test by an LDL^T factorization (no square
/// roots): true when every pivot of the leading block is finite and > 0.
pub fn is_positive_definite<const S: usize>(m: &Mat<S>, k: usize) -> bool {
    let mut l = [[0.0f32; S]; S];
    let mut d = [0.0f32; S];
    for j in 0..k {
        let mut dj = m[j][j];
        for c in 0..j {
            dj -= l[j][c] * l[j][c] * d[c];
        }
        if dj.is_nan() || dj <= 0.0 || !dj.is_finite() {
            return false;
        }
        d[j] = dj;
        l[j][j] = 1.0;
        for i in j + 1..k {
            let mut acc = m[i][j];
            for c in 0..j {
                acc -= l[i][c] * l[j][c] * d[c];
            }
            l[i][j] = acc / dj;
        }
    }
    true
}
