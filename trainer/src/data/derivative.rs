//! Time derivatives of evenly sampled signals by Savitzky-Golay smoothing
//! differentiation (A. Savitzky and M. J. E. Golay, "Smoothing and
//! differentiation of data by simplified least squares procedures",
//! Analytical Chemistry 36(8), 1964): at every sample a polynomial of degree
//! `order` is fitted by least squares to the `window` samples around it and
//! its slope at that sample is taken. Near the ends the same window length
//! and order are used, fitted one-sided (the window is shifted to stay inside
//! the signal), so every sample gets an estimate of the same order.
//!
//! Noise behaviour: the estimate is a fixed linear filter
//! dy/dt(i) = sum_j c_j y(i + j) / dt, so white measurement noise of standard
//! deviation sigma gives an error of standard deviation
//! sigma * sqrt(sum c_j^2) / dt ([`SavitzkyGolay::noise_gain`]). For the
//! default window 11 and order 3 the interior gain is 0.25, versus
//! sqrt(1/2) ~ 0.71 for a plain central difference (about 2.9 times less
//! noise); the one-sided end fits have larger gains (0.81 at the very first
//! and last sample) and larger bias (on a sine at 100 samples per period,
//! up to 2.6e-3 of the derivative's amplitude at the end samples against
//! 2.5e-5 in the interior). Order 2 would cut the noise further (gain 0.095 for
//! window 11) but biases the slope of a sine by about 1 % at 100 samples per
//! period, against 2.5e-5 for order 3 (interior; see the tests). The fit is exact for
//! polynomials up to `order`.

use std::fmt;

/// Default window length (samples).
pub const DEFAULT_WINDOW: usize = 11;
/// Default polynomial order.
pub const DEFAULT_ORDER: usize = 3;

/// Invalid filter settings.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct FilterError(String);

impl fmt::Display for FilterError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.0)
    }
}

impl std::error::Error for FilterError {}

/// Precomputed Savitzky-Golay first-derivative weights.
#[derive(Debug, Clone, PartialEq)]
pub struct SavitzkyGolay {
    window: usize,
    order: usize,
    /// `weights[j]`: weights for evaluating the slope at position `j` of the
    /// window (j = window/2 is the centred interior filter).
    weights: Vec<Vec<f64>>,
}

impl SavitzkyGolay {
    /// Build the filter. `window` must be odd and at least `order + 2`;
    /// `order` must be at least 1.
    pub fn new(window: usize, order: usize) -> Result<Self, FilterError> {
        if order < 1 {
            return Err(FilterError("derivative order must be at least 1".into()));
        }
        if window.is_multiple_of(2) || window < order + 2 {
            return Err(FilterError(format!(
                "derivative window must be odd and at least order + 2 = {} (got {window})",
                order + 2
            )));
        }
        let weights = (0..window)
            .map(|at| slope_weights(window, order, at))
            .collect();
        Ok(Self {
            window,
            order,
            weights,
        })
    }

    /// Window length in samples; signals shorter than this cannot be
    /// differentiated.
    pub fn window(&self) -> usize {
        self.window
    }

    /// Polynomial order.
    pub fn order(&self) -> usize {
        self.order
    }

    /// Weights of the centred (interior) filter.
    pub fn interior_weights(&self) -> &[f64] {
        &self.weights[self.window / 2]
    }

    /// Standard deviation of the interior estimate per unit white-noise
    /// standard deviation, times dt: sqrt(sum c_j^2).
    pub fn noise_gain(&self) -> f64 {
        self.interior_weights()
            .iter()
            .map(|c| c * c)
            .sum::<f64>()
            .sqrt()
    }

    /// dy/dt at every sample of `y`, sampled every `dt` seconds.
    /// Returns `None` when `y` is shorter than the window.
    pub fn derivative(&self, y: &[f64], dt: f64) -> Option<Vec<f64>> {
        let n = y.len();
        if n < self.window {
            return None;
        }
        let half = self.window / 2;
        let out = (0..n)
            .map(|i| {
                // Window start, shifted inwards near the ends.
                let start = i.saturating_sub(half).min(n - self.window);
                let w = &self.weights[i - start];
                let s: f64 = w
                    .iter()
                    .zip(&y[start..start + self.window])
                    .map(|(c, v)| c * v)
                    .sum();
                s / dt
            })
            .collect();
        Some(out)
    }
}

