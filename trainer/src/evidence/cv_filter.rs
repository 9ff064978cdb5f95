//! The textbook baseline for velocity from noisy positions: a per-coordinate
//! constant-velocity Kalman filter (discretized continuous white-noise
//! acceleration model of Bar-Shalom, Li and Kirubarajan, *Estimation with
//! Applications to Tracking and Navigation*, 2001): state (q, v),
//! F = [[1, T], [0, 1]], Q = s [[T^3/3, T^2/2], [T^2/2, T]] with s the
//! acceleration noise intensity, H = [1, 0], R = sigma^2, started by
//! two-point differencing (P = [[R, R/T], [R/T, 2R/T^2]]). In f64; it is a
//! yardstick, not a device path. Also the central finite difference.

/// One coordinate's constant-velocity filter.
#[derive(Debug, Clone)]
pub struct CvFilter {
    t: f64,
    r: f64,
    s: f64,
    x: [f64; 2],
    p: [[f64; 2]; 2],
}

impl CvFilter {
    /// A filter started from the first two positions `z0`, `z1` (sample
    /// interval `t`, measurement variance `r`, intensity `s`).
    pub fn new(t: f64, r: f64, s: f64, z0: f64, z1: f64) -> Self {
        Self {
            t,
            r,
            s,
            x: [z1, (z1 - z0) / t],
            p: [[r, r / t], [r / t, 2.0 * r / (t * t)]],
        }
    }

    /// Predict one interval and correct with position `z`; returns the
    /// velocity estimate.
    pub fn step(&mut self, z: f64) -> f64 {
        let (t, p) = (self.t, self.p);
        let x = [self.x[0] + t * self.x[1], self.x[1]];
        let (q11, q12, q22) = (self.s * t.powi(3) / 3.0, self.s * t * t / 2.0, self.s * t);
        let p11 = p[0][0] + 2.0 * t * p[0][1] + t * t * p[1][1] + q11;
        let p12 = p[0][1] + t * p[1][1] + q12;
        let p22 = p[1][1] + q22;
        let sv = p11 + self.r;
        let (k1, k2) = (p11 / sv, p12 / sv);
        let nu = z - x[0];
        self.x = [x[0] + k1 * nu, x[1] + k2 * nu];
        self.p = [
            [(1.0 - k1) * p11, (1.0 - k1) * p12],
            [(1.0 - k1) * p12, p22 - k2 * p12],
        ];
        self.x[1]
    }
}

/// Velocities of the whole position sequence `z` by the filter (the first
/// two from the two-point start).
pub fn cv_velocities(z: &[f64], t: f64, r: f64, s: f64) -> Vec<f64> {
    if z.len() < 2 {
        return vec![0.0; z.len()];
    }
    let mut f = CvFilter::new(t, r, s, z[0], z[1]);
    let v1 = (z[1] - z[0]) / t;
    let mut out = vec![v1, v1];
    out.extend(z[2..].iter().map(|zk| f.step(*zk)));
    out
}

/// Central differences (z[k+1] - z[k-1]) / 2T, one-sided at the ends.
pub fn central_differences(z: &[f64], t: f64) -> Vec<f64> {
    let n = z.len();
    (0..n)
        .map(|k| match (k, n) {
            (_, 0 | 1) => 0.0,
            (0, _) => (z[1] - z[0]) / t,
            (k, n) if k == n - 1 => (z[k] - z[k - 1]) / t,
            (k, _) => (z[k + 1] - z[k - 1]) / (2.0 * t),
        })
        .collect()
}
