//! Times the pieces of one training step of the shipped config (batch 8, 128×128).
//! `cargo run --release --example profile_step` (`KILN_PROFILE_ONLY=step`: only the whole step)

use std::time::Instant;

use candle_core::{Device, Module, Tensor, Var};
use kiln::kernels::conv::{self, ConvBackend};
use kiln::{Model, ModelConfig};

#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

fn time<T>(label: &str, reps: usize, mut f: impl FnMut() -> T) -> f64 {
    f();
    let t = Instant::now();
    for _ in 0..reps {
        f();
    }
    let s = t.elapsed().as_secs_f64() / reps as f64;
    println!("{label:40} {:8.1} ms", s * 1e3);
    s
}

fn main() -> candle_core::Result<()> {
    kiln::allocator::keep_freed_memory();
    let dev = Device::Cpu;
    if std::env::var("KILN_PROFILE_ONLY").as_deref() == Ok("fixed") {
        // The decoder's fixed-order hyper-synthesis for a 768×512 image (ẑ is 12×8).
        let model = Model::new(ModelConfig::default(), 1).unwrap();
        let hs = model.hyper_synthesis_fixed().unwrap();
        let z: Vec<f32> = (0..64 * 12 * 8).map(|i| ((i * 7919) % 13) as f32 - 6.0).collect();
        let mode = kiln::kernels::SimdMode::from_env();
        time("fixed h_s 768x512 (ẑ 12x8)", 10, || hs.forward(&z, 8, 12, mode));
        return Ok(());
    }
    if std::env::var("KILN_PROFILE_ONLY").as_deref() == Ok("gdn") {
        let vm = candle_nn::VarMap::new();
        let vb = candle_nn::VarBuilder::from_varmap(&vm, candle_core::DType::F32, &dev);
        let gdn = kiln::model::gdn::Gdn::new(64, kiln::model::gdn::GdnDirection::Forward, vb)?;
        let xg = Var::from_tensor(&Tensor::rand(-1f32, 1.0, (8, 64, 64, 64), &dev)?)?;
        let flops = 2.0 * 8.0 * 64.0 * 64.0 * 4096.0;
        let s = time("GDN 64ch 64x64 b8 fwd", 5, || gdn.forward(xg.as_tensor()).unwrap());
        println!("{:40} {:8.1} GFLOP/s", "", flops / s / 1e9);
        let s = time("GDN fwd+bwd", 5, || gdn.forward(xg.as_tensor()).unwrap().sum_all().unwrap().backward().unwrap());
        println!("{:40} {:8.1} GFLOP/s", "", 4.0 * flops / s / 1e9);
        // The decoder's widest inverse GDN: one 768×512 image, 64 channels at 384×256.
        let igdn = kiln::model::gdn::Gdn::new(
            64,
            kiln::model::gdn::GdnDirection::Inverse,
            candle_nn::VarBuilder::from_varmap(&vm, candle_core::DType::F32, &dev).pp("i"),
        )?;
        let xd = Tensor::rand(-1f32, 1.0, (1, 64, 256, 384), &dev)?;
        let s = time("IGDN 64ch 384x256 b1 fwd (decoder)", 5, || igdn.forward(&xd).unwrap());
        println!("{:40} {:8.1} GFLOP/s", "", 2.0 * 64.0 * 64.0 * 98304.0 / s / 1e9);
        let a = Tensor::rand(-1f32, 1.0, (64, 64), &dev)?;
        let bm = Tensor::rand(-1f32, 1.0, (64, 4096 * 8), &dev)?;
        let s = time("candle matmul 64x64 . 64x32768", 5, || a.matmul(&bm).unwrap());
        println!("{:40} {:8.1} GFLOP/s", "", flops / s / 1e9);
        return Ok(());
    }
    if std::env::var("KILN_PROFILE_ONLY").as_deref() == Ok("step") {
        // Only the whole step on the fast kernels, for `perf record`.
        let model = Model::new(ModelConfig::default(), 1).unwrap();
        let img = Tensor::rand(0f32, 1.0, (8, 3, 128, 128), &dev)?;
        let idx = Tensor::new(&[0u32, 1, 2, 3, 4, 0, 1, 2], &dev)?;
        let wt = Tensor::new(&[0.5f32; 8], &dev)?;
        let ny = Tensor::zeros((8, 96, 8, 8), candle_core::DType::F32, &dev)?;
        let nz = Tensor::zeros((8, 64, 2, 2), candle_core::DType::F32, &dev)?;
        time("Fast whole step fwd+bwd", 10, || {
            let o = model.forward_train(&img, &idx, &wt, &ny, &nz).unwrap();
            let l =
                ((o.x_hat - &img).unwrap().sqr().unwrap().mean_all().unwrap() + o.bits_y.sum_all().unwrap()).unwrap();
            l.backward().unwrap()
        });
        return Ok(());
    }
    let x = Var::from_tensor(&Tensor::rand(-1f32, 1.0, (8, 64, 64, 64), &dev)?)?;
    let w = Var::from_tensor(&Tensor::rand(-0.1f32, 0.1, (64, 64, 5, 5), &dev)?)?;
    let bias = Var::from_tensor(&Tensor::zeros(64, candle_core::DType::F32, &dev)?)?;
    let flops = 2.0 * 8.0 * 32.0 * 32.0 * 64.0 * 64.0 * 25.0;
    for be in [ConvBackend::Fast, ConvBackend::Candle] {
        conv::set_backend(be);
        let s = time(&format!("{be:?} conv 5x5 s2 64->64 fwd"), 3, || {
            conv::conv2d_selected(x.as_tensor(), w.as_tensor(), bias.as_tensor(), 2, 2)
        });
        println!("{:40} {:8.1} GFLOP/s", "", flops / s / 1e9);
        let s = time(&format!("{be:?} conv fwd+bwd"), 3, || {
            conv::conv2d_selected(x.as_tensor(), w.as_tensor(), bias.as_tensor(), 2, 2)
                .unwrap()
                .sum_all()
                .unwrap()
                .backward()
                .unwrap()
        });
        println!("{:40} {:8.1} GFLOP/s", "", 3.0 * flops / s / 1e9);
    }
    let a = Tensor::rand(-1f32, 1.0, (1024, 1024), &dev)?;
    let s = time("matmul 1024^3", 3, || a.matmul(&a));
    println!("{:40} {:8.1} GFLOP/s", "", 2.0 * 1024f64.powi(3) / s / 1e9);

    conv::set_backend(ConvBackend::Fast);
    let model = Model::new(ModelConfig::default(), 1).unwrap();
    let img = Tensor::rand(0f32, 1.0, (8, 3, 128, 128), &dev)?;
    let y = time("g_a fwd", 3, || model.g_a.forward(&img));
    let _ = y;
    time("g_a fwd+bwd", 3, || model.g_a.forward(&img).unwrap().sum_all().unwrap().backward().unwrap());
    let yl = Tensor::rand(-1f32, 1.0, (8, 96, 8, 8), &dev)?;
    time("g_s fwd+bwd", 3, || model.g_s.forward(&yl).unwrap().sum_all().unwrap().backward().unwrap());
    let idx = Tensor::new(&[0u32, 1, 2, 3, 4, 0, 1, 2], &dev)?;
    let wt = Tensor::new(&[0.5f32; 8], &dev)?;
    let ny = Tensor::zeros((8, 96, 8, 8), candle_core::DType::F32, &dev)?;
    let nz = Tensor::zeros((8, 64, 2, 2), candle_core::DType::F32, &dev)?;
    for be in [ConvBackend::Fast, ConvBackend::Candle] {
        conv::set_backend(be);
        time(&format!("{be:?} whole step fwd+bwd"), 3, || {
            let o = model.forward_train(&img, &idx, &wt, &ny, &nz).unwrap();
            let l =
                ((o.x_hat - &img).unwrap().sqr().unwrap().mean_all().unwrap() + o.bits_y.sum_all().unwrap()).unwrap();
            l.backward().unwrap()
        });
    }
    Ok(())
}
