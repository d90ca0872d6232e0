//! Archives: a source tree mirrored as `.kiln` containers with a SQLite catalog.
//!
//! Guarantees of [`pack`]: nothing under the source is ever written, moved or deleted; every
//! container is written to a temporary file in its folder and renamed when complete, and its
//! catalog row is committed after the rename, so an interrupted run leaves no half-written
//! container or row (stale temporary files are removed at the next run); a rerun skips files
//! whose row matches the source's size, modification time and pixel hash.

pub mod catalog;

use std::path::{Path, PathBuf};
use std::sync::mpsc;
use std::time::{Instant, SystemTime, UNIX_EPOCH};

use rayon::prelude::*;
use serde::Serialize;
use sha2::{Digest, Sha256};

use crate::codec::Codec;
use crate::error::{KilnError, Result};
use crate::image_io::{AlphaPolicy, Picture, PngEffort, write_atomic};
use crate::metrics::{ms_ssim, psnr};
use crate::model::hex_prefix;
use catalog::{CATALOG_FILE, Catalog, Entry, shard_file};

/// Extension appended to a source file's name for its container.
pub const CONTAINER_EXTENSION: &str = "kiln";
/// Prefix of temporary files (removed from the archive at the start of every pack).
pub const TEMP_PREFIX: &str = ".kiln-tmp-";

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

fn rel_string(path: &Path, root: &Path) -> String {
    let rel = path.strip_prefix(root).unwrap_or(path);
    rel.components().map(|c| c.as_os_str().to_string_lossy()).collect::<Vec<_>>().join("/")
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
    Packed(Box<Entry>),
    Unchanged,
    Failed(String, String),
}

fn pack_one(codec: &Codec, o: &PackOptions, path: &Path, rel: &str, existing: Option<Entry>) -> Outcome {
    let run = || -> Result<Outcome> {
        let meta = std::fs::metadata(path).map_err(|e| KilnError::io(path, e))?;
        let pic = Picture::open(path, AlphaPolicy::Refuse)?;
        let hash = pixel_hash(&pic);
        let crel = container_rel(rel);
        let cpath = o.dest.join(&crel);
        let fp = hex_prefix(&codec.model_file().fingerprint, 32);
        if let Some(e) = existing
            && e.source_size == meta.len()
            && e.source_mtime_ns == mtime_ns(&meta)
            && e.pixel_sha256 == hash
            && e.model_fingerprint == fp
            && !matches!(o.target, Target::Quality(q) if (e.quality - q as f64).abs() > 1e-6)
            && std::fs::metadata(&cpath).is_ok_and(|m| m.len() == e.container_size)
        {
            return Ok(Outcome::Unchanged);
        }
        let (bytes, quality, dec) = encode_for_target(codec, &pic, o.target)?;
        if let Some(parent) = cpath.parent() {
            std::fs::create_dir_all(parent).map_err(|e| KilnError::io(parent, e))?;
        }
        write_atomic(&cpath, &bytes)?;
        let (w, h, c) = (pic.width as usize, pic.height as usize, pic.channels as usize);
        let png_size = image_png_size(&pic)?;
        Ok(Outcome::Packed(Box::new(Entry {
            rel_path: rel.to_string(),
            source_size: meta.len(),
            source_mtime_ns: mtime_ns(&meta),
            pixel_sha256: hash,
            container_path: crel,
            container_size: bytes.len() as u64,
            png_size,
            width: pic.width,
            height: pic.height,
            channels: pic.channels,
            quality: quality as f64,
            bpp: bytes.len() as f64 * 8.0 / (w * h) as f64,
            psnr: psnr(&pic.data, &dec.data),
            ms_ssim: if w >= 11 && h >= 11 { ms_ssim(&pic.data, &dec.data, w, h, c) } else { f64::NAN },
            model_fingerprint: fp,
            packed_at: now(),
        })))
    };
    match run() {
        Ok(o) => o,
        Err(e) => Outcome::Failed(rel.to_string(), e.to_string().lines().next().unwrap_or("").to_string()),
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
        if p.is_dir() {
            remove_stale_temporaries(&p)?;
        } else if e.file_name().to_string_lossy().starts_with(TEMP_PREFIX) {
            std::fs::remove_file(&p).map_err(|err| KilnError::io(&p, err))?;
        }
    }
    Ok(())
}

/// The catalog path a pack run with this shard writes.
pub fn catalog_path(dest: &Path, shard: Option<Shard>) -> PathBuf {
    match shard {
        None => dest.join(CATALOG_FILE),
        Some(s) => dest.join(shard_file(s.index, s.count)),
    }
}

