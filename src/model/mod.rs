//! The learned transforms (candle), and model files.
//!
//! A model is `g_a`, `h_a`, `g_s`, `h_s`, the gain units and the hyper-latent density, built
//! from a [`ModelConfig`]. A *model file* is safetensors holding every weight under its module
//! path (`g_a.0.weight`, …), the integer entropy tables (`entropy.*`) and metadata
//! (`kiln.config`, `kiln.anchors`, `kiln.training`). A model's fingerprint is the SHA-256 of the
//! file's bytes; containers record it.

pub mod analysis;
pub mod config;
pub mod context;
pub mod density;
pub mod gain;
pub mod gdn;
pub mod init;
pub mod layers;
pub mod shipped;
pub mod store;
pub mod synthesis;

use std::collections::HashMap;

use candle_core::{DType, Device, Module, Tensor, Var};
use candle_nn::{VarBuilder, VarMap};
use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};

pub use config::ModelConfig;

use crate::entropy::gaussian::{SCALE_MAX, SCALE_MIN};
use crate::entropy::{EntropyTables, gaussian, hyper};
use crate::error::{KilnError, Result};
use crate::kernels::{FixedConv, HyperSynthesisFixed};
use analysis::{Analysis, HyperAnalysis};
use density::FactorizedDensity;
use gain::GainUnits;
use synthesis::{HyperSynthesis, Synthesis};

/// Format tag of model files without a context model (every model shipped before the context
/// model existed).
pub const MODEL_FORMAT: &str = "kiln-model-1";

/// Format tag of model files with a context model ([`context`]) or hyper gains
/// ([`ModelConfig::hyper_gains`]). A new tag, so that a Kiln that predates them refuses such a
/// file instead of decoding with part of its parameters.
pub const MODEL_FORMAT_CONTEXT: &str = "kiln-model-2";

pub use shipped::{DEFAULT_MODEL_BYTES, ShippedModel};

/// The network: transforms, gains and hyper-latent density, with their variables.
#[derive(Clone)]
pub struct Model {
    /// Hyper-parameters.
    pub config: ModelConfig,
    /// Analysis transform.
    pub g_a: Analysis,
    /// Hyper-analysis.
    pub h_a: HyperAnalysis,
    /// Synthesis transform.
    pub g_s: Synthesis,
    /// Hyper-synthesis (training path).
    pub h_s: HyperSynthesis,
    /// Gain units.
    pub gains: GainUnits,
    /// Hyper-latent density.
    pub prior: FactorizedDensity,
    /// Checkerboard context, when the configuration has one.
    pub ctx: Option<context::Checkerboard>,
    varmap: VarMap,
}

impl std::fmt::Debug for Model {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Model").field("config", &self.config).finish_non_exhaustive()
    }
}

/// What a training run records in the model file.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct TrainingSummary {
    /// Folders the images came from.
    pub data: Vec<String>,
    /// Number of training images used.
    pub images: usize,
    /// Optimizer steps taken.
    pub steps: u64,
    /// Crop size.
    pub patch: usize,
    /// Batch size.
    pub batch: usize,
    /// Model it was fine-tuned from (fingerprint prefix), if any.
    pub init: Option<String>,
    /// Final training loss (moving average).
    pub final_loss: Option<f64>,
    /// Final training bits per pixel (moving average).
    pub final_bpp: Option<f64>,
    /// Final training PSNR in dB (moving average).
    pub final_psnr: Option<f64>,
    /// Distortion the objective used.
    #[serde(default)]
    pub distortion: crate::train::Distortion,
    /// Free-form note.
    pub note: String,
}

/// One anchor as recorded in the model file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct AnchorRecord {
    /// The quality at which the anchor sits.
    pub quality: f32,
    /// Its rate–distortion weight λ.
    pub lambda: f64,
}

/// Outputs of a training forward pass.
#[derive(Debug)]
pub struct TrainOutput {
    /// Reconstruction, `(B, 3, H, W)` in `[0, 1]` units.
    pub x_hat: Tensor,
    /// Bits of the latents, per sample `(B,)`.
    pub bits_y: Tensor,
    /// Bits of the latents per sample and channel `(B, M)` (summing to `bits_y`).
    pub bits_y_channels: Tensor,
    /// Bits of the hyper-latents, per sample `(B,)`.
    pub bits_z: Tensor,
}

