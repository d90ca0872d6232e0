//! Rate–distortion evaluation: Kiln at a quality sweep against JPEG and PNG on folders of
//! images, with metrics, BD-rates and a report (`rd.csv`, `summary.json`, plots, `report.html`).

#[cfg(feature = "avif")]
pub mod avif;
pub mod baselines;
#[cfg(feature = "standard-codecs")]
pub mod jpeg2000;
pub mod plot;
pub mod report;
#[cfg(feature = "standard-codecs")]
pub mod webp;

use std::path::{Path, PathBuf};
use std::time::Instant;

use rayon::prelude::*;
use serde::Serialize;

use crate::codec::Codec;
use crate::error::{KilnError, Result};
use crate::image_io::{AlphaPolicy, Picture};
use crate::metrics::{bd, ms_ssim, psnr, ssim};

/// Kiln qualities swept by default.
pub const DEFAULT_QUALITIES: [f32; 8] = [1.0, 10.0, 25.0, 40.0, 55.0, 70.0, 85.0, 100.0];

/// Everything `kiln evaluate` takes.
#[derive(Debug, Clone)]
pub struct EvalOptions {
    /// Folders of images (searched recursively).
    pub dirs: Vec<PathBuf>,
    /// Report folder.
    pub out: PathBuf,
    /// Kiln qualities.
    pub qualities: Vec<f32>,
    /// JPEG qualities.
    pub jpeg_qualities: Vec<u8>,
    /// Standard codecs to compare against ([`baselines::Baseline::built`]: all of them).
    pub baselines: Vec<baselines::Baseline>,
    /// Images evaluated in parallel.
    pub jobs: usize,
    /// Show a progress bar.
    pub progress: bool,
}

/// One row of `rd.csv`.
#[derive(Debug, Clone, Serialize)]
pub struct Row {
    /// Image file name (relative to its folder).
    pub image: String,
    /// `kiln`, `kiln-reference`, or a baseline's name ([`baselines::Baseline::name`]).
    pub codec: String,
    /// Quality setting (empty for PNG).
    pub setting: String,
    /// Whole-file bytes.
    pub bytes: usize,
    /// Bits per pixel of the whole file.
    pub bpp: f64,
    /// PSNR in dB (infinite for lossless).
    pub psnr: f64,
    /// SSIM.
    pub ssim: f64,
    /// MS-SSIM.
    pub ms_ssim: f64,
    /// Encode wall time in ms.
    pub encode_ms: f64,
    /// Decode wall time in ms.
    pub decode_ms: f64,
}

/// Per-image results.
#[derive(Debug, Clone)]
pub struct ImageResult {
    /// Rows for this image.
    pub rows: Vec<Row>,
    /// Original picture (kept for crops).
    pub original: Picture,
    /// Kiln decodes, by quality index.
    pub kiln: Vec<Picture>,
    /// JPEG decodes, by quality index.
    pub jpeg: Vec<Picture>,
}

/// Size and timings of one coded file.
struct Coded {
    bytes: usize,
    encode_ms: f64,
    decode_ms: f64,
}

fn measure(image: &str, codec: &str, setting: String, coded: Coded, orig: &Picture, dec: &Picture) -> Row {
    let (w, h, c) = (orig.width as usize, orig.height as usize, orig.channels as usize);
    let small = w < 11 || h < 11;
    Row {
        image: image.to_string(),
        codec: codec.to_string(),
        setting,
        bytes: coded.bytes,
        bpp: coded.bytes as f64 * 8.0 / (w * h) as f64,
        psnr: psnr(&orig.data, &dec.data),
        ssim: if small { f64::NAN } else { ssim(&orig.data, &dec.data, w, h, c) },
        ms_ssim: if small { f64::NAN } else { ms_ssim(&orig.data, &dec.data, w, h, c) },
        encode_ms: coded.encode_ms,
        decode_ms: coded.decode_ms,
    }
}

fn ms(t: Instant) -> f64 {
    t.elapsed().as_secs_f64() * 1e3
}

/// Codec name of the reference model's rows (`--reference-model`).
pub const REFERENCE_CODEC: &str = "kiln-reference";

