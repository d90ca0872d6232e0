//! Training: rate + λ·distortion on random crops, with checkpoints, validation and export.
//!
//! The objective is the negative evidence lower bound of a VAE whose posterior is a unit-width
//! uniform box around the encoder's output: the box has entropy 0, so the bound reduces to the
//! expected code length of the noisy latents under the prior (the rate) plus the expected
//! reconstruction log-likelihood, which for a Gaussian decoder is λ·MSE up to constants.
//! Sampling the box as `y + u`, `u ~ U(−½, ½)`, is the reparameterisation trick.

pub mod checkpoint;
pub mod data;
pub mod distortion;
pub mod optim;
pub mod stages;
pub mod widen;

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::Instant;

use candle_core::{Device, Tensor};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

use crate::codec::Codec;
use crate::error::{KilnError, Result};
use crate::files::{Overwrite, check_output};
use crate::image_io::write_atomic;
use crate::metrics::psnr;
use crate::model::config::HYPER_STRIDE_MAX;
use crate::model::context::ContextKind;
use crate::model::gain::{GAIN_TABLES, HYPER_GAIN_TABLES, retarget_rows};
use crate::model::{Model, ModelConfig, ModelFile, TrainingSummary, hex_prefix, is_encoder_weight};
use checkpoint::{CheckpointMeta, LatentWarmup};
use data::{ImageSet, list_images};
pub use distortion::Distortion;
use optim::{Adam, AdamConfig};

/// Where the initial weights come from.
#[derive(Debug, Clone)]
pub enum Init {
    /// A new model with this configuration, initialised from the seed.
    Fresh(ModelConfig),
    /// Fine-tune an existing model file (`None`: the embedded default).
    FineTune(Option<PathBuf>),
}

