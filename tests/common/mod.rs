//! Helpers shared by the integration tests: synthetic images (test inputs only, never
//! training data for shipped models) and small models built by the real export path.

#![allow(dead_code)]

use kiln::{Codec, Model, ModelConfig, ModelFile, Picture};

/// A deterministic synthetic picture: smooth gradients, a few discs and mild noise.
pub fn synthetic_picture(width: u32, height: u32, channels: u8, seed: u64) -> Picture {
    let mut state = seed.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
    let mut noise = move || {
        state = state.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
        ((state >> 33) as f32 / (1u64 << 31) as f32) - 0.5
    };
    let discs: Vec<(f32, f32, f32, [f32; 3])> = (0..6)
        .map(|i| {
            let f = (seed as f32 + i as f32 * 1.7).sin().abs();
            (
                f * width as f32,
                (1.0 - f) * height as f32,
                5.0 + 20.0 * f,
                [200.0 * f, 80.0 + 100.0 * f, 255.0 - 150.0 * f],
            )
        })
        .collect();
    let mut data = Vec::with_capacity((width * height) as usize * channels as usize);
    for y in 0..height {
        for x in 0..width {
            let (fx, fy) = (x as f32 / width as f32, y as f32 / height as f32);
            let mut rgb = [60.0 + 120.0 * fx, 90.0 + 100.0 * fy, 140.0 + 60.0 * (fx * 6.0).sin() * (fy * 4.0).cos()];
            for (cx, cy, r, col) in &discs {
                if (x as f32 - cx).powi(2) + (y as f32 - cy).powi(2) < r * r {
                    rgb = *col;
                }
            }
            let n = 6.0 * noise();
            let px: Vec<u8> = rgb.iter().map(|v| (v + n).clamp(0.0, 255.0) as u8).collect();
            if channels == 3 {
                data.extend_from_slice(&px);
            } else {
                data.push(((px[0] as u16 + px[1] as u16 + px[2] as u16) / 3) as u8);
            }
        }
    }
    Picture { width, height, channels, data }
}

/// Model-file bytes of a tiny, randomly initialised model, made by the real export path.
pub fn tiny_model_bytes(seed: u64) -> Vec<u8> {
    Model::new(ModelConfig::tiny(), seed).unwrap().export(&Default::default()).unwrap()
}

/// A codec over [`tiny_model_bytes`].
pub fn tiny_codec(seed: u64) -> Codec {
    Codec::new(ModelFile::from_bytes(&tiny_model_bytes(seed)).unwrap()).unwrap()
}

/// A safetensors file split into its JSON header and its data bytes.
pub fn split_safetensors(bytes: &[u8]) -> (serde_json::Value, &[u8]) {
    let n = u64::from_le_bytes(bytes[..8].try_into().unwrap()) as usize;
    (serde_json::from_slice(&bytes[8..8 + n]).unwrap(), &bytes[8 + n..])
}

/// A safetensors file from a JSON header and data bytes (the header padded to 8 bytes with
/// spaces, as the format allows), e.g. after editing what [`split_safetensors`] returned.
pub fn join_safetensors(header: &serde_json::Value, data: &[u8]) -> Vec<u8> {
    let mut text = serde_json::to_vec(header).unwrap();
    while !text.len().is_multiple_of(8) {
        text.push(b' ');
    }
    let mut out = (text.len() as u64).to_le_bytes().to_vec();
    out.extend_from_slice(&text);
    out.extend_from_slice(data);
    out
}
