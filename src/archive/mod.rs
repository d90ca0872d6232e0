//! Archives: a source tree mirrored as `.kiln` containers with a SQLite catalog.
//!
//! Guarantees of [`pack`]: nothing under the source is ever written, moved or deleted; every
//! entry under the source is either packed or listed as skipped with its reason (printed and
//! kept in the catalog, see [`crate::source_tree`]); every container is written to a temporary file in its
//! folder and renamed when complete, and its catalog row is committed after the rename, so an
//! interrupted run leaves no half-written container or row (stale temporary files are removed
//! at the next run); a rerun skips files whose row matches the source's size, modification time
//! and pixel hash and whose container passes its checksums, and re-encodes the rest (a damaged
//! container heals); a failure of the storage itself (disk full, read-only, no permission)
//! stops every worker and the run, leaving the catalog consistent for a rerun.
//!
//! Every archive carries the models its containers were written with (see [`models`]): `pack`
//! stores its model in `DEST/models/` before its first container, so deleting the model file
//! given to `pack` never stops `verify`, `unpack` or `decompress` of the archive.
//!
//! Guarantees of [`unpack`]: every path read from the catalog is checked to stay inside the
//! output folder ([`crate::files::safe_relative`]); each source maps to its own restored name
//! ([`crate::files::restored_name`]); an existing file is replaced only when asked; damage in
//! one container is reported by name and the others are still restored.

pub mod catalog;
pub mod models;

use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::mpsc;
use std::time::{Instant, SystemTime, UNIX_EPOCH};

use rayon::prelude::*;
use serde::Serialize;
use sha2::{Digest, Sha256};

use crate::codec::Codec;
use crate::decoders::Decoders;
use crate::error::{KilnError, Result};
use crate::files::{Overwrite, create_parents_within, restored_name, safe_relative, write_output};
use crate::image_io::{AlphaPolicy, Picture, PngEffort};
use crate::metrics::{ms_ssim, psnr};
use crate::model::hex_prefix;
use crate::model::store::ModelStore;
use catalog::{CATALOG_FILE, Catalog, Entry, ModelRow, SkippedRow, shard_file};

/// Extension appended to a source file's name for its container.
pub const CONTAINER_EXTENSION: &str = "kiln";
/// Prefix of temporary files (removed from the archive at the start of every pack).
pub const TEMP_PREFIX: &str = crate::files::TEMP_PREFIX;

/// Smallest side on which [`crate::metrics::ms_ssim`] is defined: its 11-px window must fit
/// the full-resolution image.
pub const MS_SSIM_MIN_SIDE: usize = 11;

/// MS-SSIM of a decoded image, `None` where the image is too small for it.
pub fn ms_ssim_if_defined(a: &Picture, b: &Picture) -> Option<f64> {
    let (w, h, c) = (a.width as usize, a.height as usize, a.channels as usize);
    (w >= MS_SSIM_MIN_SIDE && h >= MS_SSIM_MIN_SIDE)
        .then(|| ms_ssim(&a.data, &b.data, w, h, c))
        .filter(|v| v.is_finite())
}

/// How the quality of each image is chosen.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Target {
    /// A fixed quality.
    Quality(f32),
    /// The lowest quality whose decoded PSNR is at least this many dB.
    Psnr(f64),
    /// The highest quality whose container is at most this many bits per pixel.
    Bpp(f64),
}

/// A deterministic share of the files: those whose path hash is `index` modulo `count`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Shard {
    /// This share, `0..count`.
    pub index: u32,
    /// Number of shares.
    pub count: u32,
}

impl Shard {
    /// Parses `I/N`.
    pub fn parse(s: &str) -> Result<Self> {
        let bad = || KilnError::InvalidArgument(format!("--shard {s}: expected I/N with 0 ≤ I < N, e.g. 0/8"));
        let (i, n) = s.split_once('/').ok_or_else(bad)?;
        let (index, count): (u32, u32) = (i.trim().parse().map_err(|_| bad())?, n.trim().parse().map_err(|_| bad())?);
        if count == 0 || index >= count {
            return Err(bad());
        }
        Ok(Shard { index, count })
    }

    /// Whether this shard takes `rel_path`.
    pub fn takes(&self, rel_path: &str) -> bool {
        let h = Sha256::digest(rel_path.as_bytes());
        u64::from_le_bytes(h[..8].try_into().expect("8 bytes")) % self.count as u64 == self.index as u64
    }
}

