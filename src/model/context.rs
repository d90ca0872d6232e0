//! The checkerboard context model (He et al. 2021): the latent is coded in two passes over a
//! checkerboard. *Anchors* (`(i + j)` even) are coded with the hyper-synthesis' mean and scale
//! alone; the other half is then coded with a mean and scale that also see the decoded anchors
//! around it.
//!
//! Parameters of a non-anchor position, with `(μ_h, ln σ_h)` from `h_s`:
//!
//! ```text
//! c      = ctx.0(ŷ_anchors)                      5×5, M → M (only anchor taps are non-zero)
//! (Δμ, Δ ln σ) = ctx.2(relu(ctx.1([c, μ_h, ln σ_h])))   1×1, 3M → M → 2M
//! μ = μ_h + Δμ,   ln σ = ln σ_h + Δ ln σ
//! ```
//!
//! `ctx.2` starts at zero, so a model given a context starts out coding exactly as it did
//! without one. The decoder computes the same values on a fixed-order path; what must hold for
//! exact decoding is stated there.

use candle_core::{DType, Device, Module, Result, Tensor};
use candle_nn::VarBuilder;
use serde::{Deserialize, Serialize};

use super::layers::{Conv, ConvConfig};

/// Which context model a model has.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum ContextKind {
    /// Every latent element is coded from the hyper-synthesis alone.
    #[default]
    None,
    /// Two checkerboard passes ([`Checkerboard`]).
    Checkerboard,
}

impl ContextKind {
    /// Whether this is [`ContextKind::None`] (model files without a context do not record it).
    pub fn is_none(&self) -> bool {
        *self == ContextKind::None
    }
}

/// Kernel size of the context convolution `ctx.0`.
pub const CONTEXT_KERNEL: usize = 5;

/// The layers of the checkerboard context (weights `ctx.0`, `ctx.1`, `ctx.2`).
#[derive(Debug, Clone)]
pub struct Checkerboard {
    spatial: Conv,
    hidden: Conv,
    out: Conv,
}

impl Checkerboard {
    /// Builds the context for `m` latent channels under `vb` (use `vb.pp("ctx")`).
    pub fn new(m: usize, vb: VarBuilder) -> Result<Self> {
        let conv = |i, o, k, name: &str| {
            Conv::new(ConvConfig { in_channels: i, out_channels: o, kernel: k, stride: 1 }, vb.pp(name))
        };
        Ok(Checkerboard {
            spatial: conv(m, m, CONTEXT_KERNEL, "0")?,
            hidden: conv(3 * m, m, 1, "1")?,
            out: conv(m, 2 * m, 1, "2")?,
        })
    }

    /// The corrections `(Δμ, Δ ln σ)`, each `(B, M, H, W)`, from the decoded anchors
    /// `anchors` (zero at non-anchor positions) and the hyper-synthesis' `mu`, `log_scale`.
    /// Only their values at non-anchor positions are used.
    pub fn forward(&self, anchors: &Tensor, mu: &Tensor, log_scale: &Tensor) -> Result<(Tensor, Tensor)> {
        let c = self.spatial.forward(anchors)?;
        let h = self.hidden.forward(&Tensor::cat(&[&c, mu, log_scale], 1)?)?.relu()?;
        let out = self.out.forward(&h)?;
        let m = out.dim(1)? / 2;
        Ok((out.narrow(1, 0, m)?, out.narrow(1, m, m)?))
    }

    /// Multiply-adds per latent position of the decoder, which evaluates `ctx.0` only at
    /// non-anchor positions and only over anchor taps (those at odd Manhattan distance: 12 of 25
    /// for a 5×5 kernel), and the 1×1 layers only at non-anchors.
    pub fn decoder_macs_per_latent(m: usize) -> f64 {
        let taps = anchor_taps(CONTEXT_KERNEL).len() as f64;
        0.5 * (taps * (m * m) as f64 + (3 * m * m) as f64 + (2 * m * m) as f64)
    }
}

/// Offsets `(dy, dx)` of a `k×k` kernel centred on a non-anchor position that land on anchors
/// (odd `|dy| + |dx|`), in row-major order.
pub fn anchor_taps(k: usize) -> Vec<(isize, isize)> {
    let r = (k / 2) as isize;
    let mut taps = Vec::new();
    for dy in -r..=r {
        for dx in -r..=r {
            if (dy + dx).rem_euclid(2) == 1 {
                taps.push((dy, dx));
            }
        }
    }
    taps
}

/// `(1, 1, h, w)` mask, 1 at anchor positions (`(i + j)` even), 0 elsewhere.
pub fn anchor_mask(h: usize, w: usize) -> Result<Tensor> {
    let v: Vec<f32> = (0..h * w).map(|k| if (k / w + k % w).is_multiple_of(2) { 1.0 } else { 0.0 }).collect();
    Tensor::from_vec(v, (1, 1, h, w), &Device::Cpu)?.to_dtype(DType::F32)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_five_by_five_kernel_sees_twelve_anchors() {
        let taps = anchor_taps(5);
        assert_eq!(taps.len(), 12);
        assert!(taps.contains(&(0, 1)) && taps.contains(&(-2, 1)) && !taps.contains(&(1, 1)));
    }

    #[test]
    fn the_mask_is_a_checkerboard() {
        let m = anchor_mask(2, 3).unwrap().flatten_all().unwrap().to_vec1::<f32>().unwrap();
        assert_eq!(m, vec![1.0, 0.0, 1.0, 0.0, 1.0, 0.0]);
    }
}
