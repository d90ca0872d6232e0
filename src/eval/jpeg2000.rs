//! JPEG 2000 (ISO/IEC 15444-1) through OpenJPEG, its reference implementation (the
//! `openjpeg-sys` crate builds it from vendored C).
//!
//! Settings: a raw J2K codestream, the library's defaults otherwise (six resolution levels,
//! 64×64 code blocks, LRCP), colour transform on for RGB; lossy coding is the irreversible 9/7
//! wavelet with one quality layer at a target PSNR (OpenJPEG's fixed-quality mode, `-q` of its
//! command-line encoder), lossless the reversible 5/3 wavelet.

use std::ffi::c_void;
use std::os::raw::c_int;

use openjpeg_sys as opj;

use crate::error::{KilnError, Result};
use crate::image_io::Picture;

/// Target PSNRs (dB) of the lossy sweep.
pub const JPEG2000_PSNR_TARGETS: [f32; 10] = [26.0, 28.0, 30.0, 32.0, 34.0, 36.0, 38.0, 40.0, 43.0, 46.0];

fn err(m: impl std::fmt::Display) -> KilnError {
    KilnError::UnsupportedImage(format!("JPEG 2000 baseline: {m}"))
}

/// How the codestream is coded.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Jpeg2000Mode {
    /// Irreversible 9/7 wavelet, one layer at this target PSNR in dB.
    TargetPsnr(f32),
    /// Reversible 5/3 wavelet: lossless.
    Lossless,
}

/// Owns an OpenJPEG object and frees it on every path.
struct Guard<T> {
    ptr: *mut T,
    free: unsafe extern "C" fn(*mut T),
}

impl<T> Drop for Guard<T> {
    fn drop(&mut self) {
        if !self.ptr.is_null() {
            // SAFETY: `ptr` came from the OpenJPEG constructor paired with `free`, once.
            unsafe { (self.free)(self.ptr) }
        }
    }
}

/// The bytes a write stream collects, or a read stream serves.
struct Buffer {
    data: Vec<u8>,
    pos: usize,
}

unsafe extern "C" fn write_fn(p: *mut c_void, n: usize, user: *mut c_void) -> usize {
    // SAFETY: OpenJPEG passes back the `Buffer` registered with the stream and a buffer of `n`
    // readable bytes.
    let (buf, src) = unsafe { (&mut *(user as *mut Buffer), std::slice::from_raw_parts(p as *const u8, n)) };
    buf.data.truncate(buf.pos);
    buf.data.extend_from_slice(src);
    buf.pos = buf.data.len();
    n
}

unsafe extern "C" fn read_fn(p: *mut c_void, n: usize, user: *mut c_void) -> usize {
    // SAFETY: as in `write_fn`, with `n` writable bytes at `p`.
    let buf = unsafe { &mut *(user as *mut Buffer) };
    let k = n.min(buf.data.len() - buf.pos);
    if k == 0 {
        return usize::MAX; // OpenJPEG's end-of-stream value, (OPJ_SIZE_T)-1
    }
    unsafe { std::ptr::copy_nonoverlapping(buf.data.as_ptr().add(buf.pos), p as *mut u8, k) };
    buf.pos += k;
    k
}

unsafe extern "C" fn skip_fn(n: i64, user: *mut c_void) -> i64 {
    // SAFETY: as in `write_fn`.
    let buf = unsafe { &mut *(user as *mut Buffer) };
    let target = (buf.pos as i64 + n).clamp(0, i64::MAX) as usize;
    if target > buf.data.len() {
        buf.data.resize(target, 0); // a write stream skipping ahead
    }
    buf.pos = target;
    n
}

unsafe extern "C" fn seek_fn(n: i64, user: *mut c_void) -> c_int {
    // SAFETY: as in `write_fn`.
    let buf = unsafe { &mut *(user as *mut Buffer) };
    if n < 0 || n as usize > buf.data.len() {
        return 0;
    }
    buf.pos = n as usize;
    1
}

unsafe extern "C" fn quiet(_msg: *const std::os::raw::c_char, _data: *mut c_void) {}

