//! The built-in reference systems with exactly known energy, and the
//! high-accuracy simulation that turns them into logs and checks.

pub mod simulate;
pub mod systems;
