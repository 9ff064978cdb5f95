//! Built-in reference systems with exactly known energy: the source of
//! clean reference data for `keel simulate` and of checks for fitted models.
//!
//! Every system implements [`ReferenceSystem`] and is listed once in
//! [`CATALOG`]; adding a system means one `impl` plus one catalog entry.
//! States are x = (q1..qn, p1..pn) in SI units.

use rand::Rng;
use rand_chacha::ChaCha8Rng;
use std::f64::consts::PI;
use std::fmt;

/// One settable parameter of a system.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ParamSpec {
    /// Key used with `--param key=value`.
    pub name: &'static str,
    /// Default value.
    pub default: f64,
    /// SI unit, for help and reports.
    pub unit: &'static str,
    /// What the parameter means.
    pub meaning: &'static str,
}

/// Parameter values of a system, in the order of its [`ParamSpec`] list.
#[derive(Debug, Clone, PartialEq)]
pub struct ParamValues {
    specs: &'static [ParamSpec],
    values: Vec<f64>,
}

impl ParamValues {
    /// Defaults, then `overrides` applied in order. Unknown keys and
    /// non-positive or non-finite values are errors (every built-in parameter
    /// is a positive physical quantity).
    pub fn new(
        system: &'static str,
        specs: &'static [ParamSpec],
        overrides: &[(String, f64)],
    ) -> Result<Self, SystemError> {
        let mut values: Vec<f64> = specs.iter().map(|s| s.default).collect();
        for (key, value) in overrides {
            let index = specs.iter().position(|s| s.name == key).ok_or_else(|| {
                SystemError::UnknownParam {
                    system,
                    key: key.clone(),
                    valid: specs.iter().map(|s| s.name).collect(),
                }
            })?;
            if !value.is_finite() || *value <= 0.0 {
                return Err(SystemError::BadParamValue {
                    system,
                    key: key.clone(),
                    value: *value,
                    reason: "must be a finite positive number".into(),
                });
            }
            values[index] = *value;
        }
        Ok(Self { specs, values })
    }

    /// Value of parameter `name`. Panics on a name not in the spec list,
    /// which is a programming error inside this module.
    pub fn get(&self, name: &str) -> f64 {
        let index = self
            .specs
            .iter()
            .position(|s| s.name == name)
            .unwrap_or_else(|| panic!("parameter {name} is not declared"));
        self.values[index]
    }

    /// `(name, value, unit)` for every parameter, in declaration order.
    pub fn iter(&self) -> impl Iterator<Item = (&'static str, f64, &'static str)> + '_ {
        self.specs
            .iter()
            .zip(&self.values)
            .map(|(s, v)| (s.name, *v, s.unit))
    }
}

/// Errors from choosing or configuring a built-in system.
#[derive(Debug, Clone, PartialEq)]
pub enum SystemError {
    /// No system of that name.
    UnknownSystem {
        /// Name given.
        name: String,
        /// Valid names.
        valid: Vec<&'static str>,
    },
    /// `--param` key not declared by the system.
    UnknownParam {
        /// System name.
        system: &'static str,
        /// Key given.
        key: String,
        /// Valid keys.
        valid: Vec<&'static str>,
    },
    /// A parameter value outside its physical range.
    BadParamValue {
        /// System name.
        system: &'static str,
        /// Key.
        key: String,
        /// Value given.
        value: f64,
        /// Why it is rejected.
        reason: String,
    },
}

impl fmt::Display for SystemError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            SystemError::UnknownSystem { name, valid } => write!(
                f,
                "unknown system '{name}'; valid systems: {}",
                valid.join(", ")
            ),
            SystemError::UnknownParam { system, key, valid } => write!(
                f,
                "system '{system}' has no parameter '{key}'; valid keys: {}",
                valid.join(", ")
            ),
            SystemError::BadParamValue {
                system,
                key,
                value,
                reason,
            } => write!(f, "system '{system}': parameter {key}={value} {reason}"),
        }
    }
}

impl std::error::Error for SystemError {}

