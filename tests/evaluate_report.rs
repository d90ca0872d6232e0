//! `kiln evaluate` end to end on a tiny model: every report file, the CSV columns, PNG as a
//! lossless baseline, and unreadable files skipped.

mod common;

use common::{synthetic_picture, tiny_codec};
use kiln::eval::baselines::Baseline;
use kiln::eval::{EvalOptions, evaluate};

#[test]
fn evaluate_writes_the_whole_report() {
    let tmp = tempfile::tempdir().unwrap();
    let imgs = tmp.path().join("imgs");
    std::fs::create_dir_all(imgs.join("sub")).unwrap();
    std::fs::write(imgs.join("a.png"), synthetic_picture(120, 90, 3, 1).to_png().unwrap()).unwrap();
    std::fs::write(imgs.join("sub/b.png"), synthetic_picture(77, 64, 1, 2).to_png().unwrap()).unwrap();
    std::fs::write(imgs.join("broken.png"), b"not a png").unwrap();
    let out = tmp.path().join("report");
    let o = EvalOptions {
        dirs: vec![imgs],
        out: out.clone(),
        qualities: vec![1.0, 30.0, 60.0, 100.0],
        jpeg_qualities: vec![10, 30, 60, 90],
        baselines: Baseline::built(),
        jobs: 2,
        progress: false,
    };
    let reference = tiny_codec(42);
    let s = evaluate(&tiny_codec(41), Some(&reference), &o).unwrap();
    assert!(s.mean_curves.contains_key(kiln::eval::REFERENCE_CODEC));
    assert_eq!(s.images, 2);
    assert_eq!(s.skipped.len(), 1);
    for f in ["rd.csv", "summary.json", "rd-psnr.svg", "rd-psnr.png", "rd-ms-ssim.svg", "rd-ms-ssim.png", "report.html"]
    {
        assert!(out.join(f).is_file(), "missing {f}");
    }
    let csv = std::fs::read_to_string(out.join("rd.csv")).unwrap();
    let mut lines = csv.lines();
    assert_eq!(lines.next().unwrap(), "image,codec,setting,bytes,bpp,psnr,ssim,ms_ssim,encode_ms,decode_ms");
    let rows: Vec<Vec<&str>> = lines.map(|l| l.split(',').collect()).collect();
    let baseline_rows: usize = Baseline::built().iter().map(|b| b.settings(&o.jpeg_qualities).len()).sum();
    assert_eq!(rows.len(), 2 * (4 + 4 + baseline_rows));
    for r in &rows {
        assert_eq!(r.len(), 10);
        let bytes: f64 = r[3].parse().unwrap();
        let bpp: f64 = r[4].parse().unwrap();
        let px = if r[0] == "a.png" { 120.0 * 90.0 } else { 77.0 * 64.0 };
        assert!((bpp - bytes * 8.0 / px).abs() < 1e-4);
        let lossless = Baseline::built().into_iter().any(|b| b.is_lossless() && b.name() == r[1]);
        if lossless {
            assert_eq!(r[5], "inf", "{} is lossless", r[1]);
        }
    }
    let html = std::fs::read_to_string(out.join("report.html")).unwrap();
    assert!(html.contains("<svg") && html.contains("crops/a_png-kiln.png"));
    let summary: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("summary.json")).unwrap()).unwrap();
    assert_eq!(summary["mean_curves"]["kiln"].as_array().unwrap().len(), 4);
    // One verdict and one BD-rate per lossy baseline, a mean bpp per lossless one, a plot per image.
    let lossy: Vec<&str> = Baseline::built().into_iter().filter(|b| !b.is_lossless()).map(|b| b.name()).collect();
    assert_eq!(summary["verdicts"].as_array().unwrap().len(), lossy.len());
    for b in &lossy {
        assert!(summary["bd_rate_vs"].get(*b).is_some(), "no BD-rate vs {b}");
    }
    for b in Baseline::built().into_iter().filter(|b| b.is_lossless()) {
        assert!(summary["lossless_bpp"][b.name()].as_f64().unwrap() > 0.0, "no lossless bpp for {}", b.name());
    }
    assert!(html.contains("Kiln needs") && html.contains("<h2>Lossless</h2>"));
    for f in ["a_png-rd-psnr.svg", "sub_b_png-rd-psnr.svg"] {
        assert!(out.join("plots").join(f).is_file(), "missing plots/{f}");
    }
}
