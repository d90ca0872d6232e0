//! The checkerboard context ([`crate::model::context`]) on the fixed-order path: the means and
//! log-scales of the non-anchor half of the latent, computed from the decoded anchors and the
//! hyper-synthesis' parameters, bit-identical on every machine.
//!
//! # Requirements for exact decoding
//! - the encoder and the decoder call [`CheckerboardFixed::refine`] with the same anchor values
//!   (`q + μ` in the gained domain, `f32`), which the decoder has exactly once the anchors are
//!   decoded;
//! - every sum runs on [`FixedConv`] (its order rules hold here), the corrections are added to
//!   the hyper-synthesis' values with one `f32` addition each;
//! - only non-anchor positions are computed; anchor parameters are left untouched.

use super::fixed::{FixedConv, Positions, SimdMode, relu_in_place};
use super::hyper_fixed::PriorParameters;

/// The three context layers on fixed-order arithmetic.
#[derive(Debug, Clone)]
pub struct CheckerboardFixed {
    /// `ctx.0` over its anchor taps only.
    spatial: FixedConv,
    /// `ctx.1`, 1×1, `3M → M`.
    hidden: FixedConv,
    /// `ctx.2`, 1×1, `M → 2M`.
    out: FixedConv,
    m: usize,
}

impl CheckerboardFixed {
    /// Builds from the three layers (`spatial` built with [`FixedConv::with_taps`] over the
    /// anchor taps, [`crate::model::context::anchor_taps`]).
    pub fn new(spatial: FixedConv, hidden: FixedConv, out: FixedConv, m: usize) -> Self {
        assert_eq!(spatial.out_channels(), m, "ctx.0 output channels");
        assert_eq!(hidden.out_channels(), m, "ctx.1 output channels");
        assert_eq!(out.out_channels(), 2 * m, "ctx.2 output channels");
        CheckerboardFixed { spatial, hidden, out, m }
    }

    /// Multiply-adds per non-anchor position.
    pub fn macs_per_position(&self) -> usize {
        self.spatial.macs_per_output() + self.hidden.macs_per_output() + self.out.macs_per_output()
    }

    /// Adds the context's corrections to `prior`'s means and log-scales at every non-anchor
    /// position (`(y + x)` odd), given the decoded latent `y_hat` (channel-major `M × h × w`, in
    /// the gained domain; only anchor positions are read).
    pub fn refine(&self, y_hat: &[f32], prior: &mut PriorParameters, mode: SimdMode) {
        let (m, h, w) = (self.m, prior.height, prior.width);
        let plane = h * w;
        assert_eq!(y_hat.len(), m * plane, "latent size");
        let mut anchors = vec![0.0f32; plane * m];
        for c in 0..m {
            for p in (0..plane).filter(|&p| is_anchor(p, w)) {
                anchors[p * m + c] = y_hat[c * plane + p];
            }
        }
        let spatial = self.spatial.forward_at(&anchors, h, w, Positions::Checkerboard { parity: 1 }, mode);
        let others: Vec<usize> = (0..plane).filter(|&p| !is_anchor(p, w)).collect();
        let n = others.len();
        let mut features = vec![0.0f32; n * 3 * m];
        for (k, &p) in others.iter().enumerate() {
            let f = &mut features[k * 3 * m..(k + 1) * 3 * m];
            f[..m].copy_from_slice(&spatial[p * m..(p + 1) * m]);
            for c in 0..m {
                f[m + c] = prior.means[c * plane + p];
                f[2 * m + c] = prior.log_scales[c * plane + p];
            }
        }
        let mut hidden = self.hidden.forward(&features, 1, n, mode);
        relu_in_place(&mut hidden);
        let delta = self.out.forward(&hidden, 1, n, mode);
        for (k, &p) in others.iter().enumerate() {
            for c in 0..m {
                prior.means[c * plane + p] += delta[k * 2 * m + c];
                prior.log_scales[c * plane + p] += delta[k * 2 * m + m + c];
            }
        }
    }
}

/// Whether position `p` of a row-major plane `w` wide is an anchor (`(y + x)` even).
pub fn is_anchor(p: usize, w: usize) -> bool {
    (p / w + p % w).is_multiple_of(2)
}
