//! The fleet report (`out/fleet.json`, `out/fleet.html`), built only from the
//! files the units wrote (`<unit>/out/report.json`, `fleet-unit.json`), so
//! it can be made anywhere the filesystem is mounted: one row per unit (fit
//! error, state error, energy drift, blob sizes, budget verdict, learned
//! figures), each learned figure's modified z-score against the fleet with
//! |M| > 3.5 flagged (`evidence::outliers`), and a chart per figure. The
//! page follows the unit report: every number carries its JSON path.

use std::collections::BTreeMap;

use serde::Serialize;
use serde_json::Value;

use crate::evidence::outliers::{is_outlier, modified_z, THRESHOLD};
use crate::evidence::report::{lookup, Html};
use crate::evidence::svgplot::{Chart, Series, PALETTE};

/// One blob of a unit.
#[derive(Debug, Clone, Serialize)]
pub struct BlobSize {
    /// Export target.
    pub name: String,
    /// Bytes.
    pub bytes: u64,
}

/// One learned figure of one unit, scored against the fleet.
#[derive(Debug, Clone, Serialize)]
pub struct ScoredFigure {
    /// Figure key.
    pub key: String,
    /// Value.
    pub value: f64,
    /// Modified z-score (None when the fleet's MAD is zero).
    pub m: Option<f64>,
    /// |M| > 3.5.
    pub outlier: bool,
}

/// One unit's row.
#[derive(Debug, Clone, Serialize)]
pub struct UnitRow {
    /// Unit name.
    pub name: String,
    /// `done`, `failed`, `running` or `not started`.
    pub state: String,
    /// Why it failed.
    pub error: Option<String>,
    /// Overrides of the template.
    pub overrides: Vec<String>,
    /// Best validation loss of the fit (normalized units).
    pub fit_validation_loss: Option<f64>,
    /// Median state error of the model's rollouts on held-out logs.
    pub state_rel_rmse: Option<f64>,
    /// Median energy drift (true energy when known, else learned).
    pub energy_drift: Option<f64>,
    /// Device blobs.
    pub blobs: Vec<BlobSize>,
    /// All blobs pass the device budget.
    pub budget_pass: Option<bool>,
    /// Learned figures.
    pub figures: Vec<ScoredFigure>,
    /// Keys of the figures this unit is flagged on.
    pub outlier_on: Vec<String>,
}

/// One figure across the fleet.
#[derive(Debug, Clone, Serialize)]
pub struct FigureSummary {
    /// Key.
    pub key: String,
    /// Label with unit.
    pub label: String,
    /// Units with a value.
    pub units: usize,
    /// Median.
    pub median: f64,
    /// Median absolute deviation.
    pub mad: f64,
    /// Units flagged.
    pub outliers: Vec<String>,
}

/// `fleet.json`.
#[derive(Debug, Clone, Serialize)]
pub struct FleetReport {
    /// Fleet name.
    pub fleet: String,
    /// Visviva version.
    pub visviva_version: String,
    /// Units in the fleet.
    pub units_total: usize,
    /// Units done.
    pub units_done: usize,
    /// Units failed.
    pub units_failed: usize,
    /// |M| above which a value is flagged.
    pub threshold: f64,
    /// One row per unit, by name.
    pub units: Vec<UnitRow>,
    /// One entry per learned figure.
    pub figures: Vec<FigureSummary>,
    /// Units flagged on any learned figure.
    pub outliers: Vec<String>,
    /// The safety caution.
    pub caution: String,
}

/// What the builder needs of one unit: name, state, error, overrides,
/// learned figures (key, label, value) and its `report.json`, if written.
pub struct UnitInput {
    /// Unit name.
    pub name: String,
    /// State text.
    pub state: String,
    /// Failure text.
    pub error: Option<String>,
    /// Overrides.
    pub overrides: Vec<String>,
    /// (key, label, value).
    pub figures: Vec<(String, String, f64)>,
    /// The unit's `report.json`.
    pub report: Option<Value>,
}

fn f(v: &Value, path: &str) -> Option<f64> {
    lookup(v, path).and_then(Value::as_f64)
}