/// Everything `kiln train` takes.
#[derive(Debug, Clone)]
pub struct TrainOptions {
    /// Folders of training images.
    pub images: Vec<PathBuf>,
    /// Where the exported model goes.
    pub out: PathBuf,
    /// Initial weights.
    pub init: Init,
    /// Total optimizer steps.
    pub steps: u64,
    /// Crops per step.
    pub batch: usize,
    /// Crop side (multiple of 64).
    pub patch: usize,
    /// Peak learning rate.
    pub lr: f64,
    /// Resume from this checkpoint.
    pub resume: Option<PathBuf>,
    /// Seed for initialisation, crops and noise.
    pub seed: u64,
    /// Validation images.
    pub val: Option<PathBuf>,
    /// Checkpoint path.
    pub checkpoint: PathBuf,
    /// Checkpoint every this many steps.
    pub checkpoint_every: u64,
    /// Validate every this many steps (0: only at the end).
    pub val_every: u64,
    /// Clip gradients to this global norm.
    pub clip: f64,
    /// Fraction of the run after which the learning rate drops tenfold.
    pub decay_from: f64,
    /// What the objective measures as distortion.
    pub distortion: Distortion,
    /// Stop (checkpoint and export) after this many steps of this invocation, to train in
    /// time-boxed chunks; `--resume` continues on the same schedule.
    pub stop_after: Option<u64>,
    /// Trade-off anchors λ. For a new model they replace the configuration's; with `init` or
    /// `resume` the gain tables are re-targeted to them ([`retarget_rows`]), e.g. to extend a
    /// model's quality range upwards. `None` keeps the model's own.
    pub lambdas: Option<Vec<f64>>,
    /// Latent channels `M`. For a new model it replaces the configuration's; with `init` or
    /// `resume` a smaller latent is grown to it ([`widen::widen_latent`]: the grown model starts
    /// out computing what the old one did). `None` keeps the model's own.
    pub latent_channels: Option<usize>,
    /// Hidden channels `N` of the analysis and synthesis transforms. For a new model it replaces
    /// the configuration's; with `init` or `resume` narrower transforms are grown to it
    /// ([`widen::widen_hidden`]: the grown model computes exactly what the old one did). `None`
    /// keeps the model's own.
    pub hidden_channels: Option<usize>,
    /// Stride-2 stages of the transforms (latent stride `2^stages`). For a new model it replaces
    /// the configuration's; with `init` or `resume` a model one stage deeper is cut down to it
    /// ([`stages::drop_stage`]: a start for training, not the same codec). `None` keeps the
    /// model's own.
    pub stages: Option<usize>,
    /// Context model. For a new model it replaces the configuration's; with `init` or `resume` a
    /// model without one is given one whose output layer is zero (it starts out coding exactly
    /// as before). `None` keeps the model's own.
    pub context: Option<ContextKind>,
    /// Give the hyper-synthesis per-anchor gains ([`ModelConfig::hyper_gains`]). For a new model
    /// it sets the configuration's; with `init` or `resume` a model without them gets them at
    /// zero (it starts out coding exactly as before).
    pub hyper_gains: bool,
    /// Steps over which a grown latent's new channels' bits are phased into the loss
    /// ([`LatentWarmup`]: not at all for the first half, then linearly); 0 counts them fully
    /// from the start.
    pub latent_warmup: u64,
    /// Exponent `α` of the per-crop loss weight `(λ_mid / λ)^α` (`λ_mid`: geometric mean of the
    /// anchors; 0 weighs every crop alike). A crop's loss grows roughly like `√λ`, so with `α = 0`
    /// the high-λ crops dominate every batch's gradient and the low qualities are undertrained;
    /// `α = 0.5` gives every trade-off point a similar share. Each crop still minimises its own
    /// `bpp + λ·D`: the weight only changes how the shared weights divide their capacity.
    pub balance: f64,
    /// Update only the encoder-side weights ([`crate::model::is_encoder_weight`]): the decoder,
    /// its priors and their tables stay bit-for-bit as they are. Refused for a new model and
    /// together with options that change the model's shape or anchors.
    pub encoder_only: bool,
    /// Count the rates of the rounded values the codec codes ([`Model::forward_train_rounded`])
    /// instead of the noisy stand-in. Only meaningful with fixed priors (`encoder_only`): the
    /// priors themselves get no useful gradient from it. Experimental: on the default model it
    /// raised the coded rate at equal PSNR within 1000 steps, where the noisy rates lowered it
    /// (likely cause, not isolated: the hyper-analysis follows the straight-through gradient of
    /// the rounded hyper-latent).
    pub rounded_rate: bool,
    /// Replace an existing `out` or `checkpoint` of another run (a resumed run replaces its own).
    pub force: bool,
    /// Most bytes of decoded training images held in memory; larger sets are streamed from
    /// disk ([`data::ImageSet::load_within`]).
    pub memory_budget: u64,
    /// Show a progress bar.
    pub progress: bool,
}

/// Per-crop loss weight `(λ_mid / λ)^α` for a run with `anchors`, `λ_mid` their geometric mean.
///
/// ```
/// use kiln::train::balance_weight;
/// let anchors = [0.01, 0.04];
/// assert!((balance_weight(&anchors, 0.02, 0.5) - 1.0).abs() < 1e-12); // the middle weighs 1
/// assert!((balance_weight(&anchors, 0.01, 0.5) - 2f64.sqrt()).abs() < 1e-12);
/// assert_eq!(balance_weight(&anchors, 0.04, 0.0), 1.0); // α = 0: unweighted
/// ```
pub fn balance_weight(anchors: &[f64], lambda: f64, alpha: f64) -> f64 {
    let mid = (anchors.iter().map(|l| l.ln()).sum::<f64>() / anchors.len().max(1) as f64).exp();
    (mid / lambda).powf(alpha)
}

/// Learning rate at `step`: `lr` until `decay_from · steps`, then `lr / 10`.
pub fn learning_rate(o: &TrainOptions, step: u64) -> f64 {
    if (step as f64) < o.decay_from * o.steps as f64 { o.lr } else { o.lr * 0.1 }
}

/// What a run reports at the end.
#[derive(Debug, Clone)]
pub struct TrainReport {
    /// Steps completed.
    pub steps: u64,
    /// Loss per step, from the start of this invocation.
    pub losses: Vec<f64>,
    /// Whether the run stopped (Ctrl-C or `stop_after`) before reaching `steps`.
    pub interrupted: bool,
    /// Final moving averages `(loss, bpp, psnr)`.
    pub averages: (f64, f64, f64),
}