/// Evaluates one picture with every codec (and the reference model, if given).
pub fn evaluate_picture(
    codec: &Codec,
    reference: Option<&Codec>,
    name: &str,
    pic: &Picture,
    o: &EvalOptions,
) -> Result<ImageResult> {
    let mut rows = Vec::new();
    if let Some(r) = reference {
        for &q in &o.qualities {
            let t = Instant::now();
            let enc = r.encode(pic, q)?;
            let e = ms(t);
            let t = Instant::now();
            let dec = r.decode(&enc.bytes)?;
            let d = ms(t);
            let coded = Coded { bytes: enc.bytes.len(), encode_ms: e, decode_ms: d };
            rows.push(measure(name, REFERENCE_CODEC, format!("{q}"), coded, pic, &dec));
        }
    }
    let mut kiln = Vec::new();
    for &q in &o.qualities {
        let t = Instant::now();
        let enc = codec.encode(pic, q)?;
        let e = ms(t);
        let t = Instant::now();
        let dec = codec.decode(&enc.bytes)?;
        let d = ms(t);
        rows.push(measure(
            name,
            "kiln",
            format!("{q}"),
            Coded { bytes: enc.bytes.len(), encode_ms: e, decode_ms: d },
            pic,
            &dec,
        ));
        kiln.push(dec);
    }
    let mut jpeg = Vec::new();
    for &b in &o.baselines {
        for setting in b.settings(&o.jpeg_qualities) {
            let t = Instant::now();
            let bytes = b.encode(pic, &setting)?;
            let e = ms(t);
            let t = Instant::now();
            let dec = b.decode(&bytes, pic.channels)?;
            let coded = Coded { bytes: bytes.len(), encode_ms: e, decode_ms: ms(t) };
            b.check_decode(pic, &dec)?;
            rows.push(measure(name, b.name(), setting, coded, pic, &dec));
            if b == baselines::Baseline::Jpeg {
                jpeg.push(dec);
            }
        }
    }
    Ok(ImageResult { rows, original: pic.clone(), kiln, jpeg })
}

/// A point of a mean curve: `(setting, bpp, psnr, ssim, ms_ssim)`.
pub type CurvePoint = (String, f64, f64, f64, f64);

/// Summary of a whole evaluation (`summary.json`).
#[derive(Debug, Clone, Serialize)]
pub struct Summary {
    /// Number of images evaluated.
    pub images: usize,
    /// Files that could not be read, with the reason.
    pub skipped: Vec<(String, String)>,
    /// Mean curve per codec.
    pub mean_curves: std::collections::BTreeMap<String, Vec<CurvePoint>>,
    /// BD-rate of Kiln vs JPEG on the mean curve (fraction; −0.25 = 25% fewer bits).
    pub bd_rate_vs_jpeg: Option<f64>,
    /// BD-rate of the model vs the reference model on the mean curve, when one was given.
    pub bd_rate_vs_reference: Option<f64>,
    /// BD-PSNR of Kiln vs JPEG on the mean curve, in dB.
    pub bd_psnr_vs_jpeg: Option<f64>,
    /// Per-image BD-rate of Kiln vs JPEG.
    pub bd_rate_per_image: Vec<(String, Option<f64>)>,
    /// Mean Kiln size relative to PNG at each quality.
    pub size_vs_png: Vec<(String, f64)>,
    /// Mean PNG bits per pixel.
    pub png_bpp: f64,
    /// BD-rate of Kiln against each lossy baseline on the mean curve (fraction; `None` where
    /// the curves' ranges do not overlap).
    pub bd_rate_vs: std::collections::BTreeMap<String, Option<f64>>,
    /// Per-image BD-rate of Kiln against each lossy baseline.
    pub bd_rate_per_image_vs: std::collections::BTreeMap<String, Vec<(String, Option<f64>)>>,
    /// Mean of the per-image BD-rates against each lossy baseline (images whose curves do not
    /// overlap left out).
    pub bd_rate_mean_per_image_vs: std::collections::BTreeMap<String, Option<f64>>,
    /// Mean bits per pixel of each lossless baseline.
    pub lossless_bpp: std::collections::BTreeMap<String, f64>,
    /// Bits per pixel of each lossless baseline, per image.
    pub lossless_per_image: Vec<(String, std::collections::BTreeMap<String, f64>)>,
    /// One sentence per lossy baseline: where Kiln stands against it on these images.
    pub verdicts: Vec<String>,
    /// Standard codecs this build could not run, with the reason.
    pub not_built: Vec<(String, String)>,
    /// Fingerprint prefix of the model evaluated.
    pub model: String,
    /// Encoder refinement steps per tile Kiln's files were coded with (0: none).
    pub refine_iterations: usize,
}

fn curve(rows: &[&Row]) -> Vec<(f64, f64)> {
    rows.iter().map(|r| (r.bpp, r.psnr)).collect()
}

