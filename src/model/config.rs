//! Model hyper-parameters and the quality → trade-off mapping.
//!
//! A quality `q` in `1.0..=100.0` maps to a continuous position on the model's trade-off anchors:
//! `t = (q − 1) / 99 · (L − 1)` for `L` anchors. Anchor `i` was trained with rate–distortion
//! weight `λ_i` (loss = bits per pixel + λ · MSE on the 0–255 scale). Between anchors the gain
//! vectors are interpolated exponentially (`g = g_i^(1−l) · g_{i+1}^l`, `l = t − ⌊t⌋`) and so is
//! the effective λ: quality 1 is the smallest file, quality 100 the best fidelity.

use serde::{Deserialize, Serialize};

use super::context::ContextKind;
use crate::error::{KilnError, Result};

/// Channel counts, kernel sizes and trade-off anchors of a model.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ModelConfig {
    /// Hidden channels of the analysis and synthesis transforms.
    pub n: usize,
    /// Latent channels (the coded representation `y`).
    pub m: usize,
    /// Hyper-latent channels (`z`).
    pub nz: usize,
    /// Hidden channels of the hyper-synthesis.
    pub hyper_hidden: usize,
    /// Kernel size of the stride-2 analysis convolutions.
    pub analysis_kernel: usize,
    /// Kernel size of the sub-pixel synthesis convolutions.
    pub synthesis_kernel: usize,
    /// Rate–distortion weights λ of the trade-off anchors, increasing (loss = bpp + λ·MSE₂₅₅).
    pub lambdas: Vec<f64>,
    /// Stride-2 layers in the analysis and in the synthesis (2 to 4): the latent has stride
    /// `2^stages` ([`ModelConfig::latent_stride`]). Model files without the field have 4; a
    /// model with 4 does not write it, so its file is what it was before the field existed.
    #[serde(default = "four_stages", skip_serializing_if = "is_four_stages")]
    pub stages: usize,
    /// The context model ([`super::context`]). Model files without the field have none, and a
    /// model without one does not write it.
    #[serde(default, skip_serializing_if = "ContextKind::is_none")]
    pub context: ContextKind,
    /// Whether the hyper-synthesis is told the quality through per-anchor gains on its output
    /// ([`super::gain::GainUnits`]). Model files without the field have none.
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub hyper_gains: bool,
}

fn four_stages() -> usize {
    4
}

fn is_four_stages(s: &usize) -> bool {
    *s == 4
}

impl Default for ModelConfig {
    /// The configuration the default model was trained from: N = 64, M = 96, chosen with
    /// `tools/compare-configs` (equal training budgets from scratch): 48/64 codes better after
    /// 3000 steps, 64/96 after 8000 (BD-rate vs JPEG +33.8% vs +37.1%) at 1.36× its decode
    /// time; numbers in the README. The shipped model grew its latent to M = 192 at step 72 000
    /// (`kiln train --latent-channels`) and was cut to three stages (a stride-8 latent) at step
    /// 94 000 (`kiln train --stages 3`).
    fn default() -> Self {
        ModelConfig {
            n: 64,
            m: 96,
            nz: 64,
            hyper_hidden: 64,
            analysis_kernel: 5,
            synthesis_kernel: 3,
            lambdas: vec![0.0025, 0.005, 0.01, 0.02, 0.04, 0.08],
            stages: 4,
            context: ContextKind::None,
            hyper_gains: false,
        }
    }
}

/// The largest hyper-latent stride of any valid configuration (four stages, then the
/// hyper-analysis' two stride-2 layers): sizes that are multiples of it suit every model.
pub const HYPER_STRIDE_MAX: usize = 64;

/// Lowest accepted quality.
pub const QUALITY_MIN: f32 = 1.0;
/// Highest accepted quality.
pub const QUALITY_MAX: f32 = 100.0;

impl ModelConfig {
    /// A tiny configuration for tests: fast to run, same code paths as the shipped one.
    pub fn tiny() -> Self {
        ModelConfig {
            n: 8,
            m: 12,
            nz: 8,
            hyper_hidden: 8,
            analysis_kernel: 5,
            synthesis_kernel: 3,
            lambdas: vec![0.005, 0.02, 0.08],
            stages: 4,
            context: ContextKind::None,
            hyper_gains: false,
        }
    }