fn row(u: &UnitInput) -> UnitRow {
    let r = u.report.as_ref();
    let blobs = r
        .and_then(|r| lookup(r, "devices"))
        .and_then(Value::as_array)
        .map(|d| {
            d.iter()
                .map(|b| BlobSize {
                    name: b["name"].as_str().unwrap_or("").to_string(),
                    bytes: b["export"]["bytes"].as_u64().unwrap_or(0),
                })
                .collect()
        })
        .unwrap_or_default();
    UnitRow {
        name: u.name.clone(),
        state: u.state.clone(),
        error: u.error.clone(),
        overrides: u.overrides.clone(),
        fit_validation_loss: r.and_then(|r| f(r, "fit/best_validation_loss")),
        state_rel_rmse: r.and_then(|r| {
            f(r, "check/median_model/state_rel_rmse")
                .or_else(|| f(r, "port/median_model_state_rel_rmse"))
        }),
        energy_drift: r.and_then(|r| {
            f(r, "check/median_model/true_energy_drift")
                .or_else(|| f(r, "check/median_model/learned_energy_drift"))
        }),
        blobs,
        budget_pass: r
            .and_then(|r| lookup(r, "budget_pass"))
            .and_then(Value::as_bool),
        figures: Vec::new(),
        outlier_on: Vec::new(),
    }
}

/// Build the report: rows, then each figure scored across the units that
/// have it.
pub fn build(fleet: &str, units: &[UnitInput]) -> FleetReport {
    let mut rows: Vec<UnitRow> = units.iter().map(row).collect();
    let mut labels: BTreeMap<String, String> = BTreeMap::new();
    for u in units {
        for (k, l, _) in &u.figures {
            labels.entry(k.clone()).or_insert_with(|| l.clone());
        }
    }
    let mut figures = Vec::new();
    for (key, label) in &labels {
        let have: Vec<(usize, f64)> = units
            .iter()
            .enumerate()
            .filter_map(|(i, u)| {
                u.figures
                    .iter()
                    .find(|(k, _, v)| k == key && v.is_finite())
                    .map(|(_, _, v)| (i, *v))
            })
            .collect();
        let values: Vec<f64> = have.iter().map(|(_, v)| *v).collect();
        let (median, mad, scores) = modified_z(&values);
        let mut outliers = Vec::new();
        for ((i, v), m) in have.iter().zip(scores) {
            let outlier = is_outlier(m);
            if outlier {
                outliers.push(rows[*i].name.clone());
                rows[*i].outlier_on.push(key.clone());
            }
            rows[*i].figures.push(ScoredFigure {
                key: key.clone(),
                value: *v,
                m,
                outlier,
            });
        }
        figures.push(FigureSummary {
            key: key.clone(),
            label: label.clone(),
            units: values.len(),
            median,
            mad,
            outliers,
        });
    }
    let outliers = rows
        .iter()
        .filter(|r| !r.outlier_on.is_empty())
        .map(|r| r.name.clone())
        .collect();
    FleetReport {
        fleet: fleet.to_string(),
        visviva_version: env!("CARGO_PKG_VERSION").into(),
        units_total: rows.len(),
        units_done: rows.iter().filter(|r| r.state == "done").count(),
        units_failed: rows.iter().filter(|r| r.state == "failed").count(),
        threshold: THRESHOLD,
        units: rows,
        figures,
        outliers,
        caution: crate::CAUTION.into(),
    }
}

fn esc(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
}

const STYLE: &str = "body{font-family:sans-serif;max-width:1100px;margin:2em auto;padding:0 1em;color:#111;line-height:1.4}\
table{border-collapse:collapse;margin:.6em 0}td,th{border:1px solid #bbb;padding:.25em .5em;text-align:right}\
th{background:#f0f0f0}td:first-child,th:first-child{text-align:left}.caution{border:2px solid #D55E00;padding:.6em 1em;background:#fff6ef}\
.flag{color:#b00020;font-weight:bold}.note{font-size:.9em;color:#333}";

