//! The gantry-crane payload: sway under a fixed trolley (conservative) and
//! under a moving trolley with rope damping (driven by its acceleration).

use rand::Rng;
use rand_chacha::ChaCha8Rng;
use std::f64::consts::PI;

use crate::reference::params::{uniform, ParamSpec, ParamValues, SystemError};
use crate::reference::{Multisine, ReferenceSystem};

pub const CRANE_PARAMS: &[ParamSpec] = &[
    ParamSpec {
        name: "m",
        default: 500.0,
        unit: "kg",
        meaning: "payload mass",
    },
    ParamSpec {
        name: "l",
        default: 8.0,
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
        default: 120.0,
        unit: "deg",
        meaning: "largest sway amplitude (below 179)",
    },
];

/// Gantry-crane payload sway, a rigid pendulum with q = angle and
/// p = m L^2 dq/dt: H = p^2/(2 m L^2) + m g L (1 - cos q).
#[derive(Debug)]
pub struct Crane {
    params: ParamValues,
    m: f64,
    l: f64,
    g: f64,
    max_angle: f64,
}

impl Crane {
    pub fn build(params: ParamValues) -> Result<Box<dyn ReferenceSystem>, SystemError> {
        let max_deg = params.get("max_angle_deg");
        if max_deg >= 179.0 {
            return Err(SystemError::BadParamValue {
                system: "crane",
                key: "max_angle_deg".into(),
                value: max_deg,
                reason: "must be below 179 (the payload must never swing over the top)".into(),
            });
        }
        Ok(Box::new(Crane {
            m: params.get("m"),
            l: params.get("l"),
            g: params.get("g"),
            max_angle: max_deg.to_radians(),
            params,
        }))
    }
}

impl ReferenceSystem for Crane {
    fn name(&self) -> &'static str {
        "crane"
    }
    fn dof(&self) -> usize {
        1
    }
    fn params(&self) -> &ParamValues {
        &self.params
    }
    fn hamiltonian(&self, x: &[f64]) -> f64 {
        let inertia = self.m * self.l * self.l;
        x[1] * x[1] / (2.0 * inertia) + self.m * self.g * self.l * (1.0 - x[0].cos())
    }
    fn vector_field(&self, x: &[f64], dx: &mut [f64]) {
        dx[0] = x[1] / (self.m * self.l * self.l);
        dx[1] = -self.m * self.g * self.l * x[0].sin();
    }
    /// Sway amplitude theta0 uniform in [0.05, 1] * max_angle; the state is a
    /// uniformly drawn angle on that orbit, |q| <= theta0, with the momentum
    /// from energy conservation and a random sign. The energy is therefore
    /// always below the over-the-top energy 2 m g L.
    fn sample_initial_state(&self, rng: &mut ChaCha8Rng) -> Vec<f64> {
        let theta0 = uniform(rng, 0.05, 1.0) * self.max_angle;
        let q = uniform(rng, -theta0, theta0);
        let inertia = self.m * self.l * self.l;
        let kinetic = self.m * self.g * self.l * (q.cos() - theta0.cos());
        let speed = (2.0 * inertia * kinetic.max(0.0)).sqrt();
        let sign = if rng.random::<bool>() { 1.0 } else { -1.0 };
        vec![q, sign * speed]
    }
    fn small_amplitude_period(&self) -> Option<f64> {
        Some(2.0 * PI * (self.l / self.g).sqrt())
    }
}

pub const CRANE_TROLLEY_PARAMS: &[ParamSpec] = &[
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
        name: "zeta",
        default: 0.05,
        unit: "1",
        meaning: "damping ratio of small swings, rope and pivot losses (below 1)",
    },
    ParamSpec {
        name: "accel",
        default: 2.0,
        unit: "m/s^2",
        meaning: "trolley acceleration excitation amplitude (multisine, 0.05..1.5 Hz)",
    },
    ParamSpec {
        name: "max_angle_deg",
        default: 30.0,
        unit: "deg",
        meaning: "largest initial rope angle",
    },
];

/// A payload of mass m on a rope of length l under a trolley whose
/// acceleration a(t) is the input (a lab-scale gantry rig). Coordinates: q
/// = rope angle from the vertical (rad), p = m l^2 dq/dt. In the trolley's
/// frame the payload feels the inertial force -m a, whose moment about the
/// pivot is -m l a cos q, so H = p^2 / (2 m l^2) + m g l (1 - cos q),
/// R (momentum block) = c with c = 2 zeta m l^2 sqrt(g / l) (viscous rope
/// and pivot losses), and G(q) = (0, -m l cos q)^T depends on the state.
/// Under a constant acceleration a the payload settles at
/// q = -atan(a / g).
#[derive(Debug)]
pub struct CraneTrolley {
    params: ParamValues,
    m: f64,
    l: f64,
    g: f64,
    c: f64,
    accel: f64,
    max_angle: f64,
}

impl CraneTrolley {
    pub fn build(params: ParamValues) -> Result<Box<dyn ReferenceSystem>, SystemError> {
        let (m, l, g) = (params.get("m"), params.get("l"), params.get("g"));
        let zeta = params.get("zeta").min(0.999);
        Ok(Box::new(CraneTrolley {
            m,
            l,
            g,
            c: 2.0 * zeta * m * l * l * (g / l).sqrt(),
            accel: params.get("accel"),
            max_angle: params.get("max_angle_deg").clamp(0.0, 170.0).to_radians(),
            params,
        }))
    }
}

impl ReferenceSystem for CraneTrolley {
    fn name(&self) -> &'static str {
        "crane-trolley"
    }
    fn dof(&self) -> usize {
        1
    }
    fn damped(&self) -> bool {
        true
    }
    fn inputs(&self) -> usize {
        1
    }
    fn params(&self) -> &ParamValues {
        &self.params
    }
    fn hamiltonian(&self, x: &[f64]) -> f64 {
        let (m, l) = (self.m, self.l);
        x[1] * x[1] / (2.0 * m * l * l) + m * self.g * l * (1.0 - x[0].cos())
    }
    fn gradient(&self, x: &[f64], g: &mut [f64]) {
        let (m, l) = (self.m, self.l);
        g[0] = m * self.g * l * x[0].sin();
        g[1] = x[1] / (m * l * l);
    }
    fn dissipation(&self, _x: &[f64]) -> Vec<f64> {
        vec![0.0, 0.0, 0.0, self.c]
    }
    fn input_matrix(&self, x: &[f64]) -> Vec<f64> {
        vec![0.0, -self.m * self.l * x[0].cos()]
    }
    /// Angle uniform in +-max_angle, at rest.
    fn sample_initial_state(&self, rng: &mut ChaCha8Rng) -> Vec<f64> {
        vec![uniform(rng, -1.0, 1.0) * self.max_angle, 0.0]
    }
    /// Five tones per trajectory, 0.05..1.5 Hz (around the swing frequency
    /// sqrt(g / l) / (2 pi) = 0.5 Hz at the defaults), amplitude `accel`.
    fn sample_excitation(&self, rng: &mut ChaCha8Rng) -> Multisine {
        Multisine::random(rng, 1, 5, self.accel, 0.05, 1.5)
    }
}
