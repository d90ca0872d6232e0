//! `kiln train`.

use std::path::PathBuf;

use clap::Args;
use kiln::ModelConfig;
use kiln::train::{Init, TrainOptions};

#[derive(Debug, Args)]
pub struct TrainArgs {
    /// Folders of training images (searched recursively).
    #[arg(long, num_args = 1.., required = true)]
    images: Vec<PathBuf>,
    /// Where to write the exported model.
    #[arg(long)]
    out: PathBuf,
    /// Fine-tune from this model: a model file, `default`, or a shipped model's name.
    #[arg(long)]
    init: Option<PathBuf>,
    /// Configuration of a new model: `default`, `tiny`, or a JSON file.
    #[arg(long, default_value = "default")]
    config: String,
    /// Total optimizer steps.
    #[arg(long, default_value_t = 10_000)]
    steps: u64,
    /// Crops per step.
    #[arg(long, default_value_t = 8)]
    batch: usize,
    /// Crop side in pixels (multiple of 64).
    #[arg(long, default_value_t = 128)]
    patch: usize,
    /// Learning rate.
    #[arg(long, default_value_t = 1e-4)]
    lr: f64,
    /// Resume from a checkpoint.
    #[arg(long)]
    resume: Option<PathBuf>,
    /// Seed for initialisation, crops and noise.
    #[arg(long, default_value_t = 1)]
    seed: u64,
    /// Folder of validation images.
    #[arg(long)]
    val: Option<PathBuf>,
    /// Checkpoint path (default: OUT with extension .ckpt).
    #[arg(long)]
    checkpoint: Option<PathBuf>,
    /// Steps between checkpoints.
    #[arg(long, default_value_t = 100)]
    checkpoint_every: u64,
    /// Steps between validations (0: only at the end).
    #[arg(long, default_value_t = 500)]
    val_every: u64,
    /// Global gradient-norm clip.
    #[arg(long, default_value_t = 5.0)]
    clip: f64,
    /// Fraction of the run after which the learning rate drops tenfold.
    #[arg(long, default_value_t = 0.8)]
    decay_from: f64,
    /// Distortion term of the objective.
    #[arg(long, value_enum, default_value = "mse")]
    distortion: kiln::train::Distortion,
    /// Stop after this many steps of this invocation (checkpoint and export; resume later).
    #[arg(long)]
    stop_after: Option<u64>,
    /// Trade-off anchors λ, comma-separated and increasing (loss = bpp + λ·MSE on 0–255). With
    /// --init or --resume the model's gain tables are re-targeted to them (e.g. to add higher
    /// qualities); quality 1 maps to the first, 100 to the last.
    #[arg(long, value_delimiter = ',')]
    lambdas: Option<Vec<f64>>,
    /// Latent channels M. For a new model it replaces the configuration's; with --init or
    /// --resume a smaller latent grows to it, the grown model starting out exactly as the old one.
    #[arg(long)]
    latent_channels: Option<usize>,
    /// Weigh each crop's loss by (λ_mid/λ)^BALANCE (λ_mid: geometric mean of the anchors), so
    /// that low qualities get a fair share of the gradient; 0 weighs all crops alike.
    #[arg(long, default_value_t = 0.0)]
    balance: f64,
    /// Hidden channels N of the transforms: for a new model it replaces the config's; with
    /// --init or --resume narrower transforms are grown to N, the grown model computing exactly
    /// what the old one did.
    #[arg(long, value_name = "N")]
    hidden_channels: Option<usize>,
    /// Stride-2 stages of the transforms, 2 to 4 (latent stride 4, 8 or 16): for a new model it
    /// replaces the config's; with --init or --resume a model one stage deeper is cut down to it
    /// (a start for training, not the same codec).
    #[arg(long)]
    stages: Option<usize>,
    /// Context model: `none` or `checkerboard` (two passes; the second half of the latent is
    /// predicted from the first). With --init or --resume a model without one is given one
    /// that starts out coding exactly as before.
    #[arg(long, value_name = "KIND", value_parser = parse_context)]
    context: Option<kiln::model::context::ContextKind>,
    /// Tell the hyper-synthesis the quality: per-anchor gains on its predicted means and
    /// scales. With --init or --resume a model without them gets them at zero (it starts out
    /// coding exactly as before).
    #[arg(long)]
    hyper_gains: bool,
    /// With --latent-channels: phase the new channels' bits into the loss over this many steps
    /// (not counted for the first half, then rising linearly), so that the synthesis learns to
    /// use them before the rate pulls them to zero; 0 counts them fully at once.
    #[arg(long, default_value_t = 0, value_name = "STEPS")]
    latent_warmup: u64,
    /// Train only the encoder side (analysis and hyper-analysis) of a trained model (--init or
    /// --resume); the decoder, the priors and their tables stay exactly as they are, so decode
    /// time and decoded files' format do not change.
    #[arg(long)]
    encoder_only: bool,
    /// With --encoder-only: count the rates of the rounded values the codec codes instead of the
    /// noisy stand-in used to train the priors. Experimental: on the default model it made
    /// coding worse within 1000 steps (DEVELOPERS.md).
    #[arg(long, requires = "encoder_only")]
    rounded_rate: bool,
    /// Most decoded training images held in memory, in MiB; a larger set is streamed from disk
    /// (a pool within this budget, refreshed one image per step in an order shuffled from --seed).
    #[arg(long, value_name = "MIB", default_value_t = 4096)]
    memory_budget: u64,
    /// Print plain log lines instead of a progress bar.
    #[arg(long)]
    log: bool,
    /// Replace an existing model or checkpoint of another run at --out / --checkpoint (a resumed
    /// run always writes its own again).
    #[arg(long)]
    force: bool,
}

