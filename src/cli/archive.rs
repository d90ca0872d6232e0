//! `kiln pack`, `verify`, `unpack`, `stats` and `catalog merge`.

use std::path::{Path, PathBuf};

use clap::{Args, Subcommand};
use kiln::archive::{self, PackOptions, Shard, Target};
use kiln::files::Overwrite;
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
    /// Model: a shipped model's name (`kiln models`) or a model file (default: the newest
    /// shipped model). It is stored in DEST/models/ before the first container.
    #[arg(long)]
    model: Option<PathBuf>,
    #[command(flatten)]
    refine: RefineArgs,
    /// Images in parallel (1–256).
    #[arg(long, default_value_t = 2, value_parser = clap::value_parser!(u16).range(1..=256))]
    jobs: u16,
    /// Follow symbolic links under the source whose targets lie inside it (each folder once;
    /// links to outside the source are listed as skipped). Off: links are listed as skipped.
    #[arg(long)]
    follow_symlinks: bool,
    /// Take a deterministic share I/N of the files (for array jobs); writes its own catalog shard.
    #[arg(long)]
    shard: Option<String>,
}

#[derive(Debug, Args)]
pub struct ArchiveArgs {
    /// Archive folder.
    dest: PathBuf,
    /// A model to try first for the containers that name it; the others are found by
    /// fingerprint in DEST/models/, --models folders and the shipped models.
    #[arg(long)]
    model: Option<PathBuf>,
    #[command(flatten)]
    lookup: super::models::LookupArgs,
}

#[derive(Debug, Subcommand)]
pub enum CatalogCommand {
    /// Unite the shard catalogs of an archive into catalog.sqlite.
    Merge {
        /// Archive folder.
        dest: PathBuf,
    },
}

fn codec(model: Option<&Path>) -> anyhow::Result<Codec> {
    Ok(Codec::new(ModelFile::load(model)?)?)
}

/// The catalog's name for the model `spec` loaded as `file`: its shipped name, or the file name.
fn model_name(spec: Option<&Path>, file: &ModelFile) -> String {
    match (file.shipped(), spec) {
        (Some(m), _) => m.name.to_string(),
        (None, Some(p)) => kiln::files::display_name(p.file_name().map_or(p, Path::new)),
        (None, None) => "unnamed".to_string(),
    }
}

/// Prints where models were looked up for the archive, and what would find a missing one.
fn print_search(a: &ArchiveArgs) -> anyhow::Result<()> {
    let store = a.lookup.store(a.model.as_deref())?.with_archive(&a.dest);
    eprintln!("models searched: {}", store.places().join("; "));
    eprintln!(
        "hint: pass the model file (--model FILE) or a folder that holds it (--models DIR, or {})",
        super::models::MODELS_ENV
    );
    Ok(())
}

/// Prints how the models of an archive stand; returns how many were not found.
fn report_models(uses: &[archive::ModelUse], problems: &[String]) -> usize {
    for p in problems {
        eprintln!("  model file: {p}");
    }
    let mut missing = 0;
    for u in uses {
        let fp = &u.fingerprint[..u.fingerprint.len().min(16)];
        match &u.found_in {
            None => {
                missing += 1;
                eprintln!("  model {fp}: not found ({} file(s) need it)", u.files);
            }
            Some(place) if !u.carried => eprintln!(
                "note: the archive does not carry model {fp} ({} file(s)); found in {place}\nhint: run `kiln pack` again with that model to store it in the archive",
                u.files
            ),
            Some(_) => {}
        }
    }
    missing
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
    match target {
        Target::Psnr(db) if !(db.is_finite() && db > 0.0 && db <= 100.0) => {
            anyhow::bail!("--target-psnr {db}: expected a PSNR in dB between 0 and 100")
        }
        Target::Bpp(b) if !(b.is_finite() && b > 0.0 && b <= 64.0) => {
            anyhow::bail!("--target-bpp {b}: expected bits per pixel between 0 and 64")
        }
        _ => {}
    }
    let shard = a.shard.as_deref().map(Shard::parse).transpose()?;
    let codec = a.refine.apply(codec(a.model.as_deref())?)?;
    let o = PackOptions {
        src: a.src,
        dest: a.dest.clone(),
        target,
        jobs: a.jobs as usize,
        shard,
        progress: true,
        follow_symlinks: a.follow_symlinks,
        model_name: model_name(a.model.as_deref(), codec.model_file()),
    };
    let r = archive::pack(&codec, &o)?;
    for (f, why, error) in &r.skipped {
        eprintln!("  {}: {f}: {why}", if *error { "not packed" } else { "skipped" });
    }
    for f in &r.repaired {
        eprintln!("  repaired: {f}: its container failed its checks and was re-encoded");
    }
    for (f, why) in &r.failed {
        eprintln!("  failed: {f}: {why}");
    }
    let errors = r.skipped.iter().filter(|s| s.2).count() + r.failed.len();
    if r.fixity_recorded > 0 {
        eprintln!(
            "  recorded the decoded-pixel checksum of {} unchanged file(s) packed before decoding was exact",
            r.fixity_recorded
        );
    }
    eprintln!(
        "packed {}, unchanged {}, repaired {}, failed {}, skipped {}; catalog {}",
        r.packed,
        r.unchanged,
        r.repaired.len(),
        errors,
        r.skipped.len() - r.skipped.iter().filter(|s| s.2).count(),
        archive::catalog_path(&a.dest, shard).display()
    );
    if r.has_errors() {
        anyhow::bail!("{errors} file(s) under the source were not archived (listed above); the rest were packed");
    }
    Ok(())
}

