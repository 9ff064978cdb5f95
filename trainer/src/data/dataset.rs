//! In-memory trajectories: the one data type every trainer stage shares.
//!
//! States are x = (q1..qn, p1..pn) in SI units, one row per sample; `dx` holds
//! the time derivatives dx/dt, either read from the log or estimated.

use ndarray::Array2;

/// One logged or simulated trajectory.
#[derive(Debug, Clone, PartialEq)]
pub struct Trajectory {
    /// The trajectory's id as written in the `traj` column.
    pub id: String,
    /// Sample times in seconds, strictly increasing.
    pub t: Vec<f64>,
    /// States, shape (samples, 2n).
    pub x: Array2<f64>,
    /// Time derivatives of the states, shape (samples, 2n).
    pub dx: Array2<f64>,
}

/// How the derivatives in a [`Dataset`] were obtained.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum DerivativeSource {
    /// Read from `dq*`/`dp*` columns (or exact, from a simulation).
    Given,
    /// Estimated from the time series by the trainer.
    Estimated,
}

/// A set of trajectories of one system.
#[derive(Debug, Clone, PartialEq)]
pub struct Dataset {
    /// Degrees of freedom n.
    pub dof: usize,
    /// The trajectories.
    pub trajectories: Vec<Trajectory>,
    /// Where the derivatives came from.
    pub derivatives: DerivativeSource,
}

impl Dataset {
    /// Total number of samples.
    pub fn samples(&self) -> usize {
        self.trajectories.iter().map(|t| t.t.len()).sum()
    }
}

/// Inputs u1..um of a driven system, one array per trajectory of the
/// [`Dataset`] they belong to (same order), each of shape (samples, m), in
/// the log's own units (e.g. N m of motor torque). Kept beside the dataset
/// rather than inside [`Trajectory`] so conservative data keeps its exact
/// type and layout.
#[derive(Debug, Clone, PartialEq)]
pub struct Inputs {
    /// Number of inputs m.
    pub count: usize,
    /// Per trajectory, shape (samples, m).
    pub per_trajectory: Vec<Array2<f64>>,
}

impl Inputs {
    /// Inputs of the trajectories whose indices are listed, in that order.
    pub fn select(&self, indices: &[usize]) -> Self {
        Self {
            count: self.count,
            per_trajectory: indices
                .iter()
                .map(|&i| self.per_trajectory[i].clone())
                .collect(),
        }
    }
}
