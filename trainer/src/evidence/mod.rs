//! The evidence before deploying: the model against the baseline on held-out
//! logs, modes and damping, charts, and the report page.

pub mod charts;
pub mod check;
pub mod cv_filter;
pub mod fleet_report;
pub mod observer_check;
pub mod outliers;
pub mod report;
pub mod svgplot;
