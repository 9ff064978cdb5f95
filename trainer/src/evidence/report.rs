//! The practitioner's report of `visviva run`: one serializable [`RunReport`]
//! (written as `report.json`) and its rendering as a self-contained HTML page
//! with inline SVG charts — no scripts, no network. Damped or driven
//! projects carry a [`PortReport`] (damping per mode, response to held-out
//! input sequences) instead of the conservative energy-drift check. Every number on the page
//! is printed through [`Html::num`], tagged with its JSON path, so a test can
//! prove the page shows exactly what `report.json` holds.

use serde::Serialize;
use serde_json::Value;

use crate::deploy::export::ExportReport;
use crate::evidence::check::{CheckReport, ModeDamping};
use crate::project::file::DeviceBudget;

/// Per-coordinate data summary.
#[derive(Debug, Clone, Serialize)]
pub struct CoordinateSummary {
    /// Column name (q1, p1, ...).
    pub name: String,
    /// Smallest value.
    pub min: f64,
    /// Largest value.
    pub max: f64,
    /// Root mean square.
    pub rms: f64,
    /// Estimated measurement noise (standard deviation).
    pub noise: f64,
}

/// What the data looked like.
#[derive(Debug, Clone, Serialize)]
pub struct DataSummary {
    /// Training log path as given in visviva.toml.
    pub train_file: String,
    /// Degrees of freedom.
    pub dof: usize,
    /// Training trajectories.
    pub train_trajectories: usize,
    /// Training samples.
    pub train_samples: usize,
    /// Validation trajectories.
    pub validation_trajectories: usize,
    /// Validation samples.
    pub validation_samples: usize,
    /// Median sampling interval (s).
    pub sample_interval_s: f64,
    /// "given" or "estimated (Savitzky-Golay)".
    pub derivatives: String,
    /// Per coordinate.
    pub coordinates: Vec<CoordinateSummary>,
    /// Input columns u1..um of the logs (0 for an undriven system).
    #[serde(skip_serializing_if = "is_zero")]
    pub inputs: usize,
}

fn is_zero(v: &usize) -> bool {
    *v == 0
}

/// One fitting run.
#[derive(Debug, Clone, Serialize, serde::Deserialize)]
pub struct FitSummary {
    /// Learned parameters.
    pub parameters: usize,
    /// Optimizer steps.
    pub steps: usize,
    /// Best validation loss.
    pub best_validation_loss: f64,
    /// Epoch of the kept parameters (1-based).
    pub best_epoch: usize,
    /// Why it stopped.
    pub stop: String,
    /// Wall time (s).
    pub seconds: f64,
    /// Throughput.
    pub samples_per_second: f64,
    /// Training loss per epoch.
    pub train_loss: Vec<f64>,
    /// Validation loss per epoch.
    pub validation_loss: Vec<f64>,
    /// Whether this run was reused from a previous `visviva run`.
    pub reused: bool,
}

/// Pass/fail of one blob against the device budget.
#[derive(Debug, Clone, Serialize)]
pub struct BudgetVerdict {
    /// Flash judged: the blob plus the runtime's measured flash.
    pub flash_needed_bytes: u64,
    /// RAM judged: the larger of the estimate and the runtime's measured
    /// stack plus static RAM.
    pub ram_needed_bytes: u64,
    /// Blob plus runtime fit the flash budget (None when not set).
    pub flash_ok: Option<bool>,
    /// Runtime RAM fits (None when not set).
    pub ram_ok: Option<bool>,
    /// Estimated step time (s) from MAC/step x cycles per MAC / clock.
    pub step_time_s: Option<f64>,
    /// Step fits the control period (None when not set).
    pub time_ok: Option<bool>,
    /// Overall.
    pub pass: bool,
    /// What to change when it fails.
    pub advice: Vec<String>,
}

/// One device blob.
#[derive(Debug, Clone, Serialize)]
pub struct DeviceBlob {
    /// Target name.
    pub name: String,
    /// File in out/.
    pub file: String,
    /// Export measurements.
    pub export: ExportReport,
    /// Runtime RAM estimate (bytes).
    pub ram_bytes: usize,
    /// The runtime's own measured flash and stack for this blob's
    /// configuration (`deploy::footprint`), None when not measured.
    pub runtime: Option<crate::deploy::footprint::RuntimeFootprint>,
    /// Emulator instructions per step, from the last device check, if run.
    pub emulator_instructions_per_step: Option<f64>,
    /// Golden rollout files for the device check.
    pub golden: Vec<String>,
    /// The input sequence the golden rollouts replay (driven models), CSV
    /// `t,u1..um`, row k held over step k.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub golden_inputs: Option<String>,
    /// Budget verdict.
    pub budget: BudgetVerdict,
}

