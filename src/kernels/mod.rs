//! CPU kernels: the fixed-order path that must give the same bits everywhere.

pub mod fixed;
mod hyper_fixed;

pub use fixed::{FixedConv, SimdMode};
pub use hyper_fixed::{HyperSynthesisFixed, PriorParameters};
