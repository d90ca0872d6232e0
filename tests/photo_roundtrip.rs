//! The whole path on a real photograph with the embedded default model: scikit-image's
//! "chelsea" (CC0, from the PyPI package), compressed to a file and decompressed from it.

use kiln::metrics::psnr;
use kiln::{AlphaPolicy, Codec, ModelFile, Picture};

fn photo() -> Picture {
    let p = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/metrics/chelsea.png");
    Picture::open(&p, AlphaPolicy::Refuse).unwrap()
}

#[test]
fn photograph_round_trips_through_a_file_with_quality_ordered_results() {
    let codec = Codec::new(ModelFile::load(None).expect("embedded default model")).unwrap();
    let pic = photo();
    let dir = tempfile::tempdir().unwrap();
    let mut last: Option<(f64, f64)> = None;
    for q in [1.0, 50.0, 100.0] {
        let enc = codec.encode(&pic, q).unwrap();
        let file = dir.path().join(format!("q{q}.kiln"));
        kiln::image_io::write_atomic(&file, &enc.bytes).unwrap();
        let dec = codec.decode(&std::fs::read(&file).unwrap()).unwrap();
        assert_eq!((dec.width, dec.height, dec.channels), (pic.width, pic.height, pic.channels));
        let bpp = enc.bytes.len() as f64 * 8.0 / (pic.width * pic.height) as f64;
        let p = psnr(&pic.data, &dec.data);
        println!("q{q}: {bpp:.3} bpp, {p:.2} dB");
        if let Some((b0, p0)) = last {
            assert!(bpp > b0, "q{q}: {bpp} bpp is not above the lower quality's {b0}");
            assert!(p > p0, "q{q}: {p} dB is not above the lower quality's {p0}");
        }
        last = Some((bpp, p));
        // The rate the model estimates agrees with the coded size within 2%.
        let (by, bz) = codec.estimate_bits(&pic, q).unwrap();
        let rel = (enc.coded_bits as f64 / (by + bz) - 1.0).abs();
        assert!(rel < 0.02, "q{q}: estimated {:.0} bits, coded {}", by + bz, enc.coded_bits);
    }
}

/// The top-left `w × h` of `pic`.
fn crop(pic: &Picture, w: u32, h: u32) -> Picture {
    let c = pic.channels as usize;
    let mut data = Vec::with_capacity((w * h) as usize * c);
    for y in 0..h as usize {
        let row = y * pic.width as usize * c;
        data.extend_from_slice(&pic.data[row..row + w as usize * c]);
    }
    Picture { width: w, height: h, channels: pic.channels, data }
}

#[test]
fn encoder_refinement_lowers_the_coded_rate_distortion_cost() {
    use kiln::refine::RefineConfig;
    let file = ModelFile::load(None).expect("embedded default model");
    let lambda = file.model.config.lambda_for_quality(50.0).unwrap();
    let plain = Codec::new(file.clone()).unwrap();
    let refined =
        Codec::new(file).unwrap().with_refinement(RefineConfig { iterations: 30, learning_rate: 0.005 }).unwrap();
    let pic = crop(&photo(), 160, 112); // odd multiple of 16 in neither direction: padding is not scored
    let pixels = (pic.width * pic.height) as f64;
    // The cost training minimizes, measured on what was actually coded and decoded.
    let cost = |codec: &Codec| {
        let enc = codec.encode(&pic, 50.0).unwrap();
        let dec = plain.decode(&enc.bytes).unwrap();
        let mse = kiln::metrics::psnr::mse(&pic.data, &dec.data);
        (enc.coded_bits as f64 / pixels + lambda * mse, enc.bytes.len())
    };
    let (before, _) = cost(&plain);
    let (after, bytes) = cost(&refined);
    println!("bpp + λ·MSE at q50: {before:.4} unrefined, {after:.4} refined ({bytes} bytes)");
    // Measured with the stride-8 default (step 110 946): 1.0952 -> 1.0750 (−1.8%); the
    // stride-16 default before it gained more than 2% here. Rounding alone moves it ~0.1%.
    assert!(after < 0.99 * before, "refinement did not lower the cost: {before:.4} -> {after:.4}");
    // A non-positive step size is refused with a message.
    let bad = Codec::new(ModelFile::load(None).unwrap()).unwrap();
    let err = bad.with_refinement(RefineConfig { iterations: 1, learning_rate: 0.0 }).unwrap_err().to_string();
    assert!(err.contains("learning rate"), "{err}");
}
