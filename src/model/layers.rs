//! Convolution layers shared by the transforms: a plain strided convolution and a sub-pixel
//! (convolution + depth-to-space) upsampler.

use candle_core::{Module, Result, Tensor};
use candle_nn::{Init, VarBuilder};

/// Shape of a convolution layer.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ConvConfig {
    /// Input channels.
    pub in_channels: usize,
    /// Output channels.
    pub out_channels: usize,
    /// Square kernel size (odd).
    pub kernel: usize,
    /// Stride (1 or 2); padding is always `kernel / 2`.
    pub stride: usize,
}

/// A 2-D convolution with bias; weights `{prefix}.weight` (out, in, k, k) and `{prefix}.bias`.
#[derive(Debug, Clone)]
pub struct Conv {
    weight: Tensor,
    bias: Tensor,
    config: ConvConfig,
}

impl Conv {
    /// Creates the layer (values are set by [`crate::model::init`] for new models).
    pub fn new(config: ConvConfig, vb: VarBuilder) -> Result<Self> {
        let k = config.kernel;
        let weight = vb.get_with_hints((config.out_channels, config.in_channels, k, k), "weight", Init::Const(0.0))?;
        let bias = vb.get_with_hints(config.out_channels, "bias", Init::Const(0.0))?;
        Ok(Conv { weight, bias, config })
    }

    /// The layer's shape.
    pub fn config(&self) -> ConvConfig {
        self.config
    }

    /// Weights `(O, C, k, k)`.
    pub fn weight(&self) -> &Tensor {
        &self.weight
    }

    /// Bias `(O)`.
    pub fn bias(&self) -> &Tensor {
        &self.bias
    }

    /// Multiply-adds per output position.
    pub fn macs_per_output(&self) -> usize {
        self.config.in_channels * self.config.out_channels * self.config.kernel * self.config.kernel
    }
}

impl Module for Conv {
    fn forward(&self, x: &Tensor) -> Result<Tensor> {
        let pad = self.config.kernel / 2;
        crate::kernels::conv::conv2d_selected(x, &self.weight, &self.bias, self.config.stride, pad)
    }
}

/// Rearranges `(B, 4C, H, W)` into `(B, C, 2H, 2W)`: channel `4c + 2dy + dx` lands at
/// `(c, 2h + dy, 2w + dx)`.
pub fn depth_to_space(x: &Tensor) -> Result<Tensor> {
    crate::kernels::pixel_shuffle::depth_to_space(x)
}

/// Sub-pixel upsampling by 2: a stride-1 convolution to `4·out` channels, then depth-to-space.
#[derive(Debug, Clone)]
pub struct SubpixelConv {
    conv: Conv,
}

impl SubpixelConv {
    /// Creates the layer; its weights are those of the inner convolution (`{prefix}.weight`).
    pub fn new(in_channels: usize, out_channels: usize, kernel: usize, vb: VarBuilder) -> Result<Self> {
        let config = ConvConfig { in_channels, out_channels: out_channels * 4, kernel, stride: 1 };
        Ok(SubpixelConv { conv: Conv::new(config, vb)? })
    }

    /// Multiply-adds per *input* position.
    pub fn macs_per_input(&self) -> usize {
        self.conv.macs_per_output()
    }

    /// The inner stride-1 convolution (before depth-to-space).
    pub fn conv(&self) -> &Conv {
        &self.conv
    }
}

impl Module for SubpixelConv {
    fn forward(&self, x: &Tensor) -> Result<Tensor> {
        depth_to_space(&self.conv.forward(x)?)
    }
}
