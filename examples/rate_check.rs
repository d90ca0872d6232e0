//! Compares the model's estimated rate with the ideal and coded rates on one image.
//! `cargo run --release --example rate_check -- MODEL IMAGE [QUALITY]`

fn main() -> kiln::Result<()> {
    let args: Vec<String> = std::env::args().collect();
    let codec = kiln::Codec::new(kiln::ModelFile::load(Some(args[1].as_ref()))?)?;
    let pic = kiln::Picture::open(args[2].as_ref(), kiln::AlphaPolicy::Drop)?;
    let q: f32 = args.get(3).map(|s| s.parse().unwrap_or(50.0)).unwrap_or(50.0);
    let (by, bz) = codec.estimate_bits(&pic, q)?;
    let enc = codec.encode(&pic, q)?;
    let px = (pic.width * pic.height) as f64;
    println!(
        "estimated y {:.4} z {:.4} bpp | ideal {:.4} | coded {:.4} | container {:.4} bpp",
        by / px,
        bz / px,
        enc.ideal_bits / px,
        enc.coded_bits as f64 / px,
        enc.bytes.len() as f64 * 8.0 / px
    );
    // The training objective's rate on the same image (noise and zero noise).
    let model = &codec.model_file().model;
    let w = (pic.width as usize / 64) * 64;
    let h = (pic.height as usize / 64) * 64;
    let rgb = pic.to_rgb();
    let mut data = vec![0f32; 3 * w * h];
    for y in 0..h {
        for x in 0..w {
            for c in 0..3 {
                data[(c * h + y) * w + x] = rgb[(y * pic.width as usize + x) * 3 + c] as f32 / 255.0;
            }
        }
    }
    let x = candle_core::Tensor::from_vec(data, (1, 3, h, w), &candle_core::Device::Cpu)?;
    let (i, l) = model.config.anchor_position(q)?;
    let idx = candle_core::Tensor::new(&[i as u32], &candle_core::Device::Cpu)?;
    let wt = candle_core::Tensor::new(&[l], &candle_core::Device::Cpu)?;
    let (sy, sz) = (model.config.latent_stride(), model.config.hyper_stride());
    for amp in [0.0f32, 1.0] {
        let ny =
            (candle_core::Tensor::rand(-0.5f32, 0.5, (1, model.config.m, h / sy, w / sy), &candle_core::Device::Cpu)?
                * amp as f64)?;
        let nz = (candle_core::Tensor::rand(
            -0.5f32,
            0.5,
            (1, model.config.nz, h / sz, w / sz),
            &candle_core::Device::Cpu,
        )? * amp as f64)?;
        let out = model.forward_train(&x, &idx, &wt, &ny, &nz)?;
        let by = out.bits_y.to_vec1::<f32>()?[0] as f64 / (w * h) as f64;
        let bz = out.bits_z.to_vec1::<f32>()?[0] as f64 / (w * h) as f64;
        println!("training rate with noise x{amp}: y {by:.4} z {bz:.4} bpp");
    }
    let out = model.forward_train_rounded(&x, &idx, &wt)?;
    let by = out.bits_y.to_vec1::<f32>()?[0] as f64 / (w * h) as f64;
    let bz = out.bits_z.to_vec1::<f32>()?[0] as f64 / (w * h) as f64;
    let mse = ((&out.x_hat - &x)? * 255.0)?.sqr()?.mean_all()?.to_scalar::<f32>()? as f64;
    println!("training rate rounded: y {by:.4} z {bz:.4} bpp, PSNR {:.2} dB", 10.0 * (255.0f64.powi(2) / mse).log10());
    Ok(())
}
