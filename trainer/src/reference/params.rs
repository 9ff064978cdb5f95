//! System parameters: declared once per system (name, default, unit,
//! meaning), overridden by `--param key=value` or `[check] reference_params`,
//! and the errors of looking them up.

use rand::Rng;
use rand_chacha::ChaCha8Rng;
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

    /// Every parameter at its default.
    pub fn defaults(specs: &'static [ParamSpec]) -> Self {
        Self {
            specs,
            values: specs.iter().map(|s| s.default).collect(),
        }
    }

    /// Value of parameter `name`. Panics on a name not in the spec list,
    /// which is a programming error inside the system's own module.
    pub fn get(&self, name: &str) -> f64 {
        let index = self
            .specs
            .iter()
            .position(|s| s.name == name)
            .unwrap_or_else(|| panic!("parameter {name} is not declared"));
        self.values[index]
    }

    /// `max_angle_deg` of a linkage whose sampled states stay within a
    /// quarter turn: refused unless it lies in (0, 90).
    pub fn quarter_turn_angle(&self, system: &'static str) -> Result<(), SystemError> {
        let value = self.get("max_angle_deg");
        if value > 0.0 && value < 90.0 {
            return Ok(());
        }
        Err(SystemError::BadParamValue {
            system,
            key: "max_angle_deg".into(),
            value,
            reason: "must lie in (0, 90)".into(),
        })
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

/// Uniform sample in [lo, hi).
pub fn uniform(rng: &mut ChaCha8Rng, lo: f64, hi: f64) -> f64 {
    lo + (hi - lo) * rng.random::<f64>()
}
