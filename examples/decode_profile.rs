//! Where a decode's time goes: the whole decode of a 768×512 image at quality 50 with the
//! embedded model, and each step of its synthesis transform `g_s` on the training path and on
//! the decoder's fused path (median of 9 runs each), with the GFLOP/s of each convolution. `cargo run --release --example decode_profile`

use std::time::{Duration, Instant};

use candle_core::{Device, Tensor};
use kiln::{Codec, ModelFile};

mod common;

#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

fn median(mut v: Vec<Duration>) -> Duration {
    v.sort();
    v[v.len() / 2]
}

fn main() -> anyhow::Result<()> {
    kiln::allocator::keep_freed_memory();
    let (w, h) = (768u32, 512u32);
    let pic = common::test_picture(w, h);
    let codec = Codec::new(ModelFile::load(None)?)?;
    let bytes = codec.encode(&pic, 50.0)?.bytes;
    let reps = 9;
    let mut whole = Vec::new();
    for _ in 0..=reps {
        let t = Instant::now();
        codec.decode(&bytes)?;
        whole.push(t.elapsed());
    }
    let model = &codec.model_file().model;
    let (m, n) = (model.config.m, model.config.n);
    // Any latent of the right shape: the transforms' cost does not depend on the values
    // (checked: spreads 0, 0.3 and 2 gave the same times within the machine's noise).
    let y = Tensor::randn(0f32, 2.0, (1, m, h as usize / 16, w as usize / 16), &Device::Cpu)?.round()?;
    let k2 = (model.config.synthesis_kernel * model.config.synthesis_kernel) as f64;
    let chans = [m, n, n, n, 3];
    for fused in [false, true] {
        let mut steps: Vec<(String, Vec<Duration>)> = Vec::new();
        for _ in 0..=reps {
            let (_, times) = model.g_s.forward_timed(&y, fused)?;
            for (i, (label, t)) in times.into_iter().enumerate() {
                if steps.len() <= i {
                    steps.push((label, Vec::new()));
                }
                steps[i].1.push(t);
            }
        }
        let mut total = Duration::ZERO;
        println!(
            "{:28} {:>9} {:>9}",
            if fused { "g_s, decoder's fused path" } else { "g_s, training path" },
            "ms",
            "GFLOP/s"
        );
        for (label, times) in steps {
            let t = median(times);
            total += t;
            // "g_s.L ..." or "g_s.L+L' ...": the layer index is the number before any '+'/' '.
            let layer: usize = label[4..].split([' ', '+']).next().unwrap().parse()?;
            let positions = (w as usize * h as usize) as f64 / 4f64.powi(4 - (layer / 2) as i32);
            let conv = 2.0 * positions * k2 * (chans[layer / 2] * chans[layer / 2 + 1] * 4) as f64;
            let gdn = 2.0 * positions * 4.0 * (n * n) as f64;
            let flops = match label.rsplit(' ').next() {
                Some("conv") => conv,
                Some("IGDN") => gdn,
                Some("conv+d2s+IGDN") => conv + gdn,
                _ => 0.0,
            };
            let rate = if flops > 0.0 { format!("{:9.1}", flops / t.as_secs_f64() / 1e9) } else { String::new() };
            println!("  {label:26} {:9.2} {rate}", t.as_secs_f64() * 1e3);
        }
        println!("  {:26} {:9.2}", "total", total.as_secs_f64() * 1e3);
    }
    let (_, dec) = model.macs_per_pixel();
    let whole = median(whole);
    println!(
        "{:28} {:9.2} {:9.1}  (decoder FLOPs / decode time)",
        "whole decode",
        whole.as_secs_f64() * 1e3,
        2.0 * dec * (w * h) as f64 / whole.as_secs_f64() / 1e9
    );
    Ok(())
}
