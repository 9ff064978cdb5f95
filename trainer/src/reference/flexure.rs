//! The sensor mass on a flexure: conservative, viscously damped, and with
//! squeeze-film damping that grows as the gap closes.

use rand_chacha::ChaCha8Rng;
use std::f64::consts::PI;

use crate::reference::params::{uniform, ParamSpec, ParamValues, SystemError};
use crate::reference::{Multisine, ReferenceSystem};

pub const FLEXURE_PARAMS: &[ParamSpec] = &[
    ParamSpec {
        name: "m",
        default: 0.05,
        unit: "kg",
        meaning: "moving mass",
    },
    ParamSpec {
        name: "k",
        default: 20.0,
        unit: "N/m",
        meaning: "flexure stiffness",
    },
    ParamSpec {
        name: "amp",
        default: 0.005,
        unit: "m",
        meaning: "largest initial amplitude",
    },
];

/// Sensor mass on a flexure: H = p^2/(2m) + k q^2/2.
#[derive(Debug)]
pub struct Flexure {
    params: ParamValues,
    m: f64,
    k: f64,
    amp: f64,
}

impl Flexure {
    pub fn build(params: ParamValues) -> Result<Box<dyn ReferenceSystem>, SystemError> {
        Ok(Box::new(Flexure {
            m: params.get("m"),
            k: params.get("k"),
            amp: params.get("amp"),
            params,
        }))
    }
}

impl ReferenceSystem for Flexure {
    fn name(&self) -> &'static str {
        "flexure"
    }
    fn dof(&self) -> usize {
        1
    }
    fn params(&self) -> &ParamValues {
        &self.params
    }
    fn hamiltonian(&self, x: &[f64]) -> f64 {
        x[1] * x[1] / (2.0 * self.m) + 0.5 * self.k * x[0] * x[0]
    }
    fn vector_field(&self, x: &[f64], dx: &mut [f64]) {
        dx[0] = x[1] / self.m;
        dx[1] = -self.k * x[0];
    }
    /// Amplitude uniform in [0.1, 1] * amp, phase uniform.
    fn sample_initial_state(&self, rng: &mut ChaCha8Rng) -> Vec<f64> {
        let a = uniform(rng, 0.1, 1.0) * self.amp;
        let phase = uniform(rng, 0.0, 2.0 * PI);
        let omega = (self.k / self.m).sqrt();
        vec![a * phase.cos(), -self.m * omega * a * phase.sin()]
    }
    fn small_amplitude_period(&self) -> Option<f64> {
        Some(2.0 * PI * (self.m / self.k).sqrt())
    }
}

pub const FLEXURE_DAMPED_PARAMS: &[ParamSpec] = &[
    ParamSpec {
        name: "m",
        default: 0.05,
        unit: "kg",
        meaning: "moving mass",
    },
    ParamSpec {
        name: "k",
        default: 20.0,
        unit: "N/m",
        meaning: "flexure stiffness",
    },
    ParamSpec {
        name: "zeta",
        default: 0.05,
        unit: "1",
        meaning: "damping ratio c / (2 sqrt(k m)) (below 1)",
    },
    ParamSpec {
        name: "amp",
        default: 0.005,
        unit: "m",
        meaning: "largest initial amplitude",
    },
];

/// Sensor mass on a flexure with a viscous damper: H = p^2/(2m) + k q^2/2,
/// R (momentum block) = c(q), no input. `flexure-damped` has a constant
/// c = 2 zeta sqrt(k m). `flexure-squeeze` moves its face against a fixed
/// plate across an air film (q = displacement towards the plate): the
/// squeeze-film damping of parallel plates grows as the gap h - q closes,
/// c(q) = c0 (h / (h - q))^3 (Reynolds lubrication theory; from memory),
/// c0 = 2 zeta0 sqrt(k m).
#[derive(Debug)]
pub struct FlexureDamped {
    name: &'static str,
    params: ParamValues,
    m: f64,
    k: f64,
    c: f64,
    /// Gap h to the plate (infinite: no squeeze film).
    gap: f64,
    amp: f64,
}