/// The page, rendered from `fleet.json`'s own text.
pub fn render_html(report: &FleetReport) -> String {
    let json = serde_json::to_string(report)
        .ok()
        .and_then(|t| serde_json::from_str::<Value>(&t).ok())
        .unwrap_or(Value::Null);
    let mut h = Html::new(&json);
    let title = format!("Visviva fleet report: {}", esc(&report.fleet));
    h.out.push_str(&format!(
        "<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\"><title>{title}</title><style>{STYLE}</style></head><body>\n<h1>{title}</h1>\n"
    ));
    h.out.push_str(&format!(
        "<p class=\"caution\">{}</p>\n",
        esc(&report.caution)
    ));
    let line =
        format!(
        "<p>{} of {} units done, {} failed. Outliers (|M| &gt; {} on a learned figure): {}.</p>\n",
        h.num("units_done"),
        h.num("units_total"),
        h.num("units_failed"),
        h.num("threshold"),
        if report.outliers.is_empty() {
            "none".to_string()
        } else {
            (0..report.outliers.len())
                .map(|i| format!("<span class=\"flag\">{}</span>", h.num(&format!("outliers/{i}"))))
                .collect::<Vec<_>>()
                .join(", ")
        }
    );
    h.out.push_str(&line);
    h.out.push_str("<p class=\"note\">M = 0.6745 (x - median) / MAD, MAD the median absolute deviation from the fleet's median; |M| &gt; 3.5 flags a unit (Iglewicz and Hoaglin, <i>How to Detect and Handle Outliers</i>, 1993). A flag says a unit differs from its siblings, not that it is wrong: look at its logs and its rig.</p>\n");
    units_table(&mut h, report);
    figures_section(&mut h, report);
    h.out.push_str("</body></html>\n");
    h.out
}

fn units_table(h: &mut Html<'_>, report: &FleetReport) {
    let keys: Vec<&FigureSummary> = report.figures.iter().collect();
    let mut head = String::from("<h2>Units</h2>\n<table><tr><th>unit</th><th>state</th><th>fit validation loss</th><th>state error</th><th>energy drift</th><th>blobs (bytes)</th><th>budget</th>");
    for k in &keys {
        head.push_str(&format!("<th>{}</th><th>M</th>", esc(&k.label)));
    }
    head.push_str("<th>overrides</th></tr>\n");
    h.out.push_str(&head);
    for (i, u) in report.units.iter().enumerate() {
        let p = format!("units/{i}");
        let mut tr = format!(
            "<tr><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>",
            h.num(&format!("{p}/name")),
            h.num(&format!("{p}/state")),
            h.num(&format!("{p}/fit_validation_loss")),
            h.num(&format!("{p}/state_rel_rmse")),
            h.num(&format!("{p}/energy_drift")),
        );
        let blobs: Vec<String> = (0..u.blobs.len())
            .map(|b| {
                format!(
                    "{}: {}",
                    h.num(&format!("{p}/blobs/{b}/name")),
                    h.num(&format!("{p}/blobs/{b}/bytes"))
                )
            })
            .collect();
        tr.push_str(&blobs.join("<br>"));
        tr.push_str(&format!(
            "</td><td>{}</td>",
            h.num(&format!("{p}/budget_pass"))
        ));
        for k in &keys {
            match u.figures.iter().position(|f| f.key == k.key) {
                Some(j) => {
                    let cls = if u.figures[j].outlier {
                        " class=\"flag\""
                    } else {
                        ""
                    };
                    tr.push_str(&format!(
                        "<td{cls}>{}</td><td{cls}>{}</td>",
                        h.num(&format!("{p}/figures/{j}/value")),
                        h.num(&format!("{p}/figures/{j}/m"))
                    ));
                }
                None => tr.push_str("<td>-</td><td>-</td>"),
            }
        }
        let over: Vec<String> = (0..u.overrides.len())
            .map(|o| h.num(&format!("{p}/overrides/{o}")))
            .collect();
        tr.push_str(&format!("<td>{}</td></tr>\n", over.join("<br>")));
        if u.error.is_some() {
            tr.push_str(&format!(
                "<tr><td></td><td colspan=\"{}\" class=\"flag\">{}</td></tr>\n",
                7 + 2 * keys.len(),
                h.num(&format!("{p}/error"))
            ));
        }
        h.out.push_str(&tr);
    }
    h.out.push_str("</table>\n");
}

