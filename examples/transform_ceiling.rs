//! Where a model's quality is lost: PSNR of the transforms alone (`g_s(g_a(x))` with the
//! latent left continuous), with the latent rounded, and the full codec, per quality.
//! `cargo run --release --example transform_ceiling -- MODEL IMAGE...`

use candle_core::{Device, Tensor};
use kiln::{AlphaPolicy, Codec, ModelFile, Picture, metrics::psnr};

fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let file = ModelFile::load(Some(std::path::Path::new(&args[0])))?;
    let codec = Codec::new(ModelFile::load(Some(std::path::Path::new(&args[0])))?)?;
    let m = &file.model;
    for path in &args[1..] {
        let pic = Picture::open(std::path::Path::new(path), AlphaPolicy::Refuse)?;
        // Crop to a multiple of 64 so no padding enters the comparison.
        let (w, h) = ((pic.width as usize / 64) * 64, (pic.height as usize / 64) * 64);
        let mut planar = vec![0f32; 3 * w * h];
        let mut crop = Vec::with_capacity(3 * w * h);
        for y in 0..h {
            for x in 0..w {
                for c in 0..3 {
                    let v = pic.data[(y * pic.width as usize + x) * 3 + c];
                    planar[c * w * h + y * w + x] = v as f32 / 255.0;
                    crop.push(v);
                }
            }
        }
        let xt = Tensor::from_vec(planar, (1, 3, h, w), &Device::Cpu)?;
        let y = candle_core::Module::forward(&m.g_a, &xt)?;
        let cropped = Picture { width: w as u32, height: h as u32, channels: 3, data: crop };
        for q in [1.0f32, 50.0, 100.0] {
            let (i, l) = m.config.anchor_position(q)?;
            let g = m.gains.at(i, l)?;
            let gy = Tensor::new(g.y.as_slice(), &Device::Cpu)?.reshape((1, m.config.m, 1, 1))?;
            let gi = Tensor::new(g.y_inv.as_slice(), &Device::Cpu)?.reshape((1, m.config.m, 1, 1))?;
            let yg = y.broadcast_mul(&gy)?;
            let rec = |t: &Tensor| -> anyhow::Result<f64> {
                let x = candle_core::Module::forward(&m.g_s, &t.broadcast_mul(&gi)?)?;
                let x = (x * 255.0)?.round()?.clamp(0.0, 255.0)?.squeeze(0)?.permute((1, 2, 0))?;
                let v: Vec<u8> = x.flatten_all()?.to_vec1::<f32>()?.into_iter().map(|v| v as u8).collect();
                Ok(psnr(&cropped.data, &v))
            };
            let enc = codec.encode(&cropped, q)?;
            let dec = codec.decode(&enc.bytes)?;
            println!(
                "{path} q{q}: continuous {:.2} dB, rounded {:.2} dB, codec {:.2} dB at {:.3} bpp",
                rec(&yg)?,
                rec(&yg.round()?)?,
                psnr(&cropped.data, &dec.data),
                enc.bytes.len() as f64 * 8.0 / (w * h) as f64
            );
        }
    }
    Ok(())
}
