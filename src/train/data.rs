//! Training images: loading folders, random crops and flips.
//!
//! A folder whose decoded images fit the memory budget is held in memory whole. A larger one
//! (an archive of 100 000 frames) is *streamed*: the files are put in an order shuffled from
//! the seed, a pool holds as many decoded images as the budget allows, crops come from the
//! pool, and every step the oldest pool image is replaced by the next file in the order, so
//! every file is visited once per pass over the order while memory stays within the budget.

use std::collections::VecDeque;
use std::path::PathBuf;

use candle_core::{Device, Tensor};
use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

use crate::error::{KilnError, Result};
use crate::image_io::{AlphaPolicy, Picture};

/// All image files under `dirs` (folders listed with [`crate::source_tree::list_source`]:
/// symbolic links and special files left alone, images recognised by content; files taken as
/// given), sorted so runs are reproducible.
pub fn list_images(dirs: &[PathBuf]) -> Result<Vec<PathBuf>> {
    let mut out = Vec::new();
    for d in dirs {
        if d.is_file() {
            out.push(d.clone());
        } else {
            let root = d.canonicalize().map_err(|e| KilnError::io(d, e))?;
            out.extend(crate::source_tree::list_source(&root, false)?.files.into_iter().map(|f| f.path));
        }
    }
    out.sort();
    Ok(out)
}

/// Decoded RGB training images: all of them in memory, or a bounded pool streamed from disk.
#[derive(Debug, Clone)]
pub struct ImageSet {
    images: Vec<Picture>,
    /// Files skipped, with the reason.
    pub skipped: Vec<(PathBuf, String)>,
    stream: Option<Stream>,
}

/// The streaming state: files in shuffled order, the next one to read, the pool's bytes.
#[derive(Debug, Clone)]
struct Stream {
    order: Vec<PathBuf>,
    next: usize,
    budget: u64,
    patch: usize,
    /// Bytes of the decoded images in the pool, oldest first (parallel to `images`).
    sizes: VecDeque<u64>,
    /// Files visited so far (decoded or skipped), over all passes.
    visited: u64,
}

/// Bytes an RGB image of `w × h` takes decoded.
fn rgb_bytes(w: u32, h: u32) -> u64 {
    w as u64 * h as u64 * 3
}

impl ImageSet {
    /// Loads every image under `dirs` that is at least `patch` on both sides; others are
    /// skipped with a warning on stderr and counted.
    pub fn load(dirs: &[PathBuf], patch: usize) -> Result<Self> {
        let mut images = Vec::new();
        let mut skipped = Vec::new();
        for path in list_images(dirs)? {
            match Picture::open(&path, AlphaPolicy::Drop) {
                Ok(p) if (p.width as usize) < patch || (p.height as usize) < patch => {
                    skipped.push((path, format!("{}×{} is smaller than the {patch}px patch", p.width, p.height)))
                }
                Ok(p) => images.push(Picture { data: p.to_rgb(), channels: 3, ..p }),
                Err(e) => skipped.push((path, e.to_string().lines().next().unwrap_or("").to_string())),
            }
        }
        for (p, why) in &skipped {
            eprintln!("warning: skipped {}: {why}", p.display());
        }
        Ok(ImageSet { images, skipped, stream: None })
    }

    /// Like [`ImageSet::load`] while the images' decoded size (read from their headers, RGB)
    /// fits `budget` bytes; otherwise streams them (see the module docs) in an order shuffled
    /// from `seed`, never holding more than `budget` bytes of decoded images. A file larger
    /// than the budget on its own is skipped with a warning, undecoded.
    ///
    /// # Errors
    /// Listing errors of [`list_images`].
    pub fn load_within(dirs: &[PathBuf], patch: usize, budget: u64, seed: u64) -> Result<Self> {
        let files = list_images(dirs)?;
        let mut total = 0u64;
        for f in &files {
            if let Some((w, h)) = dimensions(f).filter(|&(w, h)| w as usize >= patch && h as usize >= patch) {
                total += rgb_bytes(w, h);
            }
            if total > budget {
                break;
            }
        }
        if total <= budget {
            return Self::load(dirs, patch);
        }
        let mut order = files;
        order.shuffle(&mut ChaCha8Rng::seed_from_u64(seed));
        let mut set = ImageSet {
            images: Vec::new(),
            skipped: Vec::new(),
            stream: Some(Stream { order, next: 0, budget, patch, sizes: VecDeque::new(), visited: 0 }),
        };
        // Fill the pool: read files in order until the next one would not fit (or all were read).
        let n = set.stream.as_ref().map_or(0, |s| s.order.len());
        for _ in 0..n {
            if !set.read_next(true) {
                break;
            }
        }
        Ok(set)
    }