impl Default for SavitzkyGolay {
    fn default() -> Self {
        Self::new(DEFAULT_WINDOW, DEFAULT_ORDER).expect("default settings are valid")
    }
}

/// Least-squares slope weights at position `at` of a window of `window`
/// unit-spaced samples for a polynomial of degree `order`. With offsets
/// x_i = i - at and the Vandermonde matrix V (V_ik = x_i^k), the fitted
/// coefficients are a = (V^T V)^-1 V^T y and the slope at x = 0 is a_1, so the
/// weights are c_i = sum_k z_k x_i^k with (V^T V) z = e_1.
fn slope_weights(window: usize, order: usize, at: usize) -> Vec<f64> {
    let m = order + 1;
    let offsets: Vec<f64> = (0..window).map(|i| i as f64 - at as f64).collect();
    // Normal matrix G_kl = sum_i x_i^(k + l).
    let mut g = vec![vec![0.0; m]; m];
    for (k, row) in g.iter_mut().enumerate() {
        for (l, cell) in row.iter_mut().enumerate() {
            *cell = offsets.iter().map(|x| x.powi((k + l) as i32)).sum();
        }
    }
    let mut rhs = vec![0.0; m];
    rhs[1] = 1.0;
    let z = solve(g, rhs);
    offsets
        .iter()
        .map(|x| {
            z.iter()
                .enumerate()
                .map(|(k, zk)| zk * x.powi(k as i32))
                .sum()
        })
        .collect()
}

