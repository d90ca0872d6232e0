//! The hyper-synthesis on the fixed-order path: same layers as
//! [`crate::model::synthesis::HyperSynthesis`], bit-identical on every machine.

use super::fixed::{FixedConv, SimdMode, depth_to_space_hwc, relu_in_place};

/// Means and log-scales of the latent, channel-major (`M × h × w`).
#[derive(Debug, Clone, PartialEq)]
pub struct PriorParameters {
    /// Predicted means `μ`.
    pub means: Vec<f32>,
    /// Predicted natural-log scales `log σ`.
    pub log_scales: Vec<f32>,
    /// Latent height.
    pub height: usize,
    /// Latent width.
    pub width: usize,
}

/// `h_s` on fixed-order arithmetic.
#[derive(Debug, Clone)]
pub struct HyperSynthesisFixed {
    layers: [FixedConv; 3],
    nz: usize,
}

impl HyperSynthesisFixed {
    /// Builds from the three convolutions of `h_s` (weights `(cout, cin, 3, 3)`, biases).
    pub fn new(layers: [FixedConv; 3], nz: usize) -> Self {
        HyperSynthesisFixed { layers, nz }
    }

    /// Multiply-adds per hyper-latent position.
    pub fn macs_per_hyper_position(&self) -> usize {
        self.layers[0].macs_per_output() + 4 * self.layers[1].macs_per_output() + 16 * self.layers[2].macs_per_output()
    }

    /// Runs on `z` given channel-major (`Nz × hz × wz`), already multiplied by its inverse gain.
    pub fn forward(&self, z_chw: &[f32], hz: usize, wz: usize, mode: SimdMode) -> PriorParameters {
        let nz = self.nz;
        assert_eq!(z_chw.len(), nz * hz * wz, "hyper-latent size");
        let mut x = vec![0.0; z_chw.len()];
        for c in 0..nz {
            for p in 0..hz * wz {
                x[p * nz + c] = z_chw[c * hz * wz + p];
            }
        }
        let (mut h, mut w) = (hz, wz);
        for layer in &self.layers[..2] {
            let mut y = layer.forward(&x, h, w, mode);
            relu_in_place(&mut y);
            x = depth_to_space_hwc(&y, h, w, layer.out_channels());
            h *= 2;
            w *= 2;
        }
        let out = self.layers[2].forward(&x, h, w, mode);
        let m = self.layers[2].out_channels() / 2;
        let mut means = vec![0.0; m * h * w];
        let mut log_scales = vec![0.0; m * h * w];
        for p in 0..h * w {
            for c in 0..m {
                means[c * h * w + p] = out[p * 2 * m + c];
                log_scales[c * h * w + p] = out[p * 2 * m + m + c];
            }
        }
        PriorParameters { means, log_scales, height: h, width: w }
    }
}
