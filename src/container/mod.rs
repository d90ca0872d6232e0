//! The Kiln container: one file per image, self-describing, versioned, checksummed.
//!
//! # Layout (format version 1, all integers little-endian)
//! | offset | size | field |
//! |---|---|---|
//! | 0 | 4 | magic `8B 4B 4C 4E` (`\x8b` then `KLN`; the high first byte catches text-mode mangling) |
//! | 4 | 2 | format version (`1`) |
//! | 6 | 2 | flags: bit 0 [`FLAG_CHECKERBOARD`]; any other set bit is rejected |
//! | 8 | 4 | header length `L` in bytes, from offset 0 through the header CRC |
//! | 12 | 4 | image width |
//! | 16 | 4 | image height |
//! | 20 | 1 | channel count (1 = grey, 3 = RGB) |
//! | 21 | 1 | bit depth (8) |
//! | 22 | 2 | reserved, 0 |
//! | 24 | 32 | model fingerprint (SHA-256 of the model file) |
//! | 56 | 4 | quality (`f32`, 1–100) |
//! | 60 | 4 | tile width `tw` |
//! | 64 | 4 | tile height `th` |
//! | 68 | 4 | tile count `T` = ⌈width/tw⌉·⌈height/th⌉, row-major |
//! | 72 | 24·T | tile records: latent shape (`u16` M, h, w), hyper-latent shape (`u16` Nz, h, w), hyper stream bytes (`u32`), latent stream bytes (`u32`), reserved `u32` |
//! | 72+24T | 4 | CRC-32 of bytes `0 .. 72+24T` |
//! | L | … | per tile: hyper stream, then latent stream (ANS words, `u32` LE) |
//! | end−4 | 4 | CRC-32 of every byte before it |
//!
//! A tile's latent shape is `(M, ⌈th/s⌉, ⌈tw/s⌉)` and its hyper-latent shape
//! `(Nz, ⌈⌈th/s⌉/4⌉, ⌈⌈tw/s⌉/4⌉)` for tile size `tw × th` and the model's latent stride `s`
//! (8 or 16 for the shipped models); files written before the latent was cropped to the tile
//! carry `(M, 4·hz, 4·wz)` instead, and decoders accept both (the codec checks the shapes
//! against the model; this module only reads them).
//!
//! Tiles are decoded independently, so a later version can decode a region without the rest
//! and bound memory for very large images; version-1 writers use one tile unless the image is
//! larger than [`SINGLE_TILE_MAX`] on a side. Other channel counts and bit depths fit the same
//! header; version 1 accepts 1 or 3 channels at 8 bits. The header length field lets later
//! versions append fields that older readers can locate past.
//!
//! # Requirements for correctness
//! Every length and dimension is checked against the caps below and against the file size
//! **before** anything is allocated; a reader never trusts a length it has not checked.
//!
//! # Caps
//! - width, height ≤ [`MAX_SIDE`] (65 535); width·height ≤ [`MAX_PIXELS`] (2^28 ≈ 268 Mpx);
//! - tile sides ≤ [`MAX_TILE_SIDE`] (1536, the largest tile a writer produces); tile count ≤ [`MAX_TILES`];
//! - streams: each a multiple of 4 bytes and **not empty** (every tile codes at least one
//!   value, and a writer refuses to produce an empty stream, see [`write`]); all of them plus
//!   header and trailer = file size.

use byteorder::{ByteOrder, LittleEndian, ReadBytesExt, WriteBytesExt};

use crate::error::{KilnError, Result};

/// The four magic bytes.
pub const MAGIC: [u8; 4] = [0x8b, b'K', b'L', b'N'];
/// The format version this build writes and reads.
pub const FORMAT_VERSION: u16 = 1;

/// Header flag: the latent is coded in two checkerboard passes, the second with the model's
/// context ([`crate::model::context`]). Kiln releases before context models reject any set
/// flag, so they refuse such a file instead of misreading it.
pub const FLAG_CHECKERBOARD: u16 = 1;

/// Every flag this build understands.
pub const KNOWN_FLAGS: u16 = FLAG_CHECKERBOARD;
/// Largest accepted width or height.
pub const MAX_SIDE: u32 = 65_535;
/// Largest accepted pixel count.
pub const MAX_PIXELS: u64 = 1 << 28;
/// Images up to this many pixels on both sides are written as a single tile.
pub const SINGLE_TILE_MAX: u32 = 1536;
/// Largest accepted tile side: the largest tile a version-1 writer produces
/// ([`SINGLE_TILE_MAX`]). It bounds the decoder's working memory per tile (see
/// [`decode_memory_bound`]) whatever a file claims.
pub const MAX_TILE_SIDE: u32 = SINGLE_TILE_MAX;
/// Working memory of the decoder per pixel of a tile, in bytes, for models with up to 96
/// hidden channels (the shipped ones have 64): the synthesis' widest activations as `f32` at
/// half and full resolution, the latent, its priors and the output. A whole `kiln decompress`
/// of one 1536×1536 tile with the stride-8 default peaks at about 240 bytes per pixel of
/// resident memory, process included; `tests/hostile_inputs.rs` checks the bound.
pub const DECODE_BYTES_PER_TILE_PIXEL: u64 = 512;