static STOP: AtomicBool = AtomicBool::new(false);

fn install_interrupt_handler() {
    // A second installation in one process (tests) fails harmlessly: the first handler stays.
    let _ = ctrlc::set_handler(|| STOP.store(true, Ordering::SeqCst));
}

/// Validation of a model on images: `(quality, mean bpp, mean PSNR)` per quality.
pub fn validate(codec: &Codec, images: &ImageSet, qualities: &[f32]) -> Result<Vec<(f32, f64, f64)>> {
    let mut out = Vec::new();
    for &q in qualities {
        let (mut bpp, mut p) = (0.0, 0.0);
        for img in images.images() {
            let enc = codec.encode(img, q)?;
            let dec = codec.decode(&enc.bytes)?;
            bpp += enc.bytes.len() as f64 * 8.0 / (img.width as f64 * img.height as f64);
            p += psnr(&img.data, &dec.data).min(99.0);
        }
        let n = images.len().max(1) as f64;
        out.push((q, bpp / n, p / n));
    }
    Ok(out)
}

struct Run {
    model: Model,
    adam: Adam,
    rng: ChaCha8Rng,
    step: u64,
    init: Option<String>,
    averages: Option<(f64, f64, f64)>,
    warmup: Option<LatentWarmup>,
}

/// Re-targets the gain tables in `tensors` from anchors `old` to `new`. Adam moments of the gain
/// tables (when present) keep the rows of anchors that stay and start from zero for new ones.
fn retarget_gains(tensors: &mut HashMap<String, Tensor>, old: &[f64], new: &[f64]) -> Result<()> {
    let present: Vec<&str> =
        GAIN_TABLES.iter().chain(HYPER_GAIN_TABLES.iter().filter(|n| tensors.contains_key(**n))).copied().collect();
    for name in present {
        let t = tensors.get(name).ok_or_else(|| KilnError::BadModel(format!("missing weight {name}")))?;
        let t = retarget_rows(t, old, new)?;
        tensors.insert(name.to_string(), t);
        for moment in [format!("adam.m.{name}"), format!("adam.v.{name}")] {
            let Some(m) = tensors.get(&moment) else { continue };
            let rows = m.to_dtype(candle_core::DType::F32)?.to_vec2::<f32>()?;
            let c = rows.first().map_or(0, Vec::len);
            let kept: Vec<f32> = new
                .iter()
                .flat_map(|l| old.iter().position(|o| o == l).map_or(vec![0.0; c], |i| rows[i].clone()))
                .collect();
            tensors.insert(moment, Tensor::from_vec(kept, (new.len(), c), &Device::Cpu)?);
        }
    }
    eprintln!("trade-off anchors re-targeted from {old:?} to {new:?}");
    Ok(())
}

