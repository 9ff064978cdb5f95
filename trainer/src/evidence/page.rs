//! The report page of `visviva run`, section by section: summary and
//! caution, change against the previous run, data, fit, the check (energy
//! model against the baseline, or damping and driven response), device
//! blobs with every verdict as used / limit / margin, provenance. Every
//! number goes through [`Html::val`] (tagged with its JSON path), with its
//! unit in the column header or beside it.

use serde_json::Value;

use crate::evidence::check::CheckReport;
use crate::evidence::horizons::{HorizonError, HorizonSummary};
use crate::evidence::numfmt::Quantity;
use crate::evidence::report::{esc, Evidence, Html, PortReport, RunReport};

const STYLE: &str = "body{font-family:sans-serif;max-width:980px;margin:2em auto;padding:0 1em;color:#111;line-height:1.4}\
table{border-collapse:collapse;margin:.6em 0;break-inside:avoid}td,th{border:1px solid #bbb;padding:.25em .5em;text-align:right;vertical-align:top}\
th{background:#f0f0f0;font-weight:600}td:first-child,th:first-child{text-align:left}td span[data-x]{white-space:nowrap;font-variant-numeric:tabular-nums}\
tr.sum td{font-weight:bold;background:#fafafa}.caution{border:2px solid #D55E00;padding:.6em 1em;background:#fff6ef}\
.pass{color:#006b3c;font-weight:bold}.fail,.worse{color:#b00020;font-weight:bold}.better{color:#006b3c}.nm{color:#555;font-size:.9em}\
figure{margin:1em 0}figure svg{width:100%;height:auto;display:block}.note{font-size:.9em;color:#333}\
code,pre{font-size:.85em}pre{white-space:pre-wrap;background:#f7f7f7;padding:.5em;border:1px solid #ddd}td.hash{word-break:break-all;font-family:monospace;font-size:.8em}\
@media print{body{max-width:none;margin:0;padding:0;font-size:9pt}td,th{padding:.15em .3em}figure,table,pre{break-inside:avoid}h2{break-after:avoid}}";

/// Render the page. `charts` are (title, svg) pairs.
pub fn render_html(report: &RunReport, charts: &[(String, String)]) -> String {
    // Render from the JSON text exactly as report.json holds it (an f32
    // converted in memory reads 0.009999999776 where the file says 0.01).
    let json = serde_json::to_string(report)
        .ok()
        .and_then(|t| serde_json::from_str::<Value>(&t).ok())
        .unwrap_or(Value::Null);
    let mut h = Html::new(&json);
    header_section(&mut h, report);
    change_section(&mut h, report);
    data_section(&mut h, report);
    fit_section(&mut h, report);
    match &report.evidence {
        Evidence::Check(check) => {
            conservative_section(&mut h, check);
            let per: Vec<&[HorizonError]> = check
                .trajectories
                .iter()
                .map(|t| t.horizons.as_slice())
                .collect();
            let at = HorizonPaths {
                traj: "check/trajectories",
                summary: "check/horizons",
                measure:
                    "RMS over the coordinates of rollout minus log, over the trajectory's RMS state",
            };
            let base = check.median_baseline.is_some();
            horizons_section(&mut h, &at, &per, &check.horizons, base);
        }
        Evidence::Port(port) => port_section(&mut h, port),
    }
    underfit_note(&mut h, report);
    structure_choice_section(&mut h, report);
    for (title, svg) in charts {
        h.p(&format!(
            "<figure aria-label=\"{}\">{svg}</figure>",
            esc(title)
        ));
    }
    device_section(&mut h, report);
    budget_section(&mut h, report);
    crate::evidence::observer_check::observer_section(&mut h, report);
    provenance_section(&mut h, report);
    footer_section(&mut h);
    h.out
}

/// The structure flag, when the model underfits the baseline.
fn underfit_note(h: &mut Html<'_>, report: &RunReport) {
    let Some(u) = &report.underfit else {
        return;
    };
    let ratio = h.one("underfit/ratio", Quantity::Plain("-"));
    h.p(&format!(
        "<p class=\"fail\">The {} energy model's held-out state error is {ratio} times the \
         plain baseline's: this structure underfits the logs. Try {}.</p>",
        esc(&u.structure),
        esc(&u.try_instead)
    ));
}

/// With `arch = "auto"`: each candidate's figure and why one was chosen.
fn structure_choice_section(h: &mut Html<'_>, report: &RunReport) {
    let Some(s) = &report.structure_choice else {
        return;
    };
    let n = s.candidates.len();
    let col = h.col(
        &paths("structure_choice/candidates", n, "state_rel_rmse"),
        Quantity::Fraction,
    );
    let budget = h.one("structure_choice/short_budget", Quantity::Count);
    let unit = s.budget_unit();
    h.p("<h2>Structure choice</h2>");
    h.p(&format!(
        "<p>The structure was chosen automatically (arch = \"auto\", the default; set \
         [model] arch to fix it). {}</p>",
        choice_rule(s, &budget, unit)
    ));
    let rows: Vec<Vec<String>> = s
        .candidates
        .iter()
        .enumerate()
        .map(|(i, c)| {
            let path = format!("structure_choice/candidates/{i}/state_rel_rmse");
            let figure = match (&c.skipped, c.state_rel_rmse) {
                (Some(reason), _) => format!("skipped: {}", esc(reason)),
                (None, Some(_)) => h.val(&path, &col),
                (None, None) => "not fitted: the only structure permitted".into(),
            };
            let mark = if c.structure == s.chosen {
                "chosen"
            } else {
                ""
            };
            vec![esc(&c.structure), figure, mark.into()]
        })
        .collect();
    let head = format!("{} ({})", s.basis.figure_name(), col.unit());
    h.table(&["structure", &head, ""], &rows);
}