/// Builds the summary from all rows.
pub fn summarize(results: &[ImageResult], skipped: Vec<(String, String)>, model: String) -> Summary {
    let all: Vec<&Row> = results.iter().flat_map(|r| &r.rows).collect();
    let mut mean_curves = std::collections::BTreeMap::new();
    let mut codecs: Vec<&str> = Vec::new();
    for r in &all {
        if !codecs.contains(&r.codec.as_str()) {
            codecs.push(&r.codec);
        }
    }
    for codec in codecs.iter().copied() {
        let mut settings: Vec<String> = Vec::new();
        for r in all.iter().filter(|r| r.codec == codec) {
            if !settings.contains(&r.setting) {
                settings.push(r.setting.clone());
            }
        }
        let pts = settings
            .into_iter()
            .map(|s| {
                let sel: Vec<&&Row> = all.iter().filter(|r| r.codec == codec && r.setting == s).collect();
                let n = sel.len() as f64;
                let mean = |f: fn(&Row) -> f64| sel.iter().map(|r| f(r)).sum::<f64>() / n;
                (s, mean(|r| r.bpp), mean(|r| r.psnr), mean(|r| r.ssim), mean(|r| r.ms_ssim))
            })
            .collect::<Vec<_>>();
        if !pts.is_empty() {
            mean_curves.insert(codec.to_string(), pts);
        }
    }
    let mc = |c: &str| -> Vec<(f64, f64)> {
        mean_curves.get(c).map(|v| v.iter().map(|p| (p.1, p.2)).collect()).unwrap_or_default()
    };
    let bd_rate_per_image = results
        .iter()
        .map(|r| {
            let k: Vec<&Row> = r.rows.iter().filter(|x| x.codec == "kiln").collect();
            let j: Vec<&Row> = r.rows.iter().filter(|x| x.codec == "jpeg").collect();
            (r.rows[0].image.clone(), bd::bd_rate(&curve(&j), &curve(&k)))
        })
        .collect();
    let mut size_vs_png = Vec::new();
    if let Some(pts) = mean_curves.get("kiln") {
        for (s, ..) in pts {
            let ratios: Vec<f64> = results
                .iter()
                .filter_map(|r| {
                    let k = r.rows.iter().find(|x| x.codec == "kiln" && &x.setting == s)?;
                    let p = r.rows.iter().find(|x| x.codec == "png")?;
                    Some(k.bytes as f64 / p.bytes as f64)
                })
                .collect();
            size_vs_png.push((s.clone(), ratios.iter().sum::<f64>() / ratios.len().max(1) as f64));
        }
    }
    let png_bpp = mean_curves.get("png").and_then(|v| v.first()).map(|p| p.1).unwrap_or(f64::NAN);
    let lossless: Vec<&str> = codecs
        .iter()
        .copied()
        .filter(|c| all.iter().any(|r| r.codec == *c && r.psnr.is_infinite() && r.setting.is_empty()))
        .collect();
    let lossy: Vec<&str> =
        codecs.iter().copied().filter(|c| !lossless.contains(c) && *c != "kiln" && *c != REFERENCE_CODEC).collect();
    let mut bd_rate_vs = std::collections::BTreeMap::new();
    let mut bd_rate_per_image_vs = std::collections::BTreeMap::new();
    let mut bd_rate_mean_per_image_vs = std::collections::BTreeMap::new();
    let mut verdicts = Vec::new();
    for &b in &lossy {
        let mean = bd::bd_rate(&mc(b), &mc("kiln"));
        let per: Vec<(String, Option<f64>)> = results
            .iter()
            .map(|r| {
                let k: Vec<&Row> = r.rows.iter().filter(|x| x.codec == "kiln").collect();
                let j: Vec<&Row> = r.rows.iter().filter(|x| x.codec == b).collect();
                (r.rows[0].image.clone(), bd::bd_rate(&curve(&j), &curve(&k)))
            })
            .collect();
        let known: Vec<f64> = per.iter().filter_map(|p| p.1).collect();
        let per_mean = (!known.is_empty()).then(|| known.iter().sum::<f64>() / known.len() as f64);
        verdicts.push(verdict(b, per_mean, known.len(), per.len()));
        bd_rate_vs.insert(b.to_string(), mean);
        bd_rate_per_image_vs.insert(b.to_string(), per);
        bd_rate_mean_per_image_vs.insert(b.to_string(), per_mean);
    }
    let lossless_bpp = lossless.iter().filter_map(|c| Some((c.to_string(), mean_curves.get(*c)?.first()?.1))).collect();
    let lossless_per_image = results
        .iter()
        .map(|r| {
            let row = r
                .rows
                .iter()
                .filter(|x| lossless.contains(&x.codec.as_str()))
                .map(|x| (x.codec.clone(), x.bpp))
                .collect();
            (r.rows[0].image.clone(), row)
        })
        .collect();
    Summary {
        images: results.len(),
        skipped,
        bd_rate_vs_jpeg: bd::bd_rate(&mc("jpeg"), &mc("kiln")),
        bd_psnr_vs_jpeg: bd::bd_psnr(&mc("jpeg"), &mc("kiln")),
        bd_rate_vs_reference: bd::bd_rate(&mc(REFERENCE_CODEC), &mc("kiln")),
        mean_curves,
        bd_rate_per_image,
        size_vs_png,
        png_bpp,
        bd_rate_vs,
        bd_rate_per_image_vs,
        bd_rate_mean_per_image_vs,
        lossless_bpp,
        lossless_per_image,
        verdicts,
        not_built: baselines::NOT_BUILT.iter().map(|(n, w)| (n.to_string(), w.to_string())).collect(),
        model,
        refine_iterations: 0,
    }
}