/// Applies `o.latent_channels` (growing the latent), `o.hidden_channels` (growing the
/// transforms), `o.stages` (dropping a stage) and `o.lambdas` (re-targeting the gain tables) to
/// a model's `tensors` and `config` at `step`; whether anything changed, and the rate warm-up of
/// the grown channels when the latent grew. Adam moments of grown tensors grow with them (old entries keep theirs).
fn adapt(
    tensors: &mut HashMap<String, Tensor>,
    config: &mut ModelConfig,
    o: &TrainOptions,
    step: u64,
) -> Result<(bool, Option<LatentWarmup>)> {
    let mut changed = false;
    let mut warmup = None;
    if let Some(m) = o.latent_channels.filter(|&m| m != config.m) {
        if !config.context.is_none() || config.hyper_gains {
            return Err(KilnError::InvalidArgument(format!(
                "--latent-channels {m}: the latent of a model with a context model or hyper gains cannot grow (their layers are sized by it)\n\
                 hint: grow the latent of a model without them, then add them with --context or --hyper-gains"
            )));
        }
        tensors.extend(widen::widen_latent(tensors, config, m, o.seed)?);
        eprintln!("latent grown from {} to {m} channels", config.m);
        if o.latent_warmup > 0 {
            warmup = Some(LatentWarmup { first_channel: config.m, from: step, steps: o.latent_warmup });
        }
        config.m = m;
        changed = true;
    }
    if let Some(n) = o.hidden_channels.filter(|&n| n != config.n) {
        tensors.extend(widen::widen_hidden(tensors, config, n, o.seed)?);
        eprintln!("transforms grown from {} to {n} hidden channels", config.n);
        config.n = n;
        changed = true;
    }
    if let Some(s) = o.stages.filter(|&s| s != config.stages) {
        if s + 1 != config.stages {
            return Err(KilnError::InvalidArgument(format!(
                "--stages {s}: a trained model with {} stages can only lose one\nhint: use --stages {}",
                config.stages,
                config.stages.saturating_sub(1)
            )));
        }
        *tensors = stages::drop_stage(tensors, config)?;
        eprintln!("transforms cut from {} to {s} stages (latent stride {})", config.stages, 1 << s);
        config.stages = s;
        changed = true;
    }
    if let Some(kind) = o.context.filter(|&k| k != config.context) {
        if !config.context.is_none() {
            return Err(KilnError::InvalidArgument(format!(
                "--context {kind:?}: the model already has a context model ({:?}); only a model without one can be given one",
                config.context
            )));
        }
        let with = Model::new(ModelConfig { context: kind, ..config.clone() }, o.seed)?;
        for (name, var) in with.named_vars().into_iter().filter(|(n, _)| n.starts_with("ctx.")) {
            tensors.insert(name, var.as_tensor().clone());
        }
        eprintln!("context model {kind:?} added (its output layer starts at zero)");
        config.context = kind;
        changed = true;
    }
    if o.hyper_gains && !config.hyper_gains {
        let rows = config.anchors();
        for name in HYPER_GAIN_TABLES {
            tensors.insert(name.to_string(), Tensor::zeros((rows, config.m), candle_core::DType::F32, &Device::Cpu)?);
        }
        eprintln!("hyper gains added (at zero: the hyper-synthesis predicts as before until trained)");
        config.hyper_gains = true;
        changed = true;
    }
    if let Some(new) = o.lambdas.as_ref().filter(|l| **l != config.lambdas) {
        retarget_gains(tensors, &config.lambdas, new)?;
        config.lambdas = new.clone();
        changed = true;
    }
    if changed && o.encoder_only {
        return Err(KilnError::InvalidArgument(
            "--encoder-only keeps the decoder as it is, so the model cannot change its shape or anchors in the same run\n\
             hint: drop --latent-channels, --hidden-channels, --stages and --lambdas, or run them first without --encoder-only"
                .into(),
        ));
    }
    Ok((changed, warmup))
}

fn start(o: &TrainOptions) -> Result<Run> {
    if let Some(ck) = &o.resume {
        let (mut meta, mut tensors) = checkpoint::load(ck)?;
        let (_, grown) = adapt(&mut tensors, &mut meta.config, o, meta.step)?;
        let model = Model::new(meta.config.clone(), o.seed)?;
        model.load_weights(&tensors)?;
        let mut adam = Adam::new(model.named_vars(), AdamConfig::default())?;
        adam.load_state(&tensors, meta.step)?;
        eprintln!("resuming from {} at step {}", ck.display(), meta.step);
        let warmup = grown.or(meta.latent_warmup).filter(|w| w.weight(meta.step) < 1.0);
        return Ok(Run {
            model,
            adam,
            rng: meta.rng(),
            step: meta.step,
            init: meta.init,
            averages: meta.averages,
            warmup,
        });
    }
    let mut warmup = None;
    let (model, init) = match &o.init {
        Init::Fresh(c) => {
            let mut c = c.clone();
            if let Some(l) = &o.lambdas {
                c.lambdas = l.clone();
            }
            if let Some(m) = o.latent_channels {
                c.m = m;
            }
            if let Some(n) = o.hidden_channels {
                c.n = n;
            }
            if let Some(s) = o.stages {
                c.stages = s;
            }
            if let Some(k) = o.context {
                c.context = k;
            }
            c.hyper_gains |= o.hyper_gains;
            (Model::new(c, o.seed)?, None)
        }
        Init::FineTune(p) => {
            let f = ModelFile::load(p.as_deref())?;
            let fingerprint = Some(hex_prefix(&f.fingerprint, 8));
            let mut config = f.model.config.clone();
            let mut tensors: HashMap<String, Tensor> =
                f.model.named_vars().into_iter().map(|(n, v)| (n, v.as_tensor().clone())).collect();
            let (changed, grown) = adapt(&mut tensors, &mut config, o, 0)?;
            warmup = grown;
            if changed {
                let model = Model::new(config, o.seed)?;
                model.load_weights(&tensors)?;
                (model, fingerprint)
            } else {
                (f.model, fingerprint)
            }
        }
    };
    let adam = Adam::new(model.named_vars(), AdamConfig::default())?;
    Ok(Run { model, adam, rng: ChaCha8Rng::seed_from_u64(o.seed), step: 0, init, averages: None, warmup })
}

