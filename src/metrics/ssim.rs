//! SSIM (Wang, Bovik, Sheikh, Simoncelli 2004) and MS-SSIM (Wang, Simoncelli, Bovik 2003).
//!
//! SSIM: Gaussian window 11×11 with σ = 1.5 (radius 5), `K1 = 0.01`, `K2 = 0.03`, dynamic range
//! `L = 255`, population (not sample) covariances; the map is averaged over the positions where
//! the window lies wholly inside the image (a 5-pixel border is left out, as scikit-image does
//! with `gaussian_weights=True, use_sample_covariance=False`); colour images are computed per
//! channel and averaged.
//!
//! MS-SSIM: five scales with the published exponents `0.0448, 0.2856, 0.3001, 0.2363, 0.1333`;
//! contrast–structure at every scale, luminance at the coarsest; 2×2 averaging between scales
//! (an odd last row or column is dropped). Images too small for five scales (each side must be
//! at least 11 at the coarsest) use the scales that fit, with the exponents renormalised.

/// Exponents of the five MS-SSIM scales, finest first.
pub const MS_SSIM_WEIGHTS: [f64; 5] = [0.0448, 0.2856, 0.3001, 0.2363, 0.1333];
const K1: f64 = 0.01;
const K2: f64 = 0.03;
const L: f64 = 255.0;
const SIGMA: f64 = 1.5;
const RADIUS: usize = 5;
const WINDOW: usize = 2 * RADIUS + 1;

fn gaussian_window() -> [f64; 2 * RADIUS + 1] {
    let mut w = [0.0; 2 * RADIUS + 1];
    for (i, v) in w.iter_mut().enumerate() {
        let x = i as f64 - RADIUS as f64;
        *v = (-0.5 * x * x / (SIGMA * SIGMA)).exp();
    }
    let s: f64 = w.iter().sum();
    w.map(|v| v / s)
}

/// A single-channel plane of `f64` samples.
#[derive(Debug, Clone)]
struct Plane {
    w: usize,
    h: usize,
    v: Vec<f64>,
}

/// Separable Gaussian filtering over the valid region: output is `(w − 10) × (h − 10)`.
fn filter_valid(p: &Plane) -> Plane {
    let g = gaussian_window();
    let n = 2 * RADIUS + 1;
    let ow = p.w - n + 1;
    let oh = p.h - n + 1;
    let mut tmp = vec![0.0; ow * p.h];
    for y in 0..p.h {
        for x in 0..ow {
            tmp[y * ow + x] = (0..n).map(|k| g[k] * p.v[y * p.w + x + k]).sum();
        }
    }
    let mut out = vec![0.0; ow * oh];
    for y in 0..oh {
        for x in 0..ow {
            out[y * ow + x] = (0..n).map(|k| g[k] * tmp[(y + k) * ow + x]).sum();
        }
    }
    Plane { w: ow, h: oh, v: out }
}

fn map2(a: &Plane, b: &Plane, f: impl Fn(f64, f64) -> f64) -> Plane {
    Plane { w: a.w, h: a.h, v: a.v.iter().zip(&b.v).map(|(&x, &y)| f(x, y)).collect() }
}

/// Mean SSIM and mean contrast–structure term of two planes (both at least 11×11).
fn ssim_plane(a: &Plane, b: &Plane) -> (f64, f64) {
    let (c1, c2) = ((K1 * L).powi(2), (K2 * L).powi(2));
    let mu_a = filter_valid(a);
    let mu_b = filter_valid(b);
    let aa = filter_valid(&map2(a, a, |x, y| x * y));
    let bb = filter_valid(&map2(b, b, |x, y| x * y));
    let ab = filter_valid(&map2(a, b, |x, y| x * y));
    let n = mu_a.v.len() as f64;
    let (mut s, mut cs) = (0.0, 0.0);
    for i in 0..mu_a.v.len() {
        let (ma, mb) = (mu_a.v[i], mu_b.v[i]);
        let va = aa.v[i] - ma * ma;
        let vb = bb.v[i] - mb * mb;
        let cov = ab.v[i] - ma * mb;
        let c = (2.0 * cov + c2) / (va + vb + c2);
        cs += c;
        s += (2.0 * ma * mb + c1) / (ma * ma + mb * mb + c1) * c;
    }
    (s / n, cs / n)
}

fn planes(data: &[u8], w: usize, h: usize, c: usize) -> Vec<Plane> {
    (0..c).map(|ch| Plane { w, h, v: (0..w * h).map(|i| data[i * c + ch] as f64).collect() }).collect()
}

fn downsample(p: &Plane) -> Plane {
    let (w, h) = (p.w / 2, p.h / 2);
    let mut v = vec![0.0; w * h];
    for y in 0..h {
        for x in 0..w {
            let i = 2 * y * p.w + 2 * x;
            v[y * w + x] = (p.v[i] + p.v[i + 1] + p.v[i + p.w] + p.v[i + p.w + 1]) / 4.0;
        }
    }
    Plane { w, h, v }
}

fn check(a: &[u8], b: &[u8], w: usize, h: usize, c: usize) {
    assert_eq!(a.len(), w * h * c, "first image size");
    assert_eq!(b.len(), w * h * c, "second image size");
    assert!(w >= WINDOW && h >= WINDOW, "SSIM needs images of at least 11×11");
}

/// SSIM of two 8-bit images of `w × h` with `c` interleaved channels (mean over channels).
///
/// # Panics
/// If the buffers do not match the size or the image is smaller than 11×11.
pub fn ssim(a: &[u8], b: &[u8], w: usize, h: usize, c: usize) -> f64 {
    check(a, b, w, h, c);
    let (pa, pb) = (planes(a, w, h, c), planes(b, w, h, c));
    pa.iter().zip(&pb).map(|(x, y)| ssim_plane(x, y).0).sum::<f64>() / c as f64
}

/// MS-SSIM of two 8-bit images (mean over channels); see the module docs.
///
/// # Panics
/// As [`ssim`].
pub fn ms_ssim(a: &[u8], b: &[u8], w: usize, h: usize, c: usize) -> f64 {
    check(a, b, w, h, c);
    let mut scales = 1;
    while scales < 5 && (w >> scales) >= WINDOW && (h >> scales) >= WINDOW {
        scales += 1;
    }
    let weights = &MS_SSIM_WEIGHTS[..scales];
    let total: f64 = weights.iter().sum();
    let (pa, pb) = (planes(a, w, h, c), planes(b, w, h, c));
    let mut sum = 0.0;
    for (mut x, mut y) in pa.into_iter().zip(pb) {
        let mut value = 1.0;
        for (j, &wt) in weights.iter().enumerate() {
            let (s, cs) = ssim_plane(&x, &y);
            let term = if j + 1 == scales { s } else { cs };
            value *= term.max(0.0).powf(wt / total);
            if j + 1 < scales {
                x = downsample(&x);
                y = downsample(&y);
            }
        }
        sum += value;
    }
    sum / c as f64
}
