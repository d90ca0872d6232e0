//! How much a model's latent channels are used, per quality: the RMS of the gained latent, the
//! mean scale the hyper-synthesis predicts, the share of coded values that are not zero and the
//! ideal bits, for channels `[0, K)` and `[K, M)` apart (e.g. a grown latent's old and new
//! channels; `K` = M by default).
//! `cargo run --release --example latent_usage -- MODEL [--split K] IMAGE...`
//! With `KILN_BITS_MAP=DIR` it also writes each image's bits per latent position (summed over
//! channels) as a text grid, `DIR/{image}-q{quality}.txt`.

use candle_core::{Device, Module, Tensor};
use kiln::{AlphaPolicy, ModelFile, Picture};

fn main() -> anyhow::Result<()> {
    let mut args: Vec<String> = std::env::args().skip(1).collect();
    let file = ModelFile::load(Some(std::path::Path::new(&args.remove(0))))?;
    let m = &file.model;
    let mut split = m.config.m;
    if let Some(i) = args.iter().position(|a| a == "--split") {
        split = args[i + 1].parse()?;
        args.drain(i..i + 2);
    }
    let groups = [(0, split), (split, m.config.m - split)];
    for path in &args {
        let pic = Picture::open(std::path::Path::new(path), AlphaPolicy::Refuse)?;
        let (w, h) = ((pic.width as usize / 64) * 64, (pic.height as usize / 64) * 64);
        let mut planar = vec![0f32; 3 * w * h];
        for y in 0..h {
            for x in 0..w {
                for c in 0..3 {
                    planar[c * w * h + y * w + x] = pic.data[(y * pic.width as usize + x) * 3 + c] as f32 / 255.0;
                }
            }
        }
        let xt = Tensor::from_vec(planar, (1, 3, h, w), &Device::Cpu)?;
        let y = m.g_a.forward(&xt)?;
        for q in [1.0f32, 50.0, 100.0] {
            let (i, l) = m.config.anchor_position(q)?;
            let g = m.gains.at(i, l)?;
            let vec = |v: &[f32], n| Tensor::new(v, &Device::Cpu)?.reshape((1, n, 1, 1));
            let yg = y.broadcast_mul(&vec(&g.y, m.config.m)?)?;
            let z = m.h_a.forward(&yg)?.broadcast_mul(&vec(&g.z, m.config.nz)?)?;
            let z_hat = z.round()?.broadcast_mul(&vec(&g.z_inv, m.config.nz)?)?;
            let (mu, log_scale) = m.h_s.forward_split(&z_hat)?;
            let sigma = log_scale.exp()?;
            let q_res = (&yg - &mu)?.round()?;
            let lik = kiln::model::gaussian_likelihood(&q_res, &sigma)?;
            let bits = (lik.log()? * (-1.0 / std::f64::consts::LN_2))?;
            if let Ok(dir) = std::env::var("KILN_BITS_MAP") {
                // Bits per latent position (summed over channels), as a text grid for plotting.
                let map = bits.sum(1)?.squeeze(0)?.to_vec2::<f32>()?;
                let name = std::path::Path::new(path).file_stem().unwrap().to_string_lossy().to_string();
                let text: Vec<String> =
                    map.iter().map(|r| r.iter().map(|v| format!("{v:.2}")).collect::<Vec<_>>().join(" ")).collect();
                std::fs::write(format!("{dir}/{name}-q{q}.txt"), text.join("\n"))?;
            }
            let mut line = format!("{path} q{q}:");
            for (k, (start, len)) in groups.iter().enumerate() {
                if *len == 0 {
                    continue;
                }
                let part = |t: &Tensor| t.narrow(1, *start, *len);
                let rms = part(&yg)?.sqr()?.mean_all()?.sqrt()?.to_scalar::<f32>()?;
                let s = part(&sigma)?.mean_all()?.to_scalar::<f32>()?;
                let nonzero =
                    part(&q_res)?.ne(0f32)?.to_dtype(candle_core::DType::F32)?.mean_all()?.to_scalar::<f32>()?;
                let bpp = part(&bits)?.sum_all()?.to_scalar::<f32>()? / (w * h) as f32;
                line += &format!(
                    "  [{}] rms {rms:.3} sigma {s:.3} nonzero {:.1}% {bpp:.3} bpp",
                    if k == 0 { "old" } else { "new" },
                    100.0 * nonzero
                );
            }
            println!("{line}");
        }
    }
    Ok(())
}
