//! The encoder-refinement flags shared by `compress`, `pack` and `evaluate`.

use clap::Args;
use kiln::Codec;
use kiln::refine::RefineConfig;

/// `--refine N [--refine-lr R]`.
#[derive(Debug, Args)]
pub struct RefineArgs {
    /// Encoder refinement: gradient steps per tile on the latent (0: off). Fewer bits at the
    /// same quality for a slower encoder (about 1 s per step per megapixel on 2 cores); files decode
    /// like any other. 100 is what the README's figures use; 40 with --refine-lr 0.01 gets most of it.
    #[arg(long, default_value_t = 0)]
    refine: usize,
    /// Step size of the refinement, in quantization steps of the latent.
    #[arg(long, default_value_t = RefineConfig::default().learning_rate)]
    refine_lr: f64,
}

impl RefineArgs {
    /// `codec` with this refinement (checked).
    pub fn apply(&self, codec: Codec) -> anyhow::Result<Codec> {
        Ok(codec.with_refinement(RefineConfig { iterations: self.refine, learning_rate: self.refine_lr })?)
    }
}