/// The structure-choice paragraph's rule: what was fitted, what it was
/// scored on and which structure won.
fn choice_rule(s: &crate::learn::auto::Selection, budget: &str, unit: &str) -> String {
    use crate::learn::auto::Basis;
    let chosen = esc(&s.chosen);
    let fitted = format!(
        "Each structure the project permits was fitted for {budget} {unit} (a fifth of the \
         budget, same seed and sizes) and scored by"
    );
    match s.basis {
        Basis::HeldOut => format!(
            "{fitted} its held-out state error (the median over the validation trajectories, \
             as in the check above). The {chosen} structure had the smallest and was fitted \
             with the full budget."
        ),
        Basis::Training => format!(
            "{fitted} its state error on the training trajectories: there were no held-out \
             logs, which favours the more flexible structure. The {chosen} structure had the \
             smallest and was fitted with the full budget."
        ),
        Basis::OnlyPermitted => format!(
            "The logs and settings permit the {chosen} structure only, so none was fitted to \
             choose."
        ),
    }
}

/// Paths `prefix/i/field` for i in 0..n.
fn paths(prefix: &str, n: usize, field: &str) -> Vec<String> {
    (0..n).map(|i| format!("{prefix}/{i}/{field}")).collect()
}

/// "not measured" with the command or setting that supplies the figure.
fn missing(h: &Html<'_>, path: &str, how: &str) -> String {
    format!("{} <span class=\"nm\">{how}</span>", h.num(path))
}