/// Working memory of a decode that does not depend on the image (tile records, the priors'
/// small buffers, the hyper-latent of a single position).
pub const DECODE_FIXED_BYTES: u64 = 1 << 20;

/// Upper bound on the decoder's working memory for a container with this header: the output
/// image (`width · height · channels` bytes), plus one tile's working set — the tile padded to
/// a multiple of 64 px on each side (the coarsest grid any model's latent and hyper-latent
/// cover) times [`DECODE_BYTES_PER_TILE_PIXEL`] — plus [`DECODE_FIXED_BYTES`]; tiles are
/// decoded one at a time. With the caps this is at most 805 MB + 1.2 GB for the largest image.
pub fn decode_memory_bound(h: &Header) -> u64 {
    let pad = |v: u32| (v as u64).div_ceil(64) * 64;
    h.width as u64 * h.height as u64 * h.channels as u64
        + pad(h.tile_width) * pad(h.tile_height) * DECODE_BYTES_PER_TILE_PIXEL
        + DECODE_FIXED_BYTES
}
/// Tile side used for larger images.
pub const TILE_SIDE: u32 = 1024;
/// Largest accepted tile count.
pub const MAX_TILES: u32 = 65_536;

const FIXED_LEN: usize = 72;
const VEC_WRITE: &str = "writing to a Vec cannot fail";
const TILE_RECORD_LEN: usize = 24;

/// Shape `(channels, height, width)` of a coded tensor.
pub type Shape3 = [u16; 3];

/// Per-tile record.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TileRecord {
    /// Latent shape `(M, h, w)`.
    pub latent: Shape3,
    /// Hyper-latent shape `(Nz, h, w)`.
    pub hyper: Shape3,
    /// Bytes of the hyper-latent stream.
    pub hyper_bytes: u32,
    /// Bytes of the latent stream.
    pub latent_bytes: u32,
}

/// Everything in the header.
#[derive(Debug, Clone, PartialEq)]
pub struct Header {
    /// Flags ([`FLAG_CHECKERBOARD`]).
    pub flags: u16,
    /// Image width in pixels.
    pub width: u32,
    /// Image height in pixels.
    pub height: u32,
    /// 1 (grey) or 3 (RGB).
    pub channels: u8,
    /// Bits per sample (8).
    pub bit_depth: u8,
    /// SHA-256 of the model file used.
    pub model_fingerprint: [u8; 32],
    /// Quality used (1–100).
    pub quality: f32,
    /// Tile width.
    pub tile_width: u32,
    /// Tile height.
    pub tile_height: u32,
    /// Tile records, row-major.
    pub tiles: Vec<TileRecord>,
}

/// A tile's pixel rectangle `(x, y, width, height)`.
pub type Rect = (u32, u32, u32, u32);

/// Tile rectangles of an image, row-major.
pub fn tile_grid(width: u32, height: u32, tile_width: u32, tile_height: u32) -> Vec<Rect> {
    let mut out = Vec::new();
    let mut y = 0;
    while y < height {
        let mut x = 0;
        let h = tile_height.min(height - y);
        while x < width {
            out.push((x, y, tile_width.min(width - x), h));
            x += tile_width;
        }
        y += tile_height;
    }
    out
}

/// The tile size a version-1 writer uses for an image.
pub fn choose_tile_size(width: u32, height: u32) -> (u32, u32) {
    if width <= SINGLE_TILE_MAX && height <= SINGLE_TILE_MAX { (width, height) } else { (TILE_SIDE, TILE_SIDE) }
}

fn corrupt(msg: impl Into<String>) -> KilnError {
    KilnError::Corrupt(msg.into())
}

/// Checks image geometry against the caps (used by readers and by the encoder alike).
pub fn check_geometry(width: u32, height: u32, channels: u8, bit_depth: u8) -> Result<()> {
    if width == 0 || height == 0 {
        return Err(KilnError::UnsupportedImage(format!("{width}×{height} has no pixels")));
    }
    if width > MAX_SIDE || height > MAX_SIDE || width as u64 * height as u64 > MAX_PIXELS {
        return Err(KilnError::UnsupportedImage(format!(
            "{width}×{height} exceeds the caps ({MAX_SIDE} per side, {MAX_PIXELS} pixels)\nhint: split the image into parts first"
        )));
    }
    if channels != 1 && channels != 3 {
        return Err(KilnError::UnsupportedImage(format!("{channels} channels (version 1 takes 1 or 3)")));
    }
    if bit_depth != 8 {
        return Err(KilnError::UnsupportedImage(format!("{bit_depth}-bit samples (version 1 takes 8-bit)")));
    }
    Ok(())
}

