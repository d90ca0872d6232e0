//! AVIF (AV1 intra in HEIF) through pure-Rust crates: encoded by rav1e (the `ravif` crate,
//! speed 4, 8-bit 4:4:4 full-range BT.601 YCbCr), decoded by rav1d (the Rust port of dav1d,
//! an independent implementation) after `avif-parse` extracts the AV1 payload.
//!
//! Not libavif with libaom, the reference pair `../shared/tools/rd_check.py` uses: rav1e is a
//! different AV1 encoder: on the two test photographs it needs 2.5–5.0% more bits than libaom
//! at equal PSNR (`tests/baselines_reference.rs`), so this baseline flatters Kiln by about that. Built only with the `avif` cargo feature: the two codecs
//! add about two minutes of compile time.

use std::ptr::NonNull;

use rav1d::include::dav1d::data::Dav1dData;
use rav1d::include::dav1d::dav1d::{Dav1dContext, Dav1dSettings};
use rav1d::include::dav1d::headers::{
    DAV1D_MC_BT470BG, DAV1D_MC_BT601, DAV1D_MC_BT709, DAV1D_MC_IDENTITY, DAV1D_PIXEL_LAYOUT_I444,
};
use rav1d::include::dav1d::picture::Dav1dPicture;

use crate::error::{KilnError, Result};
use crate::image_io::Picture;

/// Qualities (ravif's 1–100 scale) of the lossy sweep.
pub const AVIF_QUALITIES: [f32; 8] = [10.0, 25.0, 40.0, 55.0, 70.0, 80.0, 90.0, 97.0];

/// rav1e's speed (0 slowest to 10): 4, the setting the reference measurements use for libaom.
const SPEED: u8 = 4;

fn err(m: impl std::fmt::Display) -> KilnError {
    KilnError::UnsupportedImage(format!("AVIF baseline: {m}"))
}

/// Encodes an 8-bit grey or RGB picture as AVIF at `quality` (1–100).
pub fn encode_avif(pic: &Picture, quality: f32) -> Result<Vec<u8>> {
    if !(1.0..=100.0).contains(&quality) {
        return Err(err(format!("quality {quality} is outside 1..=100")));
    }
    let px: Vec<ravif::RGB8> = match pic.channels {
        3 => pic.data.chunks_exact(3).map(|p| ravif::RGB8::new(p[0], p[1], p[2])).collect(),
        1 => pic.data.iter().map(|&g| ravif::RGB8::new(g, g, g)).collect(),
        c => return Err(err(format!("{c} channels"))),
    };
    let img = ravif::Img::new(px.as_slice(), pic.width as usize, pic.height as usize);
    let enc = ravif::Encoder::new()
        .with_quality(quality)
        .with_speed(SPEED)
        .with_bit_depth(ravif::BitDepth::Eight)
        .with_num_threads(Some(1));
    Ok(enc.encode_rgb(img).map_err(err)?.avif_file)
}

/// Frees the decoder context on every path.
struct Context(Option<Dav1dContext>);

impl Drop for Context {
    fn drop(&mut self) {
        // SAFETY: the context came from `dav1d_open` and is closed once, here.
        unsafe { rav1d::src::lib::dav1d_close(Some(NonNull::from(&mut self.0))) }
    }
}

/// Unreferences a decoded picture on every path.
struct PictureRef(Dav1dPicture);

impl Drop for PictureRef {
    fn drop(&mut self) {
        // SAFETY: the picture was filled by `dav1d_get_picture` (or is all-empty) and is
        // unreferenced once, here.
        unsafe { rav1d::src::lib::dav1d_picture_unref(Some(NonNull::from(&mut self.0))) }
    }
}