/// Parse one `key=value` pair (for `--param`).
pub fn parse_param(text: &str) -> Result<(String, f64), String> {
    let (key, value) = text
        .split_once('=')
        .ok_or_else(|| format!("'{text}' is not of the form key=value"))?;
    let key = key.trim();
    if key.is_empty() {
        return Err(format!("'{text}' has an empty key"));
    }
    let value: f64 = value
        .trim()
        .parse()
        .map_err(|_| format!("'{text}': '{}' is not a number", value.trim()))?;
    Ok((key.to_string(), value))
}

/// A conservative mechanical system with a known Hamiltonian.
pub trait ReferenceSystem: Send + Sync + fmt::Debug {
    /// Catalog name.
    fn name(&self) -> &'static str;
    /// Degrees of freedom n (the state has 2n entries).
    fn dof(&self) -> usize;
    /// Parameter values in use.
    fn params(&self) -> &ParamValues;
    /// Exact energy H(q, p) in joules.
    fn hamiltonian(&self, x: &[f64]) -> f64;
    /// Hamilton's equations: dx = (dH/dp, -dH/dq).
    fn vector_field(&self, x: &[f64], dx: &mut [f64]);
    /// A random initial state from the system's operating range.
    fn sample_initial_state(&self, rng: &mut ChaCha8Rng) -> Vec<f64>;
    /// Natural period for small amplitude in seconds (for several modes, the
    /// longest normal-mode period).
    fn small_amplitude_period(&self) -> f64;
}

/// A catalog entry: name, summary, parameters and constructor.
pub struct SystemEntry {
    /// Name used with `--system`.
    pub name: &'static str,
    /// One-line description.
    pub summary: &'static str,
    /// Declared parameters and their defaults.
    pub params: &'static [ParamSpec],
    /// Build the system from validated parameter values.
    pub build: fn(ParamValues) -> Result<Box<dyn ReferenceSystem>, SystemError>,
}

/// Every built-in system.
pub const CATALOG: &[SystemEntry] = &[
    SystemEntry {
        name: "flexure",
        summary: "sensor mass on a flexure (mass-spring), 1 dof",
        params: FLEXURE_PARAMS,
        build: Flexure::build,
    },
    SystemEntry {
        name: "crane",
        summary: "gantry-crane payload sway (pendulum, q = angle), 1 dof",
        params: CRANE_PARAMS,
        build: Crane::build,
    },
    SystemEntry {
        name: "mount",
        summary: "two-stage vibration-isolation mount (two masses, two springs), 2 dof",
        params: MOUNT_PARAMS,
        build: Mount::build,
    },
];

/// Look up `name` in [`CATALOG`] and build it with `overrides` applied.
pub fn build_system(
    name: &str,
    overrides: &[(String, f64)],
) -> Result<Box<dyn ReferenceSystem>, SystemError> {
    let entry =
        CATALOG
            .iter()
            .find(|e| e.name == name)
            .ok_or_else(|| SystemError::UnknownSystem {
                name: name.to_string(),
                valid: CATALOG.iter().map(|e| e.name).collect(),
            })?;
    let values = ParamValues::new(entry.name, entry.params, overrides)?;
    (entry.build)(values)
}

/// Uniform sample in [lo, hi).
fn uniform(rng: &mut ChaCha8Rng, lo: f64, hi: f64) -> f64 {
    lo + (hi - lo) * rng.random::<f64>()
}

// ---------------------------------------------------------------- flexure

