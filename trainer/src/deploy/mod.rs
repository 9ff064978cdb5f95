//! From a fitted model to a device: blob building and its owned mirror,
//! export with its measured cost, the convergence proof of implicit steps
//! and the verdict on whether it can be trusted, host rollouts through the
//! runtime.

pub mod blob;
pub mod budget;
pub mod compare;
pub mod convergence;
pub mod envelope;
pub mod export;
pub mod fitted_blob;
pub mod footprint;
pub mod inspect;
pub mod integrator;
pub mod model_log;
pub mod observe;
pub mod observer_settings;
pub mod observer_tuning;
pub mod rollout;
pub mod verdict;
