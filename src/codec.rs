//! Compress and decompress: image → container bytes → image.
//!
//! ```no_run
//! use kiln::{Codec, ModelFile, Picture, AlphaPolicy};
//! let codec = Codec::new(ModelFile::load(None)?)?;
//! let pic = Picture::open("photo.png".as_ref(), AlphaPolicy::Refuse)?;
//! let coded = codec.encode(&pic, 60.0)?;
//! let back = codec.decode(&coded.bytes)?;
//! assert_eq!((back.width, back.height), (pic.width, pic.height));
//! # Ok::<(), kiln::KilnError>(())
//! ```

use candle_core::{Device, Module, Tensor};
use rayon::prelude::*;
use serde::Serialize;

use crate::container::{self, Header, TileRecord, TileStreams};
use crate::entropy::coder::{SymbolDecoder, SymbolEncoder, TableSet};
use crate::entropy::gaussian::{SCALE_MAX, SCALE_MIN, scale_index};
use crate::error::{KilnError, Result};
use crate::image_io::Picture;
use crate::kernels::context_fixed::is_anchor;
use crate::kernels::{CheckerboardFixed, HyperSynthesisFixed, IntPath, IntSynthesis, PriorParameters, SimdMode};
use crate::model::config::check_quality;
use crate::model::gain::GainVectors;
use crate::model::{Model, ModelFile, hex_prefix};
use crate::refine::{RefineConfig, RefineTarget, refine};

/// One pass over the latent's elements in coding order (channel by channel, row-major).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Pass {
    /// Every element (no context model).
    All,
    /// The anchors of the checkerboard (`(y + x)` even).
    Anchors,
    /// The other half, coded with the context's parameters.
    Others,
}

impl Pass {
    /// Flat indices (`c·h·w + y·w + x`) of this pass' elements in an `m × h × w` latent.
    fn indices(self, m: usize, h: usize, w: usize) -> impl Iterator<Item = usize> {
        let plane = h * w;
        (0..m * plane).filter(move |&i| match self {
            Pass::All => true,
            Pass::Anchors => is_anchor(i % plane, w),
            Pass::Others => !is_anchor(i % plane, w),
        })
    }
}

/// Which synthesis a decode runs.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Synthesis {
    Integer,
    Float,
}

/// A model ready to code: its network, fixed-order hyper-synthesis and coding tables.
#[derive(Debug)]
pub struct Codec {
    file: ModelFile,
    hyper_fixed: HyperSynthesisFixed,
    /// The checkerboard context on the fixed-order path, when the model has one.
    context: Option<CheckerboardFixed>,
    synthesis: IntSynthesis,
    int_path: IntPath,
    gaussian: TableSet,
    hyper: TableSet,
    simd: SimdMode,
    refine: RefineConfig,
    /// The model with constant weights, for refinement (built when refinement is turned on).
    frozen: Option<Model>,
}

/// A compressed image and what it cost.
#[derive(Debug, Clone)]
pub struct Encoded {
    /// The whole container file.
    pub bytes: Vec<u8>,
    /// Model information content of the coded symbols, `−Σ log2 p`.
    pub ideal_bits: f64,
    /// The part of `ideal_bits` spent on hyper-latents.
    pub ideal_bits_hyper: f64,
    /// Bits of the entropy-coded streams (container header and checksums excluded).
    pub coded_bits: u64,
}

/// The `--stats` report of one compression.
#[derive(Debug, Clone, Serialize)]
pub struct EncodeStats {
    /// Container size in bytes.
    pub bytes: usize,
    /// Bits per pixel of the whole container.
    pub bpp: f64,
    /// Model information content of the coded symbols.
    pub ideal_bits: f64,
    /// Bits of the entropy-coded streams.
    pub coded_bits: u64,
    /// Header, tile table and checksums in bytes.
    pub overhead_bytes: usize,
    /// Image width.
    pub width: u32,
    /// Image height.
    pub height: u32,
    /// Quality used.
    pub quality: f32,
}

impl Encoded {
    /// The report for `--stats`.
    pub fn stats(&self, width: u32, height: u32, quality: f32) -> EncodeStats {
        EncodeStats {
            bytes: self.bytes.len(),
            bpp: self.bytes.len() as f64 * 8.0 / (width as f64 * height as f64),
            ideal_bits: self.ideal_bits,
            coded_bits: self.coded_bits,
            overhead_bytes: self.bytes.len() - (self.coded_bits / 8) as usize,
            width,
            height,
            quality,
        }
    }
}