fn figures_section(h: &mut Html<'_>, report: &FleetReport) {
    h.out
        .push_str("<h2>Learned figures across the fleet</h2>\n");
    for (i, s) in report.figures.iter().enumerate() {
        let p = format!("figures/{i}");
        let line = format!(
            "<h3>{}</h3>\n<p>{} units: median {}, MAD {}; flagged: {}.</p>\n",
            esc(&s.label),
            h.num(&format!("{p}/units")),
            h.num(&format!("{p}/median")),
            h.num(&format!("{p}/mad")),
            if s.outliers.is_empty() {
                "none".to_string()
            } else {
                (0..s.outliers.len())
                    .map(|j| h.num(&format!("{p}/outliers/{j}")))
                    .collect::<Vec<_>>()
                    .join(", ")
            }
        );
        h.out.push_str(&line);
        h.out.push_str(&format!(
            "<figure>{}<figcaption>{} per unit (x: the unit's row in the table, from 1); flagged units in orange; dashed: the fleet median.</figcaption></figure>\n",
            figure_chart(report, s).to_svg(),
            esc(&s.label)
        ));
    }
}

fn figure_chart(report: &FleetReport, s: &FigureSummary) -> Chart {
    let (mut ok, mut flagged) = (Vec::new(), Vec::new());
    for (i, u) in report.units.iter().enumerate() {
        if let Some(fig) = u.figures.iter().find(|f| f.key == s.key) {
            let pt = ((i + 1) as f64, fig.value);
            if fig.outlier {
                flagged.push(pt);
            } else {
                ok.push(pt);
            }
        }
    }
    let n = report.units.len().max(1) as f64;
    let series = |label: &str, points, color, dashed, dots| Series {
        label: label.to_string(),
        points,
        color,
        dashed,
        dots,
    };
    Chart {
        title: s.label.clone(),
        x_label: "unit (row in the table)".into(),
        y_label: s.label.clone(),
        log_y: false,
        series: vec![
            series("units", ok, PALETTE[1], false, true),
            series("flagged |M| > 3.5", flagged, PALETTE[2], false, true),
            series(
                "fleet median",
                vec![(1.0, s.median), (n, s.median)],
                PALETTE[0],
                true,
                false,
            ),
        ],
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::evidence::report::fmt_num;

    fn unit(name: &str, period: f64) -> UnitInput {
        UnitInput {
            name: name.into(),
            state: "done".into(),
            error: None,
            overrides: vec![format!("check.reference_params.l = {period}")],
            figures: vec![("mode1_period_s".into(), "period (s)".into(), period)],
            report: Some(serde_json::json!({
                "fit": {"best_validation_loss": 1e-4},
                "check": {"median_model": {"state_rel_rmse": 0.01, "true_energy_drift": 0.002}},
                "devices": [{"name": "f32", "export": {"bytes": 1234}}],
                "budget_pass": true
            })),
        }
    }

    /// The same hand-worked numbers as `outliers::tests` (median 11, MAD 1):
    /// only the 30 is flagged, and every number on the page is the file's.
    #[test]
    fn flags_and_page_numbers_match_the_json() {
        let units: Vec<UnitInput> = [10.0, 12.0, 11.0, 13.0, 9.0, 30.0, 11.0]
            .iter()
            .enumerate()
            .map(|(i, v)| unit(&format!("u{i}"), *v))
            .collect();
        let r = build("test", &units);
        assert_eq!(r.outliers, vec!["u5".to_string()]);
        assert_eq!((r.figures[0].median, r.figures[0].mad), (11.0, 1.0));
        let html = render_html(&r);
        let json: Value = serde_json::from_str(&serde_json::to_string(&r).unwrap()).unwrap();
        let mut seen = 0;
        for part in html.split("<span data-k=\"").skip(1) {
            let (path, rest) = part.split_once("\">").unwrap();
            let shown = rest.split_once("</span>").unwrap().0;
            let want = esc(&fmt_num(lookup(&json, path).unwrap()));
            assert_eq!(shown, want, "{path}");
            seen += 1;
        }
        assert!(seen > 7 * 8, "{seen} tagged numbers");
    }
}
