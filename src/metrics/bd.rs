//! Bjøntegaard delta rate and PSNR (VCEG-M33): fit a cubic through each rate–distortion curve
//! and integrate the difference over the range both curves cover.
//!
//! BD-rate: `log(rate)` as a cubic in PSNR; the mean difference `Δ` over the common PSNR range
//! gives `exp(Δ) − 1` (negative: the test codec needs fewer bits). BD-PSNR: PSNR as a cubic in
//! `log(rate)`, mean difference over the common log-rate range.
//!
//! ```
//! use kiln::metrics::bd::bd_rate;
//! let anchor = [(0.5, 30.0), (1.0, 33.0), (1.5, 35.0), (2.0, 36.5)];
//! let cheaper: Vec<(f64, f64)> = anchor.iter().map(|&(r, p)| (0.8 * r, p)).collect();
//! assert!((bd_rate(&anchor, &cheaper).unwrap() + 0.2).abs() < 1e-9);
//! ```

/// Least-squares cubic through `(x, y)`: coefficients `c0 + c1 x + c2 x² + c3 x³`.
fn fit_cubic(x: &[f64], y: &[f64]) -> Option<[f64; 4]> {
    if x.len() < 4 {
        return None;
    }
    // Normal equations on centred, scaled x for conditioning.
    let mean = x.iter().sum::<f64>() / x.len() as f64;
    let scale = x.iter().map(|v| (v - mean).abs()).fold(0.0, f64::max).max(1e-12);
    let mut a = [[0.0f64; 5]; 4];
    for (&xi, &yi) in x.iter().zip(y) {
        let t = (xi - mean) / scale;
        let p = [1.0, t, t * t, t * t * t];
        for r in 0..4 {
            for c in 0..4 {
                a[r][c] += p[r] * p[c];
            }
            a[r][4] += p[r] * yi;
        }
    }
    // Gaussian elimination with partial pivoting.
    for col in 0..4 {
        let piv = (col..4).max_by(|&i, &j| a[i][col].abs().total_cmp(&a[j][col].abs()))?;
        a.swap(col, piv);
        if a[col][col].abs() < 1e-300 {
            return None;
        }
        for r in 0..4 {
            if r != col {
                let f = a[r][col] / a[col][col];
                let pivot_row = a[col];
                for (v, p) in a[r].iter_mut().zip(pivot_row).skip(col) {
                    *v -= f * p;
                }
            }
        }
    }
    let t: Vec<f64> = (0..4).map(|i| a[i][4] / a[i][i]).collect();
    // Expand back from t = (x − mean)/scale to powers of x.
    let (m, s) = (mean, scale);
    let d = [t[0], t[1] / s, t[2] / (s * s), t[3] / (s * s * s)];
    Some([
        d[0] - d[1] * m + d[2] * m * m - d[3] * m * m * m,
        d[1] - 2.0 * d[2] * m + 3.0 * d[3] * m * m,
        d[2] - 3.0 * d[3] * m,
        d[3],
    ])
}

fn integral(c: &[f64; 4], lo: f64, hi: f64) -> f64 {
    let f = |x: f64| c[0] * x + c[1] * x * x / 2.0 + c[2] * x.powi(3) / 3.0 + c[3] * x.powi(4) / 4.0;
    f(hi) - f(lo)
}

fn delta(
    anchor: &[(f64, f64)],
    test: &[(f64, f64)],
    x_of: fn(&(f64, f64)) -> f64,
    y_of: fn(&(f64, f64)) -> f64,
) -> Option<f64> {
    let (xa, ya): (Vec<f64>, Vec<f64>) = anchor.iter().map(|p| (x_of(p), y_of(p))).unzip();
    let (xt, yt): (Vec<f64>, Vec<f64>) = test.iter().map(|p| (x_of(p), y_of(p))).unzip();
    if xa.iter().chain(&xt).chain(&ya).chain(&yt).any(|v| !v.is_finite()) {
        return None;
    }
    let lo = xa.iter().cloned().fold(f64::INFINITY, f64::min).max(xt.iter().cloned().fold(f64::INFINITY, f64::min));
    let hi =
        xa.iter().cloned().fold(f64::NEG_INFINITY, f64::max).min(xt.iter().cloned().fold(f64::NEG_INFINITY, f64::max));
    if hi <= lo {
        return None;
    }
    let (ca, ct) = (fit_cubic(&xa, &ya)?, fit_cubic(&xt, &yt)?);
    Some((integral(&ct, lo, hi) - integral(&ca, lo, hi)) / (hi - lo))
}

/// BD-rate of `test` against `anchor`, as a fraction (−0.25 = 25% fewer bits at equal PSNR).
/// Points are `(rate, psnr)`; at least four per curve; `None` if the PSNR ranges do not overlap.
pub fn bd_rate(anchor: &[(f64, f64)], test: &[(f64, f64)]) -> Option<f64> {
    delta(anchor, test, |p| p.1, |p| p.0.ln()).map(|d| d.exp() - 1.0)
}

/// BD-PSNR of `test` against `anchor` in dB (positive: better quality at equal rate).
pub fn bd_psnr(anchor: &[(f64, f64)], test: &[(f64, f64)]) -> Option<f64> {
    delta(anchor, test, |p| p.0.ln(), |p| p.1)
}
