//! Compress → container bytes → decompress on the whole path.

mod common;

use common::{synthetic_picture, tiny_codec};
use kiln::codec::LatentLayout;

#[test]
fn round_trip_keeps_dimensions_for_odd_sizes_and_grey() {
    let codec = tiny_codec(3);
    for (w, h, c) in [(1, 1, 3), (65, 33, 3), (97, 130, 1), (200, 17, 3)] {
        let pic = synthetic_picture(w, h, c, 5);
        let enc = codec.encode(&pic, 50.0).unwrap();
        let dec = codec.decode(&enc.bytes).unwrap();
        assert_eq!((dec.width, dec.height, dec.channels), (w, h, c));
        assert_eq!(dec.data.len(), pic.data.len());
    }
}

#[test]
fn a_three_stage_model_codes_a_stride_8_latent_and_round_trips() {
    use kiln::{Codec, Model, ModelConfig, ModelFile};
    let config = ModelConfig { stages: 3, ..ModelConfig::tiny() };
    let bytes = Model::new(config, 9).unwrap().export(&Default::default()).unwrap();
    let file = ModelFile::from_bytes(&bytes).unwrap();
    assert_eq!((file.model.config.stages, file.model.config.latent_stride()), (3, 8));
    let codec = Codec::new(file).unwrap();
    for (w, h, c) in [(1, 1, 3), (90, 70, 3), (41, 130, 1)] {
        let pic = synthetic_picture(w, h, c, 4);
        let enc = codec.encode(&pic, 60.0).unwrap();
        let header = kiln::container::read_header(&enc.bytes).unwrap();
        // ⌈h/8⌉ × ⌈w/8⌉ latent positions, the hyper-latent at a further stride 4.
        let (hy, wy) = (h.div_ceil(8) as u16, w.div_ceil(8) as u16);
        assert_eq!(header.tiles[0].latent, [12, hy, wy]);
        assert_eq!(header.tiles[0].hyper, [8, hy.div_ceil(4), wy.div_ceil(4)]);
        let dec = codec.decode(&enc.bytes).unwrap();
        assert_eq!((dec.width, dec.height, dec.channels), (w, h, c));
        assert_eq!(dec, codec.decode(&enc.bytes).unwrap());
    }
    // A four-stage model's file does not mention stages: files from before the field are the
    // same bytes, and read back as four stages.
    let four = kiln::ModelFile::from_bytes(&common::tiny_model_bytes(9)).unwrap();
    assert_eq!(four.model.config.stages, 4);
    assert!(!String::from_utf8_lossy(&common::tiny_model_bytes(9)).contains("stages"));
}

#[test]
fn files_with_the_earlier_padded_latent_still_decode() {
    let codec = tiny_codec(6);
    let pic = synthetic_picture(90, 70, 3, 2);
    let old = codec.encode_with_layout(&pic, 50.0, LatentLayout::Padded64).unwrap();
    let new = codec.encode(&pic, 50.0).unwrap();
    let header = kiln::container::read_header(&old.bytes).unwrap();
    assert_eq!(header.tiles[0].latent, [12, 8, 8]);
    let (a, b) = (codec.decode(&old.bytes).unwrap(), codec.decode(&new.bytes).unwrap());
    assert_eq!((a.width, a.height), (90, 70));
    assert_eq!(a.data.len(), b.data.len());
    // The cropped layout codes 5×6 latent positions instead of 8×8.
    assert!(new.ideal_bits < old.ideal_bits, "{} vs {}", new.ideal_bits, old.ideal_bits);
}

#[test]
fn a_latent_shape_that_fits_neither_layout_is_refused() {
    let codec = tiny_codec(6);
    let pic = synthetic_picture(90, 70, 3, 2);
    let bytes = codec.encode(&pic, 50.0).unwrap().bytes;
    let mut header = kiln::container::read_header(&bytes).unwrap();
    let (_, streams) = kiln::container::read(&bytes).unwrap();
    header.tiles[0].latent = [12, 6, 6];
    let forged = kiln::container::write(&header, &streams).unwrap();
    assert!(codec.decode(&forged).is_err());
}

#[test]
fn decoding_is_repeatable_bit_for_bit() {
    let codec = tiny_codec(4);
    let pic = synthetic_picture(130, 70, 3, 1);
    let enc = codec.encode(&pic, 30.0).unwrap();
    assert_eq!(codec.decode(&enc.bytes).unwrap(), codec.decode(&enc.bytes).unwrap());
    // Encoding twice gives the same bytes.
    assert_eq!(enc.bytes, codec.encode(&pic, 30.0).unwrap().bytes);
}

#[test]
fn quality_out_of_range_is_refused() {
    let codec = tiny_codec(4);
    let pic = synthetic_picture(16, 16, 3, 1);
    assert!(codec.encode(&pic, 0.0).is_err());
    assert!(codec.encode(&pic, 100.5).is_err());
    assert!(codec.encode(&pic, f32::NAN).is_err());
}