/// Options of [`pack`].
#[derive(Debug, Clone)]
pub struct PackOptions {
    /// Source tree (read only).
    pub src: PathBuf,
    /// Archive folder.
    pub dest: PathBuf,
    /// Quality choice.
    pub target: Target,
    /// Images in flight at once (bounds memory).
    pub jobs: usize,
    /// Shard of the files to take, if any.
    pub shard: Option<Shard>,
    /// Show a progress bar.
    pub progress: bool,
    /// Follow symbolic links whose targets lie inside the source (each folder once).
    pub follow_symlinks: bool,
    /// What the catalog calls the codec's model (a shipped model's name, or the file name it
    /// was given as).
    pub model_name: String,
}

/// What a pack run did.
#[derive(Debug, Clone, Default, Serialize)]
pub struct PackReport {
    /// Files packed in this run.
    pub packed: usize,
    /// Files skipped because their catalog row matched.
    pub unchanged: usize,
    /// Files that failed, with the reason.
    pub failed: Vec<(String, String)>,
    /// Rows whose source was unchanged but whose container failed its checks, re-encoded.
    pub repaired: Vec<String>,
    /// Unchanged rows that lacked the checksum of their decoded pixels and now have it.
    pub fixity_recorded: usize,
    /// Entries under the source that are not images to pack: `(path, reason, is_error)`.
    pub skipped: Vec<(String, String, bool)>,
}

impl PackReport {
    /// Whether some image under the source was not archived (a failure or an error skip).
    pub fn has_errors(&self) -> bool {
        !self.failed.is_empty() || self.skipped.iter().any(|s| s.2)
    }
}

/// SHA-256 of decoded pixels: width, height, channels (little-endian `u32`s), then samples.
pub fn pixel_hash(p: &Picture) -> String {
    let mut h = Sha256::new();
    h.update(p.width.to_le_bytes());
    h.update(p.height.to_le_bytes());
    h.update((p.channels as u32).to_le_bytes());
    h.update(&p.data);
    hex_prefix(&h.finalize(), 32)
}

fn container_rel(rel: &str) -> String {
    format!("{rel}.{CONTAINER_EXTENSION}")
}

fn mtime_ns(meta: &std::fs::Metadata) -> i64 {
    meta.modified().ok().and_then(|t| t.duration_since(UNIX_EPOCH).ok()).map(|d| d.as_nanos() as i64).unwrap_or(0)
}

fn now() -> i64 {
    SystemTime::now().duration_since(UNIX_EPOCH).map(|d| d.as_secs() as i64).unwrap_or(0)
}

/// Encodes `pic` as chosen by `target`; returns the container bytes, quality and decoded image.
pub fn encode_for_target(codec: &Codec, pic: &Picture, target: Target) -> Result<(Vec<u8>, f32, Picture)> {
    let try_q = |q: f32| -> Result<(Vec<u8>, Picture)> {
        let bytes = codec.encode(pic, q)?.bytes;
        let dec = codec.decode(&bytes)?;
        Ok((bytes, dec))
    };
    let px = pic.width as f64 * pic.height as f64;
    match target {
        Target::Quality(q) => try_q(q).map(|(b, d)| (b, q, d)),
        Target::Psnr(db) => {
            // Lowest quality meeting the bound, by bisection on the measured decoded PSNR.
            let (b, d) = try_q(100.0)?;
            if psnr(&pic.data, &d.data) < db {
                return Err(KilnError::InvalidArgument(format!(
                    "even quality 100 gives {:.2} dB, below the {db} dB target\nhint: lower --target-psnr or use a model trained for higher fidelity",
                    psnr(&pic.data, &d.data)
                )));
            }
            let mut best = (b, 100.0, d);
            let (mut lo, mut hi) = (1.0f32, 100.0f32);
            if let Ok((b, d)) = try_q(lo)
                && psnr(&pic.data, &d.data) >= db
            {
                return Ok((b, lo, d));
            }
            for _ in 0..8 {
                let mid = 0.5 * (lo + hi);
                let (b, d) = try_q(mid)?;
                if psnr(&pic.data, &d.data) >= db {
                    best = (b, mid, d);
                    hi = mid;
                } else {
                    lo = mid;
                }
            }
            Ok(best)
        }
        Target::Bpp(bpp) => {
            let fits = |b: &[u8]| b.len() as f64 * 8.0 / px <= bpp;
            let (b, d) = try_q(1.0)?;
            if !fits(&b) {
                return Err(KilnError::InvalidArgument(format!(
                    "even quality 1 needs {:.3} bpp, above the {bpp} target",
                    b.len() as f64 * 8.0 / px
                )));
            }
            let mut best = (b, 1.0, d);
            let (mut lo, mut hi) = (1.0f32, 100.0f32);
            if let Ok((b, d)) = try_q(hi)
                && fits(&b)
            {
                return Ok((b, hi, d));
            }
            for _ in 0..8 {
                let mid = 0.5 * (lo + hi);
                let (b, d) = try_q(mid)?;
                if fits(&b) {
                    best = (b, mid, d);
                    lo = mid;
                } else {
                    hi = mid;
                }
            }
            Ok(best)
        }
    }
}