    /// Streaming: reads the next file of the order into the pool, evicting the oldest images
    /// until it fits (`fill`: stop instead, returning `false`, when it would not fit without
    /// evicting). Unreadable, too small and too large files are skipped with a warning.
    fn read_next(&mut self, fill: bool) -> bool {
        let Some(s) = self.stream.as_mut() else { return false };
        let path = s.order[s.next].clone();
        let (patch, budget) = (s.patch, s.budget);
        let first_pass = s.visited < s.order.len() as u64;
        let size = dimensions(&path).map(|(w, h)| (w, h, rgb_bytes(w, h)));
        let skip = match size {
            None => Some("cannot read its header".to_string()),
            Some((w, h, _)) if (w as usize) < patch || (h as usize) < patch => {
                Some(format!("{w}×{h} is smaller than the {patch}px patch"))
            }
            Some((w, h, b)) if b > budget => Some(format!("{w}×{h} alone exceeds the memory budget of {budget} bytes")),
            Some(_) => None,
        };
        let bytes = size.map_or(0, |t| t.2);
        if skip.is_none() && fill && s.sizes.iter().sum::<u64>() + bytes > budget {
            return false;
        }
        s.next = (s.next + 1) % s.order.len();
        s.visited += 1;
        let result = match skip {
            Some(why) => Err(why),
            None => Picture::open(&path, AlphaPolicy::Drop)
                .map_err(|e| e.to_string().lines().next().unwrap_or("").to_string()),
        };
        match result {
            Ok(p) => {
                while s.sizes.iter().sum::<u64>() + bytes > budget && !s.sizes.is_empty() {
                    s.sizes.pop_front();
                    self.images.remove(0);
                }
                s.sizes.push_back(bytes);
                self.images.push(Picture { data: p.to_rgb(), channels: 3, ..p });
            }
            Err(why) => {
                if first_pass {
                    eprintln!("warning: skipped {}: {why}", path.display());
                    self.skipped.push((path, why));
                }
            }
        }
        true
    }

    /// Whether the images are streamed from disk (they did not fit the memory budget).
    pub fn is_streamed(&self) -> bool {
        self.stream.is_some()
    }

    /// Bytes of decoded images held now.
    pub fn held_bytes(&self) -> u64 {
        self.images.iter().map(|p| p.data.len() as u64).sum()
    }

    /// Number of image files a streamed set draws from (the images held otherwise).
    pub fn files(&self) -> usize {
        self.stream.as_ref().map_or(self.images.len(), |s| s.order.len())
    }

    /// Wraps already decoded RGB pictures.
    pub fn from_pictures(images: Vec<Picture>) -> Self {
        ImageSet {
            images: images.into_iter().map(|p| Picture { data: p.to_rgb(), channels: 3, ..p }).collect(),
            skipped: vec![],
            stream: None,
        }
    }

    /// Number of usable images held (the pool's size when streamed).
    pub fn len(&self) -> usize {
        self.images.len()
    }

    /// Whether no image is usable.
    pub fn is_empty(&self) -> bool {
        self.images.is_empty()
    }

    /// The images.
    pub fn images(&self) -> &[Picture] {
        &self.images
    }

