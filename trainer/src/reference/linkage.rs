//! Rigid linkages, whose mass matrix depends on the angles: the planar
//! double pendulum with point masses (a two-link arm hanging from a fixed
//! pivot). Absolute angles q1, q2 from the downward vertical; with
//! c = cos(q1 - q2) the Lagrangian is
//! L = (m1 + m2) l1^2 q1'^2 / 2 + m2 l2^2 q2'^2 / 2 + m2 l1 l2 c q1' q2'
//!     + (m1 + m2) g l1 cos q1 + m2 g l2 cos q2
//! (Landau & Lifshitz, Mechanics, 3rd ed., section 5, problem 1; from
//! memory), so p = M(q) q' with
//! M(q) = [[(m1 + m2) l1^2, m2 l1 l2 c], [m2 l1 l2 c, m2 l2^2]] and
//! H = 1/2 p^T M(q)^-1 p + V(q), V = -(m1 + m2) g l1 cos q1 - m2 g l2 cos q2.

use crate::reference::coupled::CoupledInertia;
use rand_chacha::ChaCha8Rng;
use std::f64::consts::PI;

use crate::reference::params::{uniform, ParamSpec, ParamValues, SystemError};
use crate::reference::ReferenceSystem;

pub const DOUBLE_PENDULUM_PARAMS: &[ParamSpec] = &[
    ParamSpec {
        name: "m1",
        default: 1.0,
        unit: "kg",
        meaning: "mass at the end of the upper link",
    },
    ParamSpec {
        name: "m2",
        default: 0.5,
        unit: "kg",
        meaning: "mass at the end of the lower link",
    },
    ParamSpec {
        name: "l1",
        default: 0.6,
        unit: "m",
        meaning: "upper link length",
    },
    ParamSpec {
        name: "l2",
        default: 0.4,
        unit: "m",
        meaning: "lower link length",
    },
    ParamSpec {
        name: "g",
        default: 9.81,
        unit: "m/s^2",
        meaning: "gravitational acceleration",
    },
    ParamSpec {
        name: "max_angle_deg",
        default: 40.0,
        unit: "deg",
        meaning: "largest initial angle of either link (below 90)",
    },
];

/// The double pendulum with point masses (see the module doc).
#[derive(Debug)]
pub struct DoublePendulum {
    params: ParamValues,
    m1: f64,
    m2: f64,
    l1: f64,
    l2: f64,
    g: f64,
    max_angle: f64,
}

impl DoublePendulum {
    pub fn build(params: ParamValues) -> Result<Box<dyn ReferenceSystem>, SystemError> {
        params.quarter_turn_angle("double-pendulum")?;
        Ok(Box::new(Self::from_params(params)))
    }

    /// The system with `params` (values as [`Self::build`] accepts them).
    pub fn from_params(params: ParamValues) -> Self {
        DoublePendulum {
            m1: params.get("m1"),
            m2: params.get("m2"),
            l1: params.get("l1"),
            l2: params.get("l2"),
            g: params.get("g"),
            max_angle: params.get("max_angle_deg").to_radians(),
            params,
        }
    }

    /// The mass matrix M(q) (row-major 2 x 2).
    pub fn mass_matrix(&self, q: &[f64]) -> [[f64; 2]; 2] {
        self.inertia().matrix(q[0] - q[1])
    }

    /// M(q1 - q2) as a coupled inertia: a = (m1 + m2) l1^2, b = m2 l2^2,
    /// k = m2 l1 l2.
    fn inertia(&self) -> CoupledInertia {
        CoupledInertia {
            a: (self.m1 + self.m2) * self.l1 * self.l1,
            b: self.m2 * self.l2 * self.l2,
            k: self.m2 * self.l1 * self.l2,
        }
    }

    /// The small-oscillation angular frequencies (slow, fast) about the
    /// hanging rest q = 0: the roots of det(K - w^2 M(0)) = 0 with
    /// K = diag((m1 + m2) g l1, m2 g l2) (the normal-mode problem of
    /// Goldstein, Classical Mechanics, 3rd ed., ch. 6; from memory).
    pub fn normal_mode_frequencies(&self) -> (f64, f64) {
        let (m1, m2, l1, l2, g) = (self.m1, self.m2, self.l1, self.l2, self.g);
        // m1 m2 l1^2 l2^2 w^4 - (m1 + m2) m2 g l1 l2 (l1 + l2) w^2
        //   + (m1 + m2) m2 g^2 l1 l2 = 0
        let a = m1 * m2 * l1 * l1 * l2 * l2;
        let b = -(m1 + m2) * m2 * g * l1 * l2 * (l1 + l2);
        let c = (m1 + m2) * m2 * g * g * l1 * l2;
        let root = (b * b - 4.0 * a * c).sqrt();
        let slow = (-b - root) / (2.0 * a);
        let fast = (-b + root) / (2.0 * a);
        (slow.sqrt(), fast.sqrt())
    }
}