/// A stream over `buf`, which must outlive it.
fn stream(buf: &mut Buffer, input: bool) -> Result<Guard<c_void>> {
    // SAFETY: plain constructor; the callbacks match OpenJPEG's signatures and `buf` outlives
    // the stream (the caller keeps both in one scope, the stream dropped first).
    unsafe {
        let s = opj::opj_stream_create(1 << 16, input as c_int);
        if s.is_null() {
            return Err(err("cannot create a stream"));
        }
        let g = Guard { ptr: s as *mut c_void, free: destroy_stream };
        if input {
            opj::opj_stream_set_read_function(s, Some(read_fn));
            opj::opj_stream_set_user_data_length(s, buf.data.len() as u64);
        } else {
            opj::opj_stream_set_write_function(s, Some(write_fn));
        }
        opj::opj_stream_set_skip_function(s, Some(skip_fn));
        opj::opj_stream_set_seek_function(s, Some(seek_fn));
        opj::opj_stream_set_user_data(s, buf as *mut Buffer as *mut c_void, None);
        Ok(g)
    }
}

unsafe extern "C" fn destroy_stream(p: *mut c_void) {
    unsafe { opj::opj_stream_destroy(p as *mut opj::opj_stream_t) }
}

unsafe extern "C" fn destroy_codec(p: *mut c_void) {
    unsafe { opj::opj_destroy_codec(p as *mut opj::opj_codec_t) }
}

unsafe extern "C" fn destroy_image(p: *mut opj::opj_image_t) {
    unsafe { opj::opj_image_destroy(p) }
}

fn silence(codec: *mut opj::opj_codec_t) {
    // SAFETY: `codec` is a live codec; the handlers ignore their arguments.
    unsafe {
        opj::opj_set_info_handler(codec, Some(quiet), std::ptr::null_mut());
        opj::opj_set_warning_handler(codec, Some(quiet), std::ptr::null_mut());
        opj::opj_set_error_handler(codec, Some(quiet), std::ptr::null_mut());
    }
}

/// Takes ownership of a codec OpenJPEG just created (`what`: for the error), silenced.
fn new_codec(codec: *mut opj::opj_codec_t, what: &str) -> Result<Guard<c_void>> {
    if codec.is_null() {
        return Err(err(format!("cannot create the {what}")));
    }
    silence(codec);
    Ok(Guard { ptr: codec as *mut c_void, free: destroy_codec })
}

/// Encodes `pic` (8-bit grey or RGB) as a J2K codestream.
pub fn encode_jpeg2000(pic: &Picture, mode: Jpeg2000Mode) -> Result<Vec<u8>> {
    let (w, h, c) = (pic.width, pic.height, pic.channels as usize);
    let mut parms: Vec<opj::opj_image_cmptparm_t> = (0..c)
        .map(|_| opj::opj_image_cmptparm_t { dx: 1, dy: 1, w, h, x0: 0, y0: 0, prec: 8, bpp: 8, sgnd: 0 })
        .collect();
    let space = if c == 1 { opj::COLOR_SPACE::OPJ_CLRSPC_GRAY } else { opj::COLOR_SPACE::OPJ_CLRSPC_SRGB };
    // SAFETY: `parms` holds `c` component descriptions; the image is freed by its guard.
    let image = unsafe { opj::opj_image_create(c as u32, parms.as_mut_ptr(), space) };
    if image.is_null() {
        return Err(err("cannot create the image"));
    }
    let image = Guard { ptr: image, free: destroy_image };
    // SAFETY: `image` is live with `c` components of `w·h` samples each.
    unsafe {
        let img = &mut *image.ptr;
        (img.x0, img.y0, img.x1, img.y1) = (0, 0, w, h);
        for ch in 0..c {
            let comp = &mut *img.comps.add(ch);
            let dst = std::slice::from_raw_parts_mut(comp.data, (w * h) as usize);
            for (i, d) in dst.iter_mut().enumerate() {
                *d = pic.data[i * c + ch] as i32;
            }
        }
    }
    // SAFETY: the parameter struct is plain data, filled by the library's defaults.
    let mut params: opj::opj_cparameters_t = unsafe { std::mem::zeroed() };
    unsafe { opj::opj_set_default_encoder_parameters(&mut params) };
    params.tcp_numlayers = 1;
    params.tcp_mct = (c == 3) as std::os::raw::c_char;
    match mode {
        Jpeg2000Mode::TargetPsnr(db) => {
            params.irreversible = 1;
            params.cp_fixed_quality = 1;
            params.tcp_distoratio[0] = db;
        }
        Jpeg2000Mode::Lossless => {
            params.irreversible = 0;
            params.cp_disto_alloc = 1;
            params.tcp_rates[0] = 0.0;
        }
    }
    // Fewer resolution levels than the default six for small images (each level halves).
    let mut levels = 6;
    while levels > 1 && (w.min(h) >> (levels - 1)) == 0 {
        levels -= 1;
    }
    params.numresolution = levels;
    let mut out = Buffer { data: Vec::new(), pos: 0 };
    {
        // SAFETY: codec and stream are live for this scope and freed by their guards; `out`
        // outlives the stream.
        let codec = new_codec(unsafe { opj::opj_create_compress(opj::CODEC_FORMAT::OPJ_CODEC_J2K) }, "encoder")?;
        let cp = codec.ptr as *mut opj::opj_codec_t;
        let s = stream(&mut out, false)?;
        let sp = s.ptr as *mut opj::opj_stream_t;
        let ok = unsafe {
            opj::opj_setup_encoder(cp, &mut params, image.ptr) != 0
                && opj::opj_start_compress(cp, image.ptr, sp) != 0
                && opj::opj_encode(cp, sp) != 0
                && opj::opj_end_compress(cp, sp) != 0
        };
        if !ok {
            return Err(err("the encoder failed"));
        }
    }
    Ok(out.data)
}

