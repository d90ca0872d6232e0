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

/// A standard codec `kiln evaluate` compares against, with its sweep.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub enum Baseline {
    /// JPEG (ISO/IEC 10918-1), 4:2:0, optimized Huffman tables: [`encode_jpeg`].
    Jpeg,
    /// JPEG 2000 (ISO/IEC 15444-1), OpenJPEG, one layer at a target PSNR.
    #[cfg(feature = "standard-codecs")]
    Jpeg2000,
    /// WebP lossy, libwebp method 6.
    #[cfg(feature = "standard-codecs")]
    Webp,
    /// AVIF, rav1e speed 4 (`avif` feature).
    #[cfg(feature = "avif")]
    Avif,
    /// PNG at best compression (image crate).
    Png,
    /// WebP lossless, libwebp method 6 quality 100.
    #[cfg(feature = "standard-codecs")]
    WebpLossless,
    /// JPEG 2000 reversible 5/3 wavelet (the lossless mode of ISO/IEC 15444-1).
    #[cfg(feature = "standard-codecs")]
    Jpeg2000Lossless,
}

/// Standard codecs named in the issue that this build cannot run, with the reason; reports
/// state them so that a missing curve is never mistaken for a win.
pub const NOT_BUILT: &[(&str, &str)] = &[
    #[cfg(not(feature = "avif"))]
    (
        "avif",
        "this build lacks the avif feature (cargo build --release --features avif: rav1e and rav1d, \
         about two more minutes of compile); ../shared/tools/rd_check.py measures AVIF through libavif",
    ),
    (
        "jpegxl",
        "the pure-Rust JPEG XL encoder on crates.io is AGPL-licensed and libjxl needs cmake; \
         ../shared/tools/rd_check.py measures it through libjxl",
    ),
    ("jpegxl-lossless", "as jpegxl"),
    ("jpegls", "CharLS needs cmake; jpeg2000-lossless stands in for an exact-storage standard"),
];

impl Baseline {
    /// Every baseline this build has, lossy first.
    pub fn built() -> Vec<Baseline> {
        vec![
            Baseline::Jpeg,
            #[cfg(feature = "standard-codecs")]
            Baseline::Jpeg2000,
            #[cfg(feature = "standard-codecs")]
            Baseline::Webp,
            #[cfg(feature = "avif")]
            Baseline::Avif,
            Baseline::Png,
            #[cfg(feature = "standard-codecs")]
            Baseline::WebpLossless,
            #[cfg(feature = "standard-codecs")]
            Baseline::Jpeg2000Lossless,
        ]
    }

