//! CPU kernels: fast im2col + gemm convolution ([`conv`]) for training and the transforms, and
//! the fixed-order path ([`fixed`]) that must give the same bits everywhere.

pub mod context_fixed;
pub mod conv;
mod few_inputs;
pub mod fixed;
pub mod fused_conv;
pub mod fused_gdn;
mod hyper_fixed;
pub mod int_synthesis;
mod narrow_conv;
pub mod pixel_shuffle;
mod winograd;

pub use context_fixed::CheckerboardFixed;
pub use fixed::{FixedConv, Positions, SimdMode};
pub use hyper_fixed::{HyperSynthesisFixed, PriorParameters};
pub use int_synthesis::{IntPath, IntSynthesis};