impl FlexureDamped {
    pub fn build(params: ParamValues) -> Result<Box<dyn ReferenceSystem>, SystemError> {
        let zeta = params.get("zeta").min(0.999);
        Self::with(params, "flexure-damped", zeta, f64::INFINITY)
    }

    pub fn build_squeeze(params: ParamValues) -> Result<Box<dyn ReferenceSystem>, SystemError> {
        let (zeta0, gap) = (params.get("zeta0"), params.get("gap"));
        Self::with(params, "flexure-squeeze", zeta0, gap)
    }

    fn with(
        params: ParamValues,
        name: &'static str,
        zeta: f64,
        gap: f64,
    ) -> Result<Box<dyn ReferenceSystem>, SystemError> {
        let (m, k) = (params.get("m"), params.get("k"));
        Ok(Box::new(FlexureDamped {
            name,
            m,
            k,
            c: 2.0 * zeta * (k * m).sqrt(),
            gap,
            amp: params.get("amp").min(0.9 * gap),
            params,
        }))
    }

    /// The damping coefficient at rest, c in N s/m.
    pub fn damping(&self) -> f64 {
        self.c
    }

    /// The damping coefficient at displacement q, N s/m.
    pub fn damping_at(&self, q: f64) -> f64 {
        if self.gap.is_infinite() {
            return self.c;
        }
        let ratio = self.gap / (self.gap - q).max(1e-3 * self.gap);
        self.c * ratio * ratio * ratio
    }
}

impl ReferenceSystem for FlexureDamped {
    fn name(&self) -> &'static str {
        self.name
    }
    fn dof(&self) -> usize {
        1
    }
    fn damped(&self) -> bool {
        true
    }
    fn inputs(&self) -> usize {
        0
    }
    fn params(&self) -> &ParamValues {
        &self.params
    }
    fn hamiltonian(&self, x: &[f64]) -> f64 {
        x[1] * x[1] / (2.0 * self.m) + 0.5 * self.k * x[0] * x[0]
    }
    fn gradient(&self, x: &[f64], g: &mut [f64]) {
        g[0] = self.k * x[0];
        g[1] = x[1] / self.m;
    }
    fn dissipation(&self, x: &[f64]) -> Vec<f64> {
        vec![0.0, 0.0, 0.0, self.damping_at(x[0])]
    }
    fn input_matrix(&self, _x: &[f64]) -> Vec<f64> {
        Vec::new()
    }
    /// Amplitude uniform in [0.3, 1] * amp, phase uniform.
    fn sample_initial_state(&self, rng: &mut ChaCha8Rng) -> Vec<f64> {
        let a = uniform(rng, 0.3, 1.0) * self.amp;
        let phase = uniform(rng, 0.0, 2.0 * PI);
        let omega = (self.k / self.m).sqrt();
        vec![a * phase.cos(), -self.m * omega * a * phase.sin()]
    }
    fn sample_excitation(&self, _rng: &mut ChaCha8Rng) -> Multisine {
        Multisine::none()
    }
}

pub const FLEXURE_SQUEEZE_PARAMS: &[ParamSpec] = &[
    ParamSpec {
        name: "m",
        default: 0.05,
        unit: "kg",
        meaning: "moving mass",
    },
    ParamSpec {
        name: "k",
        default: 20.0,
        unit: "N/m",
        meaning: "flexure stiffness",
    },
    ParamSpec {
        name: "gap",
        default: 0.002,
        unit: "m",
        meaning: "air gap to the fixed plate at rest",
    },
    ParamSpec {
        name: "zeta0",
        default: 0.05,
        unit: "1",
        meaning: "damping ratio of small motions about rest",
    },
    ParamSpec {
        name: "amp",
        default: 0.0012,
        unit: "m",
        meaning: "largest initial amplitude (below the gap)",
    },
];
