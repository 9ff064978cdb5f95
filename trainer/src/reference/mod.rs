//! Built-in reference systems with exactly known energy: the source of
//! clean reference data for `visviva simulate` and of checks for fitted
//! models. One trait for all of them, conservative or damped and driven, in
//! port-Hamiltonian form dx/dt = (J - R(x)) dH/dx + G(x) u(t) with R and G
//! zero unless a system says otherwise (as in the runtime). Every system is
//! listed once in [`CATALOG`]; adding one means a file with its parameter
//! table and `impl`, plus one catalog entry. States are x = (q1..qn,
//! p1..pn) in SI units.

use rand_chacha::ChaCha8Rng;
use std::fmt;

pub mod cart;
pub mod change;
pub mod coupled;
pub mod crane;
pub mod drivetrain;
pub mod excitation;
pub mod flexure;
pub mod linkage;
pub mod mount;
pub mod params;
pub mod simulate;

pub use excitation::Multisine;
pub use params::{parse_param, ParamSpec, ParamValues, SystemError};

/// A mechanical system with a known Hamiltonian and, for damped or driven
/// systems, known dissipation R and input matrix G. A system implements
/// `vector_field` (Hamilton's equations in closed form) or `gradient`; each
/// has a default from the other.
pub trait ReferenceSystem: Send + Sync + fmt::Debug {
    /// Catalog name.
    fn name(&self) -> &'static str;
    /// Degrees of freedom n (the state has 2n entries).
    fn dof(&self) -> usize;
    /// Parameter values in use.
    fn params(&self) -> &ParamValues;
    /// Exact energy H(x) in joules.
    fn hamiltonian(&self, x: &[f64]) -> f64;
    /// dH/dx into `g` (2n entries); by default from the vector field of a
    /// conservative system, dH/dq = -dp/dt, dH/dp = dq/dt.
    fn gradient(&self, x: &[f64], g: &mut [f64]) {
        let n = self.dof();
        let mut f = vec![0.0; 2 * n];
        self.vector_field(x, &mut f);
        for i in 0..n {
            g[i] = -f[n + i];
            g[n + i] = f[i];
        }
    }
    /// The unforced field (J - R) dH/dx; by default from the gradient.
    fn vector_field(&self, x: &[f64], dx: &mut [f64]) {
        port_field(self, x, &vec![0.0; self.inputs()], dx);
    }
    /// Whether the system dissipates energy (R is not zero).
    fn damped(&self) -> bool {
        false
    }
    /// Number of inputs m (0 for an undriven system).
    fn inputs(&self) -> usize {
        0
    }
    /// R at state `x`, 2n x 2n, row-major, symmetric positive semidefinite
    /// (zero by default).
    fn dissipation(&self, _x: &[f64]) -> Vec<f64> {
        vec![0.0; 4 * self.dof() * self.dof()]
    }
    /// G at state `x`, 2n x m, row-major (empty by default).
    fn input_matrix(&self, _x: &[f64]) -> Vec<f64> {
        Vec::new()
    }
    /// A random initial state from the operating range.
    fn sample_initial_state(&self, rng: &mut ChaCha8Rng) -> Vec<f64>;
    /// A random excitation for one trajectory (none for an undriven system;
    /// draws nothing from `rng` then).
    fn sample_excitation(&self, _rng: &mut ChaCha8Rng) -> Multisine {
        Multisine::none()
    }
    /// Natural period for small amplitude in seconds (for several modes, the
    /// longest normal-mode period), where a closed form is known.
    fn small_amplitude_period(&self) -> Option<f64> {
        None
    }
    /// Whether the system has port terms (damping or inputs).
    fn has_port_terms(&self) -> bool {
        self.damped() || self.inputs() > 0
    }
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
    /// Units of its coordinates, momenta and inputs (energy in joules).
    pub units: StateUnits,
}

/// The SI units of a built-in system's state and inputs.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct StateUnits {
    /// Each coordinate q_i (one entry: the same for every coordinate).
    pub q: &'static [&'static str],
    /// Each momentum p_i (one entry: the same for every momentum).
    pub p: &'static [&'static str],
    /// Each input u_j.
    pub inputs: &'static [&'static str],
}

const LINEAR: StateUnits = StateUnits {
    q: &["m"],
    p: &["kg m/s"],
    inputs: &[],
};

const ANGULAR: StateUnits = StateUnits {
    q: &["rad"],
    p: &["kg m^2/s"],
    inputs: &[],
};

/// The units of the catalog's system `name`.
pub fn units_of(name: &str) -> Option<StateUnits> {
    CATALOG.iter().find(|e| e.name == name).map(|e| e.units)
}

