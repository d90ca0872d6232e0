//! Mean squared error and PSNR on 8-bit samples (peak 255, MSE over all channels): the
//! textbook definition, `PSNR = 10·log10(255² / MSE)`.

/// Mean squared error between two equally long sample buffers.
///
/// # Panics
/// If the lengths differ or are zero.
pub fn mse(a: &[u8], b: &[u8]) -> f64 {
    assert_eq!(a.len(), b.len(), "images must have the same size");
    assert!(!a.is_empty(), "images must not be empty");
    let s: u64 = a.iter().zip(b).map(|(&x, &y)| (x as i64 - y as i64).pow(2) as u64).sum();
    s as f64 / a.len() as f64
}

/// PSNR in dB; `f64::INFINITY` for identical images.
///
/// ```
/// // One sample off by 255 in four: MSE = 255²/4, so PSNR = 10·log10(4) ≈ 6.02 dB.
/// let p = kiln::metrics::psnr(&[0, 0, 0, 0], &[255, 0, 0, 0]);
/// assert!((p - 6.0206).abs() < 1e-3);
/// ```
pub fn psnr(a: &[u8], b: &[u8]) -> f64 {
    let m = mse(a, b);
    if m == 0.0 { f64::INFINITY } else { 10.0 * (255.0f64 * 255.0 / m).log10() }
}
