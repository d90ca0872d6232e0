//! Generalized divisive normalization (GDN) and its inverse.
//!
//! `GDN(x)_i = x_i / sqrt(β_i + Σ_j γ_ij x_j²)`; the inverse multiplies instead of dividing.
//! Parameters are stored re-parameterised (`β = β_raw² + ε`, `γ = (γ_raw + √0.1·I)²`, elementwise) so that both stay
//! non-negative during training.

use candle_core::{DType, Module, Result, Tensor};
use candle_nn::{Init, VarBuilder};

const BETA_FLOOR: f64 = 1e-6;
/// √0.1: the diagonal offset of γ's parameterisation.
const GAMMA_OFFSET: f64 = 0.316_227_766_016_837_94;

/// Which direction the normalization runs.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum GdnDirection {
    /// Divide: used in the analysis transform.
    Forward,
    /// Multiply: used in the synthesis transform.
    Inverse,
}

/// A GDN layer over `channels` channels of an NCHW tensor.
#[derive(Debug, Clone)]
pub struct Gdn {
    beta_raw: Tensor,
    gamma_raw: Tensor,
    eye: Tensor,
    direction: GdnDirection,
}

impl Gdn {
    /// Creates the layer; weights are `{prefix}.beta` (C) and `{prefix}.gamma` (C×C).
    pub fn new(channels: usize, direction: GdnDirection, vb: VarBuilder) -> Result<Self> {
        let beta_raw = vb.get_with_hints(channels, "beta", Init::Const(1.0))?;
        let gamma_raw = vb.get_with_hints((channels, channels), "gamma", Init::Const(0.0))?;
        let eye = Tensor::eye(channels, DType::F32, vb.device())?;
        Ok(Gdn { beta_raw, gamma_raw, eye, direction })
    }
}

impl Gdn {
    /// The layer's direction.
    pub fn direction(&self) -> GdnDirection {
        self.direction
    }

    /// `(β, γ)` as the layer applies them: `β = β_raw² + 1e-6` and `γ = (γ_raw + c·I)²`.
    pub fn effective_parameters(&self) -> Result<(Tensor, Tensor)> {
        self.parameters()
    }

    fn parameters(&self) -> Result<(Tensor, Tensor)> {
        let beta = (self.beta_raw.sqr()? + BETA_FLOOR)?;
        let gamma = (&self.gamma_raw + (&self.eye * GAMMA_OFFSET)?)?.sqr()?;
        Ok((beta, gamma))
    }

    /// The same layer written as plain candle operations (the reference for the fused kernel).
    pub fn forward_reference(&self, x: &Tensor) -> Result<Tensor> {
        let (b, c, h, w) = x.dims4()?;
        let (beta, gamma) = self.parameters()?;
        let beta = beta.reshape((1, c, 1))?;
        let x2 = x.sqr()?.reshape((b, c, h * w))?;
        let norm = gamma.broadcast_matmul(&x2)?.broadcast_add(&beta)?.sqrt()?;
        let norm = norm.reshape((b, c, h, w))?;
        match self.direction {
            GdnDirection::Forward => x / norm,
            GdnDirection::Inverse => x * norm,
        }
    }
}

impl Module for Gdn {
    fn forward(&self, x: &Tensor) -> Result<Tensor> {
        let (beta, gamma) = self.parameters()?;
        let op = crate::kernels::fused_gdn::FusedGdn { inverse: self.direction == GdnDirection::Inverse };
        x.contiguous()?.apply_op3(&beta, &gamma.contiguous()?, op)
    }
}
