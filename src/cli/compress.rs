//! `kiln compress` and `kiln decompress`.

use std::io::Write;
use std::path::{Path, PathBuf};

use anyhow::Context;
use clap::Args;
use kiln::decoders::Decoders;
use kiln::files::{Overwrite, restored_os_name, write_output};
use kiln::image_io::read_regular;
use kiln::model::hex_prefix;
use kiln::{AlphaPolicy, Codec, ModelFile, Picture, PngEffort};

use super::refine_args::RefineArgs;

#[derive(Debug, Args)]
pub struct CompressArgs {
    /// Image to compress (any format the image crate reads).
    input: PathBuf,
    /// Output container (default: the input's name with `.kiln` appended; `-` for standard output).
    #[arg(short, long)]
    output: Option<PathBuf>,
    /// Replace the output if it exists (never one of the inputs, never a non-regular file).
    #[arg(long)]
    force: bool,
    /// Quality from 1 (smallest file) to 100 (best fidelity); fractions allowed.
    #[arg(short, long, default_value_t = 75.0)]
    quality: f32,
    /// Model: a shipped model's name (`kiln models`) or a model file (default: the newest
    /// shipped model). A container decodes only with the exact model that wrote it.
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
    /// Output PNG (default: the container's name without `.kiln`, ending in `.png`:
    /// `a.png.kiln` → `a.png`, `a.jpg.kiln` → `a.jpg.png`; `-` for standard output).
    #[arg(short, long)]
    output: Option<PathBuf>,
    /// Replace the output if it exists (never the input, never a non-regular file).
    #[arg(long)]
    force: bool,
    /// Model the container was written with, if it is none of those found by fingerprint (the
    /// models folder of an archive the container lies in, --models folders, the shipped models).
    #[arg(long)]
    model: Option<PathBuf>,
    #[command(flatten)]
    lookup: super::models::LookupArgs,
    /// PNG writer effort: `fast`, or `smallest` (several times slower, files about a quarter smaller).
    #[arg(long, value_enum, default_value = "fast")]
    png: PngEffort,
}

/// Where a command's single output goes.
enum Sink {
    Stdout,
    File(PathBuf),
}

impl Sink {
    fn new(explicit: Option<PathBuf>, default: impl FnOnce() -> PathBuf) -> Self {
        match explicit {
            Some(p) if p.as_os_str() == "-" => Sink::Stdout,
            Some(p) => Sink::File(p),
            None => Sink::File(default()),
        }
    }

    /// Refuses an output that could not be written, before any work is done.
    fn check(&self, force: bool, input: &Path) -> anyhow::Result<()> {
        if let Sink::File(p) = self {
            kiln::files::check_output(p, Overwrite::from_force(force), &[input])?;
        }
        Ok(())
    }

    fn write(&self, bytes: &[u8], force: bool, input: &Path) -> anyhow::Result<()> {
        match self {
            Sink::Stdout => {
                let mut out = std::io::stdout().lock();
                out.write_all(bytes).and_then(|()| out.flush()).context("writing to standard output")?;
            }
            Sink::File(p) => write_output(p, bytes, Overwrite::from_force(force), &[input])?,
        }
        Ok(())
    }
}

fn with_suffix(path: &Path, suffix: &str) -> PathBuf {
    let mut s = path.as_os_str().to_os_string();
    s.push(suffix);
    PathBuf::from(s)
}

pub fn compress(a: CompressArgs) -> anyhow::Result<()> {
    kiln::model::config::check_quality(a.quality)?;
    let sink = Sink::new(a.output, || with_suffix(&a.input, ".kiln"));
    if matches!(sink, Sink::Stdout) && a.stats {
        anyhow::bail!("--stats and `-o -` both write to standard output\nhint: write the container to a file");
    }
    sink.check(a.force, &a.input)?;
    let alpha = if a.drop_alpha { AlphaPolicy::Drop } else { AlphaPolicy::Refuse };
    let pic = Picture::open(&a.input, alpha)?;
    let codec = a.refine.apply(Codec::new(ModelFile::load(a.model.as_deref())?)?)?;
    let file = codec.model_file();
    if let Some(m) = a.model.as_deref().filter(|_| file.shipped().is_none()) {
        eprintln!(
            "warning: {} is not a shipped model: this container decodes only with that exact file (fingerprint {}); keep it beside the container, or `kiln pack` into an archive, which stores its models",
            m.display(),
            hex_prefix(&file.fingerprint, 8)
        );
    }
    let enc = codec.encode(&pic, a.quality)?;
    sink.write(&enc.bytes, a.force, &a.input)?;
    if a.stats {
        println!("{}", serde_json::to_string(&enc.stats(pic.width, pic.height, a.quality))?);
    }
    Ok(())
}

pub fn decompress(a: DecompressArgs) -> anyhow::Result<()> {
    let sink = Sink::new(a.output, || {
        let name = a.input.file_name().unwrap_or(std::ffi::OsStr::new("decoded"));
        a.input.with_file_name(restored_os_name(name))
    });
    sink.check(a.force, &a.input)?;
    let bytes = read_regular(&a.input)?;
    let header = kiln::container::read_header(&bytes).with_context(|| format!("{}", a.input.display()))?;
    let store = super::models::with_enclosing_archives(a.lookup.store(a.model.as_deref())?, &a.input);
    let decoders = Decoders::new(store);
    let (codec, place) = decoders
        .codec_for(&header.model_fingerprint)
        .map_err(super::models::explain)
        .with_context(|| format!("{}", a.input.display()))?;
    if let Some(m) = a.model.as_deref().filter(|m| place != format!("--model {}", m.display())) {
        eprintln!(
            "note: --model {} is not the model this container names ({}); decoded with {place}",
            m.display(),
            hex_prefix(&header.model_fingerprint, 8)
        );
    }
    let pic = codec.decode(&bytes).with_context(|| format!("{}", a.input.display()))?;
    sink.write(&pic.to_png_with(a.png)?, a.force, &a.input)?;
    Ok(())
}