/// One tile's coded streams.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TileStreams {
    /// Hyper-latent ANS words.
    pub hyper: Vec<u32>,
    /// Latent ANS words.
    pub latent: Vec<u32>,
}

fn words_to_bytes(words: &[u32], out: &mut Vec<u8>) {
    for &w in words {
        out.write_u32::<LittleEndian>(w).expect(VEC_WRITE);
    }
}

/// Serializes a container. `header.tiles[i]`'s stream lengths are filled in from `streams[i]`.
///
/// # Errors
/// Geometry outside the caps, or an empty stream: readers refuse empty streams (an ANS coder
/// leaves its stream empty only if every value it coded was the first symbol of its table,
/// which an image's latent never is), so writing one would leave an undecodable file.
pub fn write(header: &Header, streams: &[TileStreams]) -> Result<Vec<u8>> {
    check_geometry(header.width, header.height, header.channels, header.bit_depth)?;
    assert_eq!(header.tiles.len(), streams.len(), "one stream pair per tile");
    if streams.iter().any(|s| s.hyper.is_empty() || s.latent.is_empty()) {
        return Err(KilnError::UnsupportedImage(
            "the entropy coder produced an empty stream, which no reader accepts; not written".into(),
        ));
    }
    let header_len = FIXED_LEN + TILE_RECORD_LEN * header.tiles.len() + 4;
    let mut out = Vec::with_capacity(
        header_len + streams.iter().map(|s| 4 * (s.hyper.len() + s.latent.len())).sum::<usize>() + 4,
    );
    out.extend_from_slice(&MAGIC);
    out.write_u16::<LittleEndian>(FORMAT_VERSION).expect(VEC_WRITE);
    out.write_u16::<LittleEndian>(header.flags).expect(VEC_WRITE);
    out.write_u32::<LittleEndian>(header_len as u32).expect(VEC_WRITE);
    out.write_u32::<LittleEndian>(header.width).expect(VEC_WRITE);
    out.write_u32::<LittleEndian>(header.height).expect(VEC_WRITE);
    out.push(header.channels);
    out.push(header.bit_depth);
    out.write_u16::<LittleEndian>(0).expect(VEC_WRITE);
    out.extend_from_slice(&header.model_fingerprint);
    out.write_f32::<LittleEndian>(header.quality).expect(VEC_WRITE);
    out.write_u32::<LittleEndian>(header.tile_width).expect(VEC_WRITE);
    out.write_u32::<LittleEndian>(header.tile_height).expect(VEC_WRITE);
    out.write_u32::<LittleEndian>(header.tiles.len() as u32).expect(VEC_WRITE);
    for (t, s) in header.tiles.iter().zip(streams) {
        for v in t.latent.iter().chain(&t.hyper) {
            out.write_u16::<LittleEndian>(*v).expect(VEC_WRITE);
        }
        out.write_u32::<LittleEndian>((s.hyper.len() * 4) as u32).expect(VEC_WRITE);
        out.write_u32::<LittleEndian>((s.latent.len() * 4) as u32).expect(VEC_WRITE);
        out.write_u32::<LittleEndian>(0).expect(VEC_WRITE);
    }
    let crc = crc32fast::hash(&out);
    out.write_u32::<LittleEndian>(crc).expect(VEC_WRITE);
    for s in streams {
        words_to_bytes(&s.hyper, &mut out);
        words_to_bytes(&s.latent, &mut out);
    }
    let crc = crc32fast::hash(&out);
    out.write_u32::<LittleEndian>(crc).expect(VEC_WRITE);
    Ok(out)
}

/// Parses and checks the header only (for `kiln inspect`); the payload CRC is checked too.
pub fn read_header(bytes: &[u8]) -> Result<Header> {
    read(bytes).map(|(h, _)| h)
}

fn read_words(bytes: &[u8]) -> Vec<u32> {
    let mut v = vec![0u32; bytes.len() / 4];
    LittleEndian::read_u32_into(bytes, &mut v);
    v
}

