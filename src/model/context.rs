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
        let (_, _, h, w) = anchors.dims4()?;
        let c =
            if h % 2 == 0 && w % 2 == 0 { self.spatial_by_phases(anchors)? } else { self.spatial.forward(anchors)? };
        let h = self.hidden.forward(&Tensor::cat(&[&c, mu, log_scale], 1)?)?.relu()?;
        let out = self.out.forward(&h)?;
        let m = out.dim(1)? / 2;
        Ok((out.narrow(1, 0, m)?, out.narrow(1, m, m)?))
    }

    /// `ctx.0` at the non-anchor positions (0 at anchors) for an even-sized input whose
    /// non-anchor positions are zero, computed on the 2×2 phases of the grid: the anchors are
    /// the phases (0,0) and (1,1), the others (0,1) and (1,0), and the 5×5 kernel between a pair
    /// of phases is a 3×3 kernel at half resolution, gathered from the 5×5 weights (so the
    /// gradient reaches them). The same function as the full convolution there, at 9/25 of its
    /// multiply-adds; training spends most of the context's time here.
    fn spatial_by_phases(&self, anchors: &Tensor) -> Result<Tensor> {
        let (b, m, h, w) = anchors.dims4()?;
        let k = CONTEXT_KERNEL;
        let r = (k / 2) as isize;
        let x = anchors.reshape((b, m, h / 2, 2, w / 2, 2))?;
        let phase =
            |a: usize, c: usize| -> Result<Tensor> { x.narrow(3, a, 1)?.narrow(5, c, 1)?.squeeze(5)?.squeeze(3) };
        let input = Tensor::cat(&[phase(0, 0)?, phase(1, 1)?], 1)?;
        // Taps of the 5×5 kernel, one extra all-zero tap (index k·k) for half-resolution taps
        // that fall outside it.
        let weight = self.spatial.weight();
        let (o, i) = (weight.dim(0)?, weight.dim(1)?);
        let taps = Tensor::cat(
            &[weight.reshape((o, i, k * k))?, Tensor::zeros((o, i, 1), weight.dtype(), weight.device())?],
            2,
        )?;
        let (ins, outs) = ([(0isize, 0isize), (1, 1)], [(0isize, 1isize), (1, 0)]);
        let mut rows = Vec::new();
        for (qa, qb) in outs {
            let mut blocks = Vec::new();
            for (pa, pb) in ins {
                let index: Vec<u32> = (0..9isize)
                    .map(|t| {
                        let (dy, dx) = (2 * (t / 3 - 1) + pa - qa, 2 * (t % 3 - 1) + pb - qb);
                        if dy.abs() <= r && dx.abs() <= r {
                            ((dy + r) * k as isize + dx + r) as u32
                        } else {
                            (k * k) as u32
                        }
                    })
                    .collect();
                let index = Tensor::new(index, weight.device())?;
                blocks.push(taps.index_select(&index, 2)?.reshape((o, i, 3, 3))?);
            }
            rows.push(Tensor::cat(&blocks, 1)?);
        }
        let kernel = Tensor::cat(&rows, 0)?;
        let zero_bias = Tensor::zeros(2 * o, weight.dtype(), weight.device())?;
        let out = crate::kernels::conv::conv2d_selected(&input, &kernel, &zero_bias, 1, 1)?;
        let bias = self.spatial.bias().reshape((1, o, 1, 1))?;
        let p01 = out.narrow(1, 0, o)?.broadcast_add(&bias)?;
        let p10 = out.narrow(1, o, o)?.broadcast_add(&bias)?;
        let zero = p01.zeros_like()?;
        let row0 = Tensor::stack(&[&zero, &p01], 4)?;
        let row1 = Tensor::stack(&[&p10, &zero], 4)?;
        Tensor::stack(&[row0, row1], 3)?.reshape((b, o, h, w))
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
    fn the_phase_split_convolution_equals_the_full_one_at_non_anchors() {
        use candle_core::{DType, Var};
        use candle_nn::VarMap;
        let varmap = VarMap::new();
        let m = 6;
        let ctx = Checkerboard::new(m, VarBuilder::from_varmap(&varmap, DType::F32, &Device::Cpu)).unwrap();
        for v in varmap.all_vars() {
            v.set(&Tensor::randn(0f32, 0.3, v.dims(), &Device::Cpu).unwrap()).unwrap();
        }
        let (h, w) = (6, 10);
        let mask = anchor_mask(h, w).unwrap();
        let x = Var::from_tensor(&Tensor::randn(0f32, 1.0, (2, m, h, w), &Device::Cpu).unwrap()).unwrap();
        let anchors = x.as_tensor().broadcast_mul(&mask).unwrap();
        let other = (1.0 - &mask).unwrap();
        let full = ctx.spatial.forward(&anchors).unwrap().broadcast_mul(&other).unwrap();
        let split = ctx.spatial_by_phases(&anchors).unwrap();
        let diff = (&full - &split).unwrap().abs().unwrap().max_all().unwrap().to_scalar::<f32>().unwrap();
        assert!(diff < 1e-4, "values differ by {diff}");
        // The gradients with respect to the weights and the input agree too.
        let g = |t: &Tensor| t.sqr().unwrap().sum_all().unwrap().backward().unwrap();
        let (ga, gb) = (g(&full), g(&split));
        for var in [ctx.spatial.weight(), x.as_tensor()] {
            let (a, b) = (ga.get(var).unwrap(), gb.get(var).unwrap());
            let diff = (a - b).unwrap().abs().unwrap().max_all().unwrap().to_scalar::<f32>().unwrap();
            assert!(diff < 1e-3, "gradients differ by {diff}");
        }
    }

    #[test]
    fn the_mask_is_a_checkerboard() {
        let m = anchor_mask(2, 3).unwrap().flatten_all().unwrap().to_vec1::<f32>().unwrap();
        assert_eq!(m, vec![1.0, 0.0, 1.0, 0.0, 1.0, 0.0]);
    }
}
