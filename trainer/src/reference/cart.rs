//! The gantry crane with its trolley as a coordinate: a trolley of mass M
//! rolling freely on a level rail (position x), a payload of mass m on a
//! rope of length l hanging from it (angle theta from the downward
//! vertical). Unlike `crane-trolley`, whose trolley motion is a prescribed
//! input (1 dof, no trolley mass), here the trolley and the payload push on
//! each other, so the mass matrix depends on the angle. With c = cos theta
//! the Lagrangian is
//! L = (M + m) x'^2 / 2 + m l c x' theta' + m l^2 theta'^2 / 2 + m g l c
//! (the cart-pendulum of Goldstein, Classical Mechanics, 3rd ed., ch. 1
//! exercises and ch. 6; from memory; re-derived in this module's test from
//! the Cartesian positions), so p = M(q) q' with
//! M(q) = [[M + m, m l c], [m l c, m l^2]] and
//! H = 1/2 p^T M(q)^-1 p + m g l (1 - c).

use crate::reference::coupled::CoupledInertia;
use rand_chacha::ChaCha8Rng;
use std::f64::consts::PI;

use crate::reference::params::{uniform, ParamSpec, ParamValues, SystemError};
use crate::reference::ReferenceSystem;

pub const CRANE_CART_PARAMS: &[ParamSpec] = &[
    ParamSpec {
        name: "trolley_mass",
        default: 4.0,
        unit: "kg",
        meaning: "trolley mass (free on a level rail)",
    },
    ParamSpec {
        name: "m",
        default: 2.0,
        unit: "kg",
        meaning: "payload mass",
    },
    ParamSpec {
        name: "l",
        default: 1.0,
        unit: "m",
        meaning: "rope length",
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
        meaning: "largest initial rope angle (below 90)",
    },
    ParamSpec {
        name: "max_speed",
        default: 0.5,
        unit: "m/s",
        meaning: "largest initial trolley speed",
    },
];

/// The free cart-pendulum crane (see the module doc); q = (x, theta) in
/// (m, rad), p = (p_x, p_theta) in (kg m/s, kg m^2/s).
#[derive(Debug)]
pub struct CraneCart {
    params: ParamValues,
    trolley: f64,
    m: f64,
    l: f64,
    g: f64,
    max_angle: f64,
    max_speed: f64,
}

impl CraneCart {
    pub fn build(params: ParamValues) -> Result<Box<dyn ReferenceSystem>, SystemError> {
        params.quarter_turn_angle("crane-cart")?;
        for key in ["trolley_mass", "m", "l", "g"] {
            let value = params.get(key);
            if !(value > 0.0 && value.is_finite()) {
                return Err(SystemError::BadParamValue {
                    system: "crane-cart",
                    key: key.into(),
                    value,
                    reason: "must be positive".into(),
                });
            }
        }
        Ok(Box::new(Self::from_params(params)))
    }

    /// The system with `params` (values as [`Self::build`] accepts them).
    pub fn from_params(params: ParamValues) -> Self {
        CraneCart {
            trolley: params.get("trolley_mass"),
            m: params.get("m"),
            l: params.get("l"),
            g: params.get("g"),
            max_angle: params.get("max_angle_deg").to_radians(),
            max_speed: params.get("max_speed").abs(),
            params,
        }
    }

    /// The mass matrix M(q) (row-major 2 x 2, q = (x, theta)).
    pub fn mass_matrix(&self, q: &[f64]) -> [[f64; 2]; 2] {
        self.inertia().matrix(q[1])
    }

    /// M(theta) as a coupled inertia: a = M + m, b = m l^2, k = m l.
    fn inertia(&self) -> CoupledInertia {
        CoupledInertia {
            a: self.trolley + self.m,
            b: self.m * self.l * self.l,
            k: self.m * self.l,
        }
    }

    /// The angular frequency of small swings about the hanging rest with
    /// the trolley free: linearizing at theta = 0, det(K - w^2 M(0)) = 0 with
    /// K = diag(0, m g l) gives
    /// w^2 [(M + m) m l^2 w^2 - m^2 l^2 w^2 - (M + m) m g l] = 0, so besides
    /// the zero mode (the whole crane rolling) w^2 = g (M + m) / (M l).
    pub fn swing_frequency(&self) -> f64 {
        (self.g * (self.trolley + self.m) / (self.trolley * self.l)).sqrt()
    }
}

