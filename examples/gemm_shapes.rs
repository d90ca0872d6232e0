use candle_core::{Device, Tensor};
use std::time::Instant;
fn main() -> candle_core::Result<()> {
    let dev = Device::Cpu;
    for (m, k, n) in [(8192usize, 1600usize, 64usize), (64, 1600, 8192), (8192, 64, 1600), (8192, 576, 256)] {
        let a = Tensor::rand(-1f32, 1.0, (m, k), &dev)?;
        let b = Tensor::rand(-1f32, 1.0, (k, n), &dev)?;
        let _ = a.matmul(&b)?;
        let t = Instant::now();
        for _ in 0..5 {
            let _ = a.matmul(&b)?;
        }
        let s = t.elapsed().as_secs_f64() / 5.0;
        println!("{m}x{k} * {k}x{n}: {:.1} ms, {:.1} GFLOP/s", s * 1e3, 2.0 * (m * k * n) as f64 / s / 1e9);
    }
    Ok(())
}
