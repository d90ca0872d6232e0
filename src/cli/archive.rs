//! `kiln pack`, `verify`, `unpack`, `stats` and `catalog merge`.

use std::path::PathBuf;

use clap::{Args, Subcommand};
use kiln::archive::{self, PackOptions, Shard, Target};
use kiln::{Codec, ModelFile};

use super::refine_args::RefineArgs;

#[derive(Debug, Args)]
pub struct PackArgs {
    /// Source tree (never modified).
    src: PathBuf,
    /// Archive folder.
    dest: PathBuf,
    /// Fixed quality, 1–100.
    #[arg(long, conflicts_with_all = ["target_psnr", "target_bpp"])]
    quality: Option<f32>,
    /// Per image, the lowest quality whose decoded PSNR is at least this (dB).
    #[arg(long, conflicts_with = "target_bpp")]
    target_psnr: Option<f64>,
    /// Per image, the highest quality whose container is at most this many bits per pixel.
    #[arg(long)]
    target_bpp: Option<f64>,
    /// Model file (default: the embedded model).
    #[arg(long)]
    model: Option<PathBuf>,
    #[command(flatten)]
    refine: RefineArgs,
    /// Images in parallel.
    #[arg(long, default_value_t = 2)]
    jobs: usize,
    /// Take a deterministic share I/N of the files (for array jobs); writes its own catalog shard.
    #[arg(long)]
    shard: Option<String>,
}

#[derive(Debug, Args)]
pub struct ArchiveArgs {
    /// Archive folder.
    dest: PathBuf,
    /// Model file (default: the embedded model).
    #[arg(long)]
    model: Option<PathBuf>,
}

#[derive(Debug, Subcommand)]
pub enum CatalogCommand {
    /// Unite the shard catalogs of an archive into catalog.sqlite.
    Merge {
        /// Archive folder.
        dest: PathBuf,
    },
}

fn codec(model: Option<&std::path::Path>) -> anyhow::Result<Codec> {
    Ok(Codec::new(ModelFile::load(model)?)?)
}

pub fn pack(a: PackArgs) -> anyhow::Result<()> {
    let target = match (a.quality, a.target_psnr, a.target_bpp) {
        (_, Some(db), _) => Target::Psnr(db),
        (_, _, Some(b)) => Target::Bpp(b),
        (q, _, _) => Target::Quality(q.unwrap_or(75.0)),
    };
    if let Target::Quality(q) = target {
        kiln::model::config::check_quality(q)?;
    }
    let shard = a.shard.as_deref().map(Shard::parse).transpose()?;
    let codec = a.refine.apply(codec(a.model.as_deref())?)?;
    let o = PackOptions { src: a.src, dest: a.dest.clone(), target, jobs: a.jobs, shard, progress: true };
    let r = archive::pack(&codec, &o)?;
    eprintln!(
        "packed {}, unchanged {}, failed {}; catalog {}",
        r.packed,
        r.unchanged,
        r.failed.len(),
        archive::catalog_path(&a.dest, shard).display()
    );
    if !r.failed.is_empty() {
        for (f, why) in &r.failed {
            eprintln!("  failed: {f}: {why}");
        }
        anyhow::bail!("{} file(s) could not be packed (listed above); the rest were packed", r.failed.len());
    }
    Ok(())
}

pub fn verify(a: ArchiveArgs) -> anyhow::Result<()> {
    let (n, problems) = archive::verify(&codec(a.model.as_deref())?, &a.dest)?;
    for p in &problems {
        eprintln!("  mismatch: {}: {}", p.rel_path, p.problem);
    }
    if !problems.is_empty() {
        anyhow::bail!("{} of {n} file(s) failed verification (listed above)", problems.len());
    }
    eprintln!("verified {n} file(s): all containers decode and match the catalog");
    Ok(())
}

pub fn unpack(a: ArchiveArgs, out: PathBuf, png: kiln::PngEffort) -> anyhow::Result<()> {
    let n = archive::unpack(&codec(a.model.as_deref())?, &a.dest, &out, png)?;
    eprintln!("unpacked {n} file(s) to {}", out.display());
    Ok(())
}

pub fn stats(dest: PathBuf, json: bool) -> anyhow::Result<()> {
    let s = archive::stats(&dest)?;
    if json {
        println!("{}", serde_json::to_string_pretty(&s)?);
    } else {
        println!("files            {}", s.files);
        println!("source bytes     {}", s.source_bytes);
        println!("PNG-equivalent   {}", s.png_bytes);
        println!("Kiln bytes       {}", s.kiln_bytes);
        println!("ratio vs source  {:.2}×", s.ratio_vs_source);
        println!("ratio vs PNG     {:.2}×", s.ratio_vs_png);
        println!("mean PSNR        {:.2} dB", s.mean_psnr);
        println!("worst PSNR       {:.2} dB ({})", s.worst_psnr, s.worst_file.as_deref().unwrap_or("-"));
    }
    Ok(())
}

pub fn catalog(c: CatalogCommand) -> anyhow::Result<()> {
    match c {
        CatalogCommand::Merge { dest } => {
            let n = archive::merge_catalogs(&dest)?;
            eprintln!("merged catalog has {n} file(s): {}", dest.join(archive::catalog::CATALOG_FILE).display());
            Ok(())
        }
    }
}