/// Whether the weight `name` is used only by the encoder: the analysis `g_a` and the
/// hyper-analysis `h_a`. Everything else (synthesis, hyper-synthesis, gains, the hyper-latent
/// prior) shapes what the decoder computes or the tables it reads.
///
/// ```
/// assert!(kiln::model::is_encoder_weight("g_a.0.weight"));
/// assert!(kiln::model::is_encoder_weight("h_a.4.bias"));
/// assert!(!kiln::model::is_encoder_weight("h_s.0.weight"));
/// assert!(!kiln::model::is_encoder_weight("gain.y"));
/// ```
pub fn is_encoder_weight(name: &str) -> bool {
    name.starts_with("g_a.") || name.starts_with("h_a.")
}

/// The smallest probability a rate term assigns (caps a symbol's cost at about 30 bits).
pub(crate) const LIKELIHOOD_FLOOR: f64 = 1e-9;

fn std_normal_cdf(t: &Tensor) -> candle_core::Result<Tensor> {
    ((t / std::f64::consts::SQRT_2)?.erf()? + 1.0)? * 0.5
}

/// Probability of the unit bin around `residual` under `N(0, σ²)`, floored at 1e-9.
pub fn gaussian_likelihood(residual: &Tensor, sigma: &Tensor) -> candle_core::Result<Tensor> {
    let v = residual.abs()?;
    let upper = std_normal_cdf(&((0.5 - &v)? / sigma)?)?;
    let lower = std_normal_cdf(&((-0.5 - &v)? / sigma)?)?;
    (upper - lower)?.clamp(LIKELIHOOD_FLOOR, 1.0)
}

/// Rounds in the forward pass and passes gradients straight through.
pub(crate) fn ste_round(x: &Tensor) -> candle_core::Result<Tensor> {
    x + (x.round()? - x)?.detach()
}

impl Model {
    /// A new model with seeded initial weights.
    pub fn new(config: ModelConfig, seed: u64) -> Result<Self> {
        let model = Self::build(config)?;
        init::initialize(&model.varmap, &model.config.lambdas, seed)?;
        Ok(model)
    }

    fn build(config: ModelConfig) -> Result<Self> {
        let varmap = VarMap::new();
        let vb = VarBuilder::from_varmap(&varmap, DType::F32, &Device::Cpu);
        Self::build_with(config, vb, varmap)
    }

    /// A copy whose weights are constants, sharing their memory: gradients flow to the inputs
    /// only, which is what encoder-side refinement ([`crate::refine`]) needs, and the
    /// convolutions skip their weight gradients. It has no variables ([`Model::named_vars`] is
    /// empty), so it cannot be trained or exported.
    pub fn frozen(&self) -> Result<Self> {
        let tensors: HashMap<String, Tensor> =
            self.named_vars().into_iter().map(|(n, v)| (n, v.as_tensor().detach())).collect();
        let vb = VarBuilder::from_tensors(tensors, DType::F32, &Device::Cpu);
        Self::build_with(self.config.clone(), vb, VarMap::new())
    }

    fn build_with(config: ModelConfig, vb: VarBuilder, varmap: VarMap) -> Result<Self> {
        config.validate()?;
        Ok(Model {
            g_a: Analysis::new(&config, vb.pp("g_a"))?,
            h_a: HyperAnalysis::new(&config, vb.pp("h_a"))?,
            g_s: Synthesis::new(&config, vb.pp("g_s"))?,
            h_s: HyperSynthesis::new(&config, vb.pp("h_s"))?,
            gains: GainUnits::new(&config, vb.pp("gain"))?,
            prior: FactorizedDensity::new(config.nz, vb.pp("prior"))?,
            ctx: match config.context {
                context::ContextKind::None => None,
                context::ContextKind::Checkerboard => Some(context::Checkerboard::new(config.m, vb.pp("ctx"))?),
            },
            config,
            varmap,
        })
    }

    /// All trainable variables, by name, sorted.
    pub fn named_vars(&self) -> Vec<(String, Var)> {
        let data = self.varmap.data().lock().expect("varmap lock");
        let mut v: Vec<(String, Var)> = data.iter().map(|(k, v)| (k.clone(), v.clone())).collect();
        v.sort_by(|a, b| a.0.cmp(&b.0));
        v
    }

