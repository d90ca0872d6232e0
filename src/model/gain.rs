//! Gain units for variable rate: one learned per-channel gain vector per trade-off anchor, with
//! exponential interpolation between neighbouring anchors.
//!
//! Four tables, each `(L, C)` and stored as natural-log gains: `gain.y` scales the latent before
//! rounding, `gain.y_inv` undoes it before synthesis, `gain.z` and `gain.z_inv` do the same for
//! the hyper-latent. Interpolating log-gains linearly is the exponential interpolation
//! `g = g_i^(1−l) · g_{i+1}^l`.
//!
//! Gains used on the decoder's table-selecting path come from [`GainUnits::at`], which evaluates
//! `exp` with the pure-software `libm` so the value is the same on every machine.

use candle_core::{Result, Tensor};
use candle_nn::{Init, VarBuilder};

use super::config::ModelConfig;

/// The four gain tables of a model.
#[derive(Debug, Clone)]
pub struct GainUnits {
    /// Log-gains applied to `y` before rounding, `(L, M)`.
    pub y: Tensor,
    /// Log-gains applied to `ŷ` before synthesis, `(L, M)`.
    pub y_inv: Tensor,
    /// Log-gains applied to `z` before rounding, `(L, Nz)`.
    pub z: Tensor,
    /// Log-gains applied to `ẑ` before hyper-synthesis, `(L, Nz)`.
    pub z_inv: Tensor,
}

/// Gain vectors for one quality, evaluated on the CPU.
#[derive(Debug, Clone, PartialEq)]
pub struct GainVectors {
    /// Multiplies `y` (length M).
    pub y: Vec<f32>,
    /// Multiplies `ŷ` (length M).
    pub y_inv: Vec<f32>,
    /// Multiplies `z` (length Nz).
    pub z: Vec<f32>,
    /// Multiplies `ẑ` (length Nz).
    pub z_inv: Vec<f32>,
}

impl GainUnits {
    /// Creates the tables (all zero log-gains, i.e. unit gains) under `vb.pp("gain")`.
    pub fn new(c: &ModelConfig, vb: VarBuilder) -> Result<Self> {
        let l = c.anchors();
        Ok(GainUnits {
            y: vb.get_with_hints((l, c.m), "y", Init::Const(0.0))?,
            y_inv: vb.get_with_hints((l, c.m), "y_inv", Init::Const(0.0))?,
            z: vb.get_with_hints((l, c.nz), "z", Init::Const(0.0))?,
            z_inv: vb.get_with_hints((l, c.nz), "z_inv", Init::Const(0.0))?,
        })
    }

    /// Gain vectors at anchor position `(i, l)` (see [`ModelConfig::anchor_position`]).
    pub fn at(&self, i: usize, l: f32) -> Result<GainVectors> {
        let row = |t: &Tensor| -> Result<Vec<f32>> {
            let a = t.get(i)?.to_vec1::<f32>()?;
            let b = t.get(i + 1)?.to_vec1::<f32>()?;
            Ok(a.iter().zip(&b).map(|(a, b)| libm::expf(a * (1.0 - l) + b * l)).collect())
        };
        Ok(GainVectors { y: row(&self.y)?, y_inv: row(&self.y_inv)?, z: row(&self.z)?, z_inv: row(&self.z_inv)? })
    }

    /// Per-sample gains for training: `index` `(B,)` u32 anchor indices, `weight` `(B,)` f32
    /// interpolation weights. Returns a `(B, C, 1, 1)` tensor of gains from `table`.
    pub fn batch(table: &Tensor, index: &Tensor, weight: &Tensor) -> Result<Tensor> {
        let lo = table.index_select(index, 0)?;
        let hi = table.index_select(&(index + 1.0)?.to_dtype(candle_core::DType::U32)?, 0)?;
        let w = weight.unsqueeze(1)?;
        let lg = (lo.broadcast_mul(&(1.0 - &w)?)? + hi.broadcast_mul(&w)?)?;
        let (b, c) = lg.dims2()?;
        lg.exp()?.reshape((b, c, 1, 1))
    }
}