/// Title, caution, the model in words and the one-line verdict.
fn header_section(h: &mut Html<'_>, report: &RunReport) {
    h.p("<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\">");
    h.p("<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">");
    h.p(&format!(
        "<title>Visviva report: {}</title><style>{STYLE}</style></head><body>",
        esc(&report.project)
    ));
    h.p(&format!(
        "<h1>Visviva report: {}</h1>",
        esc(&report.project)
    ));
    h.p(&format!(
        "<p class=\"caution\">{}</p>",
        esc(&report.caution)
    ));
    let verdict = if report.budget_pass {
        "<span class=\"pass\">PASS</span>"
    } else {
        "<span class=\"fail\">FAIL</span>"
    };
    let open = report
        .verdicts
        .iter()
        .filter(|v| v.verdict == "not judged")
        .count();
    let open = if open > 0 {
        format!(" ({open} figure(s) not judged: see the budget table)")
    } else {
        String::new()
    };
    h.p(&format!(
        "<p><b>Model:</b> {} <span class=\"note\">(compact: {})</span>.<br><b>Device budget:</b> {verdict}{open}; details in <a href=\"#budget\">Budget</a>. Made {} by {} (<a href=\"#provenance\">Provenance</a>).</p>",
        h.num("model_description"),
        h.num("architecture"),
        h.num("provenance/created_utc"),
        h.num("provenance/tool"),
    ));
}

/// Key figures against the previous run's report.
fn change_section(h: &mut Html<'_>, report: &RunReport) {
    let Some(change) = &report.change else {
        return;
    };
    h.p("<h2 id=\"change\">Change against the previous run</h2>");
    h.p(&format!(
        "<p>The previous report in <code>out/</code> (made {}) against this run; lower is better for every figure. Worse: {}.</p>",
        h.num("change/previous_created_utc"),
        h.num("change/worse"),
    ));
    let mut rows = Vec::new();
    for (i, f) in change.figures.iter().enumerate() {
        let at = |k: &str| format!("change/figures/{i}/{k}");
        let q = match f.unit.as_str() {
            "fraction" => Quantity::Fraction,
            "B" => Quantity::Si("B"),
            "s" => Quantity::Si("s"),
            "count" => Quantity::Count,
            _ => Quantity::Plain("-"),
        };
        let fmt = h.col(&[at("previous"), at("current")], q);
        let change = h.one(&at("relative_change"), Quantity::Fraction);
        let class = match f.verdict.as_str() {
            "worse" => "worse",
            "better" => "better",
            _ => "",
        };
        rows.push(vec![
            h.num(&at("figure")),
            h.val_u(&at("previous"), &fmt),
            h.val_u(&at("current"), &fmt),
            change,
            format!("<span class=\"{class}\">{}</span>", h.num(&at("verdict"))),
        ]);
    }
    h.table(
        &["figure", "previous run", "this run", "change", "verdict"],
        &rows,
    );
}

/// What the logs hold, per coordinate, with the units they declare.
fn data_section(h: &mut Html<'_>, report: &RunReport) {
    h.p("<h2>Data</h2>");
    let mut rows = vec![
        vec!["training log".into(), h.num("data/train_file")],
        vec!["degrees of freedom".into(), h.num("data/dof")],
        vec![
            "training trajectories (samples)".into(),
            format!(
                "{} ({})",
                h.one("data/train_trajectories", Quantity::Count),
                h.one("data/train_samples", Quantity::Count)
            ),
        ],
        vec![
            "validation trajectories (samples)".into(),
            format!(
                "{} ({})",
                h.one("data/validation_trajectories", Quantity::Count),
                h.one("data/validation_samples", Quantity::Count)
            ),
        ],
        vec![
            "sampling interval".into(),
            h.one("data/sample_interval_s", Quantity::Si("s")),
        ],
        vec!["time derivatives".into(), h.num("data/derivatives")],
        vec!["units from".into(), h.num("data/units/source")],
    ];
    if report.data.inputs > 0 {
        let units: Vec<String> = (0..report.data.inputs)
            .map(|j| {
                let unit = h.num(&format!("data/units/inputs/{j}"));
                format!("<span class=\"label\">u{}</span> {unit}", j + 1)
            })
            .collect();
        rows.push(vec!["input columns".into(), h.num("data/inputs")]);
        rows.push(vec!["input units".into(), units.join(", ")]);
    }
    rows.push(vec!["fit mode".into(), h.num("fit_mode")]);
    if let Some(rig) = &report.data.rig {
        rows.extend(rig_rows(h, rig.noise.len()));
    }
    if let Some(m) = &report.data.momenta_from_rates {
        rows.extend(learned_inertia_rows(h, m.diagonal_range.len()));
    }
    h.table(&["", ""], &rows);
    let n = report.data.coordinates.len();
    let dof = report.data.dof;
    let fmt = |h: &Html<'_>, f: &str| h.col(&paths("data/coordinates", n, f), Quantity::Plain(""));
    let (lo, hi, rms, noise) = (fmt(h, "min"), fmt(h, "max"), fmt(h, "rms"), fmt(h, "noise"));
    let rows: Vec<Vec<String>> = (0..n)
        .map(|i| {
            let c = |f: &str| format!("data/coordinates/{i}/{f}");
            let unit = if i < dof {
                format!("data/units/q/{i}")
            } else {
                format!("data/units/p/{}", i - dof)
            };
            vec![
                h.num(&c("name")),
                h.num(&unit),
                h.val(&c("min"), &lo),
                h.val(&c("max"), &hi),
                h.val(&c("rms"), &rms),
                h.val(&c("noise"), &noise),
            ]
        })
        .collect();
    h.table(
        &[
            "coordinate",
            "unit",
            "min",
            "max",
            "RMS",
            "estimated noise (std)",
        ],
        &rows,
    );
    let undeclared = if report.data.units.declared {
        ""
    } else {
        " Units are not declared: add <code>[data] units = \"unitless\"</code> or a <code>[data.units]</code> table (<code>q</code>, <code>p</code>, <code>energy</code>, <code>inputs</code>) to visviva.toml."
    };
    h.p(&format!("<p class=\"note\">Each row in its unit; noise is estimated from second differences of each coordinate (for white noise of standard deviation s, the second difference has variance 6 s<sup>2</sup>; smooth motion adds little when sampled finely).{undeclared}</p>"));
}

/// What reading the log through `[columns]` found: positions only or not,
/// gaps that split trajectories, dropped pieces, and per coordinate the
/// quantization step and the noise model the fit weighs errors by.
fn rig_rows(h: &Html<'_>, dof: usize) -> Vec<Vec<String>> {
    let mut rows = vec![
        vec![
            "positions only (velocities estimated)".into(),
            h.num("data/rig/positions_only"),
        ],
        vec![
            "gaps that split trajectories".into(),
            h.one("data/rig/gaps", Quantity::Count),
        ],
        vec![
            "pieces too short to use (dropped)".into(),
            h.one("data/rig/dropped_pieces", Quantity::Count),
        ],
    ];
    for i in 0..dof {
        rows.push(vec![
            format!(
                "<span class=\"label\">q{}</span> quantization step, noise model (std)",
                i + 1
            ),
            format!(
                "{}, {}",
                h.num(&format!("data/rig/quantization/{i}")),
                h.num(&format!("data/rig/noise/{i}"))
            ),
        ]);
    }
    rows
}

/// Joint rates without masses: the learned mass matrix that formed the
/// momenta, its fit and its range over the logged positions.
fn learned_inertia_rows(h: &Html<'_>, dof: usize) -> Vec<Vec<String>> {
    let at = |f: &str| format!("data/momenta_from_rates/{f}");
    let mut rows = vec![
        vec![
            "momenta p = M(q) v from a mass matrix learned from the rates: window (samples)".into(),
            h.one(&at("window_samples"), Quantity::Count),
        ],
        vec![
            "Euler-Lagrange residual share, training / held out".into(),
            format!(
                "{} / {}",
                h.num(&at("train_ratio")),
                h.num(&at("held_out_ratio"))
            ),
        ],
        vec![
            "mean M11 (stated; - when normalized to 1)".into(),
            h.num(&at("reference_inertia")),
        ],
        vec![
            "largest coupling |Mij| / sqrt(Mii Mjj)".into(),
            h.num(&at("max_coupling")),
        ],
    ];
    for i in 0..dof {
        rows.push(vec![
            format!("M{0}{0} over the logged positions (min, max)", i + 1),
            format!(
                "{}, {}",
                h.num(&at(&format!("diagonal_range/{i}/0"))),
                h.num(&at(&format!("diagonal_range/{i}/1")))
            ),
        ]);
    }
    rows
}

/// The energy model's and the baseline's fits side by side; one format per
/// row (each row is one quantity).
fn fit_section(h: &mut Html<'_>, report: &RunReport) {
    h.p("<h2>Fit</h2>");
    let base = report.baseline_fit.is_some();
    let rows: Vec<Vec<String>> = [
        ("parameters", "parameters", Some(Quantity::Count)),
        ("optimizer steps", "steps", Some(Quantity::Count)),
        (
            "best validation loss (normalized units, -)",
            "best_validation_loss",
            Some(Quantity::Plain("-")),
        ),
        (
            "epoch of the kept parameters",
            "best_epoch",
            Some(Quantity::Count),
        ),
        ("stopped because", "stop", None),
        ("wall time", "seconds", Some(Quantity::Si("s"))),
        (
            "throughput",
            "samples_per_second",
            Some(Quantity::Plain("samples/s")),
        ),
        ("reused from the last run", "reused", None),
    ]
    .into_iter()
    .map(|(label, f, q)| {
        let (a, b) = (format!("fit/{f}"), format!("baseline_fit/{f}"));
        let cell = |h: &Html<'_>, p: &str, fmt: &Option<crate::evidence::numfmt::ColFmt>| match fmt
        {
            Some(fmt) => h.val_u(p, fmt),
            None => h.num(p),
        };
        let fmt = q.map(|q| h.col(&[a.clone(), b.clone()], q));
        let b = if base {
            cell(h, &b, &fmt)
        } else {
            "<span class=\"nm\">no baseline ([fit] baseline = false)</span>".into()
        };
        vec![label.to_string(), cell(h, &a, &fmt), b]
    })
    .collect();
    h.table(&["", "energy model", "baseline"], &rows);
    h.p("<p class=\"note\">Losses are in normalized units (each coordinate and rate divided by its scale), so they compare fits of one data set, not data sets.</p>");
}

/// The conservative model's check: drift, state and vector-field error
/// against the baseline, as percentages.
fn conservative_section(h: &mut Html<'_>, check: &CheckReport) {
    let truth = check.system.is_some();
    let (energy, ek) = if truth {
        ("true-energy drift", "true_energy_drift")
    } else {
        ("learned-energy drift", "learned_energy_drift")
    };
    h.p("<h2>Energy model versus plain baseline</h2>");
    h.p(&format!("<p>Each validation trajectory is rolled out from its first state: the energy model with its integrator ({}), the baseline (a plain network of the same size predicting dx/dt directly) with RK4. Errors are relative (RMS error over RMS value) and shown in percent. {}</p>",
        h.num("check/integrator"),
        if truth { "Energy drift is max |H(t) - H(0)| / |H(0)| over the long horizon, H the true energy of the reference system." } else { "Energy drift is max |H(t) - H(0)| / E<sub>s</sub> over the long horizon, H the learned energy and E<sub>s</sub> the blob's energy scale (the training data's typical energy, the geometric mean over coordinates of RMS(dq/dt) RMS(p) and RMS(dp/dt) RMS(q): for a mass-spring its mean energy; unlike the learned energy's spread along one trajectory, it does not shrink as the model gets more accurate). It measures how far the model's own energy moves under its integrator: the integrator's error and a rough learned energy raise it, but a smooth energy that is wrong does not, so judge accuracy by the state errors." }));
    let n = check.trajectories.len();
    let fmt = |h: &Html<'_>, f: &str| {
        let mut p = paths("check/trajectories", n, &format!("model/{f}"));
        p.extend(paths("check/trajectories", n, &format!("baseline/{f}")));
        p.push(format!("check/median_model/{f}"));
        p.push(format!("check/median_baseline/{f}"));
        h.col(&p, Quantity::Fraction)
    };
    let (vf, st, dr) = (
        fmt(h, "vector_field_rel_rmse"),
        fmt(h, "state_rel_rmse"),
        fmt(h, ek),
    );
    let mut rows: Vec<Vec<String>> = (0..n)
        .map(|i| {
            let t = |f: &str| format!("check/trajectories/{i}/{f}");
            vec![
                h.num(&t("id")),
                h.val(&t("model/vector_field_rel_rmse"), &vf),
                h.val(&t("baseline/vector_field_rel_rmse"), &vf),
                h.val(&t("model/state_rel_rmse"), &st),
                h.val(&t("baseline/state_rel_rmse"), &st),
                h.val(&t(&format!("model/{ek}")), &dr),
                h.val(&t(&format!("baseline/{ek}")), &dr),
            ]
        })
        .collect();
    rows.push(vec![
        "<!--sum-->median".into(),
        h.val("check/median_model/vector_field_rel_rmse", &vf),
        h.val("check/median_baseline/vector_field_rel_rmse", &vf),
        h.val("check/median_model/state_rel_rmse", &st),
        h.val("check/median_baseline/state_rel_rmse", &st),
        h.val(&format!("check/median_model/{ek}"), &dr),
        h.val(&format!("check/median_baseline/{ek}"), &dr),
    ]);
    let head = [
        "trajectory".to_string(),
        format!("vector-field error, model ({})", vf.unit()),
        format!("baseline ({})", vf.unit()),
        format!("state error, model ({})", st.unit()),
        format!("baseline ({})", st.unit()),
        format!("{energy}, model ({})", dr.unit()),
        format!("baseline ({})", dr.unit()),
    ];
    let head: Vec<&str> = head.iter().map(String::as_str).collect();
    h.table(&head, &rows);
    if !truth {
        h.p("<p class=\"note\">Baseline energy drift: - (the baseline has no energy; name the built-in system in <code>[check] reference_system</code> to measure the true-energy drift of both).</p>");
    }
    h.p("<p class=\"note\">How to read it: the energy model should match or beat the baseline on vector-field and state error, and its energy drift should stay small and bounded while the baseline's grows. A large state error with a small energy drift usually means a phase error (slightly wrong frequency), which grows linearly with time.</p>");
}

