//! Image quality metrics.

pub mod psnr;

pub use psnr::{mse, psnr};
