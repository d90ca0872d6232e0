//! Reading images into planar-friendly buffers and writing PNGs atomically.
//!
//! Policy: 8-bit RGB and grey are taken as they are; an alpha channel that is opaque everywhere
//! is dropped (nothing is lost), any other alpha is refused unless the caller asks to drop it;
//! 16-bit and float images are refused ("not supported yet"), never silently converted; images
//! with more than one page or frame (multi-page TIFF, animated GIF, PNG or WebP) are refused by
//! name rather than stored as their first page; the EXIF orientation is applied, so the pixels
//! are the ones a viewer shows. Only regular files are opened: a FIFO or device is refused
//! before it can block the reader.

use std::io::{Cursor, Read};
use std::path::Path;

use image::{AnimationDecoder, DynamicImage, ImageDecoder, ImageFormat, ImageReader};

use crate::error::{KilnError, Result};
use crate::files::{Overwrite, write_output};

/// An 8-bit image, samples interleaved row by row (`channels` = 1 or 3).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Picture {
    /// Width in pixels.
    pub width: u32,
    /// Height in pixels.
    pub height: u32,
    /// 1 (grey) or 3 (RGB).
    pub channels: u8,
    /// `width · height · channels` samples.
    pub data: Vec<u8>,
}

/// What to do with an alpha channel.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum AlphaPolicy {
    /// Refuse images with alpha (the default: dropping it loses data).
    #[default]
    Refuse,
    /// Drop alpha and keep the colour channels.
    Drop,
}

impl Picture {
    /// Converts a decoded image, applying the alpha policy.
    pub fn from_dynamic(img: DynamicImage, alpha: AlphaPolicy) -> Result<Self> {
        let color = img.color();
        if color.bits_per_pixel() / color.channel_count() as u16 != 8 {
            return Err(KilnError::UnsupportedImage(format!(
                "{color:?}: only 8-bit images are supported yet\nhint: convert to 8-bit first; Kiln never converts silently"
            )));
        }
        let opaque = color.has_alpha() && is_opaque(&img);
        if color.has_alpha() && !opaque && alpha == AlphaPolicy::Refuse {
            return Err(KilnError::UnsupportedImage(
                "the image has transparent pixels (an alpha channel below full opacity)\nhint: pass --drop-alpha to code the colour channels only".into(),
            ));
        }
        let (width, height) = (img.width(), img.height());
        let (channels, data) =
            if color.has_color() { (3, img.into_rgb8().into_raw()) } else { (1, img.into_luma8().into_raw()) };
        Ok(Picture { width, height, channels, data })
    }

    /// Reads any format the image crate recognises (see the module policy).
    ///
    /// # Errors
    /// I/O errors naming the path; [`KilnError::UnsupportedImage`] for a special file, an
    /// undecodable file, several pages or frames, or samples Kiln does not take.
    pub fn open(path: &Path, alpha: AlphaPolicy) -> Result<Self> {
        let bytes = read_regular(path)?;
        let unsupported = |m: String| KilnError::UnsupportedImage(format!("{}: {m}", path.display()));
        let mut reader =
            ImageReader::new(Cursor::new(&bytes[..])).with_guessed_format().map_err(|e| KilnError::io(path, e))?;
        // The content decides; the extension is the fallback, so that a damaged file named
        // like an image is reported as undecodable rather than as "not an image".
        let format = reader
            .format()
            .or_else(|| ImageFormat::from_path(path).ok())
            .ok_or_else(|| unsupported("not an image format Kiln reads".into()))?;
        reader.set_format(format);
        if let Some(pages) = several_frames(&bytes, format) {
            return Err(unsupported(format!(
                "has more than one {pages}; Kiln stores single images\nhint: split it into one file per {pages} first"
            )));
        }
        let mut decoder = reader.into_decoder().map_err(|e| unsupported(format!("cannot decode: {e}")))?;
        let orientation = decoder.orientation().map_err(|e| unsupported(format!("cannot decode: {e}")))?;
        let mut img = DynamicImage::from_decoder(decoder).map_err(|e| unsupported(format!("cannot decode: {e}")))?;
        img.apply_orientation(orientation);
        Self::from_dynamic(img, alpha).map_err(|e| match e {
            KilnError::UnsupportedImage(m) => unsupported(m),
            other => other,
        })
    }

    /// Encodes as PNG bytes with the smallest output ([`PngEffort::Smallest`]): the lossless
    /// baseline's setting.
    pub fn to_png(&self) -> Result<Vec<u8>> {
        self.to_png_with(PngEffort::Smallest)
    }

    /// Encodes as PNG bytes with the given effort.
    pub fn to_png_with(&self, effort: PngEffort) -> Result<Vec<u8>> {
        use image::codecs::png::{CompressionType, FilterType, PngEncoder};
        use image::{ExtendedColorType, ImageEncoder};
        let mut out = Vec::new();
        let color = if self.channels == 3 { ExtendedColorType::Rgb8 } else { ExtendedColorType::L8 };
        let (compression, filter) = match effort {
            PngEffort::Smallest => (CompressionType::Best, FilterType::Adaptive),
            PngEffort::Fast => (CompressionType::Fast, FilterType::Adaptive),
        };
        PngEncoder::new_with_quality(&mut out, compression, filter)
            .write_image(&self.data, self.width, self.height, color)
            .map_err(|e| KilnError::UnsupportedImage(format!("PNG encoding failed: {e}")))?;
        Ok(out)
    }

