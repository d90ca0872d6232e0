//! `kiln compress` and `kiln decompress`.

use std::path::PathBuf;

use anyhow::Context;
use clap::Args;
use kiln::image_io::write_atomic;
use kiln::{AlphaPolicy, Codec, KilnError, ModelFile, Picture, PngEffort};

use super::refine_args::RefineArgs;

#[derive(Debug, Args)]
pub struct CompressArgs {
    /// Image to compress (any format the image crate reads).
    input: PathBuf,
    /// Output container (default: the input with extension .kiln).
    #[arg(short, long)]
    output: Option<PathBuf>,
    /// Quality from 1 (smallest file) to 100 (best fidelity); fractions allowed.
    #[arg(short, long, default_value_t = 75.0)]
    quality: f32,
    /// Model file (default: the embedded model).
    #[arg(long)]
    model: Option<PathBuf>,
    /// Print a JSON object with sizes and bit counts on stdout.
    #[arg(long)]
    stats: bool,
    #[command(flatten)]
    refine: RefineArgs,
    /// Drop an alpha channel instead of refusing the image.
    #[arg(long)]
    drop_alpha: bool,
}

#[derive(Debug, Args)]
pub struct DecompressArgs {
    /// Container to decompress.
    input: PathBuf,
    /// Output PNG (default: the input with extension .png).
    #[arg(short, long)]
    output: Option<PathBuf>,
    /// Model file the container was written with (default: the embedded model).
    #[arg(long)]
    model: Option<PathBuf>,
    /// PNG writer effort: `fast`, or `smallest` (several times slower, files about a quarter smaller).
    #[arg(long, value_enum, default_value = "fast")]
    png: PngEffort,
}

pub fn compress(a: CompressArgs) -> anyhow::Result<()> {
    kiln::model::config::check_quality(a.quality)?;
    let alpha = if a.drop_alpha { AlphaPolicy::Drop } else { AlphaPolicy::Refuse };
    let pic = Picture::open(&a.input, alpha)?;
    let codec = a.refine.apply(Codec::new(ModelFile::load(a.model.as_deref())?)?)?;
    let enc = codec.encode(&pic, a.quality)?;
    let out = a.output.unwrap_or_else(|| a.input.with_extension("kiln"));
    write_atomic(&out, &enc.bytes)?;
    if a.stats {
        println!("{}", serde_json::to_string(&enc.stats(pic.width, pic.height, a.quality))?);
    }
    Ok(())
}

pub fn decompress(a: DecompressArgs) -> anyhow::Result<()> {
    let bytes = std::fs::read(&a.input).map_err(|e| KilnError::io(&a.input, e))?;
    let codec = Codec::new(ModelFile::load(a.model.as_deref())?)?;
    let pic = codec.decode(&bytes).with_context(|| format!("{}", a.input.display()))?;
    let out = a.output.unwrap_or_else(|| a.input.with_extension("png"));
    write_atomic(&out, &pic.to_png_with(a.png)?)?;
    Ok(())
}