/// How much of the padded tile the coded latent covers.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum LatentLayout {
    /// The latent covers the tile edge-padded to a multiple of the latent stride `s`
    /// (`⌈h/s⌉ × ⌈w/s⌉`; `s` = 16 for four stages); it is edge-padded to a multiple of 4 for the
    /// hyper-analysis only, and those padding elements are not coded. What [`Codec::encode`]
    /// writes.
    Cropped,
    /// The latent covers the tile edge-padded to a multiple of the hyper stride `4s`
    /// (`4·hz × 4·wz`), padding rows
    /// and all: what encoders wrote before the cropped layout. Kept so that tests can check that
    /// such files still decode; it cost 9–10% more bits on a 640×400 validation photograph.
    Padded64,
}

/// Cuts tile `rect` out of `pic`, as RGB in `[0, 1]`, edge-padded to multiples of `multiple`.
fn tile_tensor(pic: &Picture, rect: container::Rect, multiple: usize) -> Result<Tensor> {
    let (x0, y0, w, h) = (rect.0 as usize, rect.1 as usize, rect.2 as usize, rect.3 as usize);
    let pw = w.div_ceil(multiple) * multiple;
    let ph = h.div_ceil(multiple) * multiple;
    let c = pic.channels as usize;
    let stride = pic.width as usize * c;
    let mut data = vec![0f32; 3 * pw * ph];
    for y in 0..ph {
        let sy = y0 + y.min(h - 1);
        for x in 0..pw {
            let sx = x0 + x.min(w - 1);
            for ch in 0..3 {
                let v = pic.data[sy * stride + sx * c + if c == 3 { ch } else { 0 }];
                data[(ch * ph + y) * pw + x] = v as f32 / 255.0;
            }
        }
    }
    Ok(Tensor::from_vec(data, (1, 3, ph, pw), &Device::Cpu)?)
}

/// Latent `(hy, wy)` and hyper-latent `(hz, wz)` sizes of a `w × h` tile for a model with latent
/// stride `stride` ([`crate::ModelConfig::latent_stride`]): the latent covers the tile at that
/// stride, the hyper-latent covers the latent at stride 4.
///
/// ```
/// use kiln::codec::tile_latent_sizes;
/// assert_eq!(tile_latent_sizes(100, 40, 16), ((3, 7), (1, 2)));
/// assert_eq!(tile_latent_sizes(100, 40, 8), ((5, 13), (2, 4)));
/// ```
pub fn tile_latent_sizes(w: usize, h: usize, stride: usize) -> ((usize, usize), (usize, usize)) {
    let (hy, wy) = (h.div_ceil(stride), w.div_ceil(stride));
    ((hy, wy), (hy.div_ceil(4), wy.div_ceil(4)))
}

/// The top-left `tw × th` of three `h × w` planes in `[0, 1]` as interleaved 8-bit RGB
/// (`round(255·v)`, clamped), in one pass.
fn planes_to_rgb8(planes: &[f32], h: usize, w: usize, tw: usize, th: usize) -> Vec<u8> {
    let mut out = vec![0u8; tw * th * 3];
    out.par_chunks_mut(tw * 3).enumerate().for_each(|(y, row)| {
        for ch in 0..3 {
            let src = &planes[(ch * h + y) * w..][..tw];
            for (x, &v) in src.iter().enumerate() {
                row[x * 3 + ch] = (v * 255.0).round().clamp(0.0, 255.0) as u8;
            }
        }
    });
    out
}

/// Edge-pads a latent `(1, M, hy, wy)` to `(1, M, 4·hz, 4·wz)` for the hyper-analysis.
fn pad_latent(y: &Tensor, hz: usize, wz: usize) -> Result<Tensor> {
    let r = 4;
    let (_, _, hy, wy) = y.dims4()?;
    Ok(y.pad_with_same(2, 0, hz * r - hy)?.pad_with_same(3, 0, wz * r - wy)?)
}

