//! Metrics against values computed outside this project: scikit-image's PSNR and SSIM, an
//! independent numpy/scipy MS-SSIM (Wang, Simoncelli & Bovik 2003), numpy.polyfit BD-rate, and
//! Pillow's decode of a JPEG from the `jpeg-encoder` crate. The values come from
//! `tools/reference-metrics.py`; `tests/fixtures/metrics/reference.json` names the library
//! versions.

use kiln::eval::baselines::decode_jpeg;
use kiln::metrics::bd::{bd_psnr, bd_rate};
use kiln::metrics::{ms_ssim, psnr, ssim};
use kiln::{AlphaPolicy, Picture};

fn fixture(name: &str) -> std::path::PathBuf {
    std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/metrics").join(name)
}

fn reference() -> serde_json::Value {
    serde_json::from_str(&std::fs::read_to_string(fixture("reference.json")).unwrap()).unwrap()
}

fn open(name: &str) -> Picture {
    Picture::open(&fixture(name), AlphaPolicy::Refuse).unwrap()
}

#[test]
fn psnr_ssim_and_ms_ssim_match_the_reference_values() {
    let r = reference();
    let pairs = r["pairs"].as_array().unwrap();
    assert!(pairs.len() >= 4);
    for p in pairs {
        let a = open(p["reference"].as_str().unwrap());
        let b = open(p["distorted"].as_str().unwrap());
        let (w, h, c) = (a.width as usize, a.height as usize, a.channels as usize);
        let name = p["distorted"].as_str().unwrap();
        let got = psnr(&a.data, &b.data);
        assert!((got - p["psnr"].as_f64().unwrap()).abs() < 0.01, "{name}: PSNR {got} vs {}", p["psnr"]);
        let got = ssim(&a.data, &b.data, w, h, c);
        assert!((got - p["ssim"].as_f64().unwrap()).abs() < 1e-3, "{name}: SSIM {got} vs {}", p["ssim"]);
        let got = ms_ssim(&a.data, &b.data, w, h, c);
        assert!((got - p["ms_ssim"].as_f64().unwrap()).abs() < 1e-3, "{name}: MS-SSIM {got} vs {}", p["ms_ssim"]);
    }
}

fn curve(v: &serde_json::Value) -> Vec<(f64, f64)> {
    v.as_array().unwrap().iter().map(|p| (p[0].as_f64().unwrap(), p[1].as_f64().unwrap())).collect()
}

#[test]
fn bd_rate_matches_numpy_polyfit() {
    let r = reference();
    let (a, t) = (curve(&r["bd"]["anchor"]), curve(&r["bd"]["test"]));
    let got = bd_rate(&a, &t).unwrap();
    assert!((got - r["bd"]["bd_rate"].as_f64().unwrap()).abs() < 1e-6, "{got} vs {}", r["bd"]["bd_rate"]);
    let got = bd_psnr(&a, &t).unwrap();
    assert!((got - r["bd"]["bd_psnr"].as_f64().unwrap()).abs() < 1e-6, "{got} vs {}", r["bd"]["bd_psnr"]);
}

#[test]
fn bd_rate_has_the_known_answers() {
    let r = reference();
    let a = curve(&r["bd"]["anchor"]);
    assert!(bd_rate(&a, &a).unwrap().abs() < 1e-12);
    let scaled: Vec<(f64, f64)> = a.iter().map(|&(x, p)| (0.8 * x, p)).collect();
    assert!((bd_rate(&a, &scaled).unwrap() + 0.2).abs() < 1e-9);
    let far: Vec<(f64, f64)> = a.iter().map(|&(x, p)| (x, p + 100.0)).collect();
    assert!(bd_rate(&a, &far).is_none(), "non-overlapping ranges have no BD-rate");
}

#[test]
fn jpeg_baseline_decoder_agrees_with_pillow() {
    let r = reference();
    let j = &r["jpeg_decode"];
    let bytes = std::fs::read(fixture(j["file"].as_str().unwrap())).unwrap();
    let orig = open(j["reference"].as_str().unwrap());
    let dec = decode_jpeg(&bytes, 3).unwrap();
    let got = psnr(&orig.data, &dec.data);
    assert!((got - j["pillow_psnr"].as_f64().unwrap()).abs() < 0.05, "{got} vs Pillow {}", j["pillow_psnr"]);
}