impl ReferenceSystem for CraneCart {
    fn name(&self) -> &'static str {
        "crane-cart"
    }
    fn dof(&self) -> usize {
        2
    }
    fn params(&self) -> &ParamValues {
        &self.params
    }
    fn hamiltonian(&self, x: &[f64]) -> f64 {
        let kinetic = self.inertia().kinetic(x[1], [x[2], x[3]]).energy;
        kinetic + self.m * self.g * self.l * (1.0 - x[1].cos())
    }
    /// dH/dp = M^-1 p; dH/dx = 0 (the rail is level); dH/dtheta = dT/dtheta
    /// plus the payload's m g l sin theta.
    fn gradient(&self, x: &[f64], g: &mut [f64]) {
        let t = self.inertia().kinetic(x[1], [x[2], x[3]]);
        [g[2], g[3]] = t.dp;
        g[0] = 0.0;
        g[1] = t.dphi + self.m * self.g * self.l * x[1].sin();
    }
    /// Trolley position uniform in +-0.5 m and speed in
    /// +-max_speed; rope angle uniform in +-max_angle and angular velocity
    /// in +-max_angle * sqrt(g / l); p = M(q) q'.
    fn sample_initial_state(&self, rng: &mut ChaCha8Rng) -> Vec<f64> {
        let a = self.max_angle;
        let q = [uniform(rng, -0.5, 0.5), uniform(rng, -a, a)];
        let w = a * (self.g / self.l).sqrt();
        let v = [
            uniform(rng, -self.max_speed, self.max_speed),
            uniform(rng, -w, w),
        ];
        let p = self.inertia().momenta(q[1], v);
        vec![q[0], q[1], p[0], p[1]]
    }
    fn small_amplitude_period(&self) -> Option<f64> {
        Some(2.0 * PI / self.swing_frequency())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::reference::build_system;
    use rand::SeedableRng;

    #[test]
    fn energy_is_the_cartesian_kinetic_plus_potential_energy() {
        // Independent of M(q): trolley at (x, 0), payload at
        // (x + l sin theta, -l cos theta), velocities by differentiating
        // them with q' = dH/dp, T = sum m |v|^2 / 2, V = m g (y + l)
        // (elementary mechanics).
        let sys = build_system("crane-cart", &[]).unwrap();
        let (big, m, l, g) = (4.0, 2.0, 1.0, 9.81);
        let mut rng = ChaCha8Rng::seed_from_u64(4);
        for _ in 0..20 {
            let x = sys.sample_initial_state(&mut rng);
            let mut grad = [0.0; 4];
            sys.gradient(&x, &mut grad);
            let (th, vx, w) = (x[1], grad[2], grad[3]);
            let payload = (vx + l * th.cos() * w, l * th.sin() * w);
            let t = 0.5 * big * vx * vx + 0.5 * m * (payload.0.powi(2) + payload.1.powi(2));
            let v = m * g * l * (1.0 - th.cos());
            let h = sys.hamiltonian(&x);
            assert!((h - (t + v)).abs() < 1e-12 * (t + v), "{h} vs {}", t + v);
        }
    }

    #[test]
    fn swing_frequency_solves_the_linearized_problem() {
        // det(K - w^2 M(0)) = 0 at the stated w (K = diag(0, m g l)), and a
        // heavy trolley gives back the fixed-pivot pendulum sqrt(g / l)
        // (textbook limit).
        let sys =
            CraneCart::from_params(ParamValues::new("crane-cart", CRANE_CART_PARAMS, &[]).unwrap());
        let w2 = sys.swing_frequency().powi(2);
        let mm = sys.mass_matrix(&[0.0, 0.0]);
        let k = 2.0 * 9.81 * 1.0;
        let det = (-w2 * mm[0][0]) * (k - w2 * mm[1][1]) - (w2 * mm[0][1]).powi(2);
        assert!(det.abs() < 1e-12 * (k * k), "{det}");
        let heavy = [("trolley_mass".to_string(), 1e9)];
        let heavy = CraneCart::from_params(
            ParamValues::new("crane-cart", CRANE_CART_PARAMS, &heavy).unwrap(),
        );
        assert!((heavy.swing_frequency() / 9.81f64.sqrt() - 1.0).abs() < 1e-8);
    }

    #[test]
    fn angles_out_of_range_are_refused() {
        let err = build_system("crane-cart", &[("max_angle_deg".into(), 95.0)]).unwrap_err();
        assert!(err.to_string().contains("(0, 90)"), "{err}");
    }
}
