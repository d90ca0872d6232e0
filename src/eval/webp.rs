//! WebP through libwebp, its reference encoder (the `webp` crate builds it from vendored C),
//! decoded by an independent implementation (the pure-Rust `image-webp` crate).
//!
//! Settings: lossy at `quality` with method 6 (the slowest, best-compressing search); lossless
//! at quality 100 with method 6 (libwebp's strongest lossless preset, `cwebp -z 9`). WebP has no
//! grey mode: grey images are coded as RGB with equal channels and decoded back to their mean.

use crate::error::{KilnError, Result};
use crate::image_io::Picture;

/// Qualities of the lossy sweep.
pub const WEBP_QUALITIES: [f32; 8] = [5.0, 15.0, 30.0, 50.0, 70.0, 85.0, 95.0, 100.0];

fn err(m: impl std::fmt::Display) -> KilnError {
    KilnError::UnsupportedImage(format!("WebP baseline: {m}"))
}

/// How the image is coded.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum WebpMode {
    /// Lossy (VP8) at this quality, 0–100.
    Lossy(f32),
    /// Lossless (VP8L).
    Lossless,
}

/// Encodes an 8-bit grey or RGB picture as WebP.
pub fn encode_webp(pic: &Picture, mode: WebpMode) -> Result<Vec<u8>> {
    if pic.width > 16383 || pic.height > 16383 {
        return Err(err("WebP images are at most 16383 pixels on a side"));
    }
    let rgb: std::borrow::Cow<[u8]> = match pic.channels {
        3 => std::borrow::Cow::Borrowed(&pic.data),
        1 => std::borrow::Cow::Owned(pic.data.iter().flat_map(|&g| [g, g, g]).collect()),
        c => return Err(err(format!("{c} channels"))),
    };
    let mut config = webp::WebPConfig::new().map_err(|_| err("cannot initialise the configuration"))?;
    config.method = 6;
    match mode {
        WebpMode::Lossy(q) => config.quality = q,
        WebpMode::Lossless => {
            config.lossless = 1;
            config.quality = 100.0;
        }
    }
    let enc = webp::Encoder::from_rgb(&rgb, pic.width, pic.height);
    let mem = enc.encode_advanced(&config).map_err(|e| err(format!("{e:?}")))?;
    Ok(mem.to_vec())
}

/// Decodes WebP into a picture with `channels` (1 or 3) channels.
pub fn decode_webp(bytes: &[u8], channels: u8) -> Result<Picture> {
    let mut d = image_webp::WebPDecoder::new(std::io::Cursor::new(bytes)).map_err(err)?;
    let (w, h) = d.dimensions();
    let size = d.output_buffer_size().ok_or_else(|| err("image too large"))?;
    let mut buf = vec![0u8; size];
    d.read_image(&mut buf).map_err(err)?;
    let px = if d.has_alpha() { 4 } else { 3 };
    let data = match channels {
        3 if px == 3 => buf,
        3 => buf.chunks_exact(4).flat_map(|p| [p[0], p[1], p[2]]).collect(),
        _ => buf.chunks_exact(px).map(|p| ((p[0] as u16 + p[1] as u16 + p[2] as u16 + 1) / 3) as u8).collect(),
    };
    Ok(Picture { width: w, height: h, channels, data })
}
