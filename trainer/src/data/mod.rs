//! Motion logs in and out: the in-memory trajectories every stage shares,
//! CSV loading with located errors, splitting, and derivative estimation.

pub mod columns;
pub mod dataset;
pub mod derivative;
pub mod log;
pub mod measure_log;
pub mod rates;