    /// Sets variables from `tensors` (every variable must be present with its shape).
    pub fn load_weights(&self, tensors: &HashMap<String, Tensor>) -> Result<()> {
        for (name, var) in self.named_vars() {
            let t = tensors.get(&name).ok_or_else(|| KilnError::BadModel(format!("missing weight {name}")))?;
            if t.dims() != var.dims() {
                return Err(KilnError::BadModel(format!(
                    "weight {name} has shape {:?}, expected {:?}",
                    t.dims(),
                    var.dims()
                )));
            }
            var.set(&t.to_dtype(DType::F32)?)?;
        }
        Ok(())
    }

    /// Training forward pass on `x` `(B, 3, H, W)` in `[0, 1]`, `H` and `W` multiples of the
    /// hyper stride ([`ModelConfig::hyper_stride`], 64 for four stages).
    ///
    /// `anchor` `(B,)` u32 and `weight` `(B,)` f32 give each sample's quality position;
    /// `noise_y`, `noise_z` are uniform in `[−½, ½)` with the shapes of `y` and `z` (passed in so
    /// that training is reproducible from its seed). Rates use the noisy values (the
    /// differentiable stand-in for rounding); the synthesis sees straight-through-rounded values.
    pub fn forward_train(
        &self,
        x: &Tensor,
        anchor: &Tensor,
        weight: &Tensor,
        noise_y: &Tensor,
        noise_z: &Tensor,
    ) -> Result<TrainOutput> {
        self.forward_with(x, anchor, weight, Some((noise_y, noise_z)))
    }

    /// Like [`Model::forward_train`], but the rates are those of the values the codec would
    /// code: `round(z)` and `round(y − μ)`, gradients passed straight through the rounding.
    ///
    /// With the priors fixed this is the real code length (up to the float hyper-synthesis), the
    /// objective encoder-side refinement ([`crate::refine`]) minimizes per image; encoder-only
    /// training minimizes it over the training crops with `kiln train --encoder-only
    /// --rounded-rate`. It cannot train the priors themselves: a rounded value's likelihood has
    /// no gradient with respect to the density's shape between integers.
    pub fn forward_train_rounded(&self, x: &Tensor, anchor: &Tensor, weight: &Tensor) -> Result<TrainOutput> {
        self.forward_with(x, anchor, weight, None)
    }

    fn forward_with(
        &self,
        x: &Tensor,
        anchor: &Tensor,
        weight: &Tensor,
        noise: Option<(&Tensor, &Tensor)>,
    ) -> Result<TrainOutput> {
        let g = &self.gains;
        let y = self.g_a.forward(x)?;
        let yg = y.broadcast_mul(&GainUnits::batch(&g.y, anchor, weight)?)?;
        let z = self.h_a.forward(&yg)?;
        let zg = z.broadcast_mul(&GainUnits::batch(&g.z, anchor, weight)?)?;
        let z_rounded = ste_round(&zg)?;
        let z_rate = match noise {
            Some((_, noise_z)) => (&zg + noise_z)?,
            None => z_rounded.clone(),
        };
        let lik_z = self.prior.likelihood(&z_rate)?.clamp(LIKELIHOOD_FLOOR, 1.0)?;
        let z_hat = z_rounded.broadcast_mul(&GainUnits::batch(&g.z_inv, anchor, weight)?)?;
        let (mu, log_scale) = self.h_s.forward_split(&z_hat)?;
        let (mu, log_scale) = match &g.hyper {
            None => (mu, log_scale),
            Some((hs_mu, hs_ls)) => (
                mu.broadcast_mul(&GainUnits::batch(hs_mu, anchor, weight)?)?,
                log_scale.broadcast_add(&GainUnits::batch_log(hs_ls, anchor, weight)?)?,
            ),
        };
        let (mu, log_scale) = match &self.ctx {
            None => (mu, log_scale),
            Some(ctx) => {
                // Anchors are coded from h_s alone; the context sees their decoded values and
                // corrects the other half's parameters.
                let (h, w) = (yg.dim(2)?, yg.dim(3)?);
                let anchor = context::anchor_mask(h, w)?;
                let other = (1.0 - &anchor)?;
                let anchors = (ste_round(&(&yg - &mu)?)? + &mu)?.broadcast_mul(&anchor)?;
                let (d_mu, d_ls) = ctx.forward(&anchors, &mu, &log_scale)?;
                ((&mu + d_mu.broadcast_mul(&other)?)?, (&log_scale + d_ls.broadcast_mul(&other)?)?)
            }
        };
        let sigma = log_scale.clamp(SCALE_MIN.ln(), SCALE_MAX.ln())?.exp()?;
        let residual = ste_round(&(&yg - &mu)?)?;
        let y_rate = match noise {
            Some((noise_y, _)) => ((&yg + noise_y)? - &mu)?,
            None => residual.clone(),
        };
        let lik_y = gaussian_likelihood(&y_rate, &sigma)?;
        let y_hat = (residual + &mu)?;
        let x_hat = self.g_s.forward(&y_hat.broadcast_mul(&GainUnits::batch(&g.y_inv, anchor, weight)?)?)?;
        let bits = |lik: &Tensor| -> candle_core::Result<Tensor> {
            let b = lik.dim(0)?;
            lik.log()?.reshape((b, ()))?.sum(1)? * (-1.0 / std::f64::consts::LN_2)
        };
        let (b, m) = (lik_y.dim(0)?, lik_y.dim(1)?);
        let bits_y_channels = (lik_y.log()?.reshape((b, m, ()))?.sum(2)? * (-1.0 / std::f64::consts::LN_2))?;
        Ok(TrainOutput { x_hat, bits_y: bits_y_channels.sum(1)?, bits_y_channels, bits_z: bits(&lik_z)? })
    }