/// Decodes a J2K codestream into a picture with `channels` (1 or 3) 8-bit channels.
pub fn decode_jpeg2000(bytes: &[u8], channels: u8) -> Result<Picture> {
    let mut input = Buffer { data: bytes.to_vec(), pos: 0 };
    // SAFETY: as in the encoder: every object has a guard, `input` outlives the stream.
    let codec = new_codec(unsafe { opj::opj_create_decompress(opj::CODEC_FORMAT::OPJ_CODEC_J2K) }, "decoder")?;
    let cp = codec.ptr as *mut opj::opj_codec_t;
    let mut dparams: opj::opj_dparameters_t = unsafe { std::mem::zeroed() };
    unsafe { opj::opj_set_default_decoder_parameters(&mut dparams) };
    if unsafe { opj::opj_setup_decoder(cp, &mut dparams) } == 0 {
        return Err(err("cannot set up the decoder"));
    }
    let s = stream(&mut input, true)?;
    let sp = s.ptr as *mut opj::opj_stream_t;
    let mut image: *mut opj::opj_image_t = std::ptr::null_mut();
    let header = unsafe { opj::opj_read_header(sp, cp, &mut image) } != 0;
    let image = Guard { ptr: image, free: destroy_image };
    if !header || image.ptr.is_null() {
        return Err(err("cannot read the header"));
    }
    if unsafe { opj::opj_decode(cp, sp, image.ptr) == 0 || opj::opj_end_decompress(cp, sp) == 0 } {
        return Err(err("cannot decode"));
    }
    // SAFETY: the decoded image is live; its components hold `w·h` samples each.
    let img = unsafe { &*image.ptr };
    let comps = unsafe { std::slice::from_raw_parts(img.comps, img.numcomps as usize) };
    let (w, h) = (img.x1 - img.x0, img.y1 - img.y0);
    if comps.is_empty() || comps.iter().any(|c| c.w != w || c.h != h || c.prec != 8 || c.data.is_null()) {
        return Err(err("unexpected component layout"));
    }
    let planes: Vec<&[i32]> =
        comps.iter().map(|c| unsafe { std::slice::from_raw_parts(c.data, (w * h) as usize) }).collect();
    let n = (w * h) as usize;
    let c = channels as usize;
    let mut data = vec![0u8; n * c];
    for i in 0..n {
        for ch in 0..c {
            let plane = planes[ch.min(planes.len() - 1)];
            data[i * c + ch] = plane[i].clamp(0, 255) as u8;
        }
    }
    Ok(Picture { width: w, height: h, channels, data })
}