/// Every built-in system.
pub const CATALOG: &[SystemEntry] = &[
    SystemEntry {
        name: "flexure",
        summary: "sensor mass on a flexure (mass-spring), 1 dof",
        params: flexure::FLEXURE_PARAMS,
        build: flexure::Flexure::build,
        units: LINEAR,
    },
    SystemEntry {
        name: "crane",
        summary: "gantry-crane payload sway (pendulum, q = angle), 1 dof",
        params: crane::CRANE_PARAMS,
        build: crane::Crane::build,
        units: ANGULAR,
    },
    SystemEntry {
        name: "mount",
        summary: "two-stage vibration-isolation mount (two masses, two springs), 2 dof",
        params: mount::MOUNT_PARAMS,
        build: mount::Mount::build,
        units: LINEAR,
    },
    SystemEntry {
        name: "flexure-damped",
        summary: "sensor mass on a flexure with viscous damping, no input, 1 dof",
        params: flexure::FLEXURE_DAMPED_PARAMS,
        build: flexure::FlexureDamped::build,
        units: LINEAR,
    },
    SystemEntry {
        name: "drivetrain",
        summary: "two-inertia servo drivetrain (motor, elastic damped shaft, load with friction), motor torque input u1, 2 dof",
        params: drivetrain::DRIVETRAIN_PARAMS,
        build: drivetrain::Drivetrain::build,
        units: StateUnits {
            inputs: &["N m"],
            ..ANGULAR
        },
    },
    SystemEntry {
        name: "flexure-squeeze",
        summary: "sensor mass on a flexure beside a fixed plate: squeeze-film damping that grows as the gap closes, no input, 1 dof",
        params: flexure::FLEXURE_SQUEEZE_PARAMS,
        build: flexure::FlexureDamped::build_squeeze,
        units: LINEAR,
    },
    SystemEntry {
        name: "crane-trolley",
        summary: "payload swinging under a moving trolley, rope damping, trolley acceleration input u1 (acts through cos q), 1 dof",
        params: crane::CRANE_TROLLEY_PARAMS,
        build: crane::CraneTrolley::build,
        units: StateUnits {
            inputs: &["m/s^2"],
            ..ANGULAR
        },
    },    SystemEntry {
        name: "double-pendulum",
        summary: "two-link arm hanging from a pivot (double pendulum, point masses): the mass matrix depends on the angles, 2 dof",
        params: linkage::DOUBLE_PENDULUM_PARAMS,
        build: linkage::DoublePendulum::build,
        units: ANGULAR,
    },
    SystemEntry {
        name: "crane-cart",
        summary: "payload swinging under a trolley that rolls freely on its rail (cart-pendulum, q = trolley position, rope angle): the mass matrix depends on the angle, 2 dof",
        params: cart::CRANE_CART_PARAMS,
        build: cart::CraneCart::build,
        units: StateUnits {
            q: &["m", "rad"],
            p: &["kg m/s", "kg m^2/s"],
            inputs: &[],
        },
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

/// The port-Hamiltonian field f = (J - R) dH/dx + G u of `system`.
pub fn port_field(system: &(impl ReferenceSystem + ?Sized), x: &[f64], u: &[f64], f: &mut [f64]) {
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

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use std::f64::consts::PI;

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
        // (textbook definition), with H differentiated numerically: the
        // conservative systems' field, and every system's gradient (the J
        // part of a damped or driven system's field).
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        for entry in CATALOG {
            let sys = build_system(entry.name, &[]).unwrap();
            for _ in 0..5 {
                let x = sys.sample_initial_state(&mut rng);
                let n = sys.dof();
                let mut dx = vec![0.0; x.len()];
                if sys.has_port_terms() {
                    let mut g = vec![0.0; x.len()];
                    sys.gradient(&x, &mut g);
                    for i in 0..n {
                        dx[i] = g[n + i];
                        dx[n + i] = -g[i];
                    }
                } else {
                    sys.vector_field(&x, &mut dx);
                }
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
        assert!(
            (f.small_amplitude_period().unwrap() - 2.0 * PI * (0.05f64 / 20.0).sqrt()).abs()
                < 1e-12
        );
        let c = build_system("crane", &[]).unwrap();
        assert!(
            (c.small_amplitude_period().unwrap() - 2.0 * PI * (8.0f64 / 9.81).sqrt()).abs() < 1e-12
        );
        // Two equal masses and springs in series from a fixed base: the
        // normal-mode frequencies are w^2 = (k/m)(3 -+ sqrt 5)/2 (textbook
        // coupled-oscillator result).
        let m = build_system("mount", &[]).unwrap();
        let w_slow = (4000.0 * (3.0 - 5f64.sqrt()) / 2.0).sqrt();
        assert!((m.small_amplitude_period().unwrap() - 2.0 * PI / w_slow).abs() < 1e-12); // Double pendulum with equal masses and lengths: w^2 = (g/l)(2 -+ sqrt 2)
                                                                                          // (textbook normal modes, e.g. Goldstein ch. 6; from memory).
        let params = [("m1", 1.3), ("m2", 1.3), ("l1", 0.7), ("l2", 0.7)];
        let params: Vec<(String, f64)> = params.iter().map(|(k, v)| (k.to_string(), *v)).collect();
        let d = build_system("double-pendulum", &params).unwrap();
        let w_slow = (9.81 / 0.7 * (2.0 - 2f64.sqrt())).sqrt();
        assert!((d.small_amplitude_period().unwrap() * w_slow / (2.0 * PI) - 1.0).abs() < 1e-12);
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
