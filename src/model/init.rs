//! Seeded initial values for a new model, so that `kiln train --seed S` is reproducible.
//!
//! Rules by weight name: convolution weights uniform in `±1/√fan_in`, biases 0, GDN `beta` 1 and
//! `gamma` uniform in `[0, 0.01)` (small, so the layer starts near `γ = 0.1·I`), density matrices
//! at [`FactorizedDensity::initial_matrix_value`], density biases uniform in `±½`, density
//! factors 0.
//!
//! Gains start spread by λ, so the quality setting acts from the first step: for uniform
//! quantization under MSE the best step size scales as `λ^(−1/2)` (common practice from
//! high-rate quantization theory), so anchor `i` starts at log-gain `½·ln(λ_i/λ_mid)` (and the
//! inverse gains at its negative), with `λ_mid` the geometric mean of the anchors.

use candle_core::{Result, Tensor};
use candle_nn::VarMap;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

use super::density::FactorizedDensity;

/// Sets every variable of `varmap` from `seed`, visiting names in sorted order.
pub fn initialize(varmap: &VarMap, lambdas: &[f64], seed: u64) -> Result<()> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let data = varmap.data().lock().expect("varmap lock");
    let mut names: Vec<&String> = data.keys().collect();
    names.sort();
    for name in names {
        let var = &data[name];
        let dims = var.dims().to_vec();
        let n: usize = dims.iter().product();
        let values: Vec<f32> = match name.strip_prefix("gain.") {
            // Hyper gains start neutral: the hyper-synthesis predicts as it would without them.
            Some(kind) if kind.starts_with("hs_") => vec![0.0; n],
            Some(kind) => initial_gains(kind, &dims, lambdas),
            None => initial_values(name, &dims, n, &mut rng),
        };
        var.set(&Tensor::from_vec(values, dims.as_slice(), var.device())?)?;
    }
    Ok(())
}

fn initial_gains(kind: &str, dims: &[usize], lambdas: &[f64]) -> Vec<f32> {
    let mid = lambdas.iter().map(|l| l.ln()).sum::<f64>() / lambdas.len() as f64;
    let sign = if kind.ends_with("_inv") { -1.0 } else { 1.0 };
    let (rows, cols) = (dims[0], dims[1]);
    (0..rows * cols).map(|i| (sign * 0.5 * (lambdas[i / cols].ln() - mid)) as f32).collect()
}

fn initial_values(name: &str, dims: &[usize], n: usize, rng: &mut ChaCha8Rng) -> Vec<f32> {
    let uniform = |rng: &mut ChaCha8Rng, lo: f32, hi: f32| (0..n).map(|_| rng.gen_range(lo..hi)).collect::<Vec<_>>();
    if let Some(k) = name.strip_prefix("prior.matrix.") {
        let k: usize = k.parse().unwrap_or(0);
        return vec![FactorizedDensity::initial_matrix_value(k) as f32; n];
    }
    if name.starts_with("prior.bias.") {
        return uniform(rng, -0.5, 0.5);
    }
    if name.starts_with("ctx.2.") {
        // The context's output layer starts at zero: a model starts out coding without it.
        return vec![0.0; n];
    }
    if name.ends_with(".weight") && dims.len() == 4 {
        let fan_in = (dims[1] * dims[2] * dims[3]) as f32;
        let b = 1.0 / fan_in.sqrt();
        return uniform(rng, -b, b);
    }
    if name.ends_with(".beta") {
        return vec![1.0; n];
    }
    if name.ends_with(".gamma") {
        return uniform(rng, 0.0, 0.01);
    }
    vec![0.0; n]
}
