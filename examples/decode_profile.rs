//! Where a decode's time goes: the whole decode of a 768×512 image at quality 50 with the
//! embedded model, and each step of its synthesis transform `g_s` on the training path and on
//! the decoder's fused path (median of 9 runs each), with the GFLOP/s of each convolution; and
//! the decoder's GFLOP/s over candle's `matmul`'s, each decode paired with a matmul run right
//! after it (median of 18 pairs). `cargo run --release --example decode_profile`

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
    // The whole decode, each run paired with candle's matmul on 1024×1024 f32 (the ruler of
    // `cargo bench --bench codec`) right after it, so that the ratio of their FLOP rates is
    // taken under the same machine load: on a shared machine the load drifts by ±20% between
    // runs, more than the differences measured here.
    let (_, dec) = codec.model_file().model.macs_per_pixel();
    let dec_flops = 2.0 * dec * (w * h) as f64;
    let a = Tensor::randn(0f32, 1.0, (1024, 1024), &Device::Cpu)?;
    let mm_flops = 2.0 * 1024f64.powi(3);
    let (mut whole, mut ratios) = (Vec::new(), Vec::new());
    for i in 0..=2 * reps {
        let t = Instant::now();
        codec.decode(&bytes)?;
        let t_dec = t.elapsed();
        // The ruler: median of three matmuls (one alone is as noisy as the load).
        let mut mm = Vec::new();
        for _ in 0..3 {
            let t = Instant::now();
            a.matmul(&a)?;
            mm.push(t.elapsed());
        }
        let t_mm = median(mm);
        if i > 0 {
            whole.push(t_dec);
            ratios.push((dec_flops / t_dec.as_secs_f64()) / (mm_flops / t_mm.as_secs_f64()));
        }
    }
    let model = &codec.model_file().model;
    let (m, n) = (model.config.m, model.config.n);
    // Any latent of the right shape: the transforms' cost does not depend on the values
    // (checked: spreads 0, 0.3 and 2 gave the same times within the machine's noise).
    let (stride, stages) = (model.config.latent_stride(), model.config.stages);
    let y = Tensor::randn(0f32, 2.0, (1, m, h as usize / stride, w as usize / stride), &Device::Cpu)?.round()?;
    let k2 = (model.config.synthesis_kernel * model.config.synthesis_kernel) as f64;
    let mut chans = vec![m];
    chans.extend(std::iter::repeat_n(n, stages - 1));
    chans.push(3);
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
            let positions = (w as usize * h as usize) as f64 / 4f64.powi((stages - layer / 2) as i32);
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
    let whole = median(whole);
    println!(
        "{:28} {:9.2} {:9.1}  (decoder FLOPs / decode time)",
        "whole decode",
        whole.as_secs_f64() * 1e3,
        dec_flops / whole.as_secs_f64() / 1e9
    );
    ratios.sort_by(f64::total_cmp);
    println!(
        "decoder GFLOP/s / matmul GFLOP/s, {} paired runs: median {:.3} (range {:.3}–{:.3})",
        ratios.len(),
        ratios[ratios.len() / 2],
        ratios[0],
        ratios[ratios.len() - 1]
    );
    Ok(())
}