/// The prior of the top-left `(hy, wy)` part of each channel of `p` (laid out `(M, H, W)`).
fn crop_prior(p: PriorParameters, hy: usize, wy: usize) -> PriorParameters {
    if (p.height, p.width) == (hy, wy) {
        return p;
    }
    let crop = |v: &[f32]| -> Vec<f32> {
        v.chunks(p.height * p.width)
            .flat_map(|plane| plane.chunks(p.width).take(hy).flat_map(|row| &row[..wy]))
            .copied()
            .collect()
    };
    PriorParameters { means: crop(&p.means), log_scales: crop(&p.log_scales), height: hy, width: wy }
}

fn scale_channels(t: &Tensor, gains: &[f32]) -> Result<Tensor> {
    let g = Tensor::from_slice(gains, (1, gains.len(), 1, 1), &Device::Cpu)?;
    Ok(t.broadcast_mul(&g)?)
}

impl Codec {
    /// Prepares a model for coding (builds the coding models from its integer tables).
    pub fn new(file: ModelFile) -> Result<Self> {
        let hyper_fixed = file.model.hyper_synthesis_fixed()?;
        let context = file.model.context_fixed()?;
        let synthesis = file.model.synthesis_integer()?;
        let gaussian = TableSet::new(file.tables.gaussian.clone())?;
        let hyper = TableSet::new(file.tables.hyper.clone())?;
        Ok(Codec {
            file,
            hyper_fixed,
            context,
            synthesis,
            int_path: IntPath::from_env(),
            gaussian,
            hyper,
            simd: SimdMode::from_env(),
            refine: RefineConfig::default(),
            frozen: None,
        })
    }

    /// Runs the integer synthesis on `path` (by default `KILN_SIMD` decides: see
    /// [`IntPath::from_env`]). The decoded pixels are the same on every path; only the speed
    /// differs.
    pub fn with_int_path(mut self, path: IntPath) -> Self {
        self.int_path = path;
        self
    }

    /// Makes the encoder refine each tile's latent (see [`crate::refine`]); decoding is unchanged.
    pub fn with_refinement(mut self, config: RefineConfig) -> Result<Self> {
        config.validate()?;
        if config.iterations > 0 && self.frozen.is_none() {
            self.frozen = Some(self.file.model.frozen()?);
        }
        self.refine = config;
        Ok(self)
    }

    /// The encoder refinement in use.
    pub fn refinement(&self) -> RefineConfig {
        self.refine
    }

    /// The model file in use.
    pub fn model_file(&self) -> &ModelFile {
        &self.file
    }

    fn gains(&self, quality: f32) -> Result<GainVectors> {
        let (i, l) = self.file.model.config.anchor_position(quality)?;
        Ok(self.file.model.gains.at(i, l)?)
    }

    /// Compresses `pic` at `quality` (1–100) into a container.
    pub fn encode(&self, pic: &Picture, quality: f32) -> Result<Encoded> {
        self.encode_with_layout(pic, quality, LatentLayout::Cropped)
    }

    /// [`Codec::encode`] with a chosen latent layout; both layouts decode with [`Codec::decode`].
    pub fn encode_with_layout(&self, pic: &Picture, quality: f32, layout: LatentLayout) -> Result<Encoded> {
        check_quality(quality)?;
        container::check_geometry(pic.width, pic.height, pic.channels, 8)?;
        let gains = self.gains(quality)?;
        let lambda = self.file.model.config.lambda_for_quality(quality)?;
        let (tw, th) = container::choose_tile_size(pic.width, pic.height);
        let mut records = Vec::new();
        let mut streams = Vec::new();
        let (mut ideal_bits, mut ideal_bits_hyper) = (0.0, 0.0);
        for rect in container::tile_grid(pic.width, pic.height, tw, th) {
            let (rec, s, (bits_z, bits_y)) = self.encode_tile(pic, rect, &gains, lambda, layout)?;
            records.push(rec);
            streams.push(s);
            ideal_bits += bits_z + bits_y;
            ideal_bits_hyper += bits_z;
        }
        let coded_bits = streams.iter().map(|s: &TileStreams| 32 * (s.hyper.len() + s.latent.len()) as u64).sum();
        let header = Header {
            flags: if self.context.is_some() { container::FLAG_CHECKERBOARD } else { 0 },
            width: pic.width,
            height: pic.height,
            channels: pic.channels,
            bit_depth: 8,
            model_fingerprint: self.file.fingerprint,
            quality,
            tile_width: tw,
            tile_height: th,
            tiles: records,
        };
        Ok(Encoded { bytes: container::write(&header, &streams)?, ideal_bits, ideal_bits_hyper, coded_bits })
    }