/// Where one kind of check keeps its horizons in report.json: the
/// per-trajectory list (`{traj}/{i}/horizons/{j}`, ids at `{traj}/{i}/id`)
/// and the medians (`{summary}/{j}`), and how its state error is measured.
struct HorizonPaths<'s> {
    traj: &'s str,
    summary: &'s str,
    measure: &'s str,
}

/// The state errors at the chosen horizons: per horizon, one row per
/// trajectory (the logged sample the error is taken at, model, baseline;
/// "not reached" when the trajectory is shorter), then the median over the
/// trajectories that reach it.
fn horizons_section(
    h: &mut Html<'_>,
    at: &HorizonPaths<'_>,
    per: &[&[HorizonError]],
    summary: &[HorizonSummary],
    base: bool,
) {
    let (hs, n) = (summary.len(), per.len());
    if hs == 0 {
        return;
    }
    let traj = |i: usize, j: usize, f: &str| format!("{}/{i}/horizons/{j}/{f}", at.traj);
    let sum = |j: usize, f: &str| format!("{}/{j}/{f}", at.summary);
    let mut errs = Vec::new();
    let mut times = Vec::new();
    for j in 0..hs {
        for i in 0..n {
            errs.extend([traj(i, j, "model"), traj(i, j, "baseline")]);
            times.push(traj(i, j, "at_s"));
        }
        errs.extend([sum(j, "median_model"), sum(j, "median_baseline")]);
        times.push(sum(j, "seconds"));
    }
    let err = h.col(&errs, Quantity::Fraction);
    let secs = h.col(&times, Quantity::Si("s"));
    let mut rows = Vec::new();
    for (j, hz) in summary.iter().enumerate() {
        for (i, t) in per.iter().enumerate() {
            let Some(e) = t.get(j) else { continue };
            let id = h.num(&format!("{}/{i}/id", at.traj));
            let value = |f: &str, v: Option<f64>, none: &str| match v {
                Some(_) => h.val(&traj(i, j, f), &err),
                None => format!("<span class=\"nm\">{none}</span>"),
            };
            rows.push(if e.reached {
                let no_base = if base {
                    "stopped before"
                } else {
                    "no baseline"
                };
                vec![
                    h.val(&sum(j, "seconds"), &secs),
                    id,
                    h.val(&traj(i, j, "at_s"), &secs),
                    value("model", e.model, "stopped before"),
                    value("baseline", e.baseline, no_base),
                ]
            } else {
                let not = "<span class=\"nm\">not reached</span>".to_string();
                vec![
                    h.val(&sum(j, "seconds"), &secs),
                    id,
                    "<span class=\"nm\">trajectory shorter</span>".into(),
                    not.clone(),
                    not,
                ]
            });
        }
        let median = |f: &str, v: Option<f64>| match v {
            Some(_) => h.val(&sum(j, f), &err),
            None => "-".into(),
        };
        rows.push(vec![
            format!("<!--sum-->{}", h.val(&sum(j, "seconds"), &secs)),
            format!("median of {} reaching", h.num(&sum(j, "reached"))),
            String::new(),
            median("median_model", hz.median_model),
            median("median_baseline", hz.median_baseline),
        ]);
    }
    h.p("<h3>State error at chosen horizons</h3>");
    h.p(&format!("<p>The relative state error ({}) at the logged sample nearest each horizon after the first state (<code>[check] horizons</code>, <code>visviva check --horizons</code>). A horizon longer than a held-out trajectory is not reached for it: no error is given there, and it is left out of the median.</p>", at.measure));
    let head = [
        format!("horizon ({})", secs.unit()),
        "trajectory".to_string(),
        format!("sample at ({})", secs.unit()),
        format!("model ({})", err.unit()),
        format!("baseline ({})", err.unit()),
    ];
    let head: Vec<&str> = head.iter().map(String::as_str).collect();
    h.table(&head, &rows);
}