    /// The fixed-order hyper-synthesis built from this model's `h_s` weights.
    pub fn hyper_synthesis_fixed(&self) -> Result<HyperSynthesisFixed> {
        let vars: HashMap<String, Var> = self.named_vars().into_iter().collect();
        let conv = |name: &str| -> Result<FixedConv> {
            let w = vars[&format!("{name}.weight")].as_tensor();
            let b = vars[&format!("{name}.bias")].as_tensor();
            let (co, ci, k, _) = w.dims4()?;
            Ok(FixedConv::new(&w.flatten_all()?.to_vec1::<f32>()?, &b.to_vec1::<f32>()?, co, ci, k))
        };
        Ok(HyperSynthesisFixed::new([conv("h_s.0")?, conv("h_s.2")?, conv("h_s.4")?], self.config.nz))
    }

    /// The fixed-order checkerboard context built from this model's `ctx` weights, if it has
    /// a context model.
    pub fn context_fixed(&self) -> Result<Option<crate::kernels::CheckerboardFixed>> {
        if self.ctx.is_none() {
            return Ok(None);
        }
        let vars: HashMap<String, Var> = self.named_vars().into_iter().collect();
        let conv = |name: &str, taps: Option<&[usize]>| -> Result<FixedConv> {
            let w = vars[&format!("{name}.weight")].as_tensor();
            let b = vars[&format!("{name}.bias")].as_tensor();
            let (co, ci, k, _) = w.dims4()?;
            let (w, b) = (w.flatten_all()?.to_vec1::<f32>()?, b.to_vec1::<f32>()?);
            Ok(match taps {
                Some(t) => FixedConv::with_taps(&w, &b, co, ci, k, t),
                None => FixedConv::new(&w, &b, co, ci, k),
            })
        };
        let k = context::CONTEXT_KERNEL;
        let r = (k / 2) as isize;
        let taps: Vec<usize> =
            context::anchor_taps(k).into_iter().map(|(dy, dx)| ((dy + r) * k as isize + dx + r) as usize).collect();
        Ok(Some(crate::kernels::CheckerboardFixed::new(
            conv("ctx.0", Some(&taps))?,
            conv("ctx.1", None)?,
            conv("ctx.2", None)?,
            self.config.m,
        )))
    }