    fn encode_tile(
        &self,
        pic: &Picture,
        rect: container::Rect,
        gains: &GainVectors,
        lambda: f64,
        layout: LatentLayout,
    ) -> Result<(TileRecord, TileStreams, (f64, f64))> {
        let model = &self.file.model;
        let stride = model.config.latent_stride();
        let multiple = if layout == LatentLayout::Cropped { stride } else { model.config.hyper_stride() };
        let image = tile_tensor(pic, rect, multiple)?;
        let y = scale_channels(&model.g_a.forward(&image)?, &gains.y)?;
        let (_, m, hy, wy) = y.dims4()?;
        let (_, (hz, wz)) = tile_latent_sizes(rect.2 as usize, rect.3 as usize, stride);
        let z = scale_channels(&model.h_a.forward(&pad_latent(&y, hz, wz)?)?, &gains.z)?;
        let (y, z) = match (&self.frozen, self.refine.iterations) {
            (Some(frozen), 1..) => {
                let target = RefineTarget { image: &image, size: (rect.2 as usize, rect.3 as usize), gains, lambda };
                let r = refine(frozen, &target, &y, &z, &self.refine)?;
                (r.y, r.z)
            }
            _ => (y, z),
        };
        let nz = z.dim(1)?;
        let z_hat: Vec<i32> = z.flatten_all()?.to_vec1::<f32>()?.iter().map(|v| v.round() as i32).collect();
        let mut enc_z = SymbolEncoder::new(&self.hyper);
        for (i, &v) in z_hat.iter().enumerate() {
            enc_z.push(i / (hz * wz), v);
        }
        let mut prior = crop_prior(self.prior(&z_hat, hz, wz, gains), hy, wy);
        let y_vals = y.flatten_all()?.to_vec1::<f32>()?;
        let mut enc_y = SymbolEncoder::new(&self.gaussian);
        let mut y_hat = vec![0.0f32; y_vals.len()];
        for &pass in self.latent_passes() {
            if pass == Pass::Others {
                self.apply_context(&y_hat, &mut prior);
            }
            for i in pass.indices(m, hy, wy) {
                let k = scale_index(prior.log_scales[i], &self.file.tables.log_scale_thresholds);
                let q = (y_vals[i] - prior.means[i]).round();
                enc_y.push(k, q as i32);
                y_hat[i] = q + prior.means[i];
            }
        }
        let ideal = (enc_z.ideal_bits(), enc_y.ideal_bits());
        let record = TileRecord {
            latent: [m as u16, hy as u16, wy as u16],
            hyper: [nz as u16, hz as u16, wz as u16],
            hyper_bytes: 0,
            latent_bytes: 0,
        };
        Ok((record, TileStreams { hyper: enc_z.finish(), latent: enc_y.finish() }, ideal))
    }

