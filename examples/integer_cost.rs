//! What the integer synthesis costs against the float one: per image and quality, the PSNR of
//! each decode against the source (the bitstream, so the rate, is the same), the largest sample
//! difference between the two decodes and the decode times (fastest of three, alternating);
//! per image, the BD-rate of the integer decode against the float decode over the qualities.
//!
//! `cargo run --release --example integer_cost -- MODEL QUALITIES IMAGE...`
//! (MODEL: a file, `default` or a shipped name; QUALITIES: comma-separated.)
//! `KILN_SIMD=avx2` or `off` chooses the integer path (see `kiln::kernels::IntPath`).

use std::time::Instant;

use kiln::kernels::IntPath;
use kiln::metrics::{bd::bd_rate, psnr};
use kiln::{AlphaPolicy, Codec, ModelFile, Picture};

fn main() -> anyhow::Result<()> {
    kiln::allocator::keep_freed_memory();
    let args: Vec<String> = std::env::args().skip(1).collect();
    anyhow::ensure!(args.len() >= 3, "usage: integer_cost MODEL QUALITIES IMAGE...");
    let codec = Codec::new(ModelFile::load(Some(std::path::Path::new(&args[0])))?)?;
    let qualities: Vec<f32> = args[1].split(',').map(|q| q.parse()).collect::<Result<_, _>>()?;
    println!("# integer path: {}", IntPath::from_env().describe());
    println!("image\tquality\tbpp\tpsnr_float\tpsnr_integer\tmax_diff\tms_float\tms_integer");
    let (mut sum_float, mut sum_int, mut bds) = (0.0, 0.0, Vec::new());
    for path in &args[2..] {
        let pic = Picture::open(path.as_ref(), AlphaPolicy::Refuse)?;
        let name = std::path::Path::new(path).file_name().unwrap().to_string_lossy().into_owned();
        let (mut curve_float, mut curve_int) = (Vec::new(), Vec::new());
        for &q in &qualities {
            let bytes = codec.encode(&pic, q)?.bytes;
            let (mut t_float, mut t_int) = (f64::MAX, f64::MAX);
            let (mut float, mut int) = (None, None);
            for _ in 0..3 {
                let t = Instant::now();
                float = Some(codec.decode_float(&bytes)?);
                t_float = t_float.min(t.elapsed().as_secs_f64() * 1e3);
                let t = Instant::now();
                int = Some(codec.decode(&bytes)?);
                t_int = t_int.min(t.elapsed().as_secs_f64() * 1e3);
            }
            let (float, int) = (float.expect("decoded"), int.expect("decoded"));
            let diff = float.data.iter().zip(&int.data).map(|(a, b)| a.abs_diff(*b)).max().unwrap_or(0);
            let bpp = bytes.len() as f64 * 8.0 / (pic.width as f64 * pic.height as f64);
            let (pf, pi) = (psnr(&pic.data, &float.data), psnr(&pic.data, &int.data));
            curve_float.push((bpp, pf));
            curve_int.push((bpp, pi));
            (sum_float, sum_int) = (sum_float + t_float, sum_int + t_int);
            println!("{name}\t{q}\t{bpp:.4}\t{pf:.3}\t{pi:.3}\t{diff}\t{t_float:.1}\t{t_int:.1}");
        }
        let bd = bd_rate(&curve_float, &curve_int);
        println!(
            "# {name}: BD-rate of the integer decode vs the float decode {}",
            bd.map_or("n/a".into(), |b| format!("{:+.3}%", 100.0 * b))
        );
        bds.extend(bd);
    }
    let mean = bds.iter().sum::<f64>() / bds.len().max(1) as f64;
    println!(
        "# mean BD-rate {:+.3}% over {} image(s); decode time integer/float {:.3}",
        100.0 * mean,
        bds.len(),
        sum_int / sum_float
    );
    Ok(())
}
