//! Learning: the networks, the energy model and its port terms, the plain
//! baseline, the optimizer and the training loop.

pub mod activation;
pub mod auto;
pub mod fit;
pub mod hnn;
pub mod inertia;
pub mod inertia_loss;
pub mod mechanical;
pub mod mode;
pub mod net;
pub mod optim;
pub mod pool;
pub mod port;
pub mod product;
pub mod qat;
pub mod rollout_loss;
pub(crate) mod rows;
pub mod stage;
pub mod structure;
pub mod trajectory;
