//! Writes the conformance suite: for every shipped model, small containers (RGB at odd sizes
//! and the lowest and highest quality, grey, an image of two tiles) under `tests/conformance/`,
//! and `manifest.json` with the SHA-256 of each container's decoded pixels
//! (`kiln::archive::pixel_hash`). Run once when a model ships; the containers and the manifest
//! are committed, and `tests/conformance.rs` checks every CPU against them.
//!
//! `cargo run --release --example make_conformance -- [MODEL_NAME...]` (default: every shipped
//! model; existing files of other models are kept).

use std::collections::BTreeMap;
use std::path::Path;

use image::imageops::FilterType;
use kiln::model::shipped::{SHIPPED, ShippedModel};
use kiln::{AlphaPolicy, Codec, ModelFile, Picture};

fn picture(img: image::RgbImage, grey: bool) -> anyhow::Result<Picture> {
    let dynamic = image::DynamicImage::ImageRgb8(img);
    let dynamic = if grey { image::DynamicImage::ImageLuma8(dynamic.into_luma8()) } else { dynamic };
    Ok(Picture::from_dynamic(dynamic, AlphaPolicy::Refuse)?)
}

fn main() -> anyhow::Result<()> {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let out = root.join("tests/conformance");
    std::fs::create_dir_all(&out)?;
    let frame = image::open(root.join("corpus/demo/test/frame-000069.png"))?.into_rgb8();
    let crop = |x, y, w, h| image::imageops::crop_imm(&frame, x, y, w, h).to_image();
    let wide = image::imageops::resize(&frame, 1600, 1600 * frame.height() / frame.width(), FilterType::Triangle);
    let strip = image::imageops::crop_imm(&wide, 0, 300, 1600, 24).to_image();
    let cases: Vec<(&str, Picture, f32)> = vec![
        ("rgb-37x23-q1", picture(crop(200, 120, 37, 23), false)?, 1.0),
        ("rgb-61x45-q100", picture(crop(400, 200, 61, 45), false)?, 100.0),
        ("grey-29x31-q50", picture(crop(90, 60, 29, 31), true)?, 50.0),
        ("rgb-1600x24-q50-two-tiles", picture(strip, false)?, 50.0),
    ];
    let wanted: Vec<String> = std::env::args().skip(1).collect();
    let manifest_path = out.join("manifest.json");
    let mut manifest: BTreeMap<String, serde_json::Value> = match std::fs::read(&manifest_path) {
        Ok(b) => serde_json::from_slice(&b)?,
        Err(_) => BTreeMap::new(),
    };
    for m in SHIPPED.iter().filter(|m| wanted.is_empty() || wanted.iter().any(|w| w == m.name)) {
        let codec = Codec::new(ModelFile::from_bytes(&ShippedModel::bytes(m)?)?)?;
        for (case, pic, q) in &cases {
            let file = format!("{}-{case}.kiln", m.name);
            let bytes = codec.encode(pic, *q)?.bytes;
            let decoded = codec.decode(&bytes)?;
            std::fs::write(out.join(&file), &bytes)?;
            manifest.insert(
                file.clone(),
                serde_json::json!({
                    "model": m.name,
                    "quality": q,
                    "width": pic.width, "height": pic.height, "channels": pic.channels,
                    "bytes": bytes.len(),
                    "decoded_sha256": kiln::archive::pixel_hash(&decoded),
                }),
            );
            println!("{file}: {} bytes", bytes.len());
        }
    }
    std::fs::write(&manifest_path, serde_json::to_string_pretty(&manifest)? + "\n")?;
    Ok(())
}
