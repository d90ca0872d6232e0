//! Tabulating the learned hyper-latent density into integer tables, once, at model export.

use candle_core::{Device, Tensor};

use super::table::{IntTable, quantize_probabilities};
use crate::error::Result;
use crate::model::density::FactorizedDensity;

/// Values `−HYPER_RADIUS ..= HYPER_RADIUS` are evaluated when tabulating.
pub const HYPER_RADIUS: i32 = 256;
/// Mass trimmed from the two ends of each channel's support (sent via escape instead).
pub const HYPER_TAIL_MASS: f64 = 1e-6;

/// One table per channel of `density`.
pub fn tabulate_density(density: &FactorizedDensity) -> Result<Vec<IntTable>> {
    let c = density.channels();
    let n = (2 * HYPER_RADIUS + 1) as usize;
    let xs: Vec<f32> = (-HYPER_RADIUS..=HYPER_RADIUS).map(|v| v as f32).collect();
    let x = Tensor::from_vec(xs, (1, 1, n), &Device::Cpu)?.repeat((c, 1, 1))?;
    let lik = density.likelihood_flat(&x)?.reshape((c, n))?.to_vec2::<f32>()?;
    Ok(lik.into_iter().map(|p| table_from_pmf(&p)).collect())
}

fn table_from_pmf(p: &[f32]) -> IntTable {
    let p: Vec<f64> = p.iter().map(|&v| (v as f64).max(0.0)).collect();
    let total: f64 = p.iter().sum();
    let outside = (1.0 - total).max(0.0);
    let (mut lo, mut hi) = (0usize, p.len() - 1);
    let (mut cut_lo, mut cut_hi) = (0.0, 0.0);
    while lo < hi && cut_lo + p[lo] < HYPER_TAIL_MASS / 2.0 {
        cut_lo += p[lo];
        lo += 1;
    }
    while hi > lo && cut_hi + p[hi] < HYPER_TAIL_MASS / 2.0 {
        cut_hi += p[hi];
        hi -= 1;
    }
    let escape = outside + cut_lo + cut_hi;
    IntTable { lo: lo as i32 - HYPER_RADIUS, freqs: quantize_probabilities(&p[lo..=hi], escape.max(1e-9)) }
}