    /// The image as RGB samples (grey replicated).
    pub fn to_rgb(&self) -> Vec<u8> {
        if self.channels == 3 { self.data.clone() } else { self.data.iter().flat_map(|&g| [g, g, g]).collect() }
    }
}

/// How hard the PNG writer compresses.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, clap::ValueEnum)]
pub enum PngEffort {
    /// Fast deflate: the default for decoded output. Measured on a 768×512 photograph, 2 cores:
    /// `kiln decompress` takes 0.23 s instead of 0.85 s (user time 0.18 vs 0.73 s: with the
    /// smallest setting the PNG writer costs several times the decode), and the PNG is 330 KB
    /// instead of 246 KB.
    #[default]
    Fast,
    /// Best deflate: smallest files; what the PNG size baseline uses.
    Smallest,
}

/// Writes a file Kiln owns (a report, a checkpoint, a model being trained) through a temporary
/// file in the same folder, renamed when complete, so that `path` is never left half-written.
/// It replaces a regular file at `path`; anything else there is refused (see [`crate::files`]).
/// Outputs the user names go through [`crate::files::write_output`] with their own policy.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    write_output(path, bytes, Overwrite::Replace, &[])
}

/// Reads a whole file, refusing anything but a regular file before it is opened for reading
/// (a FIFO would block the reader forever, a device could be endless).
///
/// # Errors
/// I/O errors naming the path; [`KilnError::UnsupportedImage`] for a special file.
pub fn read_regular(path: &Path) -> Result<Vec<u8>> {
    let mut options = std::fs::OpenOptions::new();
    options.read(true);
    #[cfg(unix)]
    {
        use std::os::unix::fs::OpenOptionsExt;
        // O_NONBLOCK: opening a FIFO must not wait for a writer; it has no effect on regular files.
        options.custom_flags(libc::O_NONBLOCK);
    }
    let mut file = options.open(path).map_err(|e| KilnError::io(path, e))?;
    let meta = file.metadata().map_err(|e| KilnError::io(path, e))?;
    if !meta.is_file() {
        return Err(KilnError::UnsupportedImage(format!(
            "{}: not a regular file (a folder, device, FIFO or socket); Kiln reads regular files only",
            path.display()
        )));
    }
    let mut bytes = Vec::with_capacity(meta.len().min(1 << 30) as usize);
    file.read_to_end(&mut bytes).map_err(|e| KilnError::io(path, e))?;
    Ok(bytes)
}

/// Whether every alpha sample is at full opacity (then dropping alpha loses nothing).
fn is_opaque(img: &DynamicImage) -> bool {
    match img {
        DynamicImage::ImageLumaA8(b) => b.pixels().all(|p| p.0[1] == u8::MAX),
        DynamicImage::ImageRgba8(b) => b.pixels().all(|p| p.0[3] == u8::MAX),
        DynamicImage::ImageLumaA16(b) => b.pixels().all(|p| p.0[1] == u16::MAX),
        DynamicImage::ImageRgba16(b) => b.pixels().all(|p| p.0[3] == u16::MAX),
        DynamicImage::ImageRgba32F(b) => b.pixels().all(|p| p.0[3] >= 1.0),
        _ => false,
    }
}

/// `Some("page")`/`Some("frame")` when the file holds more than one image (multi-page TIFF,
/// animated GIF, PNG or WebP), `None` otherwise or when that cannot be told (the decoder will
/// then report the file's real problem).
fn several_frames(bytes: &[u8], format: ImageFormat) -> Option<&'static str> {
    let cursor = || Cursor::new(bytes);
    match format {
        ImageFormat::Tiff => {
            let d = tiff::decoder::Decoder::new(cursor()).ok()?;
            d.more_images().then_some("page")
        }
        ImageFormat::Gif => {
            let d = image::codecs::gif::GifDecoder::new(cursor()).ok()?;
            (d.into_frames().take(2).count() > 1).then_some("frame")
        }
        ImageFormat::Png => {
            let d = image::codecs::png::PngDecoder::new(cursor()).ok()?;
            d.is_apng().ok()?.then_some("frame")
        }
        ImageFormat::WebP => {
            let d = image::codecs::webp::WebPDecoder::new(cursor()).ok()?;
            d.has_animation().then_some("frame")
        }
        _ => None,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn both_png_efforts_store_the_same_pixels_and_smallest_is_not_larger() {
        let (w, h) = (96u32, 64u32);
        let data: Vec<u8> =
            (0..w * h).flat_map(|i| [(i % w) as u8, (i / w * 3) as u8, ((i * 7919) % 13) as u8]).collect();
        let pic = Picture { width: w, height: h, channels: 3, data };
        let fast = pic.to_png_with(PngEffort::Fast).unwrap();
        let small = pic.to_png_with(PngEffort::Smallest).unwrap();
        for bytes in [&fast, &small] {
            let back = image::load_from_memory(bytes).unwrap().into_rgb8();
            assert_eq!(back.as_raw(), &pic.data);
        }
        assert!(small.len() <= fast.len(), "{} > {}", small.len(), fast.len());
    }
}
