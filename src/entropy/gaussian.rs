//! The scale table of the mean-scale prior and its quantized Gaussian tables.
//!
//! A latent element is coded as the integer residual `q = round(y − μ)` under a zero-mean
//! Gaussian of scale `σ` integrated over unit bins: `P(q) = Φ((q + ½)/σ) − Φ((q − ½)/σ)`.
//! Scales are snapped to one of [`SCALE_COUNT`] log-spaced values between [`SCALE_MIN`] and
//! [`SCALE_MAX`]; entry `k` covers `q ∈ [−R_k, R_k]`, `R_k = ⌈TAIL_SIGMAS·σ_k⌉`, and everything
//! beyond is sent through the escape symbol.
//!
//! The decoder selects entry `k` by comparing the predicted *log*-scale against the stored
//! thresholds (geometric midpoints between neighbouring scales, as `f32`): no `exp`, no `log`,
//! no CDF at run time.

use super::table::{IntTable, quantize_probabilities};

/// Smallest scale in the table.
pub const SCALE_MIN: f64 = 0.11;
/// Largest scale in the table.
pub const SCALE_MAX: f64 = 256.0;
/// Number of scale entries.
pub const SCALE_COUNT: usize = 256;
/// Support radius of each entry, in units of its scale.
pub const TAIL_SIGMAS: f64 = 6.0;

/// Standard normal CDF Φ(t), via the pure-software `libm` erfc (accurate to a few ulp).
pub fn normal_cdf(t: f64) -> f64 {
    0.5 * libm::erfc(-t / std::f64::consts::SQRT_2)
}

/// The log-spaced scales `σ_k = SCALE_MIN · (SCALE_MAX/SCALE_MIN)^(k/(K−1))`.
pub fn scales() -> Vec<f64> {
    let r = (SCALE_MAX / SCALE_MIN).ln();
    (0..SCALE_COUNT).map(|k| SCALE_MIN * (r * k as f64 / (SCALE_COUNT - 1) as f64).exp()).collect()
}

/// Log-scale thresholds between entries: entry `k` is chosen for `log σ ∈ [t_{k−1}, t_k)`.
pub fn log_scale_thresholds() -> Vec<f32> {
    let s = scales();
    s.windows(2).map(|w| ((w[0].ln() + w[1].ln()) / 2.0) as f32).collect()
}

/// Probability that a zero-mean Gaussian of scale `sigma` falls in the bin of integer `q`.
pub fn bin_probability(q: i64, sigma: f64) -> f64 {
    let a = (q as f64 - 0.5) / sigma;
    let b = (q as f64 + 0.5) / sigma;
    // Use the upper tail on the positive side for accuracy far from zero.
    if q > 0 { normal_cdf(-a) - normal_cdf(-b) } else { normal_cdf(b) - normal_cdf(a) }
}

/// The quantized table for scale `sigma`.
pub fn gaussian_table(sigma: f64) -> IntTable {
    let r = (TAIL_SIGMAS * sigma).ceil() as i64;
    let p: Vec<f64> = (-r..=r).map(|q| bin_probability(q, sigma)).collect();
    let escape = 2.0 * normal_cdf(-(r as f64 + 0.5) / sigma);
    IntTable { lo: -r as i32, freqs: quantize_probabilities(&p, escape) }
}

/// All [`SCALE_COUNT`] tables, in scale order.
pub fn gaussian_tables() -> Vec<IntTable> {
    scales().into_iter().map(gaussian_table).collect()
}

/// Index of the table for a predicted log-scale, given the thresholds. NaN maps to the widest.
pub fn scale_index(log_scale: f32, thresholds: &[f32]) -> usize {
    if log_scale.is_nan() {
        return thresholds.len();
    }
    thresholds.partition_point(|&t| t <= log_scale)
}
