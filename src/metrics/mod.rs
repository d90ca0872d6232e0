//! Image quality and rate–distortion metrics: PSNR, SSIM, MS-SSIM, BD-rate.

pub mod bd;
pub mod psnr;
pub mod ssim;

pub use psnr::{mse, psnr};
pub use ssim::{ms_ssim, ssim};