/// The sentence a report states for one lossy baseline, from the mean of the per-image
/// BD-rates (`n` of `total` images had overlapping curves).
pub fn verdict(baseline: &str, per_image_mean: Option<f64>, n: usize, total: usize) -> String {
    let name = baselines::Baseline::built()
        .into_iter()
        .find(|b| b.name() == baseline)
        .map_or(baseline.to_string(), |b| b.label().to_string());
    let of = if n == total { format!("these {total} images") } else { format!("{n} of these {total} images") };
    match per_image_mean {
        None => format!("Kiln and {name}: no overlapping quality range to compare on these images."),
        Some(v) if v > 0.0 => {
            format!("Kiln needs {:.0}% more bits than {name} at equal PSNR on {of}.", 100.0 * v)
        }
        Some(v) => format!("Kiln needs {:.0}% fewer bits than {name} at equal PSNR on {of}.", -100.0 * v),
    }
}

/// Runs the evaluation and writes the report; returns the summary. With `reference`, a second
/// model (e.g. the default, when `codec` is a fine-tuned one) is swept too and compared.
pub fn evaluate(codec: &Codec, reference: Option<&Codec>, o: &EvalOptions) -> Result<Summary> {
    if o.qualities.len() < 4 || o.jpeg_qualities.len() < 4 {
        return Err(KilnError::InvalidArgument("at least four qualities per codec are needed for BD-rate".into()));
    }
    let files = crate::train::data::list_images(&o.dirs)?;
    if files.is_empty() {
        return Err(KilnError::InvalidArgument(format!("no images found under {:?}", o.dirs)));
    }
    std::fs::create_dir_all(&o.out).map_err(|e| KilnError::io(&o.out, e))?;
    let bar =
        if o.progress { indicatif::ProgressBar::new(files.len() as u64) } else { indicatif::ProgressBar::hidden() };
    bar.set_style(
        indicatif::ProgressStyle::with_template(
            "{bar:30} {pos}/{len} images [{elapsed_precise} < {eta_precise}] {msg}",
        )
        .expect("template"),
    );
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(o.jobs.max(1))
        .build()
        .map_err(|e| KilnError::InvalidArgument(e.to_string()))?;
    let outcomes: Vec<(String, std::result::Result<ImageResult, String>)> = pool.install(|| {
        files
            .par_iter()
            .map(|path| {
                let name = display_name(path, &o.dirs);
                let r = Picture::open(path, AlphaPolicy::Drop)
                    .and_then(|pic| evaluate_picture(codec, reference, &name, &pic, o))
                    .map_err(|e| e.to_string().lines().next().unwrap_or("").to_string());
                bar.inc(1);
                bar.set_message(name.clone());
                (name, r)
            })
            .collect()
    });
    bar.finish_and_clear();
    let mut results = Vec::new();
    let mut skipped = Vec::new();
    for (name, r) in outcomes {
        match r {
            Ok(r) => results.push(r),
            Err(e) => {
                eprintln!("warning: skipped {name}: {e}");
                skipped.push((name, e));
            }
        }
    }
    if results.is_empty() {
        return Err(KilnError::InvalidArgument("no image could be evaluated".into()));
    }
    let mut summary = summarize(&results, skipped, crate::model::hex_prefix(&codec.model_file().fingerprint, 8));
    summary.refine_iterations = codec.refinement().iterations;
    report::write_report(&o.out, &results, &summary)?;
    Ok(summary)
}

fn display_name(path: &Path, dirs: &[PathBuf]) -> String {
    for d in dirs.iter().filter(|d| d.is_dir()) {
        if let Ok(rel) = path.strip_prefix(d) {
            return rel.display().to_string();
        }
    }
    path.file_name().map(|n| n.to_string_lossy().to_string()).unwrap_or_else(|| path.display().to_string())
}
