//! Change against the previous run: when `out/` already holds a
//! `report.json`, the key figures of both (state error, energy drift,
//! validation loss, each blob's size and step cost) side by side, each
//! marked better, worse or unchanged, so a refit that got worse shows at
//! once. Figures are read from either report by JSON path, so a report of
//! an older version compares as far as it has them.

use serde::{Deserialize, Serialize};
use serde_json::Value;

/// One key figure in both runs.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FigureChange {
    /// What it is.
    pub figure: String,
    /// "fraction", "B", "s", "count" or a unit: how the page shows it.
    pub unit: String,
    /// The previous run's value.
    pub previous: f64,
    /// This run's value.
    pub current: f64,
    /// (current - previous) / |previous| (None when previous is 0).
    pub relative_change: Option<f64>,
    /// "better", "worse" or "unchanged" (lower is better for every figure).
    pub verdict: String,
}

/// The comparison block.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Change {
    /// When the previous report was made (absent in reports before
    /// provenance was recorded).
    pub previous_created_utc: Option<String>,
    /// The figures both reports have.
    pub figures: Vec<FigureChange>,
    /// How many got worse.
    pub worse: usize,
}

/// (figure, unit, value) of the key figures of a report, in a fixed order.
fn key_figures(r: &Value) -> Vec<(String, String, f64)> {
    let mut out = Vec::new();
    let mut add = |name: String, unit: &str, path: &str| {
        if let Some(v) = r.pointer(path).and_then(Value::as_f64) {
            out.push((name, unit.to_string(), v));
        }
    };
    add(
        "median state error, model".into(),
        "fraction",
        "/check/median_model/state_rel_rmse",
    );
    add(
        "median true-energy drift, model".into(),
        "fraction",
        "/check/median_model/true_energy_drift",
    );
    if r.pointer("/check/median_model/true_energy_drift")
        .is_none_or(Value::is_null)
    {
        add(
            "median learned-energy drift, model".into(),
            "fraction",
            "/check/median_model/learned_energy_drift",
        );
    }
    add(
        "median driven state error, model".into(),
        "fraction",
        "/port/median_model_state_rel_rmse",
    );
    add(
        "best validation loss, energy model".into(),
        "normalized",
        "/fit/best_validation_loss",
    );
    let devices = r
        .get("devices")
        .and_then(Value::as_array)
        .cloned()
        .unwrap_or_default();
    for (i, d) in devices.iter().enumerate() {
        let name = d
            .get("name")
            .and_then(Value::as_str)
            .unwrap_or("?")
            .to_string();
        let mut dev = |what: &str, unit: &str, field: &str| {
            add(
                format!("{name}: {what}"),
                unit,
                &format!("/devices/{i}/{field}"),
            );
        };
        dev("blob size", "B", "export/bytes");
        dev(
            "multiply-accumulates per step",
            "count",
            "export/macs_per_step",
        );
        dev("estimated step time", "s", "budget/step_time_s");
        dev(
            "max state deviation from the f32 model",
            "normalized",
            "export/max_state_deviation",
        );
    }
    out
}

/// Compare this run's report with the previous one's.
pub fn compare(previous: &Value, current: &Value) -> Change {
    let old = key_figures(previous);
    let figures: Vec<FigureChange> = key_figures(current)
        .into_iter()
        .filter_map(|(figure, unit, now)| {
            let (_, _, before) = old.iter().find(|(f, _, _)| *f == figure)?;
            let relative_change = (*before != 0.0).then(|| (now - before) / before.abs());
            let verdict = if now == *before {
                "unchanged"
            } else if now > *before {
                "worse"
            } else {
                "better"
            };
            Some(FigureChange {
                figure,
                unit,
                previous: *before,
                current: now,
                relative_change,
                verdict: verdict.into(),
            })
        })
        .collect();
    Change {
        previous_created_utc: previous
            .pointer("/provenance/created_utc")
            .and_then(Value::as_str)
            .map(str::to_string),
        worse: figures.iter().filter(|f| f.verdict == "worse").count(),
        figures,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_refit_that_got_worse_is_marked() {
        let before = serde_json::json!({
            "check": {"median_model": {"state_rel_rmse": 0.01, "true_energy_drift": 1e-4}},
            "fit": {"best_validation_loss": 1e-5},
            "devices": [{"name": "a", "export": {"bytes": 4000, "macs_per_step": 100, "max_state_deviation": 0.0},
                         "budget": {"step_time_s": null}}]
        });
        let mut after = before.clone();
        after["check"]["median_model"]["state_rel_rmse"] = serde_json::json!(0.02);
        after["devices"][0]["export"]["bytes"] = serde_json::json!(3000);
        let c = compare(&before, &after);
        let state = &c.figures[0];
        assert_eq!(
            (state.verdict.as_str(), state.relative_change),
            ("worse", Some(1.0))
        );
        let size = c
            .figures
            .iter()
            .find(|f| f.figure == "a: blob size")
            .unwrap();
        assert_eq!(size.verdict, "better");
        assert_eq!(c.worse, 1);
        // No step time in either: not compared. A zero before: no ratio.
        assert!(c.figures.iter().all(|f| !f.figure.contains("step time")));
        let dev = c
            .figures
            .iter()
            .find(|f| f.figure.contains("deviation"))
            .unwrap();
        assert_eq!(
            (dev.verdict.as_str(), dev.relative_change),
            ("unchanged", None)
        );
    }
}
