//! The practitioner's report of `visviva run`: one serializable [`RunReport`]
//! (written as `report.json`) and its rendering as a self-contained HTML page
//! with inline SVG charts — no scripts, no network. Every quantity shows
//! its unit (`evidence::units`) in one number format per column
//! (`evidence::numfmt`); the sections are laid out in `evidence::page`.
//! Damped or driven
//! projects carry a [`PortReport`] (damping per mode, response to held-out
//! input sequences) instead of the conservative energy-drift check. Every number on the page
//! is printed through [`Html::num`], tagged with its JSON path, so a test can
//! prove the page shows exactly what `report.json` holds.

use serde::Serialize;
use serde_json::Value;

use crate::deploy::export::ExportReport;
use crate::evidence::check::{CheckReport, ModeDamping};
use crate::evidence::numfmt::{ColFmt, Quantity};
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
    /// The units of the log's columns and of energy.
    pub units: crate::evidence::units::Units,
    /// Input columns u1..um of the logs (0 for an undriven system).
    #[serde(skip_serializing_if = "is_zero")]
    pub inputs: usize,
    /// What reading a log through `[columns]` found (gaps, quantization,
    /// noise model, masses); absent for the canonical layout.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub rig: Option<crate::data::columns::RigSummary>,
    /// For joint rates without masses: how the momenta were formed from a
    /// learned mass matrix.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub momenta_from_rates: Option<crate::learn::inertia::InertiaSummary>,
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
    /// The blob itself on the held-out logs (`evidence::held_out`), beside
    /// the fitted model's figures in `check` or `port`.
    pub held_out: crate::evidence::held_out::HeldOut,
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
    /// State errors of model and baseline at the chosen horizons.
    pub horizons: Vec<crate::evidence::horizons::HorizonError>,
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
    /// Medians at each chosen horizon over the trajectories reaching it.
    pub horizons: Vec<crate::evidence::horizons::HorizonSummary>,
}

/// Everything `visviva run` found.
#[derive(Debug, Clone, Serialize)]
pub struct RunReport {
    /// Project name.
    pub project: String,
    /// Visviva version.
    pub visviva_version: String,
    /// Model architecture (compact label).
    pub architecture: String,
    /// The model in plain words.
    pub model_description: String,
    /// Data.
    pub data: DataSummary,
    /// How the model was fitted (derivative or trajectory matching) and why.
    pub fit_mode: String,
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
    /// Cycles per multiply-accumulate the step-time estimate used (the
    /// budget's, or the default when it is not set).
    pub cycles_per_mac_used: f64,
    /// Every blob's flash, RAM and step time as used / limit / margin.
    pub verdicts: Vec<crate::evidence::verdicts::ResourceVerdict>,
    /// All blobs pass the budget.
    pub budget_pass: bool,
    /// The energy structure underfits the plain baseline by a clear
    /// margin (`evidence::structure_fit`), with the structure to try.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub underfit: Option<crate::evidence::structure_fit::Underfit>,
    /// With `arch = "auto"`: each candidate structure's held-out state
    /// error after the short fit, and the one chosen.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub structure_choice: Option<crate::learn::auto::Selection>,
    /// The state observer (projects with an `[observer]` section).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub observer: Option<crate::evidence::observer_check::ObserverReport>,
    /// What produced this report.
    pub provenance: crate::evidence::provenance::Provenance,
    /// Key figures against the previous run's report, when there was one.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub change: Option<crate::evidence::change::Change>,
    /// The safety caution.
    pub caution: String,
}

pub use crate::evidence::page::render_html;

/// The plain formatting of a JSON value (strings, counts, booleans), shared
/// by the pages and their consistency tests; quantities go through
/// [`Html::val`] with their column's format.
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

/// Escape text for HTML.
pub fn esc(s: &str) -> String {
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

    /// A value from the report, tagged with its path, plainly formatted.
    pub fn num(&self, path: &str) -> String {
        let v = lookup(self.json, path).cloned().unwrap_or(Value::Null);
        format!(r#"<span data-k="{path}">{}</span>"#, esc(&fmt_num(&v)))
    }

    /// The numbers at `paths` (those that are numbers).
    pub fn values(&self, paths: &[String]) -> Vec<f64> {
        paths
            .iter()
            .filter_map(|p| lookup(self.json, p).and_then(Value::as_f64))
            .collect()
    }

    /// One format for the column of values at `paths`.
    pub fn col(&self, paths: &[String], q: Quantity<'_>) -> ColFmt {
        ColFmt::choose(&self.values(paths), q)
    }

    /// A number in its column's format, tagged with its path and the
    /// factor the shown digits carry (`data-x`); strings and nulls as
    /// [`Html::num`].
    pub fn val(&self, path: &str, f: &ColFmt) -> String {
        match lookup(self.json, path).and_then(Value::as_f64) {
            Some(x) => format!(
                r#"<span data-k="{path}" data-x="{}">{}</span>"#,
                f.factor_text(),
                f.text(x)
            ),
            None => self.num(path),
        }
    }

    /// [`Html::val`] followed by the unit (none for counts and pure numbers).
    pub fn val_u(&self, path: &str, f: &ColFmt) -> String {
        let unit = f.unit();
        let known = lookup(self.json, path).is_some_and(Value::is_number);
        if unit.is_empty() || unit == crate::evidence::units::UNITLESS || !known {
            self.val(path, f)
        } else {
            format!("{}&nbsp;{}", self.val(path, f), esc(unit))
        }
    }

    /// A single number with its own format.
    pub fn one(&self, path: &str, q: Quantity<'_>) -> String {
        let f = self.col(&[path.to_string()], q);
        self.val_u(path, &f)
    }

    /// Whether the value at `path` is present and not null.
    pub fn has(&self, path: &str) -> bool {
        lookup(self.json, path).is_some_and(|v| !v.is_null())
    }

    /// Append a line.
    pub fn p(&mut self, s: &str) {
        self.out.push_str(s);
        self.out.push('\n');
    }

    /// A table: header cells (HTML), then rows of cell HTML. A row whose
    /// first cell starts with `<!--sum-->` is a summary row.
    pub fn table(&mut self, head: &[&str], rows: &[Vec<String>]) {
        let mut t = String::from("<table>");
        if head.iter().any(|c| !c.is_empty()) {
            t.push_str("<thead><tr>");
            for c in head {
                t.push_str(&format!("<th>{c}</th>"));
            }
            t.push_str("</tr></thead>");
        }
        t.push_str("<tbody>");
        for r in rows {
            let sum = r.first().is_some_and(|c| c.starts_with("<!--sum-->"));
            t.push_str(if sum { "<tr class=\"sum\">" } else { "<tr>" });
            for c in r {
                t.push_str(&format!("<td>{c}</td>"));
            }
            t.push_str("</tr>");
        }
        t.push_str("</tbody></table>");
        self.p(&t);
    }
}
