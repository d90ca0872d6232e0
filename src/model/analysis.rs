//! Analysis transform `g_a` (image → latent `y`) and hyper-analysis `h_a` (`y` → hyper-latent `z`).

use candle_core::{Module, Result, Tensor};
use candle_nn::VarBuilder;

use super::config::ModelConfig;
use super::gdn::{Gdn, GdnDirection};
use super::layers::{Conv, ConvConfig};

/// `g_a`: `stages` stride-2 convolutions with GDN between them; weights `g_a.{0,2,…}` (conv)
/// and `g_a.{1,3,…}` (GDN): `g_a.{0,2,4,6}` and `g_a.{1,3,5}` for four stages. Input
/// `(B, 3, H, W)` in `[0, 1]`, output `(B, M, H/s, W/s)` for the latent stride `s = 2^stages`.
#[derive(Debug, Clone)]
pub struct Analysis {
    convs: Vec<Conv>,
    gdns: Vec<Gdn>,
}

impl Analysis {
    /// Builds `g_a` under `vb` (use `vb.pp("g_a")`).
    pub fn new(c: &ModelConfig, vb: VarBuilder) -> Result<Self> {
        let chans = channels(c);
        let mut convs = Vec::new();
        let mut gdns = Vec::new();
        for i in 0..c.stages {
            let cfg =
                ConvConfig { in_channels: chans[i], out_channels: chans[i + 1], kernel: c.analysis_kernel, stride: 2 };
            convs.push(Conv::new(cfg, vb.pp((2 * i).to_string()))?);
            if i + 1 < c.stages {
                gdns.push(Gdn::new(c.n, GdnDirection::Forward, vb.pp((2 * i + 1).to_string()))?);
            }
        }
        Ok(Analysis { convs, gdns })
    }

    /// Multiply-adds per input pixel (GDN counted as its C×C matrix product).
    pub fn macs_per_pixel(c: &ModelConfig) -> f64 {
        let k2 = (c.analysis_kernel * c.analysis_kernel) as f64;
        let chans = channels(c);
        let mut macs = 0.0;
        for i in 0..c.stages {
            let positions = 1.0 / 4f64.powi(i as i32 + 1);
            macs += positions * k2 * (chans[i] * chans[i + 1]) as f64;
            if i + 1 < c.stages {
                macs += positions * (c.n * c.n) as f64;
            }
        }
        macs
    }
}

/// Channel counts along `g_a`: 3, then `N` after every stage but the last, then `M`.
fn channels(c: &ModelConfig) -> Vec<usize> {
    let mut chans = vec![3];
    chans.extend(std::iter::repeat_n(c.n, c.stages - 1));
    chans.push(c.m);
    chans
}

impl Module for Analysis {
    fn forward(&self, x: &Tensor) -> Result<Tensor> {
        let mut h = x.clone();
        for (i, conv) in self.convs.iter().enumerate() {
            h = conv.forward(&h)?;
            if let Some(gdn) = self.gdns.get(i) {
                h = gdn.forward(&h)?;
            }
        }
        Ok(h)
    }
}

/// `h_a`: 3×3 stride-1 conv, ReLU, two 5×5 stride-2 convs with a ReLU between; weights
/// `h_a.{0,2,4}`. Output `(B, Nz, H/h, W/h)` for the hyper stride `h = 4 · latent stride`.
#[derive(Debug, Clone)]
pub struct HyperAnalysis {
    convs: [Conv; 3],
}

impl HyperAnalysis {
    /// Builds `h_a` under `vb` (use `vb.pp("h_a")`).
    pub fn new(c: &ModelConfig, vb: VarBuilder) -> Result<Self> {
        let hh = c.hyper_hidden;
        let a = Conv::new(ConvConfig { in_channels: c.m, out_channels: hh, kernel: 3, stride: 1 }, vb.pp("0"))?;
        let b = Conv::new(ConvConfig { in_channels: hh, out_channels: hh, kernel: 5, stride: 2 }, vb.pp("2"))?;
        let d = Conv::new(ConvConfig { in_channels: hh, out_channels: c.nz, kernel: 5, stride: 2 }, vb.pp("4"))?;
        Ok(HyperAnalysis { convs: [a, b, d] })
    }

    /// Multiply-adds per input pixel of the image.
    pub fn macs_per_pixel(c: &ModelConfig) -> f64 {
        let hh = c.hyper_hidden as f64;
        let y = 1.0 / (c.latent_stride() * c.latent_stride()) as f64;
        y * 9.0 * c.m as f64 * hh + y / 4.0 * 25.0 * hh * hh + y / 16.0 * 25.0 * hh * c.nz as f64
    }
}

impl Module for HyperAnalysis {
    fn forward(&self, y: &Tensor) -> Result<Tensor> {
        let h = self.convs[0].forward(y)?.relu()?;
        let h = self.convs[1].forward(&h)?.relu()?;
        self.convs[2].forward(&h)
    }
}
