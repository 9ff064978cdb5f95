//! The two-inertia servo drivetrain of a test rig: motor, elastic damped
//! shaft, load with friction, motor torque input.

use rand_chacha::ChaCha8Rng;

use crate::reference::params::{uniform, ParamSpec, ParamValues, SystemError};
use crate::reference::{Multisine, ReferenceSystem};

pub const DRIVETRAIN_PARAMS: &[ParamSpec] = &[
    ParamSpec {
        name: "jm",
        default: 2e-4,
        unit: "kg m^2",
        meaning: "motor inertia",
    },
    ParamSpec {
        name: "jl",
        default: 1e-3,
        unit: "kg m^2",
        meaning: "load inertia",
    },
    ParamSpec {
        name: "k",
        default: 1.0,
        unit: "N m/rad",
        meaning: "shaft stiffness",
    },
    ParamSpec {
        name: "c",
        default: 2e-3,
        unit: "N m s/rad",
        meaning: "shaft damping (between the inertias)",
    },
    ParamSpec {
        name: "b",
        default: 1e-2,
        unit: "N m s/rad",
        meaning: "viscous friction of the load",
    },
    ParamSpec {
        name: "torque",
        default: 0.02,
        unit: "N m",
        meaning: "motor torque excitation amplitude (multisine, 0.2..15 Hz)",
    },
    ParamSpec {
        name: "speed",
        default: 2.0,
        unit: "rad/s",
        meaning: "largest initial speed",
    },
];

/// Two-inertia servo drivetrain. Coordinates: q1 = motor angle, q2 = load
/// angle (rad), p1 = Jm w_m, p2 = Jl w_l (kg m^2/s). The energy
/// H = p1^2/(2 Jm) + p2^2/(2 Jl) + k (q1 - q2)^2 / 2 depends on the twist
/// q1 - q2 only. R (momentum block) = [[c, -c], [-c, c + b]]: the shaft
/// damper acts on the speed difference, the friction on the load speed.
/// G = (0, 0, 1, 0)^T: the motor torque u1 drives p1. The absolute angles
/// are kept as coordinates (they are what an encoder logs); with a
/// zero-mean multisine torque and friction they stay bounded on average, so
/// the data covers them. Under a constant torque tau the steady speed of
/// both inertias is tau / b.
#[derive(Debug)]
pub struct Drivetrain {
    params: ParamValues,
    jm: f64,
    jl: f64,
    k: f64,
    c: f64,
    b: f64,
    torque: f64,
    speed: f64,
}

impl Drivetrain {
    pub fn build(params: ParamValues) -> Result<Box<dyn ReferenceSystem>, SystemError> {
        Ok(Box::new(Drivetrain {
            jm: params.get("jm"),
            jl: params.get("jl"),
            k: params.get("k"),
            c: params.get("c"),
            b: params.get("b"),
            torque: params.get("torque"),
            speed: params.get("speed"),
            params,
        }))
    }
}

impl ReferenceSystem for Drivetrain {
    fn name(&self) -> &'static str {
        "drivetrain"
    }
    fn dof(&self) -> usize {
        2
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
        let twist = x[0] - x[1];
        x[2] * x[2] / (2.0 * self.jm) + x[3] * x[3] / (2.0 * self.jl) + 0.5 * self.k * twist * twist
    }
    fn gradient(&self, x: &[f64], g: &mut [f64]) {
        let twist = x[0] - x[1];
        g[0] = self.k * twist;
        g[1] = -self.k * twist;
        g[2] = x[2] / self.jm;
        g[3] = x[3] / self.jl;
    }
    fn dissipation(&self, _x: &[f64]) -> Vec<f64> {
        let (c, b) = (self.c, self.b);
        #[rustfmt::skip]
        let r = vec![
            0.0, 0.0, 0.0, 0.0,
            0.0, 0.0, 0.0, 0.0,
            0.0, 0.0, c, -c,
            0.0, 0.0, -c, c + b,
        ];
        r
    }
    fn input_matrix(&self, _x: &[f64]) -> Vec<f64> {
        vec![0.0, 0.0, 1.0, 0.0]
    }
    /// Both angles 0 plus a twist uniform in +-(torque / k); speeds uniform
    /// in +-speed.
    fn sample_initial_state(&self, rng: &mut ChaCha8Rng) -> Vec<f64> {
        let twist = uniform(rng, -1.0, 1.0) * self.torque / self.k;
        let wm = uniform(rng, -1.0, 1.0) * self.speed;
        let wl = uniform(rng, -1.0, 1.0) * self.speed;
        vec![0.5 * twist, -0.5 * twist, self.jm * wm, self.jl * wl]
    }
    /// Six tones per trajectory, 0.2..15 Hz, amplitude `torque`.
    fn sample_excitation(&self, rng: &mut ChaCha8Rng) -> Multisine {
        Multisine::random(rng, 1, 6, self.torque, 0.2, 15.0)
    }
}