/// One held-out trajectory driven by its logged inputs: model and baseline.
#[derive(Debug, Clone, Serialize)]
pub struct DrivenComparison {
    /// Trajectory id.
    pub id: String,
    /// Samples (the rollout takes one step fewer).
    pub samples: usize,
    /// State error of the model's rollout (each coordinate's RMS error over
    /// its RMS, averaged in square).
    pub model_state_rel_rmse: f64,
    /// The same for the baseline (RK4, input held over each step).
    pub baseline_state_rel_rmse: Option<f64>,
    /// Why the model's rollout stopped early.
    pub model_failure: Option<String>,
    /// Why the baseline's rollout stopped early.
    pub baseline_failure: Option<String>,
}

/// The evidence of `visviva run`, one kind per model kind.
#[derive(Debug, Clone, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Evidence {
    /// Model vs baseline on the validation trajectories, energy drift over a
    /// long horizon (conservative models).
    Check(CheckReport),
    /// Damping per mode and driven response (damped or driven models).
    Port(PortReport),
}

/// What `visviva run` found for a damped or driven model.
#[derive(Debug, Clone, Serialize)]
pub struct PortReport {
    /// Inputs u1..um the model takes.
    pub inputs: usize,
    /// Whether a dissipation R = L L^T was learned.
    pub dissipation: bool,
    /// The model's rest state (unforced field zero), q then p.
    pub rest: Vec<f64>,
    /// Largest |f(rest)| over the RMS rates of the data.
    pub rest_residual: f64,
    /// Learned damping per mode of the linearization at rest.
    pub modes: Vec<ModeDamping>,
    /// The reference system's modes at rest (simulated data only).
    pub reference_modes: Option<Vec<ModeDamping>>,
    /// Per held-out trajectory.
    pub driven: Vec<DrivenComparison>,
    /// Median over trajectories of the model's state error.
    pub median_model_state_rel_rmse: f64,
    /// Median over trajectories of the baseline's state error.
    pub median_baseline_state_rel_rmse: Option<f64>,
    /// Golden rollouts' input sequence: which held-out trajectory's inputs.
    pub golden_input_trajectory: String,
}

/// Everything `visviva run` found.
#[derive(Debug, Clone, Serialize)]
pub struct RunReport {
    /// Project name.
    pub project: String,
    /// Visviva version.
    pub visviva_version: String,
    /// Model architecture.
    pub architecture: String,
    /// Data.
    pub data: DataSummary,
    /// The energy model's fit.
    pub fit: FitSummary,
    /// The baseline's fit.
    pub baseline_fit: Option<FitSummary>,
    /// The evidence: under `check` for a conservative model, under `port`
    /// for a damped or driven one.
    #[serde(flatten)]
    pub evidence: Evidence,
    /// Device blobs.
    pub devices: Vec<DeviceBlob>,
    /// The budget judged against.
    pub budget: DeviceBudget,
    /// All blobs pass the budget.
    pub budget_pass: bool,
    /// The state observer (projects with an `[observer]` section).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub observer: Option<crate::evidence::observer_check::ObserverReport>,
    /// The safety caution.
    pub caution: String,
}

/// The one formatting of numbers shared by the page and the consistency test.
pub fn fmt_num(v: &Value) -> String {
    match v {
        Value::Number(n) => {
            if let Some(i) = n.as_i64() {
                i.to_string()
            } else if let Some(u) = n.as_u64() {
                u.to_string()
            } else {
                let f = n.as_f64().unwrap_or(f64::NAN);
                if f != 0.0 && (f.abs() < 1e-2 || f.abs() >= 1e5) {
                    format!("{f:.3e}")
                } else {
                    format!("{f:.4}")
                }
            }
        }
        Value::Null => "-".into(),
        Value::Bool(b) => if *b { "yes" } else { "no" }.into(),
        Value::String(s) => s.clone(),
        other => other.to_string(),
    }
}