pub fn verify(a: ArchiveArgs) -> anyhow::Result<()> {
    let r = archive::verify(&a.lookup.store(a.model.as_deref())?, &a.dest)?;
    let missing = report_models(&r.models, &r.model_problems);
    for p in &r.problems {
        eprintln!("  mismatch: {}: {}", p.rel_path, p.problem);
    }
    let not_archived = r.skipped.iter().filter(|s| s.2).count();
    if not_archived > 0 {
        eprintln!(
            "note: {not_archived} file(s) under the source were not archived by the last pack (`kiln stats` counts them; the pack run listed them)"
        );
    }
    if missing > 0 {
        print_search(&a)?;
    }
    if !r.problems.is_empty() {
        anyhow::bail!("{} problem(s) in an archive of {} file(s) (listed above)", r.problems.len(), r.files);
    }
    let legacy = r.files - r.exact;
    eprintln!(
        "verified {} file(s): every container decodes to exactly the pixels recorded at packing{}",
        r.files,
        if legacy > 0 {
            format!(
                " ({legacy} row(s) from before exact decoding have no recorded checksum: checked by PSNR where the source is present; `kiln pack` again records them)"
            )
        } else {
            String::new()
        }
    );
    Ok(())
}

pub fn unpack(a: ArchiveArgs, out: PathBuf, png: kiln::PngEffort, force: bool) -> anyhow::Result<()> {
    let store = a.lookup.store(a.model.as_deref())?;
    let r = archive::unpack(&store, &a.dest, &out, png, Overwrite::from_force(force))?;
    for p in &r.problems {
        eprintln!("  not restored: {}: {}", p.rel_path, p.problem);
    }
    if r.problems.iter().any(|p| p.problem.starts_with("model ") && p.problem.ends_with(" not found")) {
        print_search(&a)?;
    }
    eprintln!("unpacked {} file(s) to {}", r.restored, out.display());
    if !r.problems.is_empty() {
        anyhow::bail!("{} file(s) could not be restored (listed above); the rest were", r.problems.len());
    }
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
        let db = |v: Option<f64>| v.map_or("n/a".to_string(), |v| format!("{v:.2} dB"));
        println!("mean PSNR        {}", db(s.mean_psnr));
        println!("worst PSNR       {} ({})", db(s.worst_psnr), s.worst_file.as_deref().unwrap_or("-"));
        println!("not archived     {} (errors), {} other entries skipped", s.skipped_errors, s.skipped_notes);
    }
    Ok(())
}

pub fn catalog(c: CatalogCommand) -> anyhow::Result<()> {
    match c {
        CatalogCommand::Merge { dest } => {
            let (n, refused) = archive::merge_catalogs(&dest)?;
            for p in &refused {
                eprintln!("  refused: {}: {}", p.rel_path, p.problem);
            }
            eprintln!("merged catalog has {n} file(s): {}", dest.join(archive::catalog::CATALOG_FILE).display());
            if !refused.is_empty() {
                anyhow::bail!("{} problem(s) in the shard catalogs or their models (listed above)", refused.len());
            }
            Ok(())
        }
    }
}
