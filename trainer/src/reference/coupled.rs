//! The kinetic energy of two coordinates whose inertia is coupled through
//! one angle phi: M(phi) = [[a, k cos phi], [k cos phi, b]] (the double
//! pendulum with phi = q1 - q2, the cart-pendulum with phi = theta), with
//! T = 1/2 p^T M^-1 p written as N / D, N = b p1^2 - 2 k c p1 p2 + a p2^2
//! and D = 2 det M = 2 (a b - k^2 c^2), c = cos phi.

/// The three inertia constants of M(phi).
#[derive(Debug, Clone, Copy)]
pub struct CoupledInertia {
    /// M_11.
    pub a: f64,
    /// M_22.
    pub b: f64,
    /// The coupling: M_12 = k cos phi.
    pub k: f64,
}

/// T, dT/dp and dT/dphi at one state.
#[derive(Debug, Clone, Copy)]
pub struct Kinetic {
    pub energy: f64,
    pub dp: [f64; 2],
    pub dphi: f64,
}

impl CoupledInertia {
    /// M(phi).
    pub fn matrix(&self, phi: f64) -> [[f64; 2]; 2] {
        let off = self.k * phi.cos();
        [[self.a, off], [off, self.b]]
    }

    /// p = M(phi) v.
    pub fn momenta(&self, phi: f64, v: [f64; 2]) -> [f64; 2] {
        let m = self.matrix(phi);
        [
            m[0][0] * v[0] + m[0][1] * v[1],
            m[1][0] * v[0] + m[1][1] * v[1],
        ]
    }

    /// T = N / D and its derivatives: dT/dp = M^-1 p, and dT/dphi by the
    /// quotient rule (dN/dphi = 2 k s p1 p2, dD/dphi = 4 k^2 c s).
    pub fn kinetic(&self, phi: f64, p: [f64; 2]) -> Kinetic {
        let (a, b, k) = (self.a, self.b, self.k);
        let (s, c) = phi.sin_cos();
        let det = a * b - k * k * c * c;
        let num = b * p[0] * p[0] - 2.0 * k * c * p[0] * p[1] + a * p[1] * p[1];
        let (den, dnum, dden) = (2.0 * det, 2.0 * k * s * p[0] * p[1], 4.0 * k * k * c * s);
        Kinetic {
            energy: num / den,
            dp: [
                (b * p[0] - k * c * p[1]) / det,
                (a * p[1] - k * c * p[0]) / det,
            ],
            dphi: (dnum * den - num * dden) / (den * den),
        }
    }
}