const FLEXURE_PARAMS: &[ParamSpec] = &[
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
    fn build(params: ParamValues) -> Result<Box<dyn ReferenceSystem>, SystemError> {
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
    fn small_amplitude_period(&self) -> f64 {
        2.0 * PI * (self.m / self.k).sqrt()
    }
}

// ---------------------------------------------------------------- crane

const CRANE_PARAMS: &[ParamSpec] = &[
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
    fn build(params: ParamValues) -> Result<Box<dyn ReferenceSystem>, SystemError> {
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
    fn small_amplitude_period(&self) -> f64 {
        2.0 * PI * (self.l / self.g).sqrt()
    }
}

// ---------------------------------------------------------------- mount

const MOUNT_PARAMS: &[ParamSpec] = &[
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
    fn build(params: ParamValues) -> Result<Box<dyn ReferenceSystem>, SystemError> {
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
    fn small_amplitude_period(&self) -> f64 {
        2.0 * PI / self.mode_omegas_squared().0.sqrt()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;

    /// Central-difference gradient of H, to check the vector fields.
    fn numeric_field(sys: &dyn ReferenceSystem, x: &[f64]) -> Vec<f64> {
        let n = sys.dof();
        let mut grad = vec![0.0; 2 * n];
        for (i, g) in grad.iter_mut().enumerate() {
            let h = 1e-6 * x[i].abs().max(1e-3);
            let mut a = x.to_vec();
            let mut b = x.to_vec();
            a[i] += h;
            b[i] -= h;
            *g = (sys.hamiltonian(&a) - sys.hamiltonian(&b)) / (2.0 * h);
        }
        let mut field = vec![0.0; 2 * n];
        for i in 0..n {
            field[i] = grad[n + i];
            field[n + i] = -grad[i];
        }
        field
    }

    #[test]
    fn vector_fields_are_hamiltons_equations() {
        // Check against Hamilton's equations dq/dt = dH/dp, dp/dt = -dH/dq
        // (textbook definition), with H differentiated numerically.
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        for entry in CATALOG {
            let sys = build_system(entry.name, &[]).unwrap();
            for _ in 0..5 {
                let x = sys.sample_initial_state(&mut rng);
                let mut dx = vec![0.0; x.len()];
                sys.vector_field(&x, &mut dx);
                let num = numeric_field(sys.as_ref(), &x);
                for (a, b) in dx.iter().zip(&num) {
                    let scale = dx.iter().fold(0.0f64, |m, v| m.max(v.abs()));
                    assert!((a - b).abs() <= 1e-6 * scale, "{}: {a} vs {b}", entry.name);
                }
            }
        }
    }

    #[test]
    fn small_amplitude_periods_match_closed_forms() {
        // Textbook: mass-spring T = 2 pi sqrt(m/k); pendulum T = 2 pi sqrt(L/g).
        let f = build_system("flexure", &[]).unwrap();
        assert!((f.small_amplitude_period() - 2.0 * PI * (0.05f64 / 20.0).sqrt()).abs() < 1e-12);
        let c = build_system("crane", &[]).unwrap();
        assert!((c.small_amplitude_period() - 2.0 * PI * (8.0f64 / 9.81).sqrt()).abs() < 1e-12);
        // Two equal masses and springs in series from a fixed base: the
        // normal-mode frequencies are w^2 = (k/m)(3 -+ sqrt 5)/2 (textbook
        // coupled-oscillator result).
        let m = build_system("mount", &[]).unwrap();
        let w_slow = (4000.0 * (3.0 - 5f64.sqrt()) / 2.0).sqrt();
        assert!((m.small_amplitude_period() - 2.0 * PI / w_slow).abs() < 1e-12);
    }

    #[test]
    fn crane_samples_never_go_over_the_top() {
        let c = build_system("crane", &[]).unwrap();
        let mut rng = ChaCha8Rng::seed_from_u64(9);
        let top = 2.0 * 500.0 * 9.81 * 8.0;
        let limit = 500.0 * 9.81 * 8.0 * (1.0 - 120f64.to_radians().cos());
        for _ in 0..1000 {
            let x = c.sample_initial_state(&mut rng);
            let h = c.hamiltonian(&x);
            assert!(h <= limit * (1.0 + 1e-12) && h < top);
        }
    }

    #[test]
    fn params_errors_list_valid_keys() {
        let err = build_system("flexure", &[("q".into(), 1.0)]).unwrap_err();
        let text = err.to_string();
        assert!(text.contains("'q'") && text.contains("m, k, amp"), "{text}");
        let err = build_system("crane", &[("max_angle_deg".into(), 185.0)]).unwrap_err();
        assert!(err.to_string().contains("over the top"));
        let err = build_system("nope", &[]).unwrap_err();
        assert!(err.to_string().contains("flexure, crane, mount"));
        let sys = build_system("mount", &[("k2".into(), 100.0)]).unwrap();
        assert_eq!(sys.params().get("k2"), 100.0);
        assert_eq!(parse_param("k=2.5").unwrap(), ("k".to_string(), 2.5));
        assert!(parse_param("k2.5").is_err());
        assert!(parse_param("k=abc").is_err());
    }
}