/// A damped or driven model's check: learned damping per mode and the
/// response to held-out input sequences, model against baseline.
fn port_section(h: &mut Html<'_>, port: &PortReport) {
    h.p("<h2>Damping per mode</h2>");
    h.p(&format!(
        "<p>The learned field dx/dt = (J - R) dH/dx + G u ({} input(s), dissipation learned: {}) is linearized at its rest state (u = 0; largest residual {} of the RMS rates) and its eigenvalues give each mode's undamped natural frequency |&lambda;| / 2&pi; and damping ratio -Re &lambda; / |&lambda;| (1 for a real, decaying mode; rigid-body modes with &lambda; = 0 are left out).</p>",
        h.num("port/inputs"),
        h.num("port/dissipation"),
        h.one("port/rest_residual", Quantity::Fraction),
    ));
    let n = port.modes.len();
    let r = port.reference_modes.as_ref().map_or(0, Vec::len);
    let both = |f: &str, q| {
        let mut p = paths("port/modes", n, f);
        p.extend(paths("port/reference_modes", r, f));
        h.col(&p, q)
    };
    let (hz, zeta) = (
        both("natural_hz", Quantity::Si("Hz")),
        both("damping_ratio", Quantity::Plain("-")),
    );
    let re = h.col(&paths("port/modes", n, "real"), Quantity::Plain("1/s"));
    let im = h.col(&paths("port/modes", n, "imag"), Quantity::Plain("rad/s"));
    let rows: Vec<Vec<String>> = (0..n)
        .map(|i| {
            let m = |f: &str| format!("port/modes/{i}/{f}");
            let mut row = vec![
                format!("<span class=\"label\">{}</span>", i + 1),
                h.val(&m("natural_hz"), &hz),
                h.val(&m("damping_ratio"), &zeta),
                h.val(&m("real"), &re),
                h.val(&m("imag"), &im),
            ];
            if port.reference_modes.is_some() {
                let rm = |f: &str| format!("port/reference_modes/{i}/{f}");
                if i < r {
                    row.push(h.val(&rm("natural_hz"), &hz));
                    row.push(h.val(&rm("damping_ratio"), &zeta));
                } else {
                    row.extend(["-".to_string(), "-".to_string()]);
                }
            }
            row
        })
        .collect();
    let mut head = vec![
        "mode".to_string(),
        format!("natural frequency ({})", hz.unit()),
        "damping ratio (-)".into(),
        "Re &lambda; (1/s)".into(),
        "Im &lambda; (rad/s)".into(),
    ];
    if port.reference_modes.is_some() {
        head.push(format!(
            "reference system: natural frequency ({})",
            hz.unit()
        ));
        head.push("damping ratio (-)".into());
    }
    let head: Vec<&str> = head.iter().map(String::as_str).collect();
    h.table(&head, &rows);
    if port.reference_modes.is_some() {
        h.p("<p class=\"note\">Reference modes: the built-in system the data were simulated from, linearized at rest with its exact R and energy; modes are matched by rank of natural frequency.</p>");
    }
    driven_section(h, port);
}