enum Outcome {
    Packed(Box<Entry>, bool),
    Unchanged,
    /// Unchanged, its row given the decoded-pixel checksum it lacked.
    FixityRecorded(Box<Entry>),
    Failed(String, String),
    /// The storage under the archive failed: every worker stops.
    Fatal(KilnError),
}

/// Whether the container at `path` is intact: the catalog's size and both checksums.
fn container_intact(path: &Path, size: u64) -> bool {
    std::fs::symlink_metadata(path).is_ok_and(|m| m.is_file() && m.len() == size)
        && std::fs::read(path).is_ok_and(|b| crate::container::read(&b).is_ok())
}

fn first_line(e: &KilnError) -> String {
    e.to_string().lines().next().unwrap_or("").to_string()
}

/// A catalog row, its container's bytes, and whether it repairs a damaged container.
type Encoded = (Entry, Vec<u8>, bool);

/// What a pack run does with one source file.
enum Step {
    Unchanged,
    /// Unchanged; its row gains the checksum of its container's decoded pixels.
    RecordFixity(Entry),
    Encoded(Encoded),
}

fn pack_one(codec: &Codec, o: &PackOptions, path: &Path, rel: &str, existing: Option<Entry>) -> Outcome {
    let crel = container_rel(rel);
    let cpath = o.dest.join(&crel);
    let encode = || -> Result<Step> {
        let meta = std::fs::metadata(path).map_err(|e| KilnError::io(path, e))?;
        let pic = Picture::open(path, AlphaPolicy::Refuse)?;
        let hash = pixel_hash(&pic);
        let fp = hex_prefix(&codec.model_file().fingerprint, 32);
        let mut repaired = false;
        if let Some(e) = existing
            && e.source_size == meta.len()
            && e.source_mtime_ns == mtime_ns(&meta)
            && e.pixel_sha256 == hash
            && e.model_fingerprint == fp
            && !matches!(o.target, Target::Quality(q) if (e.quality - q as f64).abs() > 1e-6)
        {
            if container_intact(&cpath, e.container_size) {
                if e.decoded_sha256.is_some() {
                    return Ok(Step::Unchanged);
                }
                let decoded = codec.decode(&crate::image_io::read_regular(&cpath)?)?;
                return Ok(Step::RecordFixity(Entry { decoded_sha256: Some(pixel_hash(&decoded)), ..e }));
            }
            repaired = true;
        }
        let (bytes, quality, dec) = encode_for_target(codec, &pic, o.target)?;
        let (w, h) = (pic.width as usize, pic.height as usize);
        let entry = Entry {
            rel_path: rel.to_string(),
            source_size: meta.len(),
            source_mtime_ns: mtime_ns(&meta),
            pixel_sha256: hash,
            container_path: crel.clone(),
            container_size: bytes.len() as u64,
            png_size: image_png_size(&pic)?,
            width: pic.width,
            height: pic.height,
            channels: pic.channels,
            quality: quality as f64,
            bpp: bytes.len() as f64 * 8.0 / (w * h) as f64,
            psnr: psnr(&pic.data, &dec.data),
            ms_ssim: ms_ssim_if_defined(&pic, &dec),
            model_fingerprint: fp,
            packed_at: now(),
            decoded_sha256: Some(pixel_hash(&dec)),
        };
        Ok(Step::Encoded((entry, bytes, repaired)))
    };
    let (entry, bytes, repaired) = match encode() {
        Ok(Step::Encoded(x)) => x,
        Ok(Step::Unchanged) => return Outcome::Unchanged,
        Ok(Step::RecordFixity(e)) => return Outcome::FixityRecorded(Box::new(e)),
        Err(e) => return Outcome::Failed(rel.to_string(), first_line(&e)),
    };
    let write = || -> Result<()> {
        create_parents_within(&o.dest, Path::new(&crel))?;
        write_output(&cpath, &bytes, Overwrite::Replace, &[path])
    };
    match write() {
        Ok(()) => Outcome::Packed(Box::new(entry), repaired),
        Err(e) if e.is_storage_failure() => Outcome::Fatal(e),
        Err(e) => Outcome::Failed(rel.to_string(), first_line(&e)),
    }
}