/// Parses a container, checking magic, version, caps, lengths and both CRCs.
pub fn read(bytes: &[u8]) -> Result<(Header, Vec<TileStreams>)> {
    if bytes.len() < 4 || bytes[..4] != MAGIC {
        return Err(corrupt("not a Kiln container (wrong magic bytes)"));
    }
    if bytes.len() < FIXED_LEN + 8 {
        return Err(corrupt(format!("file is {} bytes, shorter than any container header", bytes.len())));
    }
    let mut r = &bytes[4..];
    let version = r.read_u16::<LittleEndian>().map_err(|_| corrupt("truncated header"))?;
    if version != FORMAT_VERSION {
        return Err(KilnError::UnsupportedVersion { found: version, supported: FORMAT_VERSION });
    }
    let rd32 = |off: usize| LittleEndian::read_u32(&bytes[off..off + 4]);
    let flags = LittleEndian::read_u16(&bytes[6..8]);
    let header_len = rd32(8) as usize;
    let tile_count = rd32(68);
    if tile_count == 0 || tile_count > MAX_TILES {
        return Err(corrupt(format!("tile count {tile_count} outside 1..={MAX_TILES}")));
    }
    let expected_len = FIXED_LEN + TILE_RECORD_LEN * tile_count as usize + 4;
    if header_len != expected_len || header_len + 4 > bytes.len() {
        return Err(corrupt(format!(
            "header length {header_len} does not fit a {}-byte file with {tile_count} tiles",
            bytes.len()
        )));
    }
    let stored = rd32(header_len - 4);
    if crc32fast::hash(&bytes[..header_len - 4]) != stored {
        return Err(corrupt("header checksum mismatch"));
    }
    let stored = rd32(bytes.len() - 4);
    if crc32fast::hash(&bytes[..bytes.len() - 4]) != stored {
        return Err(corrupt("payload checksum mismatch"));
    }
    if flags & !KNOWN_FLAGS != 0 {
        return Err(corrupt(format!("unknown flags {flags:#06x}")));
    }
    let width = rd32(12);
    let height = rd32(16);
    let (channels, bit_depth) = (bytes[20], bytes[21]);
    check_geometry(width, height, channels, bit_depth).map_err(|e| corrupt(format!("{e}")))?;
    let mut model_fingerprint = [0u8; 32];
    model_fingerprint.copy_from_slice(&bytes[24..56]);
    let quality = LittleEndian::read_f32(&bytes[56..60]);
    crate::model::config::check_quality(quality).map_err(|_| corrupt(format!("quality {quality} outside 1..=100")))?;
    let (tile_width, tile_height) = (rd32(60), rd32(64));
    if tile_width == 0 || tile_height == 0 || tile_width > MAX_TILE_SIDE || tile_height > MAX_TILE_SIDE {
        return Err(corrupt(format!("tile size {tile_width}×{tile_height} outside 1..={MAX_TILE_SIDE}")));
    }
    let grid = (width.div_ceil(tile_width) as u64) * (height.div_ceil(tile_height) as u64);
    if grid != tile_count as u64 {
        return Err(corrupt(format!("tile count {tile_count} does not match the {grid}-tile grid")));
    }
    let mut tiles = Vec::with_capacity(tile_count as usize);
    let mut payload = 0u64;
    for i in 0..tile_count as usize {
        let off = FIXED_LEN + i * TILE_RECORD_LEN;
        let s = |j: usize| LittleEndian::read_u16(&bytes[off + 2 * j..off + 2 * j + 2]);
        let t = TileRecord {
            latent: [s(0), s(1), s(2)],
            hyper: [s(3), s(4), s(5)],
            hyper_bytes: rd32(off + 12),
            latent_bytes: rd32(off + 16),
        };
        if !t.hyper_bytes.is_multiple_of(4) || !t.latent_bytes.is_multiple_of(4) {
            return Err(corrupt(format!("tile {i}: stream length not a multiple of 4")));
        }
        if t.hyper_bytes == 0 || t.latent_bytes == 0 {
            return Err(corrupt(format!("tile {i}: empty entropy-coded stream")));
        }
        payload += t.hyper_bytes as u64 + t.latent_bytes as u64;
        tiles.push(t);
    }
    if header_len as u64 + payload + 4 != bytes.len() as u64 {
        return Err(corrupt(format!(
            "stream lengths add up to {} bytes, file has {}",
            header_len as u64 + payload + 4,
            bytes.len()
        )));
    }
    let mut pos = header_len;
    let mut streams = Vec::with_capacity(tiles.len());
    for t in &tiles {
        let h = read_words(&bytes[pos..pos + t.hyper_bytes as usize]);
        pos += t.hyper_bytes as usize;
        let l = read_words(&bytes[pos..pos + t.latent_bytes as usize]);
        pos += t.latent_bytes as usize;
        streams.push(TileStreams { hyper: h, latent: l });
    }
    let header = Header {
        flags,
        width,
        height,
        channels,
        bit_depth,
        model_fingerprint,
        quality,
        tile_width,
        tile_height,
        tiles,
    };
    Ok((header, streams))
}
