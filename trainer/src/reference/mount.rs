//! The two-stage vibration-isolation mount (two masses, two springs).

use rand_chacha::ChaCha8Rng;
use std::f64::consts::PI;

use crate::reference::params::{uniform, ParamSpec, ParamValues, SystemError};
use crate::reference::ReferenceSystem;

pub const MOUNT_PARAMS: &[ParamSpec] = &[
    ParamSpec {
        name: "m1",
        default: 2.0,
        unit: "kg",
        meaning: "lower (base-side) mass",
    },
    ParamSpec {
        name: "m2",
        default: 2.0,
        unit: "kg",
        meaning: "upper mass",
    },
    ParamSpec {
        name: "k1",
        default: 8000.0,
        unit: "N/m",
        meaning: "base-to-lower-mass stiffness",
    },
    ParamSpec {
        name: "k2",
        default: 8000.0,
        unit: "N/m",
        meaning: "lower-to-upper-mass stiffness",
    },
    ParamSpec {
        name: "amp",
        default: 0.002,
        unit: "m",
        meaning: "largest initial displacement of each mass",
    },
];

/// Two-stage vibration-isolation mount: two masses in series on two springs,
/// fixed at the base. H = p1^2/(2 m1) + p2^2/(2 m2) + k1 q1^2/2 + k2 (q2 - q1)^2/2.
#[derive(Debug)]
pub struct Mount {
    params: ParamValues,
    m1: f64,
    m2: f64,
    k1: f64,
    k2: f64,
    amp: f64,
}

impl Mount {
    pub fn build(params: ParamValues) -> Result<Box<dyn ReferenceSystem>, SystemError> {
        Ok(Box::new(Mount {
            m1: params.get("m1"),
            m2: params.get("m2"),
            k1: params.get("k1"),
            k2: params.get("k2"),
            amp: params.get("amp"),
            params,
        }))
    }

    /// Squared normal-mode angular frequencies (slow, fast): eigenvalues of
    /// M^-1 K with K = [[k1 + k2, -k2], [-k2, k2]], M = diag(m1, m2).
    pub fn mode_omegas_squared(&self) -> (f64, f64) {
        let a = (self.k1 + self.k2) / self.m1;
        let d = self.k2 / self.m2;
        let half_trace = 0.5 * (a + d);
        let det = self.k1 * self.k2 / (self.m1 * self.m2);
        let root = (half_trace * half_trace - det).max(0.0).sqrt();
        // Smaller root via det / larger, which avoids cancellation.
        let fast = half_trace + root;
        (det / fast, fast)
    }
}

impl ReferenceSystem for Mount {
    fn name(&self) -> &'static str {
        "mount"
    }
    fn dof(&self) -> usize {
        2
    }
    fn params(&self) -> &ParamValues {
        &self.params
    }
    fn hamiltonian(&self, x: &[f64]) -> f64 {
        let (q1, q2, p1, p2) = (x[0], x[1], x[2], x[3]);
        p1 * p1 / (2.0 * self.m1)
            + p2 * p2 / (2.0 * self.m2)
            + 0.5 * self.k1 * q1 * q1
            + 0.5 * self.k2 * (q2 - q1) * (q2 - q1)
    }
    fn vector_field(&self, x: &[f64], dx: &mut [f64]) {
        let (q1, q2, p1, p2) = (x[0], x[1], x[2], x[3]);
        dx[0] = p1 / self.m1;
        dx[1] = p2 / self.m2;
        dx[2] = -self.k1 * q1 + self.k2 * (q2 - q1);
        dx[3] = -self.k2 * (q2 - q1);
    }
    /// Displacements uniform in [-amp, amp]; velocities uniform in
    /// [-w_slow amp, w_slow amp] with w_slow the slow mode's angular frequency.
    fn sample_initial_state(&self, rng: &mut ChaCha8Rng) -> Vec<f64> {
        let w = self.mode_omegas_squared().0.sqrt();
        let q1 = uniform(rng, -self.amp, self.amp);
        let q2 = uniform(rng, -self.amp, self.amp);
        let v1 = uniform(rng, -w * self.amp, w * self.amp);
        let v2 = uniform(rng, -w * self.amp, w * self.amp);
        vec![q1, q2, self.m1 * v1, self.m2 * v2]
    }
    fn small_amplitude_period(&self) -> Option<f64> {
        Some(2.0 * PI / self.mode_omegas_squared().0.sqrt())
    }
}