/// PNG size at default compression (the "PNG-equivalent" figure in `kiln stats`).
fn image_png_size(pic: &Picture) -> Result<u64> {
    use image::ImageEncoder;
    use image::codecs::png::PngEncoder;
    let mut out = Vec::new();
    let color = if pic.channels == 3 { image::ExtendedColorType::Rgb8 } else { image::ExtendedColorType::L8 };
    PngEncoder::new(&mut out)
        .write_image(&pic.data, pic.width, pic.height, color)
        .map_err(|e| KilnError::UnsupportedImage(format!("PNG size: {e}")))?;
    Ok(out.len() as u64)
}

fn remove_stale_temporaries(dir: &Path) -> Result<()> {
    let Ok(entries) = std::fs::read_dir(dir) else { return Ok(()) };
    for e in entries.flatten() {
        let p = e.path();
        let Ok(kind) = e.file_type() else { continue };
        if kind.is_dir() {
            remove_stale_temporaries(&p)?;
        } else if kind.is_file() && e.file_name().to_string_lossy().starts_with(TEMP_PREFIX) {
            std::fs::remove_file(&p).map_err(|err| KilnError::io(&p, err))?;
        }
    }
    Ok(())
}

/// Number of `.kiln` files under `dir` (links not followed).
fn count_containers(dir: &Path) -> usize {
    let Ok(entries) = std::fs::read_dir(dir) else { return 0 };
    entries
        .flatten()
        .map(|e| match e.file_type() {
            Ok(k) if k.is_dir() => count_containers(&e.path()),
            Ok(k) if k.is_file() && e.path().extension().is_some_and(|x| x == CONTAINER_EXTENSION) => 1,
            _ => 0,
        })
        .sum()
}

/// The catalog path a pack run with this shard writes.
pub fn catalog_path(dest: &Path, shard: Option<Shard>) -> PathBuf {
    match shard {
        None => dest.join(CATALOG_FILE),
        Some(s) => dest.join(shard_file(s.index, s.count)),
    }
}