fn uniform_noise(rng: &mut ChaCha8Rng, shape: &[usize]) -> Result<Tensor> {
    let n: usize = shape.iter().product();
    let v: Vec<f32> = (0..n).map(|_| rng.gen_range(-0.5f32..0.5)).collect();
    Ok(Tensor::from_vec(v, shape, &Device::Cpu)?)
}

/// Trains (or resumes, or fine-tunes) and exports the model to `o.out`.
/// Range checks of every numeric option, and of the output paths, done before any image is
/// read: a typo must not cost a training run.
///
/// # Errors
/// [`KilnError::InvalidArgument`] stating the valid range, or the output-path errors of
/// [`crate::files::check_output`].
pub fn validate_options(o: &TrainOptions) -> Result<()> {
    let bad = |m: String| Err(KilnError::InvalidArgument(m));
    let in_range = |v: f64, lo: f64, hi: f64| v.is_finite() && v >= lo && v <= hi;
    if !(1..=1024).contains(&o.batch) {
        return bad(format!("batch {} is outside 1..=1024", o.batch));
    }
    if o.steps == 0 {
        return bad("steps must be at least 1".into());
    }
    if o.memory_budget < 1 << 20 {
        return bad(format!("memory budget {} bytes is below 1 MiB", o.memory_budget));
    }
    if !(in_range(o.lr, 0.0, 1.0) && o.lr > 0.0) {
        return bad(format!("learning rate {} is not in (0, 1]", o.lr));
    }
    if !(in_range(o.clip, 0.0, 1e6) && o.clip > 0.0) {
        return bad(format!("gradient clip {} is not a positive number (at most 1e6)", o.clip));
    }
    if !(in_range(o.decay_from, 0.0, 1.0) && o.decay_from > 0.0) {
        return bad(format!("decay point {} is not a fraction of the run in (0, 1]", o.decay_from));
    }
    if !in_range(o.balance, 0.0, 4.0) {
        return bad(format!("balance {} is outside 0..=4", o.balance));
    }
    if o.patch == 0 || o.patch > 4096 {
        return bad(format!("patch {} is outside 64..=4096", o.patch));
    }
    if let Some(l) = &o.lambdas
        && !l.iter().all(|v| v.is_finite() && *v > 0.0)
    {
        return bad(format!("trade-off anchors {l:?} must be positive numbers"));
    }
    for (what, v) in [("latent channels", o.latent_channels), ("hidden channels", o.hidden_channels)] {
        if v.is_some_and(|v| !(1..=1024).contains(&v)) {
            return bad(format!("{what} {} is outside 1..=1024", v.unwrap_or(0)));
        }
    }
    if o.stages.is_some_and(|s| !(2..=4).contains(&s)) {
        return bad(format!("stages {} is outside 2..=4", o.stages.unwrap_or(0)));
    }
    if let Some(v) = &o.val {
        let has_images = list_images(std::slice::from_ref(v)).is_ok_and(|l| !l.is_empty());
        if !has_images {
            return bad(format!("the validation folder {} holds no images", v.display()));
        }
    }
    let same = |a: &Path, b: &Path| a == b || matches!((a.canonicalize(), b.canonicalize()), (Ok(x), Ok(y)) if x == y);
    if same(&o.out, &o.checkpoint) {
        return bad(format!(
            "the model ({}) and the checkpoint would be the same file\nhint: name the model .safetensors, or pass another checkpoint path",
            o.out.display()
        ));
    }
    let mut inputs: Vec<&Path> = Vec::new();
    if let Some(r) = &o.resume {
        inputs.push(r);
    }
    if let Init::FineTune(Some(m)) = &o.init {
        inputs.push(m);
    }
    // A resumed run writes its own model and checkpoint again; a fresh one must not replace
    // another run's files unless told to.
    let own = if o.force || o.resume.is_some() { Overwrite::Replace } else { Overwrite::Refuse };
    check_output(&o.out, own, &inputs)?;
    let resumes_here = o.resume.as_deref().is_some_and(|r| same(r, &o.checkpoint));
    let ck_policy = if o.force || resumes_here { Overwrite::Replace } else { Overwrite::Refuse };
    let ck_inputs: Vec<&Path> = inputs.iter().copied().filter(|p| !(resumes_here && same(p, &o.checkpoint))).collect();
    check_output(&o.checkpoint, ck_policy, &ck_inputs)
}