/// Driven rollouts of the held-out trajectories, model against baseline.
fn driven_section(h: &mut Html<'_>, port: &PortReport) {
    h.p("<h2>Response to held-out input sequences</h2>");
    h.p("<p>Each validation trajectory is rolled out from its first state with its own logged inputs (input row k held over step k): the model with its integrator, the baseline (a plain network of the same hidden sizes taking state and input, predicting dx/dt) with RK4. Error: each coordinate's RMS error over its RMS, averaged in square, in percent.</p>");
    let n = port.driven.len();
    let mut p = paths("port/driven", n, "model_state_rel_rmse");
    p.extend(paths("port/driven", n, "baseline_state_rel_rmse"));
    p.push("port/median_model_state_rel_rmse".into());
    p.push("port/median_baseline_state_rel_rmse".into());
    let err = h.col(&p, Quantity::Fraction);
    let samples = h.col(&paths("port/driven", n, "samples"), Quantity::Count);
    let mut rows: Vec<Vec<String>> = (0..n)
        .map(|i| {
            let t = |f: &str| format!("port/driven/{i}/{f}");
            vec![
                h.num(&t("id")),
                h.val(&t("samples"), &samples),
                h.val(&t("model_state_rel_rmse"), &err),
                h.val(&t("baseline_state_rel_rmse"), &err),
            ]
        })
        .collect();
    rows.push(vec![
        "<!--sum-->median".into(),
        String::new(),
        h.val("port/median_model_state_rel_rmse", &err),
        h.val("port/median_baseline_state_rel_rmse", &err),
    ]);
    let head = [
        "trajectory".to_string(),
        "samples".into(),
        format!("state error, model ({})", err.unit()),
        format!("baseline ({})", err.unit()),
    ];
    let head: Vec<&str> = head.iter().map(String::as_str).collect();
    h.table(&head, &rows);
    for (i, d) in port.driven.iter().enumerate() {
        for (who, f, field) in [
            ("model", &d.model_failure, "model_failure"),
            ("baseline", &d.baseline_failure, "baseline_failure"),
        ] {
            if f.is_some() {
                let text = h.num(&format!("port/driven/{i}/{field}"));
                h.p(&format!(
                    "<p class=\"fail\">{who} rollout of trajectory {} stopped early: {text}</p>",
                    esc(&d.id)
                ));
            }
        }
    }
    h.p(&format!(
        "<p class=\"note\">The golden rollouts kept for the device check replay the inputs of held-out trajectory {} (file golden/&lt;blob&gt;-inputs.csv).</p>",
        h.num("port/golden_input_trajectory")
    ));
    let per: Vec<&[HorizonError]> = port.driven.iter().map(|d| d.horizons.as_slice()).collect();
    let at = HorizonPaths {
        traj: "port/driven",
        summary: "port/horizons",
        measure: "the square root of the mean over coordinates of each coordinate's squared error over its mean square along the trajectory",
    };
    let base = port.median_baseline_state_rel_rmse.is_some();
    horizons_section(h, &at, &per, &port.horizons, base);
}

/// Device blobs: size, cost, the runtime's footprint and the price of
/// quantization.
fn device_section(h: &mut Html<'_>, report: &RunReport) {
    h.p("<h2 id=\"device\">Device blobs</h2>");
    let n = report.devices.len();
    let d = |f: &str| paths("devices", n, f);
    let (dt, bytes, bpp, rflash, rstack, macs, emu) = (
        h.col(&d("export/dt"), Quantity::Si("s")),
        h.col(&d("export/bytes"), Quantity::Si("B")),
        h.col(&d("export/bytes_per_parameter"), Quantity::Plain("B")),
        h.col(&d("runtime/flash_bytes"), Quantity::Si("B")),
        h.col(&d("runtime/stack_bytes"), Quantity::Si("B")),
        h.col(&d("export/macs_per_step"), Quantity::Count),
        h.col(&d("emulator_instructions_per_step"), Quantity::Plain("")),
    );
    let rows: Vec<Vec<String>> = (0..n)
        .map(|i| {
            let p = |f: &str| format!("devices/{i}/{f}");
            let emulator = if h.has(&p("emulator_instructions_per_step")) {
                h.val(&p("emulator_instructions_per_step"), &emu)
            } else {
                missing(
                    h,
                    &p("emulator_instructions_per_step"),
                    "not measured: run <code>cargo xtask device</code>",
                )
            };
            let runtime = |f: &str, fmt| {
                if h.has(&p("runtime")) {
                    h.val(&p(f), fmt)
                } else {
                    missing(
                        h,
                        &p(f),
                        "not measured for this configuration: <code>cargo xtask footprint</code>",
                    )
                }
            };
            vec![
                h.num(&p("name")),
                h.num(&p("export/weights")),
                h.num(&p("export/integrator")),
                h.val(&p("export/dt"), &dt),
                h.val(&p("export/bytes"), &bytes),
                h.val(&p("export/bytes_per_parameter"), &bpp),
                runtime("runtime/flash_bytes", &rflash),
                runtime("runtime/stack_bytes", &rstack),
                h.val(&p("export/macs_per_step"), &macs),
                emulator,
            ]
        })
        .collect();
    let head = [
        "blob".to_string(),
        "weights".into(),
        "integrator".into(),
        format!("time step ({})", dt.unit()),
        "blob size (B)".into(),
        "bytes per parameter".into(),
        "runtime flash (B)".into(),
        "runtime stack (B)".into(),
        "MAC per step".into(),
        "emulator instructions per step".into(),
    ];
    let head: Vec<&str> = head.iter().map(String::as_str).collect();
    h.table(&head, &rows);
    h.p(&format!(
        "<p class=\"note\">Runtime flash and stack: {}. MAC: multiply-accumulates. Emulator instructions are counted by QEMU and are not cycles; measure on the board.</p>",
        esc(crate::deploy::footprint::SOURCE)
    ));
    quantization_table(h, n);
    held_out_table(h, report);
}

