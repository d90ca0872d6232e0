//! Distortion terms of the training objective: MSE on the 0–255 scale, or 1 − MS-SSIM.
//!
//! The MS-SSIM term is the differentiable twin of [`crate::metrics::ms_ssim`] (same window,
//! constants, exponents and 2×2 averaging; per channel, averaged), so training optimizes what
//! `kiln evaluate` reports. Crops too small for five scales use the scales that fit, with the
//! exponents renormalised, as the metric does.

use candle_core::{DType, Device, Result, Tensor};
use serde::{Deserialize, Serialize};

use crate::metrics::ssim::MS_SSIM_WEIGHTS;

/// What the training objective measures as distortion.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize, clap::ValueEnum)]
#[serde(rename_all = "kebab-case")]
pub enum Distortion {
    /// Mean squared error on the 0–255 scale (the default; matches PSNR).
    #[default]
    Mse,
    /// 1 − MS-SSIM.
    MsSsim,
}

/// λ multiplier for MS-SSIM: `1 − MS-SSIM` is about 1/2000 of MSE₂₅₅ at similar visual quality
/// on photographs (a rough equivalence, from memory of typical published operating points), so
/// the model's λ anchors keep their meaning.
pub const MS_SSIM_LAMBDA_SCALE: f64 = 2000.0;

impl Distortion {
    /// Per-sample distortion `(B,)` of `x_hat` against `x`, both `(B, 3, H, W)` in `[0, 1]`.
    pub fn per_sample(self, x_hat: &Tensor, x: &Tensor) -> Result<Tensor> {
        let b = x.dim(0)?;
        match self {
            Distortion::Mse => ((x_hat - x)? * 255.0)?.sqr()?.reshape((b, ()))?.mean(1),
            Distortion::MsSsim => 1.0 - ms_ssim_per_sample(&(x_hat * 255.0)?, &(x * 255.0)?)?,
        }
    }

    /// The factor applied to λ for this distortion.
    pub fn lambda_scale(self) -> f64 {
        match self {
            Distortion::Mse => 1.0,
            Distortion::MsSsim => MS_SSIM_LAMBDA_SCALE,
        }
    }
}

fn gaussian_kernels(dev: &Device) -> Result<(Tensor, Tensor)> {
    let w: Vec<f32> = (0..11)
        .map(|i| {
            let x = i as f64 - 5.0;
            (-0.5 * x * x / (1.5 * 1.5)).exp()
        })
        .collect::<Vec<f64>>()
        .iter()
        .map(|&v| v as f32)
        .collect();
    let s: f32 = w.iter().sum();
    let w: Vec<f32> = w.iter().map(|v| v / s).collect();
    Ok((Tensor::from_slice(&w, (1, 1, 1, 11), dev)?, Tensor::from_slice(&w, (1, 1, 11, 1), dev)?))
}

fn blur(x: &Tensor, k: &(Tensor, Tensor)) -> Result<Tensor> {
    x.conv2d(&k.0, 0, 1, 1, 1)?.conv2d(&k.1, 0, 1, 1, 1)
}

/// `(mean SSIM, mean contrast–structure)` per plane of `(N, 1, H, W)` planes on the 0–255 scale.
fn ssim_terms(a: &Tensor, b: &Tensor, k: &(Tensor, Tensor)) -> Result<(Tensor, Tensor)> {
    let (c1, c2) = ((0.01f64 * 255.0).powi(2), (0.03f64 * 255.0).powi(2));
    let (ma, mb) = (blur(a, k)?, blur(b, k)?);
    let va = (blur(&a.sqr()?, k)? - ma.sqr()?)?;
    let vb = (blur(&b.sqr()?, k)? - mb.sqr()?)?;
    let cov = (blur(&(a * b)?, k)? - (&ma * &mb)?)?;
    let cs = ((cov * 2.0)? + c2)?.div(&((va + vb)? + c2)?)?;
    let lum = (((&ma * &mb)? * 2.0)? + c1)?.div(&((ma.sqr()? + mb.sqr()?)? + c1)?)?;
    let n = a.dim(0)?;
    let s = (lum * &cs)?.reshape((n, ()))?.mean(1)?;
    Ok((s, cs.reshape((n, ()))?.mean(1)?))
}

/// MS-SSIM per sample of `(B, C, H, W)` images on the 0–255 scale.
pub fn ms_ssim_per_sample(x: &Tensor, y: &Tensor) -> Result<Tensor> {
    let (b, c, h, w) = x.dims4()?;
    let k = gaussian_kernels(x.device())?;
    let mut scales = 1;
    while scales < 5 && (h >> scales) >= 11 && (w >> scales) >= 11 {
        scales += 1;
    }
    let total: f64 = MS_SSIM_WEIGHTS[..scales].iter().sum();
    let mut a = x.reshape((b * c, 1, h, w))?;
    let mut bb = y.reshape((b * c, 1, h, w))?;
    let mut value = Tensor::ones(b * c, DType::F32, x.device())?;
    for (j, &wt) in MS_SSIM_WEIGHTS[..scales].iter().enumerate() {
        let (s, cs) = ssim_terms(&a, &bb, &k)?;
        let term = if j + 1 == scales { s } else { cs };
        value = (value * term.clamp(1e-6, 1.0)?.powf(wt / total)?)?;
        if j + 1 < scales {
            let (hh, ww) = (a.dim(2)? / 2 * 2, a.dim(3)? / 2 * 2);
            a = a.narrow(2, 0, hh)?.narrow(3, 0, ww)?.avg_pool2d(2)?;
            bb = bb.narrow(2, 0, hh)?.narrow(3, 0, ww)?.avg_pool2d(2)?;
        }
    }
    value.reshape((b, c))?.mean(1)
}