    /// The codec name in `rd.csv`, `summary.json` and `--baselines`.
    pub fn name(self) -> &'static str {
        match self {
            Baseline::Jpeg => "jpeg",
            #[cfg(feature = "standard-codecs")]
            Baseline::Jpeg2000 => "jpeg2000",
            #[cfg(feature = "standard-codecs")]
            Baseline::Webp => "webp",
            #[cfg(feature = "avif")]
            Baseline::Avif => "avif",
            Baseline::Png => "png",
            #[cfg(feature = "standard-codecs")]
            Baseline::WebpLossless => "webp-lossless",
            #[cfg(feature = "standard-codecs")]
            Baseline::Jpeg2000Lossless => "jpeg2000-lossless",
        }
    }

    /// How reports name it, with its settings.
    pub fn label(self) -> &'static str {
        match self {
            Baseline::Jpeg => "JPEG (4:2:0, optimized Huffman)",
            #[cfg(feature = "standard-codecs")]
            Baseline::Jpeg2000 => "JPEG 2000 (OpenJPEG, 9/7, target PSNR)",
            #[cfg(feature = "standard-codecs")]
            Baseline::Webp => "WebP (libwebp, method 6)",
            #[cfg(feature = "avif")]
            Baseline::Avif => "AVIF (rav1e speed 4, 4:4:4)",
            Baseline::Png => "PNG",
            #[cfg(feature = "standard-codecs")]
            Baseline::WebpLossless => "WebP lossless (libwebp, method 6)",
            #[cfg(feature = "standard-codecs")]
            Baseline::Jpeg2000Lossless => "JPEG 2000 lossless (OpenJPEG, 5/3)",
        }
    }

    /// Whether it reproduces every sample exactly (reported as bpp, not as a curve).
    pub fn is_lossless(self) -> bool {
        match self {
            Baseline::Png => true,
            #[cfg(feature = "standard-codecs")]
            Baseline::WebpLossless | Baseline::Jpeg2000Lossless => true,
            _ => false,
        }
    }

    /// Parses a comma-separated list of names (`all`: every one built).
    ///
    /// # Errors
    /// [`KilnError::InvalidArgument`] naming an unknown or unbuilt codec and the valid names.
    pub fn parse_list(s: &str) -> Result<Vec<Baseline>> {
        let built = Baseline::built();
        let mut out = Vec::new();
        for name in s.split(',').map(str::trim).filter(|n| !n.is_empty()) {
            if name == "all" {
                out.extend(built.iter().copied());
                continue;
            }
            match built.iter().find(|b| b.name() == name) {
                Some(&b) => out.push(b),
                None => {
                    let names: Vec<&str> = built.iter().map(|b| b.name()).collect();
                    let why =
                        NOT_BUILT.iter().find(|(n, _)| *n == name).map(|(_, w)| format!(" (not in this build: {w})"));
                    return Err(KilnError::InvalidArgument(format!(
                        "unknown baseline {name:?}{}; choose from {}",
                        why.unwrap_or_default(),
                        names.join(", ")
                    )));
                }
            }
        }
        out.sort();
        out.dedup();
        Ok(out)
    }

    /// The settings swept (one empty setting for lossless codecs); `jpeg_qualities` is JPEG's.
    pub fn settings(self, jpeg_qualities: &[u8]) -> Vec<String> {
        match self {
            Baseline::Jpeg => jpeg_qualities.iter().map(|q| q.to_string()).collect(),
            #[cfg(feature = "standard-codecs")]
            Baseline::Jpeg2000 => super::jpeg2000::JPEG2000_PSNR_TARGETS.iter().map(|q| q.to_string()).collect(),
            #[cfg(feature = "standard-codecs")]
            Baseline::Webp => super::webp::WEBP_QUALITIES.iter().map(|q| q.to_string()).collect(),
            #[cfg(feature = "avif")]
            Baseline::Avif => super::avif::AVIF_QUALITIES.iter().map(|q| q.to_string()).collect(),
            _ => vec![String::new()],
        }
    }

    /// Encodes `pic` at `setting` (one of [`Baseline::settings`]): the whole file's bytes.
    ///
    /// # Errors
    /// The codec's own errors, or a setting that does not parse.
    pub fn encode(self, pic: &Picture, setting: &str) -> Result<Vec<u8>> {
        let parse = |s: &str| -> Result<f32> {
            s.parse().map_err(|_| KilnError::InvalidArgument(format!("{}: bad setting {s:?}", self.name())))
        };
        match self {
            Baseline::Jpeg => encode_jpeg(&pic.data, pic.width, pic.height, parse(setting)? as u8),
            Baseline::Png => encode_png_checked(pic),
            #[cfg(feature = "standard-codecs")]
            Baseline::Jpeg2000 => {
                super::jpeg2000::encode_jpeg2000(pic, super::jpeg2000::Jpeg2000Mode::TargetPsnr(parse(setting)?))
            }
            #[cfg(feature = "standard-codecs")]
            Baseline::Jpeg2000Lossless => {
                super::jpeg2000::encode_jpeg2000(pic, super::jpeg2000::Jpeg2000Mode::Lossless)
            }
            #[cfg(feature = "standard-codecs")]
            Baseline::Webp => super::webp::encode_webp(pic, super::webp::WebpMode::Lossy(parse(setting)?)),
            #[cfg(feature = "standard-codecs")]
            Baseline::WebpLossless => super::webp::encode_webp(pic, super::webp::WebpMode::Lossless),
            #[cfg(feature = "avif")]
            Baseline::Avif => super::avif::encode_avif(pic, parse(setting)?),
        }
    }

    /// Decodes a file [`Baseline::encode`] wrote with the decoder named in the module docs,
    /// into `channels` channels.
    ///
    /// # Errors
    /// The decoder's own errors.
    pub fn decode(self, bytes: &[u8], channels: u8) -> Result<Picture> {
        match self {
            Baseline::Jpeg => decode_jpeg(bytes, channels),
            Baseline::Png => {
                let img = image::load_from_memory(bytes)
                    .map_err(|e| KilnError::UnsupportedImage(format!("PNG baseline: {e}")))?;
                Picture::from_dynamic(img, crate::image_io::AlphaPolicy::Refuse)
            }
            #[cfg(feature = "standard-codecs")]
            Baseline::Jpeg2000 | Baseline::Jpeg2000Lossless => super::jpeg2000::decode_jpeg2000(bytes, channels),
            #[cfg(feature = "standard-codecs")]
            Baseline::Webp | Baseline::WebpLossless => super::webp::decode_webp(bytes, channels),
            #[cfg(feature = "avif")]
            Baseline::Avif => super::avif::decode_avif(bytes, channels),
        }
    }

    /// Checks a decode of `pic`: same shape, and the same samples for a lossless codec.
    ///
    /// # Errors
    /// [`KilnError::UnsupportedImage`] naming the codec.
    pub fn check_decode(self, pic: &Picture, dec: &Picture) -> Result<()> {
        if (dec.width, dec.height, dec.channels) != (pic.width, pic.height, pic.channels) {
            return Err(KilnError::UnsupportedImage(format!("{} decoded to another shape", self.name())));
        }
        if self.is_lossless() && dec.data != pic.data {
            return Err(KilnError::UnsupportedImage(format!("{} did not reproduce the image exactly", self.name())));
        }
        Ok(())
    }
}