/// Gaussian elimination with partial pivoting for a small, well-posed system.
fn solve(mut a: Vec<Vec<f64>>, mut b: Vec<f64>) -> Vec<f64> {
    let n = b.len();
    for col in 0..n {
        let pivot = (col..n)
            .max_by(|&i, &j| a[i][col].abs().total_cmp(&a[j][col].abs()))
            .expect("non-empty range");
        a.swap(col, pivot);
        b.swap(col, pivot);
        let (upper, lower) = a.split_at_mut(col + 1);
        let pivot_row = &upper[col];
        for (offset, row) in lower.iter_mut().enumerate() {
            let f = row[col] / pivot_row[col];
            for (cell, p) in row[col..].iter_mut().zip(&pivot_row[col..]) {
                *cell -= f * p;
            }
            b[col + 1 + offset] -= f * b[col];
        }
    }
    let mut x = vec![0.0; n];
    for row in (0..n).rev() {
        let s: f64 = (row + 1..n).map(|k| a[row][k] * x[k]).sum();
        x[row] = (b[row] - s) / a[row][row];
    }
    x
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;
    use rand_distr::{Distribution, Normal};

    #[test]
    fn interior_weights_match_published_values() {
        // Orders 1 and 2 share the centred first-derivative weights
        // c_j = j / sum(j^2) (least-squares slope of a straight line; textbook
        // closed form), so the 9-point noise gain is sqrt(1/60).
        for window in [5usize, 7, 9, 11] {
            let half = (window / 2) as i64;
            let norm: f64 = (-half..=half).map(|j| (j * j) as f64).sum();
            let f = SavitzkyGolay::new(window, 2).unwrap();
            for (c, j) in f.interior_weights().iter().zip(-half..=half) {
                assert!((c - j as f64 / norm).abs() < 1e-13);
            }
        }
        let f = SavitzkyGolay::new(9, 2).unwrap();
        assert!((f.noise_gain() - (1.0f64 / 60.0).sqrt()).abs() < 1e-13);
        // Cubic, 5 points: (1, -8, 0, 8, -1)/12, the classic five-point
        // derivative formula (Abramowitz & Stegun 25.3.6, from memory).
        let f = SavitzkyGolay::new(5, 3).unwrap();
        for (c, e) in f.interior_weights().iter().zip([1.0, -8.0, 0.0, 8.0, -1.0]) {
            assert!((c - e / 12.0).abs() < 1e-13);
        }
        // Cubic, 9 points: (86, -142, -193, -126, 0, 126, 193, 142, -86)/1188
        // (Savitzky & Golay 1964 first-derivative table, from memory).
        let f = SavitzkyGolay::new(9, 3).unwrap();
        let table = [
            86.0, -142.0, -193.0, -126.0, 0.0, 126.0, 193.0, 142.0, -86.0,
        ];
        for (c, e) in f.interior_weights().iter().zip(table) {
            assert!((c - e / 1188.0).abs() < 1e-13);
        }
    }

    #[test]
    fn exact_on_polynomials_including_ends() {
        // A least-squares fit of degree `order` reproduces any polynomial of
        // that degree exactly (basic property of least squares).
        let f = SavitzkyGolay::new(7, 3).unwrap();
        let dt = 0.1;
        let t: Vec<f64> = (0..20).map(|i| i as f64 * dt).collect();
        let y: Vec<f64> = t
            .iter()
            .map(|t| 1.0 - 2.0 * t + 0.5 * t * t - 0.3 * t.powi(3))
            .collect();
        let d = f.derivative(&y, dt).unwrap();
        for (t, d) in t.iter().zip(&d) {
            let exact = -2.0 + t - 0.9 * t * t;
            assert!((d - exact).abs() < 1e-10, "{d} vs {exact}");
        }
        assert!(f.derivative(&y[..6], dt).is_none());
        assert!(SavitzkyGolay::new(8, 3).is_err());
        assert!(SavitzkyGolay::new(3, 3).is_err());
    }

    /// Samples of sin(w t + phi) and its derivative at `rate` Hz for 4 s,
    /// w = 2 pi * 1 Hz.
    fn sine(rate: f64, phi: f64) -> (Vec<f64>, Vec<f64>, f64) {
        let w = 2.0 * std::f64::consts::PI;
        let dt = 1.0 / rate;
        let t: Vec<f64> = (0..(4.0 * rate) as usize).map(|i| i as f64 * dt).collect();
        let y = t.iter().map(|t| (w * t + phi).sin()).collect();
        let dy = t.iter().map(|t| w * (w * t + phi).cos()).collect();
        (y, dy, dt)
    }

    fn rms(a: &[f64], b: &[f64]) -> f64 {
        (a.iter().zip(b).map(|(x, y)| (x - y).powi(2)).sum::<f64>() / a.len() as f64).sqrt()
    }

    #[test]
    fn sine_noise_free_error_is_small() {
        // Closed form d/dt sin(w t + phi) = w cos(w t + phi), 100 samples per
        // period, 16 phases (the end error depends on the phase there). The
        // default filter (window 11, cubic) errs by at most 1e-4 of the
        // derivative's amplitude w in the interior (measured 2.5e-5) and by at
        // most 4e-3 at the one-sided ends (measured 2.6e-3).
        let filter = SavitzkyGolay::default();
        let half = filter.window() / 2;
        let w = 2.0 * std::f64::consts::PI;
        for k in 0..16 {
            let phi = k as f64 * std::f64::consts::PI / 8.0;
            let (y, dy, dt) = sine(100.0, phi);
            let d = filter.derivative(&y, dt).unwrap();
            let rel: Vec<f64> = d.iter().zip(&dy).map(|(a, b)| (a - b).abs() / w).collect();
            let interior = rel[half..rel.len() - half]
                .iter()
                .copied()
                .fold(0.0, f64::max);
            let all = rel.iter().copied().fold(0.0, f64::max);
            assert!(
                interior < 1e-4,
                "phase {phi}: interior relative error {interior}"
            );
            assert!(all < 4e-3, "phase {phi}: relative error with ends {all}");
        }
    }

    #[test]
    fn sine_with_noise_beats_central_differences() {
        // With white noise sigma = 1e-3 the central difference error has
        // standard deviation sigma * sqrt(1/2) / dt, the default filter's
        // interior error sigma * 0.246 / dt (its weights' root-sum-square;
        // the bias is negligible here): an expected ratio of 0.35. Assert the
        // filter's RMS error is under 0.42 times the central difference's
        // (same interior samples; the margin covers the RMS estimates'
        // sampling spread of a few percent).
        let (y, dy, dt) = sine(100.0, 0.3);
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        let normal = Normal::new(0.0, 1e-3).unwrap();
        let noisy: Vec<f64> = y.iter().map(|v| v + normal.sample(&mut rng)).collect();
        let d = SavitzkyGolay::default().derivative(&noisy, dt).unwrap();
        let n = noisy.len();
        let central: Vec<f64> = (1..n - 1)
            .map(|i| (noisy[i + 1] - noisy[i - 1]) / (2.0 * dt))
            .collect();
        let inner = 5..n - 5;
        let err_sg = rms(&d[inner.clone()], &dy[inner.clone()]);
        let err_cd = rms(&central[4..n - 6], &dy[inner]);
        assert!(err_sg < 0.42 * err_cd, "SG {err_sg} vs central {err_cd}");
    }
}
