//! Classical baselines: JPEG as a good encoder writes it (4:2:0 chroma subsampling, optimized
//! Huffman tables; `jpeg-encoder` crate) and PNG at best compression (image crate).
//!
//! JPEG files are decoded with the `jpeg-decoder` crate, which agrees with Pillow's libjpeg
//! decode (a test checks it against a stored reference); the image crate 0.25's own JPEG
//! decoder mis-decodes this encoder's 4:2:0 output, so it is not used here.

use crate::error::{KilnError, Result};
use crate::image_io::Picture;

/// JPEG qualities swept by `kiln evaluate`.
pub const JPEG_QUALITIES: [u8; 12] = [5, 10, 15, 20, 30, 40, 50, 60, 70, 80, 90, 95];

fn jpeg_err(e: impl std::fmt::Display) -> KilnError {
    KilnError::UnsupportedImage(format!("JPEG baseline: {e}"))
}

/// Encodes interleaved RGB (`3·w·h` samples) or grey (`w·h`) as JPEG at `quality` (1–100).
pub fn encode_jpeg(samples: &[u8], width: u32, height: u32, quality: u8) -> Result<Vec<u8>> {
    if width > u16::MAX as u32 || height > u16::MAX as u32 {
        return Err(jpeg_err("image too large for JPEG"));
    }
    let color = if samples.len() == (width * height) as usize {
        jpeg_encoder::ColorType::Luma
    } else {
        jpeg_encoder::ColorType::Rgb
    };
    let mut out = Vec::new();
    let mut enc = jpeg_encoder::Encoder::new(&mut out, quality);
    enc.set_sampling_factor(jpeg_encoder::SamplingFactor::F_2_2);
    enc.set_optimized_huffman_tables(true);
    enc.encode(samples, width as u16, height as u16, color).map_err(jpeg_err)?;
    Ok(out)
}

/// Decodes a JPEG into a picture with `channels` (1 or 3) channels.
pub fn decode_jpeg(bytes: &[u8], channels: u8) -> Result<Picture> {
    let mut d = jpeg_decoder::Decoder::new(bytes);
    let px = d.decode().map_err(jpeg_err)?;
    let info = d.info().ok_or_else(|| jpeg_err("no frame header"))?;
    let data = match (info.pixel_format, channels) {
        (jpeg_decoder::PixelFormat::RGB24, 3) | (jpeg_decoder::PixelFormat::L8, 1) => px,
        (jpeg_decoder::PixelFormat::L8, 3) => px.iter().flat_map(|&g| [g, g, g]).collect(),
        (f, c) => return Err(jpeg_err(format!("decoded {f:?}, expected {c} channels"))),
    };
    Ok(Picture { width: info.width as u32, height: info.height as u32, channels, data })
}

/// PNG bytes of a picture, checked to decode back to the same samples.
pub fn encode_png_checked(pic: &Picture) -> Result<Vec<u8>> {
    let bytes = pic.to_png()?;
    let back =
        image::load_from_memory(&bytes).map_err(|e| KilnError::UnsupportedImage(format!("PNG baseline: {e}")))?;
    let back = Picture::from_dynamic(back, crate::image_io::AlphaPolicy::Refuse)?;
    if back.data != pic.data {
        return Err(KilnError::UnsupportedImage("PNG baseline did not round-trip losslessly".into()));
    }
    Ok(bytes)
}