/// Packs `o.src` into `o.dest`.
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
    let files: Vec<(PathBuf, String)> = crate::train::data::list_images(std::slice::from_ref(&src))?
        .into_iter()
        .map(|p| {
            let rel = rel_string(&p, &src);
            (p, rel)
        })
        .filter(|(_, rel)| o.shard.is_none_or(|s| s.takes(rel)))
        .collect();
    let work: Vec<(PathBuf, String, Option<Entry>)> =
        files.into_iter().map(|(p, r)| cat.get(&r).map(|e| (p, r, e))).collect::<Result<_>>()?;
    let bar =
        if o.progress { indicatif::ProgressBar::new(work.len() as u64) } else { indicatif::ProgressBar::hidden() };
    bar.set_style(
        indicatif::ProgressStyle::with_template("{bar:30} {pos}/{len} files [{elapsed_precise} < {eta_precise}] {msg}")
            .expect("template"),
    );
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(o.jobs.max(1))
        .build()
        .map_err(|e| KilnError::InvalidArgument(e.to_string()))?;
    let o_inner = PackOptions { dest: dest.clone(), ..o.clone() };
    let (tx, rx) = mpsc::sync_channel::<Outcome>(o.jobs.max(1));
    let mut report = PackReport::default();
    let t0 = Instant::now();
    let (mut mpx, mut saved) = (0.0f64, 0i64);
    std::thread::scope(|s| -> Result<()> {
        s.spawn(|| {
            pool.install(|| {
                work.into_par_iter().for_each_with(tx, |tx, (p, rel, existing)| {
                    let _ = tx.send(pack_one(codec, &o_inner, &p, &rel, existing));
                })
            })
        });
        for outcome in rx {
            match outcome {
                Outcome::Packed(e) => {
                    cat.put(&e)?;
                    mpx += e.width as f64 * e.height as f64 / 1e6;
                    saved += e.source_size as i64 - e.container_size as i64;
                    report.packed += 1;
                }
                Outcome::Unchanged => report.unchanged += 1,
                Outcome::Failed(rel, why) => report.failed.push((rel, why)),
            }
            bar.inc(1);
            let secs = t0.elapsed().as_secs_f64().max(1e-9);
            bar.set_message(format!("{:.2} Mpx/s, {:.1} MB saved", mpx / secs, saved as f64 / 1e6));
        }
        Ok(())
    })?;
    bar.finish_and_clear();
    Ok(report)
}

/// One problem found by [`verify`].
#[derive(Debug, Clone, Serialize)]
pub struct Mismatch {
    /// Relative source path.
    pub rel_path: String,
    /// What is wrong.
    pub problem: String,
}

/// Decodes every container in the catalog, checks its checksums and, where the source is still
/// present and unchanged, that the decoded PSNR matches the recorded one (±0.01 dB).
pub fn verify(codec: &Codec, dest: &Path) -> Result<(usize, Vec<Mismatch>)> {
    let cat = Catalog::open_existing(&dest.join(CATALOG_FILE))?;
    let src_root = cat.meta("source_root")?.map(PathBuf::from);
    let entries = cat.all()?;
    let problems: Vec<Mismatch> = entries
        .par_iter()
        .filter_map(|e| {
            let fail = |p: String| Some(Mismatch { rel_path: e.rel_path.clone(), problem: p });
            let cpath = dest.join(&e.container_path);
            let bytes = match std::fs::read(&cpath) {
                Ok(b) => b,
                Err(err) => return fail(format!("container unreadable: {err}")),
            };
            if bytes.len() as u64 != e.container_size {
                return fail(format!("container is {} bytes, catalog says {}", bytes.len(), e.container_size));
            }
            let dec = match codec.decode(&bytes) {
                Ok(d) => d,
                Err(err) => return fail(err.to_string().lines().next().unwrap_or("").to_string()),
            };
            let source = src_root.as_ref().map(|r| r.join(&e.rel_path)).filter(|p| p.is_file());
            if let Some(sp) = source {
                match Picture::open(&sp, AlphaPolicy::Refuse) {
                    Ok(pic) if pixel_hash(&pic) != e.pixel_sha256 => {
                        return fail("source pixels changed since packing".into());
                    }
                    Ok(pic) => {
                        let p = psnr(&pic.data, &dec.data);
                        if (p - e.psnr).abs() > 0.01 && !(p.is_infinite() && e.psnr.is_infinite()) {
                            return fail(format!("decoded PSNR {p:.3} dB, catalog says {:.3} dB", e.psnr));
                        }
                    }
                    Err(err) => return fail(format!("source unreadable: {err}")),
                }
            }
            None
        })
        .collect();
    Ok((entries.len(), problems))
}

/// Decodes every container back to PNG under `out`, mirroring paths (extension → `.png`),
/// writing the PNGs with `png` effort.
pub fn unpack(codec: &Codec, dest: &Path, out: &Path, png: PngEffort) -> Result<usize> {
    let cat = Catalog::open_existing(&dest.join(CATALOG_FILE))?;
    let entries = cat.all()?;
    entries.par_iter().try_for_each(|e| -> Result<()> {
        let cpath = dest.join(&e.container_path);
        let bytes = std::fs::read(&cpath).map_err(|err| KilnError::io(&cpath, err))?;
        let pic = codec.decode(&bytes)?;
        let target = out.join(Path::new(&e.rel_path).with_extension("png"));
        if let Some(parent) = target.parent() {
            std::fs::create_dir_all(parent).map_err(|err| KilnError::io(parent, err))?;
        }
        write_atomic(&target, &pic.to_png_with(png)?)
    })?;
    Ok(entries.len())
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
    /// Mean PSNR (dB).
    pub mean_psnr: f64,
    /// Lowest PSNR (dB).
    pub worst_psnr: f64,
    /// The file with the lowest PSNR.
    pub worst_file: Option<String>,
}

/// Totals over the catalog.
pub fn stats(dest: &Path) -> Result<Stats> {
    let cat = Catalog::open_existing(&dest.join(CATALOG_FILE))?;
    let e = cat.all()?;
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
        mean_psnr: finite.iter().map(|x| x.psnr).sum::<f64>() / finite.len().max(1) as f64,
        worst_psnr: worst.map(|x| x.psnr).unwrap_or(f64::NAN),
        worst_file: worst.map(|x| x.rel_path.clone()),
    })
}

/// Unites every shard catalog in `dest` into `catalog.sqlite`; returns the number of rows.
pub fn merge_catalogs(dest: &Path) -> Result<usize> {
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
    for s in &shards {
        let c = Catalog::open_existing(s)?;
        if let Some(root) = c.meta("source_root")? {
            merged.set_meta("source_root", &root)?;
        }
        for e in c.all()? {
            merged.put(&e)?;
        }
    }
    Ok(merged.all()?.len())
}