/// Packs `o.src` into `o.dest`.
///
/// # Errors
/// Source or destination unusable, or a storage failure during the run (the report of what was
/// done before it is lost, the catalog is consistent and a rerun resumes). Per-file problems are
/// not errors: they are in the report.
pub fn pack(codec: &Codec, o: &PackOptions) -> Result<PackReport> {
    if !o.src.is_dir() {
        return Err(KilnError::InvalidArgument(format!("source {} is not a folder", o.src.display())));
    }
    let src = o.src.canonicalize().map_err(|e| KilnError::io(&o.src, e))?;
    std::fs::create_dir_all(&o.dest).map_err(|e| KilnError::io(&o.dest, e))?;
    let dest = o.dest.canonicalize().map_err(|e| KilnError::io(&o.dest, e))?;
    if dest.starts_with(&src) || src.starts_with(&dest) {
        return Err(KilnError::InvalidArgument("source and destination must not contain each other".into()));
    }
    remove_stale_temporaries(&dest)?;
    let mut cat = Catalog::open(&catalog_path(&dest, o.shard))?;
    cat.set_meta("source_root", &src.display().to_string())?;
    models::carry_model(&dest, &cat, codec.model_file(), &o.model_name, now())?;
    let listing = crate::source_tree::list_source(&src, o.follow_symlinks)?;
    let takes = |rel: &str| o.shard.is_none_or(|s| s.takes(rel));
    let work: Vec<(PathBuf, String, Option<Entry>)> = listing
        .files
        .into_iter()
        .filter(|f| takes(&f.rel))
        .map(|f| cat.get(&f.rel).map(|e| (f.path, f.rel, e)))
        .collect::<Result<_>>()?;
    let mut report = PackReport {
        skipped: listing.skipped.into_iter().filter(|s| takes(&s.rel)).map(|s| (s.rel, s.reason, s.error)).collect(),
        ..PackReport::default()
    };
    let bar =
        if o.progress { indicatif::ProgressBar::new(work.len() as u64) } else { indicatif::ProgressBar::hidden() };
    bar.set_style(
        indicatif::ProgressStyle::with_template("{bar:30} {pos}/{len} files [{elapsed_precise} < {eta_precise}] {msg}")
            .expect("template"),
    );
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(o.jobs.max(1))
        .build()
        .map_err(|e| KilnError::InvalidArgument(format!("cannot start {} worker threads: {e}", o.jobs)))?;
    let o_inner = PackOptions { dest: dest.clone(), ..o.clone() };
    let (tx, rx) = mpsc::sync_channel::<Outcome>(o.jobs.max(1));
    let stop = AtomicBool::new(false);
    let t0 = Instant::now();
    let (mut mpx, mut saved) = (0.0f64, 0i64);
    let mut fatal: Option<KilnError> = None;
    std::thread::scope(|s| {
        s.spawn(|| {
            pool.install(|| {
                work.into_par_iter().for_each_with(tx, |tx, (p, rel, existing)| {
                    if stop.load(Ordering::Relaxed) {
                        return;
                    }
                    let _ = tx.send(pack_one(codec, &o_inner, &p, &rel, existing));
                })
            })
        });
        // Every outcome is received (the workers never block on a full channel), but after a
        // storage failure nothing more is written and the workers start no new file.
        for outcome in rx {
            if fatal.is_some() {
                continue;
            }
            let result = match outcome {
                Outcome::Packed(e, repaired) => cat.put(&e).map(|()| {
                    mpx += e.width as f64 * e.height as f64 / 1e6;
                    saved += e.source_size as i64 - e.container_size as i64;
                    report.packed += 1;
                    if repaired {
                        report.repaired.push(e.rel_path.clone());
                    }
                }),
                Outcome::Unchanged => {
                    report.unchanged += 1;
                    Ok(())
                }
                Outcome::FixityRecorded(e) => cat.put(&e).map(|()| {
                    report.unchanged += 1;
                    report.fixity_recorded += 1;
                }),
                Outcome::Failed(rel, why) => {
                    report.failed.push((rel, why));
                    Ok(())
                }
                Outcome::Fatal(e) => Err(e),
            };
            if let Err(e) = result {
                stop.store(true, Ordering::Relaxed);
                fatal = Some(e);
                continue;
            }
            bar.inc(1);
            let secs = t0.elapsed().as_secs_f64().max(1e-9);
            bar.set_message(format!("{:.2} Mpx/s, {:.1} MB saved", mpx / secs, saved as f64 / 1e6));
        }
    });
    bar.finish_and_clear();
    if let Some(e) = fatal {
        return Err(e);
    }
    let mut rows: Vec<SkippedRow> = report
        .skipped
        .iter()
        .map(|(rel, reason, error)| SkippedRow { rel_path: rel.clone(), reason: reason.clone(), error: *error })
        .collect();
    rows.extend(report.failed.iter().map(|(rel, why)| SkippedRow {
        rel_path: rel.clone(),
        reason: why.clone(),
        error: true,
    }));
    cat.set_skipped(&rows)?;
    Ok(report)
}

/// One problem found by [`verify`] or [`unpack`].
#[derive(Debug, Clone, Serialize)]
pub struct Mismatch {
    /// Relative source path.
    pub rel_path: String,
    /// What is wrong.
    pub problem: String,
}

/// Reads and decodes the container of catalog row `e`, its stored path checked first, with the
/// model the container names (which must be the one the catalog names).
fn decode_entry(decoders: &Decoders, dest: &Path, e: &Entry) -> std::result::Result<Picture, String> {
    let crel = safe_relative(&e.container_path).map_err(|err| first_line(&err))?;
    let cpath = dest.join(crel);
    let bytes =
        crate::image_io::read_regular(&cpath).map_err(|err| format!("container unreadable: {}", first_line(&err)))?;
    if bytes.len() as u64 != e.container_size {
        return Err(format!("container is {} bytes, catalog says {}", bytes.len(), e.container_size));
    }
    let header = crate::container::read_header(&bytes).map_err(|err| first_line(&err))?;
    let named = hex_prefix(&header.model_fingerprint, 32);
    if named != e.model_fingerprint {
        return Err(format!(
            "container names model {}, the catalog {}",
            &named[..16],
            e.model_fingerprint.get(..16).unwrap_or(&e.model_fingerprint)
        ));
    }
    decoders.decode(&bytes).map_err(|err| match err {
        // The places searched are listed once per model (`VerifyReport::models`), not per file.
        KilnError::ModelNotFound { fingerprint, .. } => format!("model {fingerprint} not found"),
        other => first_line(&other),
    })
}

