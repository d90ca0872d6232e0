//! Synthesis transform `g_s` (latent → image) and the training-time hyper-synthesis `h_s`
//! (hyper-latent → mean and log-scale of each latent element).
//!
//! The decoder never runs this `h_s`: it runs [`crate::kernels::HyperSynthesisFixed`], the
//! fixed-order version of the same layers, so that the tables it selects are bit-identical on
//! every machine.

use candle_core::{Module, Result, Tensor};
use candle_nn::VarBuilder;

use super::config::ModelConfig;
use super::gdn::{Gdn, GdnDirection};
use super::layers::{Conv, ConvConfig, SubpixelConv};

/// `g_s`: `stages` sub-pixel upsampling layers with inverse GDN between them; weights
/// `g_s.{0,2,…}` (convs) and `g_s.{1,3,…}` (IGDN): `g_s.{0,2,4,6}` and `g_s.{1,3,5}` for four
/// stages. Output `(B, 3, s·h, s·w)` in about `[0, 1]` for the latent stride `s = 2^stages`.
#[derive(Debug, Clone)]
pub struct Synthesis {
    ups: Vec<SubpixelConv>,
    igdns: Vec<Gdn>,
}

impl Synthesis {
    /// Builds `g_s` under `vb` (use `vb.pp("g_s")`).
    pub fn new(c: &ModelConfig, vb: VarBuilder) -> Result<Self> {
        let chans = channels(c);
        let mut ups = Vec::new();
        let mut igdns = Vec::new();
        for i in 0..c.stages {
            ups.push(SubpixelConv::new(chans[i], chans[i + 1], c.synthesis_kernel, vb.pp((2 * i).to_string()))?);
            if i + 1 < c.stages {
                igdns.push(Gdn::new(c.n, GdnDirection::Inverse, vb.pp((2 * i + 1).to_string()))?);
            }
        }
        Ok(Synthesis { ups, igdns })
    }

    /// Multiply-adds per output pixel.
    pub fn macs_per_pixel(c: &ModelConfig) -> f64 {
        let k2 = (c.synthesis_kernel * c.synthesis_kernel) as f64;
        let chans = channels(c);
        let mut macs = 0.0;
        for i in 0..c.stages {
            let in_positions = 1.0 / 4f64.powi((c.stages - i) as i32);
            macs += in_positions * k2 * (chans[i] * chans[i + 1] * 4) as f64;
            if i + 1 < c.stages {
                macs += in_positions * 4.0 * (c.n * c.n) as f64;
            }
        }
        macs
    }
}

/// Channel counts along `g_s`: `M`, then `N` after every stage but the last, then 3.
fn channels(c: &ModelConfig) -> Vec<usize> {
    let mut chans = vec![c.m];
    chans.extend(std::iter::repeat_n(c.n, c.stages - 1));
    chans.push(3);
    chans
}

impl Synthesis {
    /// Runs `g_s` for decoding (no gradient): each sub-pixel layer and the inverse GDN after it
    /// as one fused pass ([`crate::kernels::fused_conv::subpixel_igdn_forward`]), the narrow last
    /// layer as in `forward`. Equal to `forward` up to float rounding; 81 instead of 99 ms for a
    /// 768×512 image in one run (`examples/decode_profile`).
    pub fn forward_decode(&self, y: &Tensor) -> Result<Tensor> {
        Ok(self.forward_timed(y, true)?.0)
    }

    /// Runs `g_s` like `forward` (`fused = false`) or `forward_decode` (`fused = true`), returning
    /// the wall time of each step as well (`g_s.0 conv`, `g_s.0 depth-to-space`, `g_s.1 IGDN`, …;
    /// fused: `g_s.0+1 conv+d2s+IGDN`, …): the decode profile of `examples/decode_profile`.
    pub fn forward_timed(&self, y: &Tensor, fused: bool) -> Result<(Tensor, Vec<(String, std::time::Duration)>)> {
        let mut times = Vec::new();
        let mut h = y.clone();
        let mut step = |label: String, f: &dyn Fn(&Tensor) -> Result<Tensor>, h: &mut Tensor| -> Result<()> {
            let t = std::time::Instant::now();
            *h = f(h)?;
            times.push((label, t.elapsed()));
            Ok(())
        };
        for (i, up) in self.ups.iter().enumerate() {
            match self.igdns.get(i) {
                Some(g) if fused => {
                    let (beta, gamma) = g.effective_parameters()?;
                    let (w, b) = (up.conv().weight(), up.conv().bias());
                    let f =
                        |x: &Tensor| crate::kernels::fused_conv::subpixel_igdn_forward(x, w, b, Some((&beta, &gamma)));
                    step(format!("g_s.{}+{} conv+d2s+IGDN", 2 * i, 2 * i + 1), &f, &mut h)?;
                }
                _ => {
                    step(format!("g_s.{} conv", 2 * i), &|x| up.conv().forward(x), &mut h)?;
                    step(format!("g_s.{} depth-to-space", 2 * i), &super::layers::depth_to_space, &mut h)?;
                    if let Some(g) = self.igdns.get(i) {
                        step(format!("g_s.{} IGDN", 2 * i + 1), &|x| g.forward(x), &mut h)?;
                    }
                }
            }
        }
        Ok((h, times))
    }
}

impl Module for Synthesis {
    fn forward(&self, y: &Tensor) -> Result<Tensor> {
        let mut h = y.clone();
        for (i, up) in self.ups.iter().enumerate() {
            h = up.forward(&h)?;
            if let Some(g) = self.igdns.get(i) {
                h = g.forward(&h)?;
            }
        }
        Ok(h)
    }
}

/// `h_s`: two sub-pixel upsamplers (3×3) with ReLU, then a 3×3 conv to `2M` channels; weights
/// `h_s.{0,2,4}`. Output channels `0..M` are means, `M..2M` log-scales.
#[derive(Debug, Clone)]
pub struct HyperSynthesis {
    up0: SubpixelConv,
    up1: SubpixelConv,
    out: Conv,
}

impl HyperSynthesis {
    /// Builds `h_s` under `vb` (use `vb.pp("h_s")`).
    pub fn new(c: &ModelConfig, vb: VarBuilder) -> Result<Self> {
        let hh = c.hyper_hidden;
        Ok(HyperSynthesis {
            up0: SubpixelConv::new(c.nz, hh, 3, vb.pp("0"))?,
            up1: SubpixelConv::new(hh, hh, 3, vb.pp("2"))?,
            out: Conv::new(ConvConfig { in_channels: hh, out_channels: 2 * c.m, kernel: 3, stride: 1 }, vb.pp("4"))?,
        })
    }

    /// Multiply-adds per image pixel.
    pub fn macs_per_pixel(c: &ModelConfig) -> f64 {
        let hh = c.hyper_hidden as f64;
        let z = 1.0 / (c.hyper_stride() * c.hyper_stride()) as f64;
        z * 9.0 * c.nz as f64 * hh * 4.0 + z * 4.0 * 9.0 * hh * hh * 4.0 + z * 16.0 * 9.0 * hh * 2.0 * c.m as f64
    }

    /// Runs `h_s`, returning `(means, log_scales)`, each `(B, M, 4h, 4w)`.
    pub fn forward_split(&self, z: &Tensor) -> Result<(Tensor, Tensor)> {
        let h = self.up0.forward(z)?.relu()?;
        let h = self.up1.forward(&h)?.relu()?;
        let out = self.out.forward(&h)?;
        let m = out.dim(1)? / 2;
        Ok((out.narrow(1, 0, m)?, out.narrow(1, m, m)?))
    }
}
