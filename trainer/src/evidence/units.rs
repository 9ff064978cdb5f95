//! The physical units of a project's quantities, as the data declare them:
//! a built-in reference system knows its own (`reference::units_of`), a
//! user's log declares them in `visviva.toml` (`[data] units = "unitless"`
//! or a `[data.units]` table), and a report of undeclared data says so
//! instead of guessing. Time is always in seconds (the logs' `t` column).

use anyhow::{bail, Result};
use serde::{Deserialize, Serialize};

/// `[data] units` as written: the word "unitless", or a table.
#[derive(Debug, Clone, PartialEq, Serialize)]
#[serde(untagged)]
pub enum DeclaredUnits {
    /// `units = "unitless"`: every quantity is a pure number.
    Unitless(String),
    /// `[data.units]`: `q`, `p` (one unit per coordinate), `energy`, and
    /// `inputs` (one per input column u1..um).
    Table(UnitTable),
}

/// `[data.units]`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct UnitTable {
    /// Units of q1..qn.
    pub q: Vec<String>,
    /// Units of p1..pn.
    pub p: Vec<String>,
    /// Unit of the energy.
    pub energy: String,
    /// Units of u1..um (default: none).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub inputs: Vec<String>,
}

impl<'de> Deserialize<'de> for DeclaredUnits {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V;
        impl<'de> serde::de::Visitor<'de> for V {
            type Value = DeclaredUnits;
            fn expecting(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
                f.write_str("\"unitless\" or a table with q, p, energy and optionally inputs")
            }
            fn visit_str<E: serde::de::Error>(self, s: &str) -> Result<DeclaredUnits, E> {
                if s == "unitless" {
                    Ok(DeclaredUnits::Unitless(s.into()))
                } else {
                    Err(E::custom(format!(
                        "units = \"{s}\": write \"unitless\" or a table [data.units] with q, p and energy"
                    )))
                }
            }
            fn visit_map<A: serde::de::MapAccess<'de>>(
                self,
                map: A,
            ) -> Result<DeclaredUnits, A::Error> {
                UnitTable::deserialize(serde::de::value::MapAccessDeserializer::new(map))
                    .map(DeclaredUnits::Table)
            }
        }
        d.deserialize_any(V)
    }
}

/// The units the report shows, one per quantity.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Units {
    /// Where they come from.
    pub source: String,
    /// Whether the data declare them (false: the report asks for them).
    pub declared: bool,
    /// Units of q1..qn.
    pub q: Vec<String>,
    /// Units of p1..pn.
    pub p: Vec<String>,
    /// Unit of energy.
    pub energy: String,
    /// Units of u1..um.
    pub inputs: Vec<String>,
    /// Unit of time.
    pub time: String,
}

/// The unit shown for a pure number.
pub const UNITLESS: &str = "-";

/// The placeholder shown while units are not declared.
pub const UNDECLARED: &str = "?";

impl Units {
    /// Undeclared units filled from the `[columns]` mapping's `unit` keys
    /// (positions q1..qn, then inputs); units declared under `[data]` or
    /// known from a built-in system win. Momenta and energy stay undeclared:
    /// a column mapping does not say them.
    pub fn with_columns(
        mut self,
        rig: Option<&crate::data::columns::RigSummary>,
        dof: usize,
    ) -> Self {
        let Some(rig) = rig.filter(|_| !self.declared) else {
            return self;
        };
        let mut filled = false;
        let slots = self.q.iter_mut().chain(self.inputs.iter_mut());
        for (slot, unit) in slots.zip(&rig.units) {
            if !unit.is_empty() {
                *slot = unit.clone();
                filled = true;
            }
        }
        if filled {
            self.source = format!(
                "[columns] unit keys ({dof} position columns and the inputs); add [data] units for momenta and energy"
            );
        }
        self
    }

    /// Settle the units of data with `dof` degrees of freedom and `inputs`
    /// input columns: `[data] units` first, else the built-in `system`'s,
    /// else undeclared. A declared table must give one unit per column.
    pub fn resolve(
        declared: Option<&DeclaredUnits>,
        system: Option<&str>,
        dof: usize,
        inputs: usize,
    ) -> Result<Self> {
        let all = |u: &str, n: usize| vec![u.to_string(); n];
        if let Some(d) = declared {
            return match d {
                DeclaredUnits::Unitless(_) => Ok(Self {
                    source: "[data] units = \"unitless\"".into(),
                    declared: true,
                    q: all(UNITLESS, dof),
                    p: all(UNITLESS, dof),
                    energy: UNITLESS.into(),
                    inputs: all(UNITLESS, inputs),
                    time: "s".into(),
                }),
                DeclaredUnits::Table(t) => Self::from_table(t, dof, inputs),
            };
        }
        if let Some(u) = system.and_then(crate::reference::units_of) {
            return Ok(Self {
                source: format!("built-in system {}", system.unwrap_or_default()),
                declared: true,
                q: per_coordinate(u.q, dof),
                p: per_coordinate(u.p, dof),
                energy: "J".into(),
                inputs: u.inputs.iter().map(|s| s.to_string()).collect(),
                time: "s".into(),
            });
        }
        Ok(Self {
            source: "not declared: add [data] units to visviva.toml".into(),
            declared: false,
            q: all(UNDECLARED, dof),
            p: all(UNDECLARED, dof),
            energy: UNDECLARED.into(),
            inputs: all(UNDECLARED, inputs),
            time: "s".into(),
        })
    }

