//! Decode speed of candidate configurations: FLOPs per pixel and measured decode time of a
//! 768×512 image, each configuration with seeded random weights (speed does not depend on
//! training). `cargo run --release --example config_speed [-- --model FILE]` (with `--model`:
//! that model alone, one line).

use std::time::Instant;

mod common;

#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

use kiln::model::TrainingSummary;
use kiln::{Codec, Model, ModelConfig, ModelFile};

fn main() -> anyhow::Result<()> {
    kiln::allocator::keep_freed_memory();
    let (w, h) = (768u32, 512u32);
    let pic = common::test_picture(w, h);
    println!(
        "{:>18} {:>4} {:>4} {:>10} {:>10} {:>10} {:>9}",
        "weights", "N", "M", "enc kFLOP", "dec kFLOP", "decode ms", "Mpx/s"
    );
    let args: Vec<String> = std::env::args().collect();
    let mut candidates: Vec<(String, ModelFile)> = Vec::new();
    if let [_, flag, path] = args.as_slice()
        && flag == "--model"
    {
        let name = std::path::Path::new(path).file_stem().map_or("model".into(), |s| s.to_string_lossy().into_owned());
        candidates.push((name, ModelFile::load(Some(std::path::Path::new(path)))?));
    } else {
        candidates.push(("default (trained)".into(), ModelFile::load(None)?));
    }
    for (n, m) in [(48, 64), (64, 96), (96, 128), (128, 192)].into_iter().filter(|_| args.len() == 1) {
        let config = ModelConfig { n, m, nz: 64, hyper_hidden: 64, ..ModelConfig::default() };
        let model = Model::new(config, 1)?;
        candidates
            .push((format!("random {n}/{m}"), ModelFile::from_bytes(&model.export(&TrainingSummary::default())?)?));
    }
    for (name, file) in candidates {
        let (n, m) = (file.model.config.n, file.model.config.m);
        let (enc, dec) = file.model.macs_per_pixel();
        print!("{name:>18} ");
        let codec = Codec::new(file)?;
        let bytes = codec.encode(&pic, 50.0)?.bytes;
        codec.decode(&bytes)?;
        let reps = 3;
        let t = Instant::now();
        for _ in 0..reps {
            codec.decode(&bytes)?;
        }
        let s = t.elapsed().as_secs_f64() / reps as f64;
        println!(
            "{n:>4} {m:>4} {:>10.1} {:>10.1} {:>10.0} {:>9.2}",
            2.0 * enc / 1e3,
            2.0 * dec / 1e3,
            s * 1e3,
            (w * h) as f64 / s / 1e6
        );
    }
    Ok(())
}
