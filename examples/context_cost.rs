//! Time of the checkerboard context's layers in one training step (forward and backward) at the
//! shipped shape: batch 8, 128² crops (a 16×16 latent at stride 8), M = 192.
//! `cargo run --release --example context_cost`

use std::time::Instant;

use candle_core::{DType, Device, Tensor, Var};
use candle_nn::{VarBuilder, VarMap};
use kiln::model::context::{Checkerboard, anchor_mask};

fn main() -> candle_core::Result<()> {
    let (b, m, h) = (8, 192, 16);
    let varmap = VarMap::new();
    let ctx = Checkerboard::new(m, VarBuilder::from_varmap(&varmap, DType::F32, &Device::Cpu))?;
    for v in varmap.all_vars() {
        v.set(&Tensor::randn(0f32, 0.05, v.dims(), &Device::Cpu)?)?;
    }
    let y = Var::from_tensor(&Tensor::randn(0f32, 1.0, (b, m, h, h), &Device::Cpu)?)?;
    let mu = Tensor::randn(0f32, 1.0, (b, m, h, h), &Device::Cpu)?;
    let ls = Tensor::randn(0f32, 1.0, (b, m, h, h), &Device::Cpu)?;
    let mask = anchor_mask(h, h)?;
    let step = || -> candle_core::Result<()> {
        let (d_mu, d_ls) = ctx.forward(&y.as_tensor().broadcast_mul(&mask)?, &mu, &ls)?;
        let loss = (d_mu.sqr()?.sum_all()? + d_ls.sqr()?.sum_all()?)?;
        loss.backward()?;
        Ok(())
    };
    step()?;
    let reps = 10;
    let t = Instant::now();
    for _ in 0..reps {
        step()?;
    }
    println!("context forward+backward: {:.1} ms per step", t.elapsed().as_secs_f64() * 1e3 / reps as f64);
    Ok(())
}