    /// A batch of `batch` random `patch × patch` crops with random horizontal flips, as a
    /// `(B, 3, P, P)` tensor in `[0, 1]`. A streamed set first replaces its oldest image with
    /// the next file in its order.
    ///
    /// # Errors
    /// [`KilnError::InvalidArgument`] when no image is held.
    pub fn sample(&mut self, batch: usize, patch: usize, rng: &mut ChaCha8Rng) -> Result<Tensor> {
        if self.stream.is_some() {
            self.read_next(false);
        }
        if self.images.is_empty() {
            return Err(KilnError::InvalidArgument("no usable training image".into()));
        }
        let mut data = vec![0f32; batch * 3 * patch * patch];
        for b in 0..batch {
            let img = &self.images[rng.gen_range(0..self.images.len())];
            let (w, h) = (img.width as usize, img.height as usize);
            let x0 = rng.gen_range(0..=w - patch);
            let y0 = rng.gen_range(0..=h - patch);
            let flip = rng.gen_bool(0.5);
            for y in 0..patch {
                for x in 0..patch {
                    let sx = if flip { x0 + patch - 1 - x } else { x0 + x };
                    let src = ((y0 + y) * w + sx) * 3;
                    for c in 0..3 {
                        data[((b * 3 + c) * patch + y) * patch + x] = img.data[src + c] as f32 / 255.0;
                    }
                }
            }
        }
        Ok(Tensor::from_vec(data, (batch, 3, patch, patch), &Device::Cpu)?)
    }
}

/// Width and height from an image file's header, without decoding it.
fn dimensions(path: &std::path::Path) -> Option<(u32, u32)> {
    image::ImageReader::open(path).ok()?.with_guessed_format().ok()?.into_dimensions().ok()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A folder of `n` distinct 64×64 (or `big`×`big` for the last) RGB PNGs.
    fn folder(n: usize, big: Option<u32>) -> tempfile::TempDir {
        let dir = tempfile::tempdir().unwrap();
        for i in 0..n {
            let side = if i + 1 == n { big.unwrap_or(64) } else { 64 };
            let data = vec![i as u8; (side * side * 3) as usize];
            let p = Picture { width: side, height: side, channels: 3, data };
            std::fs::write(dir.path().join(format!("img{i:02}.png")), p.to_png().unwrap()).unwrap();
        }
        dir
    }

    #[test]
    fn a_set_within_the_budget_is_held_whole_as_before() {
        let dir = folder(4, None);
        let dirs = vec![dir.path().to_path_buf()];
        let set = ImageSet::load_within(&dirs, 64, 1 << 20, 1).unwrap();
        assert!(!set.is_streamed());
        assert_eq!(set.len(), 4);
        assert_eq!(set.images()[2].data, ImageSet::load(&dirs, 64).unwrap().images()[2].data);
    }

    #[test]
    fn a_larger_set_is_streamed_within_the_budget_and_every_file_is_visited() {
        let dir = folder(10, Some(200));
        let dirs = vec![dir.path().to_path_buf()];
        let one = 64 * 64 * 3;
        let budget = 3 * one as u64 + 100;
        let mut set = ImageSet::load_within(&dirs, 64, budget, 5).unwrap();
        assert!(set.is_streamed());
        assert_eq!((set.files(), set.len()), (10, 3));
        // The 200×200 image alone exceeds the budget: skipped undecoded, named once.
        let mut rng = ChaCha8Rng::seed_from_u64(1);
        let mut seen = std::collections::BTreeSet::new();
        for _ in 0..30 {
            let x = set.sample(2, 64, &mut rng).unwrap();
            assert!(set.held_bytes() <= budget, "{} bytes held", set.held_bytes());
            // Each image is one flat value, so a crop names its image.
            for b in 0..2 {
                seen.insert(
                    (x.get(b).unwrap().flatten_all().unwrap().to_vec1::<f32>().unwrap()[0] * 255.0).round() as u8
                );
            }
        }
        assert_eq!(set.skipped.len(), 1, "{:?}", set.skipped);
        assert!(set.skipped[0].1.contains("exceeds the memory budget"));
        assert_eq!(seen.len(), 9, "images drawn: {seen:?}");
        // The same seed streams the same order.
        let again = ImageSet::load_within(&dirs, 64, budget, 5).unwrap();
        let first = ImageSet::load_within(&dirs, 64, budget, 5).unwrap();
        assert_eq!(again.images()[0].data, first.images()[0].data);
    }
}
