//! The `kiln` binary: exit codes, one-line errors, no partial files.

mod common;

use std::path::Path;
use std::process::Command;

use common::{synthetic_picture, tiny_model_bytes};

fn kiln(args: &[&str]) -> std::process::Output {
    Command::new(env!("CARGO_BIN_EXE_kiln")).args(args).output().unwrap()
}

fn setup() -> (tempfile::TempDir, String, String) {
    let tmp = tempfile::tempdir().unwrap();
    let model = tmp.path().join("m.safetensors");
    std::fs::write(&model, tiny_model_bytes(31)).unwrap();
    let img = tmp.path().join("in.png");
    std::fs::write(&img, synthetic_picture(77, 45, 3, 1).to_png().unwrap()).unwrap();
    (tmp, model.display().to_string(), img.display().to_string())
}

fn stderr(o: &std::process::Output) -> String {
    String::from_utf8_lossy(&o.stderr).to_string()
}

fn only_listed_files(dir: &Path, expected: &[&str]) {
    let mut names: Vec<String> =
        std::fs::read_dir(dir).unwrap().map(|e| e.unwrap().file_name().to_string_lossy().to_string()).collect();
    names.sort();
    let mut expected: Vec<String> = expected.iter().map(|s| s.to_string()).collect();
    expected.sort();
    assert_eq!(names, expected);
}

#[test]
fn compress_then_decompress_with_stats() {
    let (tmp, model, img) = setup();
    let out = tmp.path().join("x.kiln").display().to_string();
    let o = kiln(&["compress", &img, "-o", &out, "--quality", "42.5", "--model", &model, "--stats"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let stats: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    for key in ["bytes", "bpp", "ideal_bits", "coded_bits"] {
        assert!(stats.get(key).is_some(), "missing {key}");
    }
    assert_eq!(stats["bytes"].as_u64().unwrap(), std::fs::metadata(&out).unwrap().len());
    let png = tmp.path().join("x.png").display().to_string();
    let o = kiln(&["decompress", &out, "-o", &png, "--model", &model]);
    assert!(o.status.success(), "{}", stderr(&o));
    let back = image::open(&png).unwrap();
    assert_eq!((back.width(), back.height()), (77, 45));
    let o = kiln(&["inspect", &out, "--json"]);
    assert!(o.status.success());
    let info: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(info["quality"].as_f64().unwrap(), 42.5);
    // A refined file is an ordinary container: the plain decoder reads it.
    let refined = tmp.path().join("r.kiln").display().to_string();
    let o = kiln(&["compress", &img, "-o", &refined, "--quality", "42.5", "--model", &model, "--refine", "3"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let png = tmp.path().join("r.png").display().to_string();
    let o = kiln(&["decompress", &refined, "-o", &png, "--model", &model]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert_eq!(image::image_dimensions(&png).unwrap(), (77, 45));
}

#[test]
fn inspect_reports_flops_for_a_model() {
    let (_tmp, model, _) = setup();
    let o = kiln(&["inspect", &model, "--json"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let info: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert!(info["encoder_flops_per_pixel"].as_f64().unwrap() > 0.0);
    assert!(info["decoder_flops_per_pixel"].as_f64().unwrap() > 0.0);
    assert_eq!(info["config"]["m"].as_u64().unwrap(), 12);
}

#[test]
fn bad_inputs_exit_1_with_a_one_line_error_and_no_partial_file() {
    let (tmp, model, img) = setup();
    let dir = tmp.path();
    let good = dir.join("g.kiln").display().to_string();
    assert!(kiln(&["compress", &img, "-o", &good, "--model", &model]).status.success());
    let bytes = std::fs::read(&good).unwrap();
    std::fs::write(dir.join("trunc.kiln"), &bytes[..bytes.len() / 2]).unwrap();
    std::fs::write(dir.join("text.png"), b"hello").unwrap();
    let mut rgba = image::RgbaImage::new(8, 8);
    rgba.put_pixel(0, 0, image::Rgba([1, 2, 3, 4]));
    rgba.save(dir.join("alpha.png")).unwrap();
    image::ImageBuffer::<image::Luma<u16>, Vec<u16>>::new(8, 8).save(dir.join("deep.png")).unwrap();
    let other = dir.join("other.safetensors");
    std::fs::write(&other, tiny_model_bytes(32)).unwrap();
    let p = |n: &str| dir.join(n).display().to_string();
    let cases: Vec<(Vec<String>, &str)> = vec![
        (
            vec!["decompress".into(), p("trunc.kiln"), "-o".into(), p("o1.png"), "--model".into(), model.clone()],
            "corrupt",
        ),
        (vec!["decompress".into(), p("missing.kiln"), "-o".into(), p("o2.png")], "missing.kiln"),
        (
            vec!["compress".into(), p("text.png"), "-o".into(), p("o3.kiln"), "--model".into(), model.clone()],
            "cannot decode",
        ),
        (vec!["compress".into(), p("alpha.png"), "-o".into(), p("o4.kiln"), "--model".into(), model.clone()], "alpha"),
        (vec!["compress".into(), p("deep.png"), "-o".into(), p("o5.kiln"), "--model".into(), model.clone()], "8-bit"),
        (
            vec![
                "compress".into(),
                img.clone(),
                "-o".into(),
                p("o6.kiln"),
                "--model".into(),
                model.clone(),
                "-q".into(),
                "0".into(),
            ],
            "quality",
        ),
        (
            vec![
                "decompress".into(),
                good.clone(),
                "-o".into(),
                p("o7.png"),
                "--model".into(),
                other.display().to_string(),
            ],
            "no model with fingerprint",
        ),
        (vec!["compress".into(), img.clone(), "-o".into(), p("o8.kiln"), "--model".into(), p("text.png")], "bad model"),
        (
            vec![
                "compress".into(),
                img.clone(),
                "-o".into(),
                p("o9.kiln"),
                "--model".into(),
                model.clone(),
                "--refine".into(),
                "2".into(),
                "--refine-lr=-1".into(),
            ],
            "learning rate",
        ),
    ];
    for (args, needle) in &cases {
        let args: Vec<&str> = args.iter().map(String::as_str).collect();
        let o = kiln(&args);
        let err = stderr(&o);
        assert_eq!(o.status.code(), Some(1), "{args:?}: {err}");
        let first = err.lines().next().unwrap_or("");
        assert!(first.starts_with("error: ") && err.to_lowercase().contains(needle), "{args:?}: {err}");
    }
    // --drop-alpha accepts the RGBA image.
    let o = kiln(&["compress", &p("alpha.png"), "-o", &p("ok.kiln"), "--model", &model, "--drop-alpha"]);
    assert!(o.status.success(), "{}", stderr(&o));
    only_listed_files(
        dir,
        &[
            "m.safetensors",
            "in.png",
            "g.kiln",
            "trunc.kiln",
            "text.png",
            "alpha.png",
            "deep.png",
            "other.safetensors",
            "ok.kiln",
        ],
    );
}

#[test]
fn a_closed_output_pipe_ends_quietly_without_a_panic() {
    let mut child = Command::new(env!("CARGO_BIN_EXE_kiln"))
        .args(["inspect", "default"])
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    // The reader goes away before kiln writes (it first loads the model), as with `| head -0`.
    drop(child.stdout.take());
    let out = child.wait_with_output().unwrap();
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(!err.contains("panicked"), "{err}");
}
