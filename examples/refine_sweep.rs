//! Compares encoder-refinement settings on one image at one quality by what they actually code:
//! container bits per pixel, PSNR of the decoded image, the objective `bpp + λ·MSE` and the
//! encode time. `cargo run --release --example refine_sweep -- IMAGE QUALITY 0 40@0.01 100@0.005`
//! (`N@LR`: N steps from step size LR; `0`: no refinement).

use std::time::Instant;

use kiln::refine::RefineConfig;
use kiln::{AlphaPolicy, Codec, ModelFile, Picture};

#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

fn main() -> anyhow::Result<()> {
    kiln::allocator::keep_freed_memory();
    let args: Vec<String> = std::env::args().skip(1).collect();
    let [image, quality, settings @ ..] = args.as_slice() else {
        anyhow::bail!("usage: refine_sweep IMAGE QUALITY SETTING... (SETTING: 0 or STEPS@LR)");
    };
    let quality: f32 = quality.parse()?;
    let pic = Picture::open(image.as_ref(), AlphaPolicy::Drop)?;
    let file = ModelFile::load(None)?;
    let lambda = file.model.config.lambda_for_quality(quality)?;
    let plain = Codec::new(file.clone())?;
    let pixels = (pic.width * pic.height) as f64;
    for s in settings {
        let config = match s.split_once('@') {
            Some((n, lr)) => RefineConfig { iterations: n.parse()?, learning_rate: lr.parse()? },
            None => RefineConfig { iterations: s.parse()?, ..RefineConfig::default() },
        };
        let codec = Codec::new(file.clone())?.with_refinement(config)?;
        let t = Instant::now();
        let enc = codec.encode(&pic, quality)?;
        let secs = t.elapsed().as_secs_f64();
        let dec = plain.decode(&enc.bytes)?;
        let mse = kiln::metrics::mse(&pic.data, &dec.data);
        let bpp = enc.bytes.len() as f64 * 8.0 / pixels;
        println!(
            "{s:>10}: {bpp:.4} bpp  {:.3} dB  bpp+λ·MSE {:.5}  encode {secs:.1} s",
            kiln::metrics::psnr(&pic.data, &dec.data),
            bpp + lambda * mse
        );
    }
    Ok(())
}