pub fn train(o: &TrainOptions) -> Result<TrainReport> {
    validate_options(o)?;
    if o.patch == 0 || !o.patch.is_multiple_of(HYPER_STRIDE_MAX) {
        return Err(KilnError::InvalidArgument(format!(
            "--patch {} must be a positive multiple of {HYPER_STRIDE_MAX}",
            o.patch
        )));
    }
    if o.rounded_rate && !o.encoder_only {
        return Err(KilnError::InvalidArgument(
            "--rounded-rate gives the priors no gradient, so it needs fixed priors\nhint: add --encoder-only".into(),
        ));
    }
    if o.encoder_only && matches!(o.init, Init::Fresh(_)) && o.resume.is_none() {
        return Err(KilnError::InvalidArgument(
            "--encoder-only trains the encoder of an existing model\nhint: add --init MODEL or --resume CHECKPOINT"
                .into(),
        ));
    }
    let mut data = ImageSet::load_within(&o.images, o.patch, o.memory_budget, o.seed)?;
    if data.is_empty() {
        return Err(KilnError::InvalidArgument(format!(
            "no usable training images under {:?} ({} skipped)\nhint: give folders of images at least {} px on each side",
            o.images,
            data.skipped.len(),
            o.patch
        )));
    }
    let val = match &o.val {
        Some(d) => Some(ImageSet::load(std::slice::from_ref(d), HYPER_STRIDE_MAX)?),
        None => None,
    };
    if data.is_streamed() {
        eprintln!(
            "training on {} image files, streamed: {} decoded images ({} MiB) held at a time within the {} MiB budget",
            data.files(),
            data.len(),
            data.held_bytes() >> 20,
            o.memory_budget >> 20
        );
    } else {
        eprintln!("training on {} images ({} skipped)", data.len(), data.skipped.len());
    }
    let mut run = start(o)?;
    install_interrupt_handler();
    let config = run.model.config.clone();
    let lambdas: Vec<f64> = config.lambdas.clone();
    let bar = progress_bar(o, run.step);
    let mut losses = Vec::new();
    let t0 = Instant::now();
    let first_step = run.step;
    // Start of the window the logged speed covers (the steps since the previous log line), so
    // that a pause (a suspended process, a shared machine) spoils one line, not every later one.
    let (mut window_t, mut window_step) = (Instant::now(), run.step);
    let mut interrupted = false;
    while run.step < o.steps {
        let paused = o.stop_after.is_some_and(|n| run.step - first_step >= n);
        if STOP.load(Ordering::SeqCst) || paused {
            interrupted = true;
            break;
        }
        let x = data.sample(o.batch, o.patch, &mut run.rng)?;
        let (mut idx, mut wts, mut lam, mut bal) = (vec![], vec![], vec![], vec![]);
        for _ in 0..o.batch {
            let t: f64 = run.rng.gen_range(0.0..(config.anchors() - 1) as f64);
            let i = (t.floor() as usize).min(config.anchors() - 2);
            let l = t - i as f64;
            idx.push(i as u32);
            wts.push(l as f32);
            let lambda = (lambdas[i].ln() * (1.0 - l) + lambdas[i + 1].ln() * l).exp();
            lam.push(lambda as f32);
            bal.push(balance_weight(&lambdas, lambda, o.balance) as f32);
        }
        let p = o.patch;
        let (sy, sz) = (config.latent_stride(), config.hyper_stride());
        let ny = uniform_noise(&mut run.rng, &[o.batch, config.m, p / sy, p / sy])?;
        let nz = uniform_noise(&mut run.rng, &[o.batch, config.nz, p / sz, p / sz])?;
        let idx = Tensor::new(idx, &Device::Cpu)?;
        let wts = Tensor::new(wts, &Device::Cpu)?;
        let lam = Tensor::new(lam, &Device::Cpu)?;
        let bal = Tensor::new(bal, &Device::Cpu)?;
        let out = if o.rounded_rate {
            run.model.forward_train_rounded(&x, &idx, &wts)?
        } else {
            run.model.forward_train(&x, &idx, &wts, &ny, &nz)?
        };
        let pixels = (p * p) as f64;
        // Bits in the objective: a grown latent's new channels count with their warm-up weight.
        let bits_y = match run.warmup {
            Some(w) if w.weight(run.step) < 1.0 => {
                let m = config.m;
                let weights: Vec<f32> =
                    (0..m).map(|c| if c < w.first_channel { 1.0 } else { w.weight(run.step) as f32 }).collect();
                out.bits_y_channels.broadcast_mul(&Tensor::new(weights, &Device::Cpu)?.reshape((1, m))?)?.sum(1)?
            }
            _ => out.bits_y.clone(),
        };
        let bpp = ((&bits_y + &out.bits_z)? / pixels)?;
        let dist = o.distortion.per_sample(&out.x_hat, &x)?;
        let per_crop = (&bpp + ((&dist * &lam)? * o.distortion.lambda_scale())?)?;
        let loss = (&per_crop * &bal)?.mean(0)?;
        // Logged: the unweighted objective, comparable across `balance` settings.
        let objective = per_crop.mean(0)?.detach().to_scalar::<f32>()?;
        let mse = ((&out.x_hat - &x)? * 255.0)?.sqr()?.mean_all()?.detach();
        let loss_v = loss.to_scalar::<f32>()?;
        if !loss_v.is_finite() {
            bar.abandon();
            return Err(KilnError::Diverged { step: run.step, loss: loss_v });
        }
        let grads = loss.backward()?;
        let mut grads = run.adam.gradients(&grads)?;
        if o.encoder_only {
            for (g, name) in grads.iter_mut().zip(run.adam.names()) {
                if !is_encoder_weight(name) {
                    *g = None;
                }
            }
        }
        let norm = Adam::grad_norm(&grads);
        let scale = if norm > o.clip { o.clip / norm } else { 1.0 };
        run.adam.step(&grads, learning_rate(o, run.step), scale)?;
        run.step += 1;
        // Logged: the bits actually coded, whatever the warm-up weighs in the objective.
        let coded_bpp = ((&out.bits_y + &out.bits_z)? / pixels)?;
        let bpp_v = coded_bpp.mean(0)?.to_scalar::<f32>()? as f64;
        let mse_v = mse.to_scalar::<f32>()? as f64;
        let psnr_v = 10.0 * (255.0f64.powi(2) / mse_v.max(1e-10)).log10();
        let cur = (objective as f64, bpp_v, psnr_v);
        run.averages = Some(match run.averages {
            None => cur,
            Some(a) => (0.98 * a.0 + 0.02 * cur.0, 0.98 * a.1 + 0.02 * cur.1, 0.98 * a.2 + 0.02 * cur.2),
        });
        losses.push(objective as f64);
        let a = run.averages.unwrap_or(cur);
        let rate = (run.step - first_step) as f64 / t0.elapsed().as_secs_f64().max(1e-9);
        bar.set_position(run.step);
        bar.set_message(format!("loss {:.3}  bpp {:.3}  PSNR {:.2} dB  {:.2} steps/s", a.0, a.1, a.2, rate));
        if !o.progress && (run.step % 50 == 0 || run.step == o.steps) {
            let recent = (run.step - window_step) as f64 / window_t.elapsed().as_secs_f64().max(1e-9);
            (window_t, window_step) = (Instant::now(), run.step);
            eprintln!(
                "step {}/{}  loss {:.4}  bpp {:.4}  PSNR {:.2} dB  {:.3} steps/s",
                run.step, o.steps, a.0, a.1, a.2, recent
            );
        }
        if run.step % o.checkpoint_every == 0 {
            save_checkpoint(o, &run)?;
        }
        if let Some(v) = val.as_ref().filter(|_| o.val_every > 0 && run.step % o.val_every == 0) {
            report_validation(&run, o, v, &data, &bar)?;
        }
    }
    save_checkpoint(o, &run)?;
    bar.finish_and_clear();
    let averages = run.averages.unwrap_or((f64::NAN, f64::NAN, f64::NAN));
    let bytes = run.model.export(&summary(&run, o, &data))?;
    write_atomic(&o.out, &bytes)?;
    eprintln!("exported {} ({} bytes) after {} steps", o.out.display(), bytes.len(), run.step);
    if interrupted {
        eprintln!(
            "stopped at step {} of {}; checkpoint saved to {}\nhint: continue with --resume {}",
            run.step,
            o.steps,
            o.checkpoint.display(),
            o.checkpoint.display()
        );
    } else if let Some(v) = &val {
        report_validation(&run, o, v, &data, &indicatif::ProgressBar::hidden())?;
    }
    Ok(TrainReport { steps: run.step, losses, interrupted, averages })
}

