//! Built-in reference systems with exactly known energy: the source of
//! clean reference data for `visviva simulate` and of checks for fitted models.
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

// ------------------------------------------------------- damped and driven

/// A damped, driven system in port-Hamiltonian form
/// dx/dt = (J - R(x)) dH/dx + G(x) u(t), with H, the dissipation R and the
/// input matrix G known in closed form (SI units).
pub trait PortSystem: Send + Sync + fmt::Debug {
    /// Catalog name.
    fn name(&self) -> &'static str;
    /// Degrees of freedom n.
    fn dof(&self) -> usize;
    /// Number of inputs m (0 for an undriven system).
    fn inputs(&self) -> usize;
    /// Parameter values in use.
    fn params(&self) -> &ParamValues;
    /// Energy H(x) in joules.
    fn hamiltonian(&self, x: &[f64]) -> f64;
    /// dH/dx into `g` (2n entries).
    fn gradient(&self, x: &[f64], g: &mut [f64]);
    /// R at state `x`, 2n x 2n, row-major, symmetric positive semidefinite.
    fn dissipation(&self, x: &[f64]) -> Vec<f64>;
    /// G at state `x`, 2n x m, row-major.
    fn input_matrix(&self, x: &[f64]) -> Vec<f64>;
    /// A random initial state from the operating range.
    fn sample_initial_state(&self, rng: &mut ChaCha8Rng) -> Vec<f64>;
    /// A random excitation for one trajectory (no components if m = 0).
    fn sample_excitation(&self, rng: &mut ChaCha8Rng) -> Multisine;
}

/// The port-Hamiltonian field f = (J - R) dH/dx + G u of `system`.
pub fn port_field(system: &dyn PortSystem, x: &[f64], u: &[f64], f: &mut [f64]) {
    let n = system.dof();
    let d = 2 * n;
    let m = system.inputs();
    let mut g = vec![0.0; d];
    system.gradient(x, &mut g);
    let r = system.dissipation(x);
    let gm = system.input_matrix(x);
    for i in 0..d {
        let mut acc = if i < n { g[n + i] } else { -g[i - n] };
        for j in 0..d {
            acc -= r[i * d + j] * g[j];
        }
        for k in 0..m {
            acc += gm[i * m + k] * u[k];
        }
        f[i] = acc;
    }
}

/// One smooth excitation signal per input: u_j(t) = sum_k a_jk sin(2 pi
/// f_jk t + phi_jk) (a multisine; zero mean, so a driven free rotor's
/// angle stays bounded on average). An empty signal is u = 0.
#[derive(Debug, Clone, PartialEq)]
pub struct Multisine {
    /// Per input: (amplitude, frequency in Hz, phase in rad) of each tone.
    pub tones: Vec<Vec<(f64, f64, f64)>>,
}

impl Multisine {
    /// No input.
    pub fn none() -> Self {
        Self { tones: Vec::new() }
    }

    /// `count` tones per input, frequencies log-uniform in [f_lo, f_hi] Hz,
    /// phases uniform, each tone of amplitude `amplitude / sqrt(count)` (so
    /// the RMS is about `amplitude / sqrt(2)`).
    pub fn random(
        rng: &mut ChaCha8Rng,
        inputs: usize,
        count: usize,
        amplitude: f64,
        f_lo: f64,
        f_hi: f64,
    ) -> Self {
        let a = amplitude / (count as f64).sqrt();
        let tones = (0..inputs)
            .map(|_| {
                (0..count)
                    .map(|_| {
                        let f = f_lo * (f_hi / f_lo).powf(rng.random::<f64>());
                        (a, f, uniform(rng, 0.0, 2.0 * PI))
                    })
                    .collect()
            })
            .collect();
        Self { tones }
    }

    /// u(t) into `u` (one value per input).
    pub fn value(&self, t: f64, u: &mut [f64]) {
        for (out, tones) in u.iter_mut().zip(&self.tones) {
            *out = tones
                .iter()
                .map(|(a, f, phi)| a * (2.0 * PI * f * t + phi).sin())
                .sum();
        }
    }
}

/// A catalog entry for a damped or driven system.
pub struct PortEntry {
    /// Name used with `--system`.
    pub name: &'static str,
    /// One-line description.
    pub summary: &'static str,
    /// Declared parameters and their defaults.
    pub params: &'static [ParamSpec],
    /// Build the system from validated parameter values.
    pub build: fn(ParamValues) -> Box<dyn PortSystem>,
}