    /// The integer synthesis built from this model's `g_s` weights (see
    /// [`crate::kernels::int_synthesis`]); the inverse GDN's effective `β = β_raw² + 10⁻⁶` and
    /// `γ = (γ_raw + √0.1·I)²` are computed here elementwise in `f32` (single IEEE operations,
    /// so the same everywhere).
    pub fn synthesis_integer(&self) -> Result<crate::kernels::IntSynthesis> {
        let vars: HashMap<String, Var> = self.named_vars().into_iter().collect();
        let get = |name: &str| -> Result<(Vec<f32>, Vec<usize>)> {
            let t = vars.get(name).ok_or_else(|| KilnError::BadModel(format!("missing weight {name}")))?.as_tensor();
            Ok((t.flatten_all()?.to_vec1::<f32>()?, t.dims().to_vec()))
        };
        let mut stages = Vec::new();
        for i in 0..self.config.stages {
            let (weight, dims) = get(&format!("g_s.{}.weight", 2 * i))?;
            let (bias, _) = get(&format!("g_s.{}.bias", 2 * i))?;
            let igdn = if i + 1 < self.config.stages {
                let (beta_raw, _) = get(&format!("g_s.{}.beta", 2 * i + 1))?;
                let (gamma_raw, gdims) = get(&format!("g_s.{}.gamma", 2 * i + 1))?;
                let c = gdims[0];
                let beta: Vec<f32> = beta_raw.iter().map(|b| b * b + 1e-6).collect();
                let offset = 0.316_227_77f32;
                let gamma: Vec<f32> = (0..c * c)
                    .map(|k| {
                        let v = gamma_raw[k] + if k / c == k % c { offset } else { 0.0 };
                        v * v
                    })
                    .collect();
                Some((beta, gamma))
            } else {
                None
            };
            stages.push(crate::kernels::int_synthesis::StageParameters {
                weight,
                bias,
                shape: (dims[1], dims[0], dims[2]),
                igdn,
            });
        }
        Ok(crate::kernels::IntSynthesis::new(&stages))
    }

    /// Encoder and decoder multiply-adds per pixel `(encoder, decoder)`, the encoder including
    /// `h_s` and the context model (it needs the same means and scales).
    pub fn macs_per_pixel(&self) -> (f64, f64) {
        let c = &self.config;
        let ctx = match c.context {
            context::ContextKind::None => 0.0,
            context::ContextKind::Checkerboard => {
                context::Checkerboard::decoder_macs_per_latent(c.m) / (c.latent_stride() * c.latent_stride()) as f64
            }
        };
        let hs = HyperSynthesis::macs_per_pixel(c) + ctx;
        (Analysis::macs_per_pixel(c) + HyperAnalysis::macs_per_pixel(c) + hs, Synthesis::macs_per_pixel(c) + hs)
    }

    /// Builds this model's entropy tables (the export step: floating point is used here, once).
    pub fn build_entropy_tables(&self) -> Result<EntropyTables> {
        Ok(EntropyTables {
            gaussian: gaussian::gaussian_tables(),
            log_scale_thresholds: gaussian::log_scale_thresholds(),
            hyper: hyper::tabulate_density(&self.prior)?,
        })
    }

    /// Serializes weights, freshly built entropy tables and metadata into model-file bytes.
    pub fn export(&self, summary: &TrainingSummary) -> Result<Vec<u8>> {
        let tables = self.build_entropy_tables()?;
        let mut tensors: Vec<(String, Tensor)> =
            self.named_vars().into_iter().map(|(n, v)| (n, v.as_tensor().clone())).collect();
        tensors.extend(tables.to_tensors()?);
        let anchors: Vec<AnchorRecord> = (0..self.config.anchors())
            .map(|i| AnchorRecord { quality: self.config.anchor_quality(i), lambda: self.config.lambdas[i] })
            .collect();
        let json = |v: serde_json::Result<String>| v.expect("serializing plain structs cannot fail");
        let metadata = HashMap::from([
            ("kiln.format".to_string(), self.config.format_tag().to_string()),
            ("kiln.config".to_string(), json(serde_json::to_string(&self.config))),
            ("kiln.anchors".to_string(), json(serde_json::to_string(&anchors))),
            ("kiln.training".to_string(), json(serde_json::to_string(summary))),
        ]);
        tensors.sort_by(|a, b| a.0.cmp(&b.0));
        let bytes = safetensors::serialize(tensors.iter().map(|(n, t)| (n.as_str(), t)), Some(metadata))
            .map_err(|e| KilnError::BadModel(format!("cannot serialize: {e}")))?;
        canonical_header(bytes)
    }
}

