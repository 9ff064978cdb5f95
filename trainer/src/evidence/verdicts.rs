//! Every budget verdict as used / limit / margin: flash (blob plus the
//! runtime), RAM and the estimated step time of each device blob against
//! the `[device]` budget. A figure that is not set or not measured says
//! which setting or command supplies it instead of a bare "-".

use serde::{Deserialize, Serialize};

use crate::evidence::report::DeviceBlob;
use crate::project::file::DeviceBudget;

/// One resource of one blob.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ResourceVerdict {
    /// The blob's name.
    pub blob: String,
    /// "flash (blob + runtime)", "RAM (runtime)" or "step time (estimate)".
    pub resource: String,
    /// "B" or "s".
    pub unit: String,
    /// What the blob needs (None: not measured or not estimated).
    pub used: Option<f64>,
    /// The budget (None: not set).
    pub limit: Option<f64>,
    /// limit - used.
    pub margin: Option<f64>,
    /// (limit - used) / limit.
    pub margin_fraction: Option<f64>,
    /// "pass", "fail" or "not judged".
    pub verdict: String,
    /// What supplies a missing figure, when one is missing.
    pub missing: Option<String>,
}

fn verdict(
    blob: &str,
    resource: &str,
    unit: &str,
    used: Option<f64>,
    limit: Option<f64>,
    missing: Option<String>,
) -> ResourceVerdict {
    let margin = used.zip(limit).map(|(u, l)| l - u);
    ResourceVerdict {
        blob: blob.into(),
        resource: resource.into(),
        unit: unit.into(),
        used,
        limit,
        margin,
        margin_fraction: margin.zip(limit).map(|(m, l)| m / l),
        verdict: match margin {
            Some(m) if m >= 0.0 => "pass",
            Some(_) => "fail",
            None => "not judged",
        }
        .into(),
        missing: (margin.is_none()).then_some(missing).flatten(),
    }
}

/// The verdicts of every blob against `budget`.
pub fn verdicts(devices: &[DeviceBlob], budget: &DeviceBudget) -> Vec<ResourceVerdict> {
    let set = |v: f64| (v > 0.0).then_some(v);
    let mut out = Vec::new();
    for d in devices {
        let b = &d.budget;
        out.push(verdict(
            &d.name,
            "flash (blob + runtime)",
            "B",
            Some(b.flash_needed_bytes as f64),
            set(budget.flash_bytes as f64),
            Some("limit not set: [device] flash_bytes".into()),
        ));
        out.push(verdict(
            &d.name,
            "RAM (runtime)",
            "B",
            Some(b.ram_needed_bytes as f64),
            set(budget.ram_bytes as f64),
            Some("limit not set: [device] ram_bytes".into()),
        ));
        let time_missing = match (b.step_time_s, budget.control_period_s > 0.0) {
            (None, _) => "not estimated: set [device] clock_hz",
            (Some(_), false) => "limit not set: [device] control_period_s",
            _ => "",
        };
        out.push(verdict(
            &d.name,
            "step time (estimate)",
            "s",
            b.step_time_s,
            set(budget.control_period_s),
            Some(time_missing.into()),
        ));
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn margins_are_limit_minus_used() {
        let v = verdict("a", "flash", "B", Some(4691.0), Some(65536.0), None);
        assert_eq!(v.margin, Some(60845.0));
        assert!((v.margin_fraction.unwrap() - 60845.0 / 65536.0).abs() < 1e-15);
        assert_eq!(v.verdict, "pass");
        let v = verdict("a", "flash", "B", Some(200.0), Some(100.0), None);
        assert_eq!((v.verdict.as_str(), v.margin), ("fail", Some(-100.0)));
        let v = verdict("a", "t", "s", Some(1e-4), None, Some("set it".into()));
        assert_eq!(
            (v.verdict.as_str(), v.missing.as_deref()),
            ("not judged", Some("set it"))
        );
    }
}
