//! Training images: loading folders, random crops and flips.

use std::path::PathBuf;

use candle_core::{Device, Tensor};
use rand::Rng;
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

/// Decoded RGB training images held in memory.
#[derive(Debug, Clone)]
pub struct ImageSet {
    images: Vec<Picture>,
    /// Files skipped, with the reason.
    pub skipped: Vec<(PathBuf, String)>,
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
        Ok(ImageSet { images, skipped })
    }

    /// Wraps already decoded RGB pictures.
    pub fn from_pictures(images: Vec<Picture>) -> Self {
        ImageSet {
            images: images.into_iter().map(|p| Picture { data: p.to_rgb(), channels: 3, ..p }).collect(),
            skipped: vec![],
        }
    }

    /// Number of usable images.
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
    /// `(B, 3, P, P)` tensor in `[0, 1]`.
    pub fn sample(&self, batch: usize, patch: usize, rng: &mut ChaCha8Rng) -> Result<Tensor> {
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