/// The same safetensors file with its JSON header's keys in sorted order (padded with spaces
/// to a multiple of 8 bytes, as the format allows): the writer builds the header from hash
/// maps, whose order changes from run to run, and a model's fingerprint is over its bytes, so
/// exporting the same weights must give the same file. The data section is untouched (its
/// offsets are relative to it).
fn canonical_header(bytes: Vec<u8>) -> Result<Vec<u8>> {
    let bad = |m: &str| KilnError::BadModel(format!("cannot serialize: {m}"));
    let n = u64::from_le_bytes(bytes.get(..8).ok_or_else(|| bad("short file"))?.try_into().expect("8 bytes")) as usize;
    let header: serde_json::Value = serde_json::from_slice(bytes.get(8..8 + n).ok_or_else(|| bad("short header"))?)
        .map_err(|e| bad(&e.to_string()))?;
    fn sorted(v: serde_json::Value) -> serde_json::Value {
        match v {
            serde_json::Value::Object(map) => {
                let mut entries: Vec<(String, serde_json::Value)> =
                    map.into_iter().map(|(k, v)| (k, sorted(v))).collect();
                entries.sort_by(|a, b| a.0.cmp(&b.0));
                serde_json::Value::Object(entries.into_iter().collect())
            }
            serde_json::Value::Array(a) => serde_json::Value::Array(a.into_iter().map(sorted).collect()),
            other => other,
        }
    }
    let mut text = serde_json::to_vec(&sorted(header)).map_err(|e| bad(&e.to_string()))?;
    while !text.len().is_multiple_of(8) {
        text.push(b' ');
    }
    let mut out = Vec::with_capacity(8 + text.len() + bytes.len() - 8 - n);
    out.extend_from_slice(&(text.len() as u64).to_le_bytes());
    out.extend_from_slice(&text);
    out.extend_from_slice(&bytes[8 + n..]);
    Ok(out)
}

/// A loaded model file: the network, its integer tables, metadata and fingerprint.
#[derive(Debug, Clone)]
pub struct ModelFile {
    /// The network.
    pub model: Model,
    /// Integer entropy tables, as stored.
    pub tables: EntropyTables,
    /// Training summary from the metadata.
    pub training: TrainingSummary,
    /// SHA-256 of the file's bytes.
    pub fingerprint: [u8; 32],
    /// Size of the file in bytes.
    pub size: usize,
    /// The file's bytes, exactly as fingerprinted (what an archive stores beside its containers).
    bytes: std::sync::Arc<[u8]>,
}

/// SHA-256 of model-file bytes.
pub fn fingerprint(bytes: &[u8]) -> [u8; 32] {
    Sha256::digest(bytes).into()
}

/// Lowercase hex of the first `n` bytes.
pub fn hex_prefix(bytes: &[u8], n: usize) -> String {
    bytes.iter().take(n).map(|b| format!("{b:02x}")).collect()
}