impl ReferenceSystem for DoublePendulum {
    fn name(&self) -> &'static str {
        "double-pendulum"
    }
    fn dof(&self) -> usize {
        2
    }
    fn params(&self) -> &ParamValues {
        &self.params
    }
    fn hamiltonian(&self, x: &[f64]) -> f64 {
        let kinetic = self.inertia().kinetic(x[0] - x[1], [x[2], x[3]]).energy;
        let v = -(self.m1 + self.m2) * self.g * self.l1 * x[0].cos()
            - self.m2 * self.g * self.l2 * x[1].cos();
        kinetic + v
    }
    /// dH/dp = M^-1 p; T depends on q1 - q2 only, so dT/dq1 = -dT/dq2 =
    /// dT/d(q1 - q2), plus each link's gravity term.
    fn gradient(&self, x: &[f64], g: &mut [f64]) {
        let (m1, m2, l1, l2) = (self.m1, self.m2, self.l1, self.l2);
        let t = self.inertia().kinetic(x[0] - x[1], [x[2], x[3]]);
        [g[2], g[3]] = t.dp;
        g[0] = t.dphi + (m1 + m2) * self.g * l1 * x[0].sin();
        g[1] = -t.dphi + m2 * self.g * l2 * x[1].sin();
    }
    /// Both angles uniform in +-max_angle, angular velocities uniform in
    /// +-max_angle * sqrt(g / l1); p = M(q) q'.
    fn sample_initial_state(&self, rng: &mut ChaCha8Rng) -> Vec<f64> {
        let a = self.max_angle;
        let q = [uniform(rng, -a, a), uniform(rng, -a, a)];
        let w = a * (self.g / self.l1).sqrt();
        let v = [uniform(rng, -w, w), uniform(rng, -w, w)];
        let p = self.inertia().momenta(q[0] - q[1], v);
        vec![q[0], q[1], p[0], p[1]]
    }
    fn small_amplitude_period(&self) -> Option<f64> {
        Some(2.0 * PI / self.normal_mode_frequencies().0)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::reference::build_system;
    use rand::SeedableRng;

    #[test]
    fn energy_is_the_cartesian_kinetic_plus_potential_energy() {
        // Independent of M(q): the masses' positions (l1 sin q1, -l1 cos q1)
        // and (l1 sin q1 + l2 sin q2, -l1 cos q1 - l2 cos q2), velocities by
        // differentiating them with q' = dH/dp, T = sum m |v|^2 / 2 and
        // V = sum m g y (elementary mechanics).
        let sys = build_system("double-pendulum", &[]).unwrap();
        let (m1, m2, l1, l2, g) = (1.0, 0.5, 0.6, 0.4, 9.81);
        let mut rng = ChaCha8Rng::seed_from_u64(4);
        for _ in 0..20 {
            let x = sys.sample_initial_state(&mut rng);
            let mut grad = [0.0; 4];
            sys.gradient(&x, &mut grad);
            let (q1, q2, w1, w2) = (x[0], x[1], grad[2], grad[3]);
            let v1 = (l1 * q1.cos() * w1, l1 * q1.sin() * w1);
            let v2 = (v1.0 + l2 * q2.cos() * w2, v1.1 + l2 * q2.sin() * w2);
            let t = 0.5 * m1 * (v1.0 * v1.0 + v1.1 * v1.1) + 0.5 * m2 * (v2.0 * v2.0 + v2.1 * v2.1);
            let v = -m1 * g * l1 * q1.cos() - m2 * g * (l1 * q1.cos() + l2 * q2.cos());
            let h = sys.hamiltonian(&x);
            assert!(
                (h - (t + v)).abs() < 1e-12 * (t.abs() + v.abs()),
                "{h} vs {}",
                t + v
            );
        }
    }

    #[test]
    fn angles_out_of_range_are_refused() {
        let err = build_system("double-pendulum", &[("max_angle_deg".into(), 95.0)]).unwrap_err();
        assert!(err.to_string().contains("(0, 90)"), "{err}");
    }
}
