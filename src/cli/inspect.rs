//! `kiln inspect`: containers and model files, as text or JSON.

use std::path::Path;

use kiln::model::{ModelFile, ShippedModel, hex_prefix};
use kiln::{KilnError, container};
use serde_json::json;

use super::models::LookupArgs;

pub fn inspect(file: &Path, as_json: bool, lookup: &LookupArgs) -> anyhow::Result<()> {
    let bytes = match file.to_str().and_then(ShippedModel::by_name) {
        Some(m) => m.bytes()?.into_owned(),
        None => kiln::image_io::read_regular(file)?,
    };
    let value = if bytes.starts_with(&container::MAGIC) {
        let store = super::models::with_enclosing_archives(lookup.store(None)?, file);
        container_json(&bytes, &store)?
    } else if let Ok(format) = image::guess_format(&bytes) {
        anyhow::bail!(
            "{} is a {format:?} image, not a Kiln container or model file\nhint: `kiln compress` makes a container from it",
            file.display()
        );
    } else {
        model_json(&bytes).map_err(|e| match e.downcast::<KilnError>() {
            Ok(KilnError::BadModel(m)) => {
                anyhow::anyhow!("{} is neither a Kiln container nor a usable model file: {m}", file.display())
            }
            Ok(other) => other.into(),
            Err(other) => other,
        })?
    };
    if as_json {
        println!("{}", serde_json::to_string_pretty(&value)?);
    } else {
        print_text(&value, 0);
    }
    Ok(())
}

fn container_json(bytes: &[u8], store: &kiln::model::store::ModelStore) -> anyhow::Result<serde_json::Value> {
    let h = container::read_header(bytes)?;
    let model = match store.find(&h.model_fingerprint) {
        Ok(found) => json!({
            "shipped_name": found.file.shipped().map(|m| m.name),
            "found_in": found.place,
        }),
        Err(e) => json!({"found_in": null, "not_found": e.to_string().lines().next().unwrap_or("")}),
    };
    let tiles: Vec<_> = h
        .tiles
        .iter()
        .map(|t| json!({"latent": t.latent, "hyper_latent": t.hyper, "hyper_bytes": t.hyper_bytes, "latent_bytes": t.latent_bytes}))
        .collect();
    Ok(json!({
        "kind": "container",
        "format_version": container::FORMAT_VERSION,
        "bytes": bytes.len(),
        "width": h.width, "height": h.height, "channels": h.channels, "bit_depth": h.bit_depth,
        "bpp": bytes.len() as f64 * 8.0 / (h.width as f64 * h.height as f64),
        "quality": h.quality,
        "model_fingerprint": hex_prefix(&h.model_fingerprint, 32),
        "model": model,
        "tile_size": [h.tile_width, h.tile_height],
        "tiles": tiles,
    }))
}

fn model_json(bytes: &[u8]) -> anyhow::Result<serde_json::Value> {
    let f = ModelFile::from_bytes(bytes)?;
    let (enc, dec) = f.model.macs_per_pixel();
    let c = &f.model.config;
    let anchors: Vec<_> = (0..c.anchors())
        .map(|i| json!({"quality": (c.anchor_quality(i) as f64 * 100.0).round() / 100.0, "lambda": c.lambdas[i]}))
        .collect();
    Ok(json!({
        "kind": "model",
        "bytes": f.size,
        "fingerprint": hex_prefix(&f.fingerprint, 32),
        "shipped_name": f.shipped().map(|m| m.name),
        "config": c,
        "latent_stride": c.latent_stride(),
        "anchors": anchors,
        "training": f.training,
        "encoder_flops_per_pixel": 2.0 * enc,
        "decoder_flops_per_pixel": 2.0 * dec,
        "entropy_tables": {
            "gaussian": f.tables.gaussian.len(),
            "gaussian_entries": f.tables.gaussian.iter().map(|t| t.freqs.len()).sum::<usize>(),
            "hyper": f.tables.hyper.len(),
            "hyper_entries": f.tables.hyper.iter().map(|t| t.freqs.len()).sum::<usize>(),
        },
    }))
}

fn print_text(v: &serde_json::Value, indent: usize) {
    let pad = "  ".repeat(indent);
    match v {
        serde_json::Value::Object(m) => {
            for (k, v) in m {
                if v.is_object() || (v.is_array() && v.as_array().is_some_and(|a| a.iter().any(|x| x.is_object()))) {
                    println!("{pad}{k}:");
                    print_text(v, indent + 1);
                } else {
                    println!("{pad}{k}: {v}");
                }
            }
        }
        serde_json::Value::Array(a) => {
            for x in a {
                println!("{pad}-");
                print_text(x, indent + 1);
            }
        }
        other => println!("{pad}{other}"),
    }
}