/// Each blob on the held-out logs beside the fitted model it came from.
fn held_out_table(h: &mut Html<'_>, report: &RunReport) {
    let n = report.devices.len();
    let (model, model_horizon, model_drift) = match &report.evidence {
        Evidence::Check(_) => (
            "check/median_model/state_rel_rmse",
            "check/horizons",
            Some("check/median_model/learned_energy_drift"),
        ),
        Evidence::Port(_) => ("port/median_model_state_rel_rmse", "port/horizons", None),
    };
    let horizons = report
        .devices
        .first()
        .map_or(0, |d| d.held_out.horizons.len());
    let mut errs = vec![model.to_string()];
    errs.extend(paths("devices", n, "held_out/state_rel_rmse"));
    for j in 0..horizons {
        errs.push(format!("{model_horizon}/{j}/median_model"));
        errs.extend(paths(
            "devices",
            n,
            &format!("held_out/horizons/{j}/state_rel_rmse"),
        ));
    }
    let err = h.col(&errs, Quantity::Fraction);
    let mut drifts: Vec<String> = model_drift.iter().map(|p| p.to_string()).collect();
    drifts.extend(paths("devices", n, "held_out/learned_energy_drift"));
    let drift = h.col(&drifts, Quantity::Fraction);
    let value = |path: &str, fmt, none: &str| {
        if h.has(path) {
            h.val(path, fmt)
        } else {
            missing(h, path, none)
        }
    };
    let (unreached, undefined) = ("not reached", "damped or driven");
    let mut rows = Vec::new();
    let mut first = vec![
        "fitted model".to_string(),
        "as fitted".to_string(),
        value(model, &err, ""),
    ];
    first.extend((0..horizons).map(|j| {
        value(
            &format!("{model_horizon}/{j}/median_model"),
            &err,
            unreached,
        )
    }));
    first.push(
        model_drift.map_or(format!("<span class=\"nm\">{undefined}</span>"), |p| {
            value(p, &drift, undefined)
        }),
    );
    rows.push(first);
    for i in 0..n {
        let p = |f: &str| format!("devices/{i}/{f}");
        let mut row = vec![
            h.num(&p("name")),
            h.num(&p("export/weights")),
            value(&p("held_out/state_rel_rmse"), &err, ""),
        ];
        row.extend((0..horizons).map(|j| {
            value(
                &p(&format!("held_out/horizons/{j}/state_rel_rmse")),
                &err,
                unreached,
            )
        }));
        row.push(value(
            &p("held_out/learned_energy_drift"),
            &drift,
            undefined,
        ));
        rows.push(row);
    }
    let mut head = vec![
        "rolled out".to_string(),
        "weights".into(),
        "median state error".into(),
    ];
    if let Some(d) = report.devices.first() {
        head.extend(
            d.held_out
                .horizons
                .iter()
                .map(|x| format!("at {} s", x.seconds)),
        );
    }
    head.push("learned-energy drift".into());
    let head: Vec<&str> = head.iter().map(String::as_str).collect();
    h.p("<h3>Each blob on the held-out logs</h3>");
    h.table(&head, &rows);
    h.p("<p class=\"note\">The blob's own weights and integrator rolled out from the held-out logs' states, as the fitted model is by the check above: what int8 weights or another integrator cost against the data, not only against the f32 model.</p>");
}

