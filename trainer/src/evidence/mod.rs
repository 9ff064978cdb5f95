//! The evidence before deploying: the model against the baseline on held-out
//! logs, modes and damping, charts, and the report: its data (`report`),
//! units, number formats, verdicts, provenance, the change against the
//! previous run, the model in words, and the page.

pub mod change;
pub mod charts;
pub mod check;
pub mod cv_filter;
pub mod describe;
pub mod fleet_report;
pub mod held_out;
pub mod horizons;
pub mod numfmt;
pub mod observer_check;
pub mod outliers;
pub mod page;
pub mod provenance;
pub mod report;
pub mod structure_fit;
pub mod svgplot;
pub mod units;
pub mod verdicts;