fn summary(run: &Run, o: &TrainOptions, data: &ImageSet) -> TrainingSummary {
    let a = run.averages;
    TrainingSummary {
        data: o.images.iter().map(|p| p.display().to_string()).collect(),
        images: data.len(),
        steps: run.step,
        patch: o.patch,
        batch: o.batch,
        init: run.init.clone(),
        final_loss: a.map(|a| a.0),
        final_bpp: a.map(|a| a.1),
        final_psnr: a.map(|a| a.2),
        distortion: o.distortion,
        note: String::new(),
    }
}

fn save_checkpoint(o: &TrainOptions, run: &Run) -> Result<()> {
    let (rng_seed, rng_stream, rng_word_pos) = CheckpointMeta::rng_state(&run.rng);
    let meta = CheckpointMeta {
        config: run.model.config.clone(),
        step: run.step,
        rng_seed,
        rng_stream,
        rng_word_pos,
        init: run.init.clone(),
        averages: run.averages,
        latent_warmup: run.warmup,
    };
    checkpoint::save(&o.checkpoint, &run.model, run.adam.state()?, &meta)
}

fn report_validation(
    run: &Run,
    o: &TrainOptions,
    val: &ImageSet,
    data: &ImageSet,
    bar: &indicatif::ProgressBar,
) -> Result<()> {
    let bytes = run.model.export(&summary(run, o, data))?;
    let codec = Codec::new(ModelFile::from_bytes(&bytes)?)?;
    let rows = validate(&codec, val, &[1.0, 50.0, 100.0])?;
    let text: Vec<String> = rows.iter().map(|(q, b, p)| format!("q{q}: {b:.3} bpp {p:.2} dB")).collect();
    let line = format!("validation at step {}: {}", run.step, text.join(", "));
    if bar.is_hidden() {
        eprintln!("{line}")
    } else {
        bar.println(line)
    }
    Ok(())
}

fn progress_bar(o: &TrainOptions, start: u64) -> indicatif::ProgressBar {
    if !o.progress {
        return indicatif::ProgressBar::hidden();
    }
    let bar = indicatif::ProgressBar::new(o.steps);
    bar.set_style(
        indicatif::ProgressStyle::with_template("{bar:30} {pos}/{len} [{elapsed_precise} < {eta_precise}] {msg}")
            .expect("valid template"),
    );
    bar.set_position(start);
    bar
}