/// How one model used by an archive's containers stands.
#[derive(Debug, Clone, Serialize)]
pub struct ModelUse {
    /// Fingerprint (hex, 64 digits).
    pub fingerprint: String,
    /// Catalog rows written with it.
    pub files: usize,
    /// Whether the archive records carrying it (`models/<fingerprint>.safetensors`).
    pub carried: bool,
    /// Where the decoder found it, or `None` if it was not found.
    pub found_in: Option<String>,
}

/// Every model the rows of `entries` use, and where `decoders` finds each.
fn model_uses(decoders: &Decoders, entries: &[Entry], carried: &[ModelRow]) -> Vec<ModelUse> {
    let mut counts: std::collections::BTreeMap<&str, usize> = std::collections::BTreeMap::new();
    for e in entries {
        *counts.entry(e.model_fingerprint.as_str()).or_default() += 1;
    }
    counts
        .into_iter()
        .map(|(fp, files)| ModelUse {
            fingerprint: fp.to_string(),
            files,
            carried: carried.iter().any(|m| m.fingerprint == fp),
            found_in: models::parse_fingerprint(fp).and_then(|f| decoders.codec_for(&f).ok()).map(|(_, place)| place),
        })
        .collect()
}

/// What [`verify`] found.
#[derive(Debug, Clone, Default, Serialize)]
pub struct VerifyReport {
    /// Rows in the catalog.
    pub files: usize,
    /// Rows whose container or source failed a check, each named.
    pub problems: Vec<Mismatch>,
    /// Files under the source that the last pack did not archive (`(path, reason, is_error)`).
    pub skipped: Vec<(String, String, bool)>,
    /// The models the containers use, whether the archive carries each and where it was found.
    pub models: Vec<ModelUse>,
    /// Model files met during the lookups that were not what their place promised.
    pub model_problems: Vec<String>,
    /// Rows checked exactly against their recorded decoded-pixel checksum.
    pub exact: usize,
}

/// Checks every model the archive carries against its fingerprint, then decodes every
/// container in the catalog with the model it names, checks its checksums, that its decoded
/// pixels are exactly those recorded at packing (`decoded_sha256`; rows packed before decoding
/// was exact have none, and where their source is present their PSNR is checked within
/// 0.01 dB instead), and that the source, where still present, is unchanged.
/// Goes on past every damaged file. Models are looked up in `store` with the archive's own
/// models folder after its explicit model (see [`crate::model::store`]); a damaged or missing
/// carried model is a problem (named `models/<fingerprint>.safetensors`) even where another
/// copy decodes the containers.
///
/// # Errors
/// No catalog, an unreadable catalog, or a catalog without rows beside containers (a lost or
/// foreign catalog must not read as "all verified").
pub fn verify(store: &ModelStore, dest: &Path) -> Result<VerifyReport> {
    let cat = Catalog::open_existing(&dest.join(CATALOG_FILE))?;
    let src_root = cat.meta("source_root")?.map(PathBuf::from);
    let entries = cat.all()?;
    if entries.is_empty() {
        let n = count_containers(dest);
        if n > 0 {
            return Err(KilnError::InvalidArgument(format!(
                "the catalog of {} lists no files, but the folder holds {n} container(s)\nhint: the catalog was lost or replaced; run `kiln pack` again with the same source to rebuild it",
                dest.display()
            )));
        }
    }
    let carried = cat.models()?;
    let mut problems: Vec<Mismatch> = carried
        .iter()
        .filter_map(|m| {
            models::check_carried(dest, m).map(|problem| Mismatch {
                rel_path: models::parse_fingerprint(&m.fingerprint)
                    .map_or_else(|| m.fingerprint.clone(), |fp| models::carried_rel(&fp)),
                problem,
            })
        })
        .collect();
    let decoders = Decoders::new(store.with_archive(dest));
    let models = model_uses(&decoders, &entries, &carried);
    problems.extend(
        entries
            .par_iter()
            .filter_map(|e| {
                let fail = |p: String| Some(Mismatch { rel_path: e.rel_path.clone(), problem: p });
                let dec = match decode_entry(&decoders, dest, e) {
                    Ok(d) => d,
                    Err(why) => return fail(why),
                };
                if let Some(recorded) = &e.decoded_sha256 {
                    let now = pixel_hash(&dec);
                    if &now != recorded {
                        return fail(format!(
                            "decoded pixels differ from those recorded at packing (SHA-256 {}…, recorded {}…)",
                            &now[..16],
                            recorded.get(..16).unwrap_or(recorded)
                        ));
                    }
                }
                let source = src_root.as_ref().zip(safe_relative(&e.rel_path).ok()).map(|(r, rel)| r.join(rel));
                if let Some(sp) = source.filter(|p| p.is_file()) {
                    match Picture::open(&sp, AlphaPolicy::Refuse) {
                        Ok(pic) if pixel_hash(&pic) != e.pixel_sha256 => {
                            return fail("source pixels changed since packing".into());
                        }
                        // Rows from before exact decoding: the PSNR recorded then, within 0.01 dB.
                        Ok(pic) if e.decoded_sha256.is_none() => {
                            let p = psnr(&pic.data, &dec.data);
                            if (p - e.psnr).abs() > 0.01 && !(p.is_infinite() && e.psnr.is_infinite()) {
                                return fail(format!("decoded PSNR {p:.3} dB, catalog says {:.3} dB", e.psnr));
                            }
                        }
                        Ok(_) => {}
                        Err(err) => return fail(format!("source unreadable: {}", first_line(&err))),
                    }
                }
                None
            })
            .collect::<Vec<_>>(),
    );
    let skipped = cat.skipped()?.into_iter().map(|r| (r.rel_path, r.reason, r.error)).collect();
    let model_problems = decoders.store().problems();
    let exact = entries.iter().filter(|e| e.decoded_sha256.is_some()).count();
    Ok(VerifyReport { files: entries.len(), problems, skipped, models, model_problems, exact })
}

