//! `kiln evaluate`.

use std::path::PathBuf;

use clap::Args;
use kiln::eval::{DEFAULT_QUALITIES, EvalOptions, baselines::JPEG_QUALITIES};
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
    let opts = EvalOptions {
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
    eprintln!("BD-rate vs JPEG (4:2:0, optimized Huffman): {}  (negative = fewer bits)", pct(s.bd_rate_vs_jpeg));
    if reference.is_some() {
        eprintln!("BD-rate vs the reference model: {}", pct(s.bd_rate_vs_reference));
    }
    eprintln!("report: {}", a.out.join("report.html").display());
    Ok(())
}