/// The price of int8 weights and of the blob's integrator.
fn quantization_table(h: &mut Html<'_>, n: usize) {
    h.p("<h3>Quantization and integrator cost</h3>");
    let d = |f: &str| paths("devices", n, f);
    let dev = h.col(&d("export/max_state_deviation"), Quantity::Plain("-"));
    let mut drift_paths = d("export/energy_drift_reference");
    drift_paths.extend(d("export/energy_drift_exported"));
    let drift = h.col(&drift_paths, Quantity::Fraction);
    let failed = h.col(&d("export/failed_rollouts"), Quantity::Count);
    let mut iteration_paths = d("export/convergence/iterations_needed");
    iteration_paths.extend(d("export/convergence/max_iterations"));
    let iterations = h.col(&iteration_paths, Quantity::Count);
    let rows: Vec<Vec<String>> = (0..n)
        .map(|i| {
            let p = |f: &str| format!("devices/{i}/{f}");
            let iteration = |f: &str| {
                if h.has(&p("export/convergence")) {
                    h.val(&p(f), &iterations)
                } else {
                    missing(h, &p("export/convergence"), "explicit method")
                }
            };
            vec![
                h.num(&p("name")),
                h.val(&p("export/max_state_deviation"), &dev),
                h.val(&p("export/energy_drift_reference"), &drift),
                h.val(&p("export/energy_drift_exported"), &drift),
                h.val(&p("export/failed_rollouts"), &failed),
                iteration("export/convergence/iterations_needed"),
                iteration("export/convergence/max_iterations"),
            ]
        })
        .collect();
    let head = [
        "blob".to_string(),
        "max state deviation from the f32 model (normalization scales)".into(),
        format!("learned-energy drift, f32 model ({})", drift.unit()),
        format!("this blob ({})", drift.unit()),
        "failed check rollouts".into(),
        "iterations needed (training range)".into(),
        "iteration limit".into(),
    ];
    let head: Vec<&str> = head.iter().map(String::as_str).collect();
    h.table(&head, &rows);
    h.p("<p class=\"note\">Implicit methods (implicit midpoint, the discrete-gradient method): before a blob is written, its step is taken from the centre, the face centres, the corners of the training log's range per coordinate and seeded states inside it, a few steps each, and the largest iteration count those steps needed is shown beside the blob's limit; a limit below it is refused, naming the state. The step costs MAC at the limit, so a limit near the count needed is cheaper (<code>[[export]] max_iterations</code>).</p>");
}

/// Every verdict as used / limit / margin, and the budget's assumptions.
fn budget_section(h: &mut Html<'_>, report: &RunReport) {
    h.p("<h2 id=\"budget\">Budget</h2>");
    let rows: Vec<Vec<String>> = report
        .verdicts
        .iter()
        .enumerate()
        .map(|(i, v)| {
            let p = |f: &str| format!("verdicts/{i}/{f}");
            let q = if v.unit == "B" {
                Quantity::Si("B")
            } else {
                Quantity::Si("s")
            };
            let fmt = h.col(&[p("used"), p("limit"), p("margin")], q);
            let how = |f: &str| {
                if h.has(&p(f)) {
                    h.val_u(&p(f), &fmt)
                } else {
                    missing(h, &p(f), &esc(v.missing.as_deref().unwrap_or("")))
                }
            };
            let class = match v.verdict.as_str() {
                "pass" => "pass",
                "fail" => "fail",
                _ => "nm",
            };
            vec![
                h.num(&p("blob")),
                h.num(&p("resource")),
                how("used"),
                how("limit"),
                h.val_u(&p("margin"), &fmt),
                h.one(&p("margin_fraction"), Quantity::Fraction),
                format!("<span class=\"{class}\">{}</span>", h.num(&p("verdict"))),
            ]
        })
        .collect();
    h.table(
        &[
            "blob",
            "resource",
            "used",
            "limit",
            "margin",
            "margin (of limit)",
            "verdict",
        ],
        &rows,
    );
    let cpm = if report.budget.cycles_per_mac > 0.0 {
        "from <code>[device] cycles_per_mac</code>"
    } else {
        "the default, as <code>[device] cycles_per_mac</code> is not set; a Cortex-M4F-class figure, measure your board"
    };
    let clock = if report.budget.clock_hz > 0 {
        format!(
            " at a clock of {}",
            h.one("budget/clock_hz", Quantity::Si("Hz"))
        )
    } else {
        String::new()
    };
    h.p(&format!(
        "<p>Step time is estimated as multiply-accumulates per step &times; {} cycles per multiply-accumulate ({cpm}){clock}. Flash judges the blob plus the runtime's own flash; RAM the larger of the runtime's estimate and its measured stack plus static RAM. A limit of 0 in <code>[device]</code> is not judged.</p>",
        h.one("cycles_per_mac_used", Quantity::Plain("-")),
    ));
    for d in &report.devices {
        for a in &d.budget.advice {
            h.p(&format!(
                "<p class=\"fail\">{}: {}</p>",
                esc(&d.name),
                esc(a)
            ));
        }
    }
}

/// Tool, time, host, inputs with hashes, the effective settings and the
/// command that reproduces the run.
fn provenance_section(h: &mut Html<'_>, report: &RunReport) {
    h.p("<h2 id=\"provenance\">Provenance</h2>");
    h.table(
        &["", ""],
        &[
            vec!["tool".into(), h.num("provenance/tool")],
            vec!["created (UTC)".into(), h.num("provenance/created_utc")],
            vec!["host".into(), h.num("provenance/host")],
            vec![
                "reproduce with".into(),
                format!("<code>{}</code>", h.num("provenance/command")),
            ],
        ],
    );
    let n = report.provenance.inputs.len();
    let bytes = h.col(&paths("provenance/inputs", n, "bytes"), Quantity::Si("B"));
    let rows: Vec<Vec<String>> = (0..n)
        .map(|i| {
            let p = |f: &str| format!("provenance/inputs/{i}/{f}");
            vec![
                h.num(&p("role")),
                h.num(&p("file")),
                h.val(&p("bytes"), &bytes),
                format!("<!--hash-->{}", h.num(&p("sha256"))),
            ]
        })
        .collect();
    h.table(&["input", "file", "size (B)", "SHA-256"], &rows);
    h.out = h.out.replace("<td><!--hash-->", "<td class=\"hash\">");
    h.p("<p>Effective settings (visviva.toml with every default filled in):</p>");
    h.p(&format!("<pre>{}</pre>", h.num("provenance/settings")));
}

/// The caution again.
fn footer_section(h: &mut Html<'_>) {
    h.p("<p class=\"caution\">");
    let caution = h.num("caution");
    h.p(&format!("{caution}</p></body></html>"));
}