impl ModelFile {
    /// Parses model-file bytes.
    pub fn from_bytes(bytes: &[u8]) -> Result<Self> {
        if bytes.is_empty() {
            return Err(KilnError::BadModel(
                "the model file is empty (is a default model embedded in this build?)".into(),
            ));
        }
        let (_, meta) = safetensors::SafeTensors::read_metadata(bytes)
            .map_err(|e| KilnError::BadModel(format!("not a safetensors file: {e}")))?;
        let meta = meta.metadata().clone().unwrap_or_default();
        let tag = meta.get("kiln.format").map(String::as_str);
        if tag != Some(MODEL_FORMAT) && tag != Some(MODEL_FORMAT_CONTEXT) {
            return Err(KilnError::BadModel(format!(
                "not a Kiln model this version reads (format tag {tag:?}; this version reads {MODEL_FORMAT} and {MODEL_FORMAT_CONTEXT})"
            )));
        }
        let config: ModelConfig = serde_json::from_str(meta.get("kiln.config").map(String::as_str).unwrap_or(""))
            .map_err(|e| KilnError::BadModel(format!("kiln.config: {e}")))?;
        if tag != Some(config.format_tag()) {
            return Err(KilnError::BadModel(format!(
                "format tag {tag:?} does not match the configuration (context model {:?}, hyper gains {})",
                config.context, config.hyper_gains
            )));
        }
        let training: TrainingSummary =
            meta.get("kiln.training").and_then(|s| serde_json::from_str(s).ok()).unwrap_or_default();
        config.validate()?;
        let tensors = candle_core::safetensors::load_buffer(bytes, &Device::Cpu)?;
        // Every shape is checked against the config by building the network over the file's own
        // tensors first (nothing is allocated beyond what the file holds), so a config that
        // claims more channels than the file carries is refused before its weights are made.
        Model::build_with(
            config.clone(),
            VarBuilder::from_tensors(tensors.clone(), DType::F32, &Device::Cpu),
            VarMap::new(),
        )
        .map_err(|e| KilnError::BadModel(format!("the weights do not match the config: {}", first_line(&e))))?;
        for (name, t) in &tensors {
            if t.dtype().is_float() && !all_finite(t)? {
                return Err(KilnError::BadModel(format!("weight {name} holds NaN or infinite values")));
            }
        }
        let model = Model::build(config)?;
        model.load_weights(&tensors)?;
        let tables = EntropyTables::from_tensors(&tensors)?;
        if tables.hyper.len() != model.config.nz {
            return Err(KilnError::BadModel("hyper tables do not match the hyper-latent channels".into()));
        }
        Ok(ModelFile {
            model,
            tables,
            training,
            fingerprint: fingerprint(bytes),
            size: bytes.len(),
            bytes: bytes.into(),
        })
    }

    /// The model file's bytes, exactly those the fingerprint is the SHA-256 of.
    pub fn bytes(&self) -> &[u8] {
        &self.bytes
    }

    /// The shipped model this file is, if it is one (by fingerprint, whatever its file name).
    pub fn shipped(&self) -> Option<&'static ShippedModel> {
        ShippedModel::by_fingerprint(&self.fingerprint)
    }

    /// Reads the model `spec` names: `None` or `default` is the newest shipped model (embedded);
    /// the name of a shipped model ([`shipped::SHIPPED`]) is that model; anything else is a path
    /// (write `./NAME` for a file that has a shipped model's name).
    ///
    /// # Errors
    /// I/O errors naming the path (special files are refused, not read); [`KilnError::BadModel`]
    /// for a file over [`MODEL_FILE_MAX_BYTES`], one [`ModelFile::from_bytes`] refuses, or a
    /// shipped model whose bytes this installation lacks.
    pub fn load(spec: Option<&std::path::Path>) -> Result<Self> {
        let path = match spec {
            None => return Self::from_bytes(&ShippedModel::newest().bytes()?),
            Some(p) => p,
        };
        if let Some(m) = path.to_str().and_then(ShippedModel::by_name) {
            return Self::from_bytes(&m.bytes()?);
        }
        Self::read(path)
    }

    /// Reads the model file at `path` (no shipped names).
    ///
    /// # Errors
    /// As [`ModelFile::load`].
    pub fn read(path: &std::path::Path) -> Result<Self> {
        let len = std::fs::metadata(path).map_err(|e| KilnError::io(path, e))?.len();
        if len > MODEL_FILE_MAX_BYTES {
            return Err(KilnError::BadModel(format!(
                "{} is {len} bytes; model files above {MODEL_FILE_MAX_BYTES} bytes are not supported",
                path.display()
            )));
        }
        let bytes = crate::image_io::read_regular(path).map_err(|e| match e {
            KilnError::UnsupportedImage(m) => KilnError::BadModel(m),
            other => other,
        })?;
        Self::from_bytes(&bytes).map_err(|e| match e {
            KilnError::BadModel(m) => KilnError::BadModel(format!("{}: {m}", path.display())),
            other => other,
        })
    }
}

/// Largest model file Kiln reads (the shipped models are about 5 MB; 1024 channels everywhere
/// would still fit).
pub const MODEL_FILE_MAX_BYTES: u64 = 1 << 30;

fn first_line(e: &KilnError) -> String {
    e.to_string().lines().next().unwrap_or("").to_string()
}

/// Whether every element of a float tensor is finite.
fn all_finite(t: &Tensor) -> Result<bool> {
    let v = t.to_dtype(DType::F32)?.flatten_all()?.to_vec1::<f32>()?;
    Ok(v.iter().all(|x| x.is_finite()))
}
