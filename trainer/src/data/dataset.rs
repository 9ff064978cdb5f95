//! In-memory trajectories: the one data type every trainer stage shares.
//!
//! States are x = (q1..qn, p1..pn) in SI units, one row per sample; `dx` holds
//! the time derivatives dx/dt, either read from the log or estimated; `u`
//! holds the inputs u1..um of a driven system (m = 0 columns for a
//! conservative or merely damped log), so every stage sees one data type.

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
    /// Inputs u1..um in the log's own units (e.g. N m of motor torque),
    /// shape (samples, m); m = 0 without inputs.
    pub u: Array2<f64>,
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
    /// Number of inputs m (0 for a log without `u` columns).
    pub inputs: usize,
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

    /// Whether the trajectories carry inputs u1..um.
    pub fn driven(&self) -> bool {
        self.inputs > 0
    }

    /// The same trajectories with their inputs dropped (m = 0).
    pub fn without_inputs(&self) -> Self {
        Self {
            inputs: 0,
            trajectories: self
                .trajectories
                .iter()
                .map(|t| Trajectory {
                    u: Array2::zeros((t.t.len(), 0)),
                    ..t.clone()
                })
                .collect(),
            ..self.clone()
        }
    }
}
