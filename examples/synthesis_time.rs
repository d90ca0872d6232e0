//! The synthesis alone, integer against float, on the latent of an image (fastest of five,
//! alternating): the part of decoding the integer arithmetic replaced. Entropy decoding and the
//! fixed-order hyper-synthesis, which both decoders share, are left out.
//!
//! `cargo run --release --example synthesis_time -- IMAGE [MODEL]`

use std::time::Instant;

use candle_core::{Device, Module, Tensor};
use kiln::kernels::IntPath;
use kiln::{AlphaPolicy, ModelFile, Picture};

fn main() -> anyhow::Result<()> {
    kiln::allocator::keep_freed_memory();
    let args: Vec<String> = std::env::args().skip(1).collect();
    anyhow::ensure!(!args.is_empty(), "usage: synthesis_time IMAGE [MODEL]");
    let file = ModelFile::load(args.get(1).map(std::path::Path::new))?;
    let model = &file.model;
    let pic = Picture::open(args[0].as_ref(), AlphaPolicy::Refuse)?;
    let s = model.config.latent_stride();
    let (w, h) = (pic.width as usize / s * s, pic.height as usize / s * s);
    let mut data = vec![0f32; 3 * w * h];
    for y in 0..h {
        for x in 0..w {
            for c in 0..3 {
                data[(c * h + y) * w + x] = pic.data[(y * pic.width as usize + x) * 3 + c] as f32 / 255.0;
            }
        }
    }
    let y = model.g_a.forward(&Tensor::from_vec(data, (1, 3, h, w), &Device::Cpu)?)?.round()?;
    let (_, m, hy, wy) = y.dims4()?;
    let flat = y.flatten_all()?.to_vec1::<f32>()?;
    let int = model.synthesis_integer()?;
    let macs = model.macs_per_pixel().1 * (w * h) as f64;
    let mut best = [f64::MAX; 3];
    for _ in 0..5 {
        let t = Instant::now();
        std::hint::black_box(model.g_s.forward_decode(&y)?);
        best[0] = best[0].min(t.elapsed().as_secs_f64());
        for (i, path) in [IntPath::Native, IntPath::Avx2].into_iter().enumerate() {
            let t = Instant::now();
            std::hint::black_box(int.decode_rgb8(&flat, m, hy, wy, w, h, path));
            best[i + 1] = best[i + 1].min(t.elapsed().as_secs_f64());
        }
    }
    println!("{w}×{h}, decoder {:.1} GMAC (the hyper-synthesis' share included in the count)", macs / 1e9);
    println!("float synthesis: {:.1} ms", best[0] * 1e3);
    for (i, path) in [IntPath::Native, IntPath::Avx2].into_iter().enumerate() {
        println!(
            "integer synthesis, {}: {:.1} ms ({:.2}× the float synthesis' speed)",
            path.describe(),
            best[i + 1] * 1e3,
            best[0] / best[i + 1]
        );
    }
    Ok(())
}