/// What [`unpack`] did.
#[derive(Debug, Clone, Default, Serialize)]
pub struct UnpackReport {
    /// Files written.
    pub restored: usize,
    /// Rows not restored, each named with the reason.
    pub problems: Vec<Mismatch>,
}

/// Decodes every container back to PNG under `out` (created if missing), mirroring paths
/// (names from [`restored_name`]), writing the PNGs with `png` effort. An existing file is
/// replaced only with [`Overwrite::Replace`]. Goes on past every damaged container or unsafe
/// row and reports each. Models are looked up as by [`verify`].
///
/// # Errors
/// No catalog, or `out` cannot be created.
pub fn unpack(
    store: &ModelStore,
    dest: &Path,
    out: &Path,
    png: PngEffort,
    overwrite: Overwrite,
) -> Result<UnpackReport> {
    let cat = Catalog::open_existing(&dest.join(CATALOG_FILE))?;
    let decoders = Decoders::new(store.with_archive(dest));
    let entries = cat.all()?;
    std::fs::create_dir_all(out).map_err(|e| KilnError::io(out, e))?;
    // One restored name per row: a second row that maps to a name already taken is refused.
    let mut taken = std::collections::HashMap::new();
    let mut problems = Vec::new();
    let mut jobs = Vec::new();
    for e in &entries {
        let name = restored_name(&e.rel_path);
        match safe_relative(&name) {
            Err(err) => problems.push(Mismatch { rel_path: e.rel_path.clone(), problem: first_line(&err) }),
            Ok(rel) => match taken.insert(rel.clone(), e.rel_path.clone()) {
                Some(first) => problems.push(Mismatch {
                    rel_path: e.rel_path.clone(),
                    problem: format!("restores to {}, the name {first} restores to; not written", rel.display()),
                }),
                None => jobs.push((e, rel)),
            },
        }
    }
    let results: Vec<std::result::Result<(), Mismatch>> = jobs
        .par_iter()
        .map(|(e, rel)| {
            let fail = |problem: String| Mismatch { rel_path: e.rel_path.clone(), problem };
            let pic = decode_entry(&decoders, dest, e).map_err(fail)?;
            let bytes = pic.to_png_with(png).map_err(|err| fail(first_line(&err)))?;
            create_parents_within(out, rel).map_err(|err| fail(first_line(&err)))?;
            write_output(&out.join(rel), &bytes, overwrite, &[]).map_err(|err| fail(first_line(&err)))
        })
        .collect();
    let mut restored = 0;
    for r in results {
        match r {
            Ok(()) => restored += 1,
            Err(m) => problems.push(m),
        }
    }
    problems.sort_by(|a, b| a.rel_path.cmp(&b.rel_path));
    Ok(UnpackReport { restored, problems })
}