    fn from_table(t: &UnitTable, dof: usize, inputs: usize) -> Result<Self> {
        for (key, list, n) in [
            ("q", &t.q, dof),
            ("p", &t.p, dof),
            ("inputs", &t.inputs, inputs),
        ] {
            if list.len() != n {
                bail!(
                    "[data.units] {key}: {} unit(s) for {n} column(s) in the log",
                    list.len()
                );
            }
            if let Some(e) = list.iter().find(|u| u.trim().is_empty()) {
                bail!("[data.units] {key}: empty unit {e:?}; write \"-\" for a pure number");
            }
        }
        let word = |u: &str| {
            if u == "unitless" {
                UNITLESS.to_string()
            } else {
                u.to_string()
            }
        };
        Ok(Self {
            source: "[data.units] in visviva.toml".into(),
            declared: true,
            q: t.q.iter().map(|u| word(u)).collect(),
            p: t.p.iter().map(|u| word(u)).collect(),
            energy: word(&t.energy),
            inputs: t.inputs.iter().map(|u| word(u)).collect(),
            time: "s".into(),
        })
    }

    /// The unit of state column `c` (q1..qn, then p1..pn).
    pub fn state(&self, c: usize) -> &str {
        let n = self.q.len();
        if c < n {
            &self.q[c]
        } else {
            self.p.get(c - n).map_or(UNDECLARED, String::as_str)
        }
    }
}

/// A built-in system's units for `n` coordinates: one entry repeats for
/// every coordinate, else one per coordinate (missing ones undeclared).
fn per_coordinate(list: &[&str], n: usize) -> Vec<String> {
    match list {
        [one] => vec![one.to_string(); n],
        _ => (0..n)
            .map(|i| list.get(i).copied().unwrap_or(UNDECLARED).to_string())
            .collect(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[derive(Deserialize)]
    struct Data {
        units: DeclaredUnits,
    }

    #[test]
    fn declared_units_parse_and_are_checked_against_the_log() {
        let d: Data = toml::from_str("units = \"unitless\"").unwrap();
        let u = Units::resolve(Some(&d.units), Some("crane"), 1, 0).unwrap();
        assert_eq!((u.q[0].as_str(), u.energy.as_str()), ("-", "-"));
        let d: Data = toml::from_str(
            "[units]\nq = [\"m\", \"rad\"]\np = [\"kg m/s\", \"kg m^2/s\"]\nenergy = \"J\"\n",
        )
        .unwrap();
        let u = Units::resolve(Some(&d.units), None, 2, 0).unwrap();
        assert_eq!(u.state(3), "kg m^2/s");
        let err = Units::resolve(Some(&d.units), None, 1, 0).unwrap_err();
        assert!(
            err.to_string().contains("[data.units] q: 2 unit(s) for 1"),
            "{err}"
        );
        let err = toml::from_str::<Data>("units = \"SI\"").err().unwrap();
        assert!(err.to_string().contains("unitless"), "{err}");
        let err = toml::from_str::<Data>("[units]\nq = []\np = []\nenergy = \"J\"\nenergie = 1\n")
            .err()
            .unwrap();
        assert!(err.to_string().contains("energie"), "{err}");
    }

    #[test]
    fn built_in_systems_know_theirs_and_undeclared_data_says_so() {
        // The crane's q is the rope angle (rad), p = m l^2 dq/dt (kg m^2/s).
        let u = Units::resolve(None, Some("crane"), 1, 0).unwrap();
        assert_eq!(
            (u.state(0), u.state(1), u.energy.as_str()),
            ("rad", "kg m^2/s", "J")
        );
        let u = Units::resolve(None, Some("drivetrain"), 2, 1).unwrap();
        assert_eq!(u.inputs, ["N m"]);
        // The free-trolley crane mixes a position and an angle.
        let u = Units::resolve(None, Some("crane-cart"), 2, 0).unwrap();
        assert_eq!(u.q, ["m", "rad"]);
        assert_eq!(u.p, ["kg m/s", "kg m^2/s"]);
        let u = Units::resolve(None, None, 1, 0).unwrap();
        assert!(!u.declared && u.source.contains("[data] units"));
    }
}