    /// Checks that the configuration can be built.
    pub fn validate(&self) -> Result<()> {
        let bad = |m: &str| Err(KilnError::BadModel(format!("config: {m}")));
        if self.n == 0 || self.m == 0 || self.nz == 0 || self.hyper_hidden == 0 {
            return bad("channel counts must be positive");
        }
        if self.n > 1024 || self.m > 1024 || self.nz > 1024 || self.hyper_hidden > 1024 {
            return bad("channel counts above 1024 are not supported");
        }
        if self.analysis_kernel.is_multiple_of(2) || self.synthesis_kernel.is_multiple_of(2) {
            return bad("kernel sizes must be odd");
        }
        if self.analysis_kernel > 9 || self.synthesis_kernel > 9 {
            return bad("kernel sizes above 9 are not supported");
        }
        if !(2..=4).contains(&self.stages) {
            return bad("stages must be 2, 3 or 4 (latent stride 4, 8 or 16)");
        }
        if self.lambdas.len() < 2 || self.lambdas.len() > 32 {
            return bad("between 2 and 32 trade-off anchors are needed");
        }
        if !self.lambdas.windows(2).all(|w| w[0] > 0.0 && w[1] > w[0]) {
            return bad("lambdas must be positive and increasing");
        }
        Ok(())
    }

    /// The model-file format tag for this configuration ([`super::MODEL_FORMAT`], or
    /// [`super::MODEL_FORMAT_CONTEXT`] with a context model or hyper gains).
    pub fn format_tag(&self) -> &'static str {
        if self.context.is_none() && !self.hyper_gains { super::MODEL_FORMAT } else { super::MODEL_FORMAT_CONTEXT }
    }

    /// Downsampling factor of the analysis transform: `2^stages` (16 for four stages).
    pub fn latent_stride(&self) -> usize {
        1 << self.stages
    }

    /// Downsampling factor of analysis plus hyper-analysis (two more stride-2 layers):
    /// `4 · latent_stride`.
    pub fn hyper_stride(&self) -> usize {
        4 * self.latent_stride()
    }

    /// Number of trade-off anchors.
    pub fn anchors(&self) -> usize {
        self.lambdas.len()
    }

    /// Position of a quality on the anchors: `(index i, weight l)` with the result between
    /// anchor `i` (weight `1 − l`) and anchor `i + 1` (weight `l`).
    pub fn anchor_position(&self, quality: f32) -> Result<(usize, f32)> {
        check_quality(quality)?;
        let t = (quality - QUALITY_MIN) / (QUALITY_MAX - QUALITY_MIN) * (self.anchors() - 1) as f32;
        let i = (t.floor() as usize).min(self.anchors() - 2);
        Ok((i, t - i as f32))
    }

    /// The effective λ of a quality (log-linear between anchors).
    pub fn lambda_for_quality(&self, quality: f32) -> Result<f64> {
        let (i, l) = self.anchor_position(quality)?;
        let (a, b) = (self.lambdas[i].ln(), self.lambdas[i + 1].ln());
        Ok((a * (1.0 - l as f64) + b * l as f64).exp())
    }

    /// The quality at which anchor `i` sits exactly.
    pub fn anchor_quality(&self, i: usize) -> f32 {
        QUALITY_MIN + (QUALITY_MAX - QUALITY_MIN) * i as f32 / (self.anchors() - 1) as f32
    }
}

/// Rejects qualities outside `1..=100` and non-finite values.
pub fn check_quality(quality: f32) -> Result<()> {
    if !(QUALITY_MIN..=QUALITY_MAX).contains(&quality) {
        return Err(KilnError::InvalidArgument(format!(
            "quality {quality} is outside 1..=100\nhint: 1 gives the smallest file, 100 the best fidelity"
        )));
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quality_extremes_hit_first_and_last_anchor() {
        let c = ModelConfig::default();
        assert_eq!(c.anchor_position(1.0).unwrap(), (0, 0.0));
        let (i, l) = c.anchor_position(100.0).unwrap();
        assert_eq!(i, c.anchors() - 2);
        assert!((l - 1.0).abs() < 1e-6);
        assert!((c.lambda_for_quality(100.0).unwrap() - 0.08).abs() < 1e-9);
        assert!(c.anchor_position(0.5).is_err());
        assert!(c.anchor_position(f32::NAN).is_err());
    }

    #[test]
    fn lambda_increases_with_quality() {
        let c = ModelConfig::default();
        let mut last = 0.0;
        for q in 1..=100 {
            let l = c.lambda_for_quality(q as f32).unwrap();
            assert!(l > last);
            last = l;
        }
    }
}