/// Archive totals.
#[derive(Debug, Clone, Serialize)]
pub struct Stats {
    /// Files in the catalog.
    pub files: usize,
    /// Bytes of the source files.
    pub source_bytes: u64,
    /// Bytes of the same pixels as PNG.
    pub png_bytes: u64,
    /// Bytes of the containers.
    pub kiln_bytes: u64,
    /// Source bytes / Kiln bytes.
    pub ratio_vs_source: f64,
    /// PNG bytes / Kiln bytes.
    pub ratio_vs_png: f64,
    /// Mean PSNR (dB) over files with a finite PSNR; `None` if there are none.
    pub mean_psnr: Option<f64>,
    /// Lowest PSNR (dB); `None` if no file has a finite PSNR.
    pub worst_psnr: Option<f64>,
    /// Files under the source the last pack did not archive for an error.
    pub skipped_errors: usize,
    /// Other entries under the source left alone (not images, links, special files).
    pub skipped_notes: usize,
    /// The file with the lowest PSNR.
    pub worst_file: Option<String>,
}

/// Totals over the catalog.
pub fn stats(dest: &Path) -> Result<Stats> {
    let cat = Catalog::open_existing(&dest.join(CATALOG_FILE))?;
    let e = cat.all()?;
    let skipped = cat.skipped()?;
    let sum = |f: fn(&Entry) -> u64| e.iter().map(f).sum::<u64>();
    let (src, png, kiln) = (sum(|x| x.source_size), sum(|x| x.png_size), sum(|x| x.container_size));
    let finite: Vec<&Entry> = e.iter().filter(|x| x.psnr.is_finite()).collect();
    let worst = finite.iter().min_by(|a, b| a.psnr.total_cmp(&b.psnr));
    Ok(Stats {
        files: e.len(),
        source_bytes: src,
        png_bytes: png,
        kiln_bytes: kiln,
        ratio_vs_source: src as f64 / kiln.max(1) as f64,
        ratio_vs_png: png as f64 / kiln.max(1) as f64,
        mean_psnr: (!finite.is_empty()).then(|| finite.iter().map(|x| x.psnr).sum::<f64>() / finite.len() as f64),
        worst_psnr: worst.map(|x| x.psnr),
        skipped_errors: skipped.iter().filter(|r| r.error).count(),
        skipped_notes: skipped.iter().filter(|r| !r.error).count(),
        worst_file: worst.map(|x| x.rel_path.clone()),
    })
}

/// Unites every shard catalog in `dest` into `catalog.sqlite`, their models included; returns
/// the number of rows and the problems: rows refused because a stored path could lead outside
/// the archive, and carried models missing or damaged in `models/` (named by their path).
pub fn merge_catalogs(dest: &Path) -> Result<(usize, Vec<Mismatch>)> {
    let mut shards: Vec<PathBuf> = std::fs::read_dir(dest)
        .map_err(|e| KilnError::io(dest, e))?
        .flatten()
        .map(|e| e.path())
        .filter(|p| {
            p.file_name().is_some_and(|n| {
                n.to_string_lossy().starts_with("catalog.shard-") && n.to_string_lossy().ends_with(".sqlite")
            })
        })
        .collect();
    shards.sort();
    if shards.is_empty() {
        return Err(KilnError::InvalidArgument(format!(
            "no shard catalogs (catalog.shard-*.sqlite) in {}",
            dest.display()
        )));
    }
    let mut merged = Catalog::open(&dest.join(CATALOG_FILE))?;
    let mut skipped = Vec::new();
    let mut refused = Vec::new();
    for s in &shards {
        let c = Catalog::open_existing(s)?;
        if let Some(root) = c.meta("source_root")? {
            merged.set_meta("source_root", &root)?;
        }
        for e in c.all()? {
            match safe_relative(&e.container_path).and_then(|_| safe_relative(&e.rel_path)) {
                Ok(_) => merged.put(&e)?,
                Err(err) => refused.push(Mismatch { rel_path: e.rel_path.clone(), problem: first_line(&err) }),
            }
        }
        skipped.extend(c.skipped()?);
        for m in c.models()? {
            merged.put_model(&m)?;
        }
    }
    merged.set_skipped(&skipped)?;
    for m in merged.models()? {
        if let Some(problem) = models::check_carried(dest, &m) {
            let rel_path = models::parse_fingerprint(&m.fingerprint)
                .map_or_else(|| m.fingerprint.clone(), |fp| models::carried_rel(&fp));
            refused.push(Mismatch { rel_path, problem });
        }
    }
    Ok((merged.all()?.len(), refused))
}
