//! `kiln evaluate`.

use std::path::PathBuf;

use clap::Args;
use kiln::eval::baselines::{Baseline, JPEG_QUALITIES};
use kiln::eval::{DEFAULT_QUALITIES, EvalOptions};
use kiln::{Codec, ModelFile};

use super::refine_args::RefineArgs;

#[derive(Debug, Args)]
pub struct EvaluateArgs {
    /// Folders of images (searched recursively).
    #[arg(required = true)]
    dirs: Vec<PathBuf>,
    /// Report folder (created if missing).
    #[arg(long)]
    out: PathBuf,
    /// Model: a shipped model's name or a model file (default: the newest shipped model).
    #[arg(long)]
    model: Option<PathBuf>,
    /// A second model to compare against (e.g. `default` or a shipped model's name when
    /// --model is a fine-tuned one).
    #[arg(long)]
    reference_model: Option<PathBuf>,
    /// Kiln qualities, comma-separated.
    #[arg(long, value_delimiter = ',')]
    qualities: Option<Vec<f32>>,
    /// JPEG qualities, comma-separated.
    #[arg(long, value_delimiter = ',')]
    jpeg_qualities: Option<Vec<u8>>,
    /// Standard codecs to compare against, comma-separated (default: every one this build has:
    /// jpeg, jpeg2000, webp, png, webp-lossless, jpeg2000-lossless).
    #[arg(long, value_name = "LIST")]
    baselines: Option<String>,
    #[command(flatten)]
    refine: RefineArgs,
    /// Images evaluated in parallel.
    #[arg(long, default_value_t = 2)]
    jobs: usize,
}

pub fn evaluate(a: EvaluateArgs) -> anyhow::Result<()> {
    let qualities = a.qualities.unwrap_or_else(|| DEFAULT_QUALITIES.to_vec());
    for &q in &qualities {
        kiln::model::config::check_quality(q)?;
    }
    let codec = a.refine.apply(Codec::new(ModelFile::load(a.model.as_deref())?)?)?;
    let baselines = match a.baselines.as_deref() {
        Some(list) => Baseline::parse_list(list)?,
        None => Baseline::built(),
    };
    let opts = EvalOptions {
        baselines,
        dirs: a.dirs,
        out: a.out.clone(),
        qualities,
        jpeg_qualities: a.jpeg_qualities.unwrap_or_else(|| JPEG_QUALITIES.to_vec()),
        jobs: a.jobs,
        progress: true,
    };
    let reference = a.reference_model.as_deref().map(|p| ModelFile::load(Some(p)).and_then(Codec::new)).transpose()?;
    let s = kiln::eval::evaluate(&codec, reference.as_ref(), &opts)?;
    let pct = |v: Option<f64>| v.map(|v| format!("{:+.1}%", 100.0 * v)).unwrap_or_else(|| "n/a".into());
    eprintln!("{} images, {} skipped", s.images, s.skipped.len());
    if let Some(k) = s.mean_curves.get("kiln") {
        for (q, bpp, psnr, _, ms) in k {
            eprintln!("  kiln q{q:>5}: {bpp:.3} bpp  {psnr:.2} dB  MS-SSIM {ms:.4}");
        }
    }
    for (b, v) in &s.bd_rate_vs {
        let per = s.bd_rate_mean_per_image_vs.get(b).copied().flatten();
        eprintln!(
            "BD-rate vs {b:<9} mean curve {:>7}, mean per image {:>7}  (negative = fewer bits)",
            pct(*v),
            pct(per)
        );
    }
    for (b, bpp) in &s.lossless_bpp {
        eprintln!("lossless {b:<18} {bpp:.3} bpp");
    }
    for v in &s.verdicts {
        eprintln!("{v}");
    }
    for (name, why) in &s.not_built {
        eprintln!("not compared: {name} ({why})");
    }
    if reference.is_some() {
        eprintln!("BD-rate vs the reference model: {}", pct(s.bd_rate_vs_reference));
    }
    eprintln!("report: {}", a.out.join("report.html").display());
    Ok(())
}
