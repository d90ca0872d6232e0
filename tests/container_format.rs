//! The container format: round trip, and every kind of damage gives an error, never a panic.

mod common;

use byteorder::{ByteOrder, LittleEndian};
use common::{synthetic_picture, tiny_codec};
use kiln::KilnError;
use kiln::container::{self, FORMAT_VERSION, MAGIC};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

fn sample_container() -> (kiln::Codec, Vec<u8>) {
    let codec = tiny_codec(21);
    let pic = synthetic_picture(90, 70, 3, 2);
    let bytes = codec.encode(&pic, 40.0).unwrap().bytes;
    (codec, bytes)
}

/// Recomputes both checksums after a deliberate edit, so that the field checks are reached.
fn reseal(bytes: &mut [u8]) {
    let header_len = LittleEndian::read_u32(&bytes[8..12]) as usize;
    if header_len >= 4 && header_len <= bytes.len() {
        let crc = crc32fast::hash(&bytes[..header_len - 4]);
        LittleEndian::write_u32(&mut bytes[header_len - 4..header_len], crc);
    }
    let n = bytes.len();
    let crc = crc32fast::hash(&bytes[..n - 4]);
    LittleEndian::write_u32(&mut bytes[n - 4..], crc);
}

#[test]
fn header_round_trips() {
    let (codec, bytes) = sample_container();
    let h = container::read_header(&bytes).unwrap();
    assert_eq!((h.width, h.height, h.channels, h.bit_depth), (90, 70, 3, 8));
    assert_eq!(h.quality, 40.0);
    assert_eq!(h.model_fingerprint, codec.model_file().fingerprint);
    assert_eq!(h.tiles.len(), 1);
    // The latent covers the 90×70 image at stride 16, not its 128×128 padding.
    assert_eq!(h.tiles[0].latent, [12, 5, 6]);
    assert_eq!(h.tiles[0].hyper, [8, 2, 2]);
    assert_eq!(&bytes[..4], &MAGIC);
}

#[test]
fn decode_rejects_every_truncation() {
    let (codec, bytes) = sample_container();
    for n in 0..bytes.len() {
        assert!(codec.decode(&bytes[..n]).is_err(), "truncated to {n} bytes was accepted");
    }
}

#[test]
fn decode_rejects_random_bit_flips() {
    let (codec, bytes) = sample_container();
    let mut rng = ChaCha8Rng::seed_from_u64(99);
    for _ in 0..1500 {
        let mut b = bytes.clone();
        let i = rng.gen_range(0..b.len());
        b[i] ^= 1 << rng.gen_range(0..8);
        assert!(codec.decode(&b).is_err(), "bit flip at byte {i} was accepted");
    }
}

#[test]
fn decode_rejects_wrong_magic_and_unknown_version() {
    let (codec, bytes) = sample_container();
    let mut b = bytes.clone();
    b[1] = b'X';
    assert!(matches!(codec.decode(&b), Err(KilnError::Corrupt(m)) if m.contains("magic")));
    let mut b = bytes.clone();
    LittleEndian::write_u16(&mut b[4..6], FORMAT_VERSION + 1);
    reseal(&mut b);
    assert!(
        matches!(codec.decode(&b), Err(KilnError::UnsupportedVersion { found, .. }) if found == FORMAT_VERSION + 1)
    );
}

#[test]
fn decode_rejects_absurd_dimensions_before_allocating() {
    let (codec, bytes) = sample_container();
    for (w, h) in [(0u32, 70u32), (4_000_000_000, 70), (65_535, 65_535), (90, 0)] {
        let mut b = bytes.clone();
        LittleEndian::write_u32(&mut b[12..16], w);
        LittleEndian::write_u32(&mut b[16..20], h);
        reseal(&mut b);
        assert!(codec.decode(&b).is_err(), "{w}×{h} was accepted");
    }
    // A tile count that would need gigabytes of tile records.
    let mut b = bytes.clone();
    LittleEndian::write_u32(&mut b[68..72], u32::MAX);
    reseal(&mut b);
    assert!(codec.decode(&b).is_err());
    // Stream lengths that point past the end of the file.
    let mut b = bytes.clone();
    LittleEndian::write_u32(&mut b[72 + 16..72 + 20], 1 << 30);
    reseal(&mut b);
    assert!(matches!(codec.decode(&b), Err(KilnError::Corrupt(_))));
}

#[test]
fn decode_rejects_a_different_model() {
    let (_, bytes) = sample_container();
    let other = tiny_codec(22);
    assert!(matches!(other.decode(&bytes), Err(KilnError::ModelMismatch { .. })));
}

#[test]
fn large_images_are_split_into_tiles() {
    let (tw, th) = container::choose_tile_size(3000, 1000);
    assert_eq!((tw, th), (container::TILE_SIDE, container::TILE_SIDE));
    let grid = container::tile_grid(3000, 1000, tw, th);
    assert_eq!(grid.len(), 3);
    assert_eq!(grid[2], (2048, 0, 952, 1000));
    let codec = tiny_codec(23);
    let pic = synthetic_picture(1600, 70, 3, 3);
    let enc = codec.encode(&pic, 50.0).unwrap();
    let h = container::read_header(&enc.bytes).unwrap();
    assert_eq!(h.tiles.len(), 2);
    let dec = codec.decode(&enc.bytes).unwrap();
    assert_eq!((dec.width, dec.height), (1600, 70));
}