fn parse_context(s: &str) -> Result<kiln::model::context::ContextKind, String> {
    use kiln::model::context::ContextKind;
    match s {
        "none" => Ok(ContextKind::None),
        "checkerboard" => Ok(ContextKind::Checkerboard),
        _ => Err(format!("unknown context model {s:?} (choose none or checkerboard)")),
    }
}

fn parse_config(s: &str) -> anyhow::Result<ModelConfig> {
    Ok(match s {
        "default" => ModelConfig::default(),
        "tiny" => ModelConfig::tiny(),
        path => {
            let text = std::fs::read_to_string(path).map_err(|e| kiln::KilnError::io(path, e))?;
            serde_json::from_str(&text).map_err(|e| anyhow::anyhow!("{path}: bad model config: {e}"))?
        }
    })
}

pub fn train(a: TrainArgs) -> anyhow::Result<()> {
    let init = match a.init {
        Some(p) if p.as_os_str() == "default" => Init::FineTune(None),
        Some(p) => Init::FineTune(Some(p)),
        None => Init::Fresh(parse_config(&a.config)?),
    };
    let opts = TrainOptions {
        images: a.images,
        checkpoint: a.checkpoint.unwrap_or_else(|| a.out.with_extension("ckpt")),
        out: a.out,
        init,
        steps: a.steps,
        batch: a.batch,
        patch: a.patch,
        lr: a.lr,
        resume: a.resume,
        seed: a.seed,
        val: a.val,
        checkpoint_every: a.checkpoint_every.max(1),
        val_every: a.val_every,
        clip: a.clip,
        decay_from: a.decay_from,
        distortion: a.distortion,
        stop_after: a.stop_after,
        lambdas: a.lambdas,
        latent_channels: a.latent_channels,
        balance: a.balance,
        hidden_channels: a.hidden_channels,
        stages: a.stages,
        context: a.context,
        hyper_gains: a.hyper_gains,
        latent_warmup: a.latent_warmup,
        encoder_only: a.encoder_only,
        rounded_rate: a.rounded_rate,
        progress: !a.log,
        force: a.force,
        memory_budget: a.memory_budget.saturating_mul(1 << 20),
    };
    kiln::train::train(&opts)?;
    Ok(())
}
