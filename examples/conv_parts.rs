use candle_core::{Device, Tensor};
use kiln::kernels::conv::Im2Col;
use std::time::Instant;
fn main() -> candle_core::Result<()> {
    let dev = Device::Cpu;
    let x = Tensor::rand(-1f32, 1.0, (8, 64, 64, 64), &dev)?;
    let w = Tensor::rand(-0.1f32, 0.1, (64, 1600), &dev)?;
    let g = Im2Col { k: 5, stride: 2, pad: 2 };
    let t = Instant::now();
    for _ in 0..5 {
        let _ = x.apply_op1_no_bwd(&g)?;
    }
    println!("im2col {:.1} ms", t.elapsed().as_secs_f64() * 200.0);
    let cols = x.apply_op1_no_bwd(&g)?;
    let t = Instant::now();
    for _ in 0..5 {
        let _ = w.broadcast_matmul(&cols)?;
    }
    println!("broadcast_matmul {:.1} ms", t.elapsed().as_secs_f64() * 200.0);
    let wb = w.unsqueeze(0)?.repeat((8, 1, 1))?;
    let t = Instant::now();
    for _ in 0..5 {
        let _ = wb.matmul(&cols)?;
    }
    println!("batched matmul {:.1} ms", t.elapsed().as_secs_f64() * 200.0);
    // one big matmul: cols transposed to (1600, 8*1024)
    let ct = cols.transpose(0, 1)?.reshape((1600, 8 * 1024))?.contiguous()?;
    let t = Instant::now();
    for _ in 0..5 {
        let _ = w.matmul(&ct)?;
    }
    println!("single matmul (64x1600x8192) {:.1} ms", t.elapsed().as_secs_f64() * 200.0);
    let dy = Tensor::rand(-1f32, 1.0, (8, 64, 1024), &dev)?;
    let t = Instant::now();
    for _ in 0..5 {
        let _ = dy.matmul(&cols.transpose(1, 2)?)?;
    }
    println!("dW matmul (8x 64x1024x1600, rhs transposed) {:.1} ms", t.elapsed().as_secs_f64() * 200.0);
    let t = Instant::now();
    for _ in 0..5 {
        let _ = w.t()?.broadcast_matmul(&dy)?;
    }
    println!("dcols matmul {:.1} ms", t.elapsed().as_secs_f64() * 200.0);
    Ok(())
}