/// Every built-in damped or driven system.
pub const PORT_CATALOG: &[PortEntry] = &[
    PortEntry {
        name: "flexure-damped",
        summary: "sensor mass on a flexure with viscous damping, no input, 1 dof",
        params: FLEXURE_DAMPED_PARAMS,
        build: FlexureDamped::build,
    },
    PortEntry {
        name: "drivetrain",
        summary: "two-inertia servo drivetrain (motor, elastic damped shaft, load with friction), motor torque input u1, 2 dof",
        params: DRIVETRAIN_PARAMS,
        build: Drivetrain::build,
    },
    PortEntry {
        name: "flexure-squeeze",
        summary: "sensor mass on a flexure beside a fixed plate: squeeze-film damping that grows as the gap closes, no input, 1 dof",
        params: FLEXURE_SQUEEZE_PARAMS,
        build: FlexureDamped::build_squeeze,
    },
    PortEntry {
        name: "crane-trolley",
        summary: "payload swinging under a moving trolley, rope damping, trolley acceleration input u1 (acts through cos q), 1 dof",
        params: CRANE_TROLLEY_PARAMS,
        build: CraneTrolley::build,
    },
];

/// Look up `name` in [`PORT_CATALOG`]; `None` if it is not a port system.
pub fn build_port_system(
    name: &str,
    overrides: &[(String, f64)],
) -> Option<Result<Box<dyn PortSystem>, SystemError>> {
    let entry = PORT_CATALOG.iter().find(|e| e.name == name)?;
    Some(ParamValues::new(entry.name, entry.params, overrides).map(entry.build))
}

const FLEXURE_DAMPED_PARAMS: &[ParamSpec] = &[
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
    fn build(params: ParamValues) -> Box<dyn PortSystem> {
        let zeta = params.get("zeta").min(0.999);
        Self::with(params, "flexure-damped", zeta, f64::INFINITY)
    }

    fn build_squeeze(params: ParamValues) -> Box<dyn PortSystem> {
        let (zeta0, gap) = (params.get("zeta0"), params.get("gap"));
        Self::with(params, "flexure-squeeze", zeta0, gap)
    }

    fn with(params: ParamValues, name: &'static str, zeta: f64, gap: f64) -> Box<dyn PortSystem> {
        let (m, k) = (params.get("m"), params.get("k"));
        Box::new(FlexureDamped {
            name,
            m,
            k,
            c: 2.0 * zeta * (k * m).sqrt(),
            gap,
            amp: params.get("amp").min(0.9 * gap),
            params,
        })
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

impl PortSystem for FlexureDamped {
    fn name(&self) -> &'static str {
        self.name
    }
    fn dof(&self) -> usize {
        1
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

const DRIVETRAIN_PARAMS: &[ParamSpec] = &[
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
    fn build(params: ParamValues) -> Box<dyn PortSystem> {
        Box::new(Drivetrain {
            jm: params.get("jm"),
            jl: params.get("jl"),
            k: params.get("k"),
            c: params.get("c"),
            b: params.get("b"),
            torque: params.get("torque"),
            speed: params.get("speed"),
            params,
        })
    }
}

impl PortSystem for Drivetrain {
    fn name(&self) -> &'static str {
        "drivetrain"
    }
    fn dof(&self) -> usize {
        2
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

const CRANE_TROLLEY_PARAMS: &[ParamSpec] = &[
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
    fn build(params: ParamValues) -> Box<dyn PortSystem> {
        let (m, l, g) = (params.get("m"), params.get("l"), params.get("g"));
        let zeta = params.get("zeta").min(0.999);
        Box::new(CraneTrolley {
            m,
            l,
            g,
            c: 2.0 * zeta * m * l * l * (g / l).sqrt(),
            accel: params.get("accel"),
            max_angle: params.get("max_angle_deg").clamp(0.0, 170.0).to_radians(),
            params,
        })
    }
}

impl PortSystem for CraneTrolley {
    fn name(&self) -> &'static str {
        "crane-trolley"
    }
    fn dof(&self) -> usize {
        1
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

const FLEXURE_SQUEEZE_PARAMS: &[ParamSpec] = &[
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