/// Decodes AVIF into a picture with `channels` (1 or 3) channels.
pub fn decode_avif(bytes: &[u8], channels: u8) -> Result<Picture> {
    use rav1d::src::lib as dav1d;
    let avif = avif_parse::read_avif(&mut std::io::Cursor::new(bytes)).map_err(err)?;
    let payload: &[u8] = &avif.primary_item;
    // SAFETY: every pointer handed to the decoder points into a live local, and every object it
    // returns is released by a guard (`Context`, `PictureRef`) or by the decoder itself (the
    // data buffer, consumed by `dav1d_send_data` or unreferenced below).
    unsafe {
        let mut settings = std::mem::MaybeUninit::<Dav1dSettings>::uninit();
        dav1d::dav1d_default_settings(NonNull::new(settings.as_mut_ptr()).expect("non-null"));
        let mut settings = settings.assume_init();
        settings.n_threads = 1;
        settings.max_frame_delay = 1;
        let mut ctx = Context(None);
        if dav1d::dav1d_open(Some(NonNull::from(&mut ctx.0)), Some(NonNull::from(&mut settings))).0 != 0 {
            return Err(err("cannot open the decoder"));
        }
        let mut data = Dav1dData::default();
        let buf = dav1d::dav1d_data_create(Some(NonNull::from(&mut data)), payload.len());
        if buf.is_null() {
            return Err(err("cannot allocate the input"));
        }
        std::ptr::copy_nonoverlapping(payload.as_ptr(), buf, payload.len());
        let mut pic = PictureRef(std::mem::zeroed());
        let mut sent = false;
        loop {
            if !sent {
                let r = dav1d::dav1d_send_data(ctx.0, Some(NonNull::from(&mut data))).0;
                if r == 0 && data.sz == 0 {
                    sent = true;
                } else if r != 0 && r != -libc::EAGAIN {
                    dav1d::dav1d_data_unref(Some(NonNull::from(&mut data)));
                    return Err(err(format!("the decoder refused the data ({r})")));
                }
            }
            let r = dav1d::dav1d_get_picture(ctx.0, Some(NonNull::from(&mut pic.0))).0;
            if r == 0 {
                break;
            }
            if r != -libc::EAGAIN || sent {
                if !sent {
                    dav1d::dav1d_data_unref(Some(NonNull::from(&mut data)));
                }
                return Err(err(format!("no picture decoded ({r})")));
            }
        }
        if !sent {
            dav1d::dav1d_data_unref(Some(NonNull::from(&mut data)));
        }
        to_picture(&pic.0, channels)
    }
}

/// Converts a decoded 8-bit 4:4:4 picture to RGB (or grey) with the matrix and range its
/// sequence header states.
///
/// # Safety
/// `p` must be a picture filled by `dav1d_get_picture` and not yet unreferenced.
unsafe fn to_picture(p: &Dav1dPicture, channels: u8) -> Result<Picture> {
    let (w, h) = (p.p.w as usize, p.p.h as usize);
    if p.p.bpc != 8 || p.p.layout != DAV1D_PIXEL_LAYOUT_I444 {
        return Err(err(format!("unexpected picture format: {} bits, layout {}", p.p.bpc, p.p.layout)));
    }
    let hdr = p.seq_hdr.ok_or_else(|| err("no sequence header"))?;
    // SAFETY: the header lives as long as the picture (caller's contract).
    let hdr = unsafe { hdr.as_ref() };
    let planes: Vec<NonNull<std::ffi::c_void>> =
        p.data.iter().map(|d| d.ok_or_else(|| err("missing plane"))).collect::<Result<_>>()?;
    let (ys, cs) = (p.stride[0] as usize, p.stride[1] as usize);
    // SAFETY: each plane holds `h` rows of its stride, of at least `w` bytes (4:4:4).
    let plane = |i: usize, stride: usize| unsafe {
        std::slice::from_raw_parts(planes[i].as_ptr() as *const u8, stride * (h - 1) + w)
    };
    let (yp, up, vp) = (plane(0, ys), plane(1, cs), plane(2, cs));
    // Full or limited ("studio") range, then the matrix: R = Y + a·Cr, G = Y − b·Cb − c·Cr,
    // B = Y + d·Cb from the luma weights (Kr, Kb) of the stated matrix (ITU-T H.273).
    let full = hdr.color_range != 0;
    let weights = match hdr.mtrx {
        m if m == DAV1D_MC_BT601 || m == DAV1D_MC_BT470BG => Some((0.299, 0.114)),
        m if m == DAV1D_MC_BT709 => Some((0.2126, 0.0722)),
        m if m == DAV1D_MC_IDENTITY => None,
        m => return Err(err(format!("matrix coefficients {m} not supported"))),
    };
    let c = channels as usize;
    let mut data = vec![0u8; w * h * c];
    for y in 0..h {
        for x in 0..w {
            let (yy, u, v) = (yp[y * ys + x] as f64, up[y * cs + x] as f64, vp[y * cs + x] as f64);
            let rgb = match weights {
                None => [v, yy, u], // identity: G in Y, B in U, R in V
                Some((kr, kb)) => {
                    let (yy, cb, cr) = if full {
                        (yy, u - 128.0, v - 128.0)
                    } else {
                        ((yy - 16.0) * 255.0 / 219.0, (u - 128.0) * 255.0 / 224.0, (v - 128.0) * 255.0 / 224.0)
                    };
                    let kg = 1.0 - kr - kb;
                    let r = yy + 2.0 * (1.0 - kr) * cr;
                    let b = yy + 2.0 * (1.0 - kb) * cb;
                    let g = (yy - kr * r - kb * b) / kg;
                    [r, g, b]
                }
            };
            let px: [u8; 3] = rgb.map(|v| v.round().clamp(0.0, 255.0) as u8);
            let dst = (y * w + x) * c;
            if c == 3 {
                data[dst..dst + 3].copy_from_slice(&px);
            } else {
                data[dst] = ((px[0] as u16 + px[1] as u16 + px[2] as u16 + 1) / 3) as u8;
            }
        }
    }
    Ok(Picture { width: w as u32, height: h as u32, channels, data })
}
