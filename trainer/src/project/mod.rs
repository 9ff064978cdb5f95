//! A rig described once: the project file and the pipeline of stages that
//! `visviva run` and the single-stage commands share.

pub mod cache;
pub mod file;
pub mod fleet;
pub mod pipeline;
pub mod stale;
pub mod validate;