/// Look up a `/`-separated path in JSON.
pub fn lookup<'v>(root: &'v Value, path: &str) -> Option<&'v Value> {
    root.pointer(&format!("/{path}"))
}

/// HTML builder that tags every number with its JSON path.
pub struct Html<'a> {
    json: &'a Value,
    /// The page so far.
    pub out: String,
}

fn esc(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
}

impl<'a> Html<'a> {
    /// A builder over `json` (the report's own JSON text, parsed back).
    pub fn new(json: &'a Value) -> Self {
        Self {
            json,
            out: String::new(),
        }
    }

    /// A value from the report, tagged with its path.
    pub fn num(&self, path: &str) -> String {
        let v = lookup(self.json, path).cloned().unwrap_or(Value::Null);
        format!(r#"<span data-k="{path}">{}</span>"#, esc(&fmt_num(&v)))
    }

    fn p(&mut self, s: &str) {
        self.out.push_str(s);
        self.out.push('\n');
    }
}

const STYLE: &str = "body{font-family:sans-serif;max-width:980px;margin:2em auto;padding:0 1em;color:#111;line-height:1.4}\
table{border-collapse:collapse;margin:.6em 0}td,th{border:1px solid #bbb;padding:.25em .6em;text-align:right}\
th{background:#f0f0f0}td:first-child,th:first-child{text-align:left}.caution{border:2px solid #D55E00;padding:.6em 1em;background:#fff6ef}\
.pass{color:#006b3c;font-weight:bold}.fail{color:#b00020;font-weight:bold}figure{margin:1em 0}figcaption{font-size:.9em;color:#333}\
.note{font-size:.9em;color:#333}";

/// Render the page. `charts` are (caption, svg) pairs.
pub fn render_html(report: &RunReport, charts: &[(String, String)]) -> String {
    // Render from the JSON text exactly as report.json holds it (an f32
    // converted in memory reads 0.009999999776 where the file says 0.01).
    let json = serde_json::to_string(report)
        .ok()
        .and_then(|t| serde_json::from_str::<Value>(&t).ok())
        .unwrap_or(Value::Null);
    let mut h = Html {
        json: &json,
        out: String::new(),
    };
    header_section(&mut h, report);
    data_section(&mut h, report);
    fit_section(&mut h, report);
    match &report.evidence {
        Evidence::Check(check) => conservative_section(&mut h, check, charts),
        Evidence::Port(port) => port_section(&mut h, port, charts),
    }
    device_section(&mut h, report);
    observer_section(&mut h, report);
    footer_section(&mut h, report);
    h.out
}

/// The state observer on the validation log fed with noisy positions only
/// (nothing without an `[observer]` section).
fn observer_section(h: &mut Html<'_>, report: &RunReport) {
    let Some(o) = &report.observer else {
        return;
    };
    h.p("<h2 id=\"observer\">State observer</h2>");
    h.p(&format!(
        "<p>Settings tuned from the training and validation logs and written to <code>out/{}</code> (window {} updates, false-alarm rate {}, process-noise scale {}). The validation log is fed with its positions only, topped up with Gaussian noise to the tuned noise level; velocities are compared with {}, positions with the log's q (a noisy log's own noise is in that reference); the first 20 samples of each trajectory are left out. Baselines: central finite differences and the constant-velocity Kalman filter (Bar-Shalom, Li and Kirubarajan, 2001; its intensity the best of a grid on the training log).</p>",
        esc(&o.settings_file),
        h.num("observer/window"),
        esc(&o.false_alarm),
        h.num("observer/process_scale"),
        esc(&o.velocity_reference)
    ));
    h.p("<table><tr><th>coordinate</th><th>tuned noise (std)</th><th>added noise (std)</th><th>velocity error, observer</th><th>finite differences</th><th>constant-velocity filter</th><th>position error, observer</th><th>measured positions</th></tr>");
    for i in 0..o.velocity_rmse_observer.len() {
        let c = |k: &str| h.num(&format!("observer/{k}/{i}"));
        h.p(&format!(
            "<tr><td>q{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
            i + 1,
            c("position_noise"),
            c("added_noise"),
            c("velocity_rmse_observer"),
            c("velocity_rmse_finite_differences"),
            c("velocity_rmse_cv_filter"),
            c("position_rmse_observer"),
            c("position_rmse_measured")
        ));
    }
    h.p(&format!(
        "</table><p>Health monitor on this healthy log: {} upper flags (false alarms) and {} lower flags in {} full windows. The flags are plain values; nothing stops stepping, and they are no safety function.</p>",
        h.num("observer/upper_flags"),
        h.num("observer/lower_flags"),
        h.num("observer/full_windows")
    ));
}

/// Title, caution and the one-line verdict.
fn header_section(h: &mut Html<'_>, report: &RunReport) {
    h.p("<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\">");
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
    h.p(&format!(
        "<p>Model: {}. Device budget: {verdict} (details in <a href=\"#device\">Device blobs</a>).</p>",
        h.num("architecture")
    ));
}

/// What the logs hold, per coordinate.
fn data_section(h: &mut Html<'_>, report: &RunReport) {
    h.p("<h2>Data</h2>");
    let rows = [
        ("training log", "data/train_file"),
        ("degrees of freedom", "data/dof"),
        ("training trajectories", "data/train_trajectories"),
        ("training samples", "data/train_samples"),
        ("validation trajectories", "data/validation_trajectories"),
        ("validation samples", "data/validation_samples"),
        ("sampling interval (s)", "data/sample_interval_s"),
        ("time derivatives", "data/derivatives"),
    ];
    let rows: Vec<(&str, &str)> = rows
        .into_iter()
        .chain((report.data.inputs > 0).then_some(("input columns (u1..um)", "data/inputs")))
        .collect();
    h.p("<table>");
    for (k, path) in rows {
        let cell = h.num(path);
        h.p(&format!("<tr><td>{k}</td><td>{cell}</td></tr>"));
    }
    h.p("</table><table><tr><th>coordinate</th><th>min</th><th>max</th><th>RMS</th><th>estimated noise (std)</th></tr>");
    for i in 0..report.data.coordinates.len() {
        let c = |f: &str| h.num(&format!("data/coordinates/{i}/{f}"));
        let row = format!(
            "<tr><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
            c("name"),
            c("min"),
            c("max"),
            c("rms"),
            c("noise")
        );
        h.p(&row);
    }
    h.p("</table><p class=\"note\">Noise is estimated from second differences of each coordinate (for white noise of standard deviation s, the second difference has variance 6 s<sup>2</sup>; smooth motion adds little when sampled finely).</p>");
}

/// The energy model's and the baseline's fits side by side.
fn fit_section(h: &mut Html<'_>, report: &RunReport) {
    h.p("<h2>Fit</h2><table><tr><th></th><th>energy model</th><th>baseline</th></tr>");
    for (k, f) in [
        ("parameters", "parameters"),
        ("optimizer steps", "steps"),
        ("best validation loss", "best_validation_loss"),
        ("best epoch", "best_epoch"),
        ("stopped because", "stop"),
        ("wall time (s)", "seconds"),
        ("samples/s", "samples_per_second"),
        ("reused from the last run", "reused"),
    ] {
        let a = h.num(&format!("fit/{f}"));
        let b = if report.baseline_fit.is_some() {
            h.num(&format!("baseline_fit/{f}"))
        } else {
            "-".into()
        };
        h.p(&format!("<tr><td>{k}</td><td>{a}</td><td>{b}</td></tr>"));
    }
    h.p("</table>");
}

/// Device blobs: size, cost, budget and the price of quantization.
fn device_section(h: &mut Html<'_>, report: &RunReport) {
    h.p("<h2 id=\"device\">Device blobs</h2><table><tr><th>blob</th><th>weights</th><th>integrator</th><th>dt (s)</th><th>bytes</th><th>bytes/parameter</th><th>runtime flash (bytes)</th><th>flash, blob + runtime</th><th>runtime stack (bytes)</th><th>runtime RAM (bytes)</th><th>MAC/step</th><th>emulator instructions/step</th><th>est. step time (s)</th><th>budget</th></tr>");
    for i in 0..report.devices.len() {
        let d = |f: &str| h.num(&format!("devices/{i}/{f}"));
        let pass = if report.devices[i].budget.pass {
            "<span class=\"pass\">pass</span>"
        } else {
            "<span class=\"fail\">fail</span>"
        };
        let row = format!(
            "<tr><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{pass}</td></tr>",
            d("name"),
            d("export/weights"),
            d("export/integrator"),
            d("export/dt"),
            d("export/bytes"),
            d("export/bytes_per_parameter"),
            d("runtime/flash_bytes"),
            d("budget/flash_needed_bytes"),
            d("runtime/stack_bytes"),
            d("ram_bytes"),
            d("export/macs_per_step"),
            d("emulator_instructions_per_step"),
            d("budget/step_time_s"),
        );
        h.p(&row);
    }
    h.p("</table><h3>Quantization and integrator cost</h3><table><tr><th>blob</th><th>max state deviation from the f32 model (normalization scales)</th><th>learned-energy drift, f32 model</th><th>this blob</th><th>failed check rollouts</th></tr>");
    for i in 0..report.devices.len() {
        let d = |f: &str| h.num(&format!("devices/{i}/{f}"));
        let row = format!(
            "<tr><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
            d("name"),
            d("export/max_state_deviation"),
            d("export/energy_drift_reference"),
            d("export/energy_drift_exported"),
            d("export/failed_rollouts"),
        );
        h.p(&row);
    }
    h.p("</table>");
    h.p(&format!(
        "<p>Budget: flash {} bytes, RAM {} bytes, clock {} Hz, control period {} s, {} cycles per multiply-accumulate assumed (0 = not set). Emulator instructions are counted by QEMU and are not cycles; measure on the board.</p>",
        h.num("budget/flash_bytes"),
        h.num("budget/ram_bytes"),
        h.num("budget/clock_hz"),
        h.num("budget/control_period_s"),
        h.num("budget/cycles_per_mac"),
    ));
    h.p(&format!(
        "<p class=\"note\">Runtime flash and stack: {} The budget judges the blob plus the runtime's flash, and the larger of the RAM estimate and the runtime's stack plus static RAM.</p>",
        esc(crate::deploy::footprint::SOURCE)
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

/// The caution again and the tool version.
fn footer_section(h: &mut Html<'_>, report: &RunReport) {
    h.p(&format!(
        "<p class=\"caution\">{}</p>",
        esc(&report.caution)
    ));
    h.p(&format!(
        "<p class=\"note\">Visviva {}.</p></body></html>",
        h.num("visviva_version")
    ));
}

/// The conservative model's check: drift, state and vector-field error
/// against the baseline.
fn conservative_section(h: &mut Html<'_>, check: &CheckReport, charts: &[(String, String)]) {
    // Check.
    let energy = if check.system.is_some() {
        "true-energy drift"
    } else {
        "learned-energy drift"
    };
    let ek = if check.system.is_some() {
        "true_energy_drift"
    } else {
        "learned_energy_drift"
    };
    h.p("<h2>Energy model versus plain baseline</h2>");
    h.p(&format!("<p>Each validation trajectory is rolled out from its first state: the energy model with its integrator ({}), the baseline (a plain network of the same size predicting dx/dt directly) with RK4. Errors are relative (RMS error over RMS value). Energy drift is max |H(t) - H(0)| / |H(0)| over the long horizon{}.</p>",
        h.num("check/integrator"),
        if check.system.is_some() { " of the true energy of the reference system" } else { " of the learned energy, over its spread on the data" }));
    h.p(&format!("<table><tr><th>trajectory</th><th>vector-field error, model</th><th>baseline</th><th>state error, model</th><th>baseline</th><th>{energy}, model</th><th>baseline</th></tr>"));
    for i in 0..check.trajectories.len() {
        let t = |f: &str| h.num(&format!("check/trajectories/{i}/{f}"));
        let row = format!(
            "<tr><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
            t("id"),
            t("model/vector_field_rel_rmse"),
            t("baseline/vector_field_rel_rmse"),
            t("model/state_rel_rmse"),
            t("baseline/state_rel_rmse"),
            t(&format!("model/{ek}")),
            t(&format!("baseline/{ek}")),
        );
        h.p(&row);
    }
    let m = |f: &str| h.num(&format!("check/median_model/{f}"));
    let b = |f: &str| h.num(&format!("check/median_baseline/{f}"));
    let row = format!(
        "<tr><th>median</th><th>{}</th><th>{}</th><th>{}</th><th>{}</th><th>{}</th><th>{}</th></tr></table>",
        m("vector_field_rel_rmse"),
        b("vector_field_rel_rmse"),
        m("state_rel_rmse"),
        b("state_rel_rmse"),
        m(ek),
        b(ek)
    );
    h.p(&row);
    h.p("<p class=\"note\">How to read it: the energy model should match or beat the baseline on vector-field and state error, and its energy drift should stay small and bounded while the baseline's grows. A large state error with a small energy drift usually means a phase error (slightly wrong frequency), which grows linearly with time.</p>");
    for (caption, svg) in charts {
        h.p(&format!(
            "<figure>{svg}<figcaption>{}</figcaption></figure>",
            esc(caption)
        ));
    }
}

/// A damped or driven model's check: learned damping per mode and the
/// response to held-out input sequences, model against baseline.
fn port_section(h: &mut Html<'_>, port: &PortReport, charts: &[(String, String)]) {
    h.p("<h2>Damping per mode</h2>");
    h.p(&format!(
        "<p>The learned field dx/dt = (J - R) dH/dx + G u ({} input(s), dissipation learned: {}) is linearized at its rest state (u = 0; largest residual {} of the RMS rates) and its eigenvalues give each mode's undamped natural frequency |&lambda;| / 2&pi; and damping ratio -Re &lambda; / |&lambda;| (1 for a real, decaying mode; rigid-body modes with &lambda; = 0 are left out).</p>",
        h.num("port/inputs"),
        h.num("port/dissipation"),
        h.num("port/rest_residual"),
    ));
    let reference = port.reference_modes.as_ref();
    h.p(&format!(
        "<table><tr><th>mode</th><th>natural frequency (Hz)</th><th>damping ratio</th><th>Re &lambda; (1/s)</th><th>Im &lambda; (rad/s)</th>{}</tr>",
        if reference.is_some() {
            "<th>reference system: natural frequency (Hz)</th><th>damping ratio</th>"
        } else {
            ""
        }
    ));
    for i in 0..port.modes.len() {
        let m = |f: &str| h.num(&format!("port/modes/{i}/{f}"));
        let mut row = format!(
            "<tr><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td>",
            i + 1,
            m("natural_hz"),
            m("damping_ratio"),
            m("real"),
            m("imag")
        );
        if let Some(r) = reference {
            if i < r.len() {
                row.push_str(&format!(
                    "<td>{}</td><td>{}</td>",
                    h.num(&format!("port/reference_modes/{i}/natural_hz")),
                    h.num(&format!("port/reference_modes/{i}/damping_ratio"))
                ));
            } else {
                row.push_str("<td>-</td><td>-</td>");
            }
        }
        row.push_str("</tr>");
        h.p(&row);
    }
    h.p("</table>");
    if reference.is_some() {
        h.p("<p class=\"note\">Reference modes: the built-in system the data were simulated from, linearized at rest with its exact R and energy; modes are matched by rank of natural frequency.</p>");
    }
    h.p("<h2>Response to held-out input sequences</h2>");
    h.p("<p>Each validation trajectory is rolled out from its first state with its own logged inputs (input row k held over step k): the model with its integrator, the baseline (a plain network of the same hidden sizes taking state and input, predicting dx/dt) with RK4. Error: each coordinate's RMS error over its RMS, averaged in square.</p>");
    h.p("<table><tr><th>trajectory</th><th>samples</th><th>state error, model</th><th>baseline</th></tr>");
    for i in 0..port.driven.len() {
        let t = |f: &str| h.num(&format!("port/driven/{i}/{f}"));
        let row = format!(
            "<tr><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
            t("id"),
            t("samples"),
            t("model_state_rel_rmse"),
            t("baseline_state_rel_rmse")
        );
        h.p(&row);
    }
    let row = format!(
        "<tr><th>median</th><th></th><th>{}</th><th>{}</th></tr></table>",
        h.num("port/median_model_state_rel_rmse"),
        h.num("port/median_baseline_state_rel_rmse")
    );
    h.p(&row);
    for (i, d) in port.driven.iter().enumerate() {
        for (who, f) in [
            ("model", &d.model_failure),
            ("baseline", &d.baseline_failure),
        ] {
            if f.is_some() {
                let field = if who == "model" {
                    "model_failure"
                } else {
                    "baseline_failure"
                };
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
    for (caption, svg) in charts {
        h.p(&format!(
            "<figure>{svg}<figcaption>{}</figcaption></figure>",
            esc(caption)
        ));
    }
}