    /// The passes over the latent in coding order: everything at once, or anchors then the
    /// other half with a checkerboard context.
    fn latent_passes(&self) -> &'static [Pass] {
        if self.context.is_some() { &[Pass::Anchors, Pass::Others] } else { &[Pass::All] }
    }

    /// Adds the context's corrections to the non-anchor parameters of `prior`, from the decoded
    /// anchors in `y_hat` (gained domain).
    fn apply_context(&self, y_hat: &[f32], prior: &mut PriorParameters) {
        if let Some(ctx) = &self.context {
            ctx.refine(y_hat, prior, self.simd);
        }
    }

    fn prior(&self, z_hat: &[i32], hz: usize, wz: usize, gains: &GainVectors) -> PriorParameters {
        let plane = hz * wz;
        let z: Vec<f32> = z_hat.iter().enumerate().map(|(i, &v)| v as f32 * gains.z_inv[i / plane]).collect();
        let mut prior = self.hyper_fixed.forward(&z, hz, wz, self.simd);
        if let Some((mu, ls)) = &gains.hyper {
            // One f32 multiply or add per element: the same bits everywhere.
            let latent_plane = prior.height * prior.width;
            for (i, (m, l)) in prior.means.iter_mut().zip(prior.log_scales.iter_mut()).enumerate() {
                *m *= mu[i / latent_plane];
                *l += ls[i / latent_plane];
            }
        }
        prior
    }

    /// The rate the model's continuous likelihoods assign to the values [`Codec::encode`] codes
    /// (`(latent bits, hyper-latent bits)`), without tables or entropy coding: the figure
    /// training optimizes, for comparison with the coded size.
    pub fn estimate_bits(&self, pic: &Picture, quality: f32) -> Result<(f64, f64)> {
        check_quality(quality)?;
        let model = &self.file.model;
        let gains = self.gains(quality)?;
        let (tw, th) = container::choose_tile_size(pic.width, pic.height);
        let (mut by, mut bz) = (0.0, 0.0);
        for rect in container::tile_grid(pic.width, pic.height, tw, th) {
            let stride = model.config.latent_stride();
            let y = scale_channels(&model.g_a.forward(&tile_tensor(pic, rect, stride)?)?, &gains.y)?;
            let (_, _, hy, wy) = y.dims4()?;
            let (_, (hz, wz)) = tile_latent_sizes(rect.2 as usize, rect.3 as usize, stride);
            let z = scale_channels(&model.h_a.forward(&pad_latent(&y, hz, wz)?)?, &gains.z)?.round()?;
            let z_hat: Vec<i32> = z.flatten_all()?.to_vec1::<f32>()?.iter().map(|&v| v as i32).collect();
            let mut prior = crop_prior(self.prior(&z_hat, hz, wz, &gains), hy, wy);
            if self.context.is_some() {
                let y_vals = y.flatten_all()?.to_vec1::<f32>()?;
                let y_hat: Vec<f32> = y_vals.iter().zip(&prior.means).map(|(&v, &mu)| (v - mu).round() + mu).collect();
                self.apply_context(&y_hat, &mut prior);
            }
            let shape = y.shape().clone();
            let mu = Tensor::from_vec(prior.means, &shape, &Device::Cpu)?;
            let log_s = Tensor::from_vec(prior.log_scales, &shape, &Device::Cpu)?;
            let sigma = log_s.clamp(SCALE_MIN.ln(), SCALE_MAX.ln())?.exp()?;
            let lik_y = crate::model::gaussian_likelihood(&(&y - &mu)?.round()?, &sigma)?;
            let lik_z = model.prior.likelihood(&z)?;
            let bits = |t: &Tensor| -> Result<f64> {
                Ok(-(t.log()?.sum_all()?.to_scalar::<f32>()? as f64) / std::f64::consts::LN_2)
            };
            by += bits(&lik_y)?;
            bz += bits(&lik_z.clamp(1e-9, 1.0)?)?;
        }
        Ok((by, bz))
    }

    /// Decompresses a container made with this codec's model: the same pixels on every CPU
    /// (the integer synthesis, [`crate::kernels::int_synthesis`]).
    pub fn decode(&self, bytes: &[u8]) -> Result<Picture> {
        self.decode_on(bytes, Synthesis::Integer)
    }

    /// Decompresses with the float synthesis the model was trained with: not exact across CPUs,
    /// kept to measure what the integer synthesis costs (`cargo bench --bench codec`,
    /// `examples/integer_cost`).
    pub fn decode_float(&self, bytes: &[u8]) -> Result<Picture> {
        self.decode_on(bytes, Synthesis::Float)
    }

    fn decode_on(&self, bytes: &[u8], synthesis: Synthesis) -> Result<Picture> {
        let (header, streams) = container::read(bytes)?;
        if header.model_fingerprint != self.file.fingerprint {
            return Err(KilnError::ModelMismatch {
                expected: hex_prefix(&header.model_fingerprint, 8),
                given: hex_prefix(&self.file.fingerprint, 8),
            });
        }
        if (header.flags & container::FLAG_CHECKERBOARD != 0) != self.context.is_some() {
            return Err(KilnError::Corrupt(format!(
                "the container says its latent is {} checkerboard context, but its model {} one",
                if header.flags & container::FLAG_CHECKERBOARD != 0 { "coded with a" } else { "not coded with a" },
                if self.context.is_some() { "has" } else { "lacks" }
            )));
        }
        let gains = self.gains(header.quality)?;
        let (w, h, c) = (header.width as usize, header.height as usize, header.channels as usize);
        let mut data = vec![0u8; w * h * c];
        let rects = container::tile_grid(header.width, header.height, header.tile_width, header.tile_height);
        let single = rects.len() == 1;
        for ((rect, record), s) in rects.into_iter().zip(&header.tiles).zip(streams) {
            let rgb = self.decode_tile(rect, record, s, &gains, synthesis)?;
            if single && c == 3 && rgb.len() == data.len() {
                data = rgb; // one tile covering the image: already in place
                continue;
            }
            let (x0, y0, tw, th) = (rect.0 as usize, rect.1 as usize, rect.2 as usize, rect.3 as usize);
            for y in 0..th {
                for x in 0..tw {
                    let px = &rgb[(y * tw + x) * 3..(y * tw + x) * 3 + 3];
                    let dst = ((y0 + y) * w + x0 + x) * c;
                    if c == 3 {
                        data[dst..dst + 3].copy_from_slice(px);
                    } else {
                        data[dst] = ((px[0] as u16 + px[1] as u16 + px[2] as u16 + 1) / 3) as u8;
                    }
                }
            }
        }
        Ok(Picture { width: header.width, height: header.height, channels: header.channels, data })
    }

    fn decode_tile(
        &self,
        rect: container::Rect,
        record: &TileRecord,
        s: TileStreams,
        gains: &GainVectors,
        synthesis: Synthesis,
    ) -> Result<Vec<u8>> {
        let cfg = &self.file.model.config;
        let (tw, th) = (rect.2 as usize, rect.3 as usize);
        let stride = cfg.latent_stride();
        let ((hy, wy), (hz, wz)) = tile_latent_sizes(tw, th, stride);
        // Files written before the latent was cropped to the tile code the latent of the image
        // padded to a multiple of the hyper stride, i.e. exactly 4·hz × 4·wz; both layouts decode.
        let (hy, wy) = match record.latent {
            [m, h, w] if m as usize == cfg.m && (h as usize, w as usize) == (hy, wy) => (hy, wy),
            [m, h, w] if m as usize == cfg.m && (h as usize, w as usize) == (4 * hz, 4 * wz) => (4 * hz, 4 * wz),
            _ => (0, 0),
        };
        if record.hyper != [cfg.nz as u16, hz as u16, wz as u16] || hy == 0 {
            return Err(KilnError::Corrupt(format!(
                "tile shapes {:?}/{:?} do not match a {tw}×{th} tile for this model",
                record.latent, record.hyper
            )));
        }
        let mut dec_z = SymbolDecoder::new(&self.hyper, s.hyper)?;
        let mut z_hat = Vec::with_capacity(cfg.nz * hz * wz);
        for i in 0..cfg.nz * hz * wz {
            z_hat.push(dec_z.pop(i / (hz * wz))?);
        }
        dec_z.finish()?;
        let mut prior = crop_prior(self.prior(&z_hat, hz, wz, gains), hy, wy);
        let mut dec_y = SymbolDecoder::new(&self.gaussian, s.latent)?;
        let plane = hy * wy;
        let mut y_hat = vec![0.0f32; cfg.m * plane];
        for &pass in self.latent_passes() {
            if pass == Pass::Others {
                self.apply_context(&y_hat, &mut prior);
            }
            for i in pass.indices(cfg.m, hy, wy) {
                let k = scale_index(prior.log_scales[i], &self.file.tables.log_scale_thresholds);
                let q = dec_y.pop(k)?;
                y_hat[i] = q as f32 + prior.means[i];
            }
        }
        dec_y.finish()?;
        for (i, v) in y_hat.iter_mut().enumerate() {
            *v *= gains.y_inv[i / plane];
        }
        if synthesis == Synthesis::Integer {
            return Ok(self.synthesis.decode_rgb8(&y_hat, cfg.m, hy, wy, tw, th, self.int_path));
        }
        let y = Tensor::from_vec(y_hat, (1, cfg.m, hy, wy), &Device::Cpu)?;
        let x = self.file.model.g_s.forward_decode(&y)?; // (1, 3, s·hy, s·wy)
        Ok(crate::kernels::conv::with_f32(&x, |x| Ok(planes_to_rgb8(x, stride * hy, stride * wy, tw, th)))?)
    }
}
