//! What the integer synthesis costs against the float one, per image and quality: PSNR of each
//! decode against the source, the largest sample difference between the two decodes, and the
//! decode times.
//!
//! `cargo run --release --example integer_cost -- MODEL QUALITIES IMAGE...`
//! (MODEL: a file, `default` or a shipped name; QUALITIES: comma-separated.)

use std::time::Instant;

use kiln::{AlphaPolicy, Codec, ModelFile, Picture, metrics::psnr};

fn main() -> anyhow::Result<()> {
    kiln::allocator::keep_freed_memory();
    let args: Vec<String> = std::env::args().skip(1).collect();
    anyhow::ensure!(args.len() >= 3, "usage: integer_cost MODEL QUALITIES IMAGE...");
    let codec = Codec::new(ModelFile::load(Some(std::path::Path::new(&args[0])))?)?;
    let qualities: Vec<f32> = args[1].split(',').map(|q| q.parse()).collect::<Result<_, _>>()?;
    println!("image\tquality\tbpp\tpsnr_float\tpsnr_integer\tmax_diff\tms_float\tms_integer");
    for path in &args[2..] {
        let pic = Picture::open(path.as_ref(), AlphaPolicy::Refuse)?;
        for &q in &qualities {
            let bytes = codec.encode(&pic, q)?.bytes;
            // Each decode three times, alternating; the fastest of each counts.
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
            println!(
                "{}\t{q}\t{bpp:.4}\t{:.3}\t{:.3}\t{diff}\t{t_float:.1}\t{t_int:.1}",
                std::path::Path::new(path).file_name().unwrap().to_string_lossy(),
                psnr(&pic.data, &float.data),
                psnr(&pic.data, &int.data)
            );
        }
    }
    Ok(())
}
