//! The integer synthesis transform: the decoder's `g_s` in integer arithmetic, so that a
//! container decodes to the same pixels on every CPU, with any SIMD width and any number of
//! threads.
//!
//! # Arithmetic
//!
//! Activations are `i16` in channel-last layout, every element of a layer sharing one binary
//! exponent `f` (value = `a · 2^−f`). Per tile and layer, `f` is the largest exponent at which
//! the layer's largest magnitude still fits in ±32 767 ([`headroom`]): the scale follows the
//! data, computed from exact integer (or exact float) maxima, so it is the same everywhere.
//!
//! - **Convolutions** (3×3 sub-pixel layers, stride 1, zero padding): weights are quantized per
//!   output channel `c` to 14-bit magnitudes with a power-of-two scale `2^s_c`
//!   (`w_q = round(w · 2^s_c)`, exact in floating point: a power-of-two product and a
//!   rounding); products are summed in `i32` with wrapping addition, starting from the bias
//!   `round(b · 2^(f + s_c))`. Wrapping sums are exact modulo 2³² in any order, so vectorized,
//!   blocked and threaded evaluations agree bit for bit.
//! - **Requantization** to the next `i16` layer: `round_shift(acc, e)` = `(acc + 2^(e−1)) >> e`
//!   (round half up, arithmetic shift) for `e > 0`, a left shift for `e ≤ 0`, clamped to
//!   ±32 767. Depth-to-space is folded into where each value is written.
//! - **Inverse GDN** `x_i · sqrt(β_i + Σ_j γ_ij x_j²)`: squares `a_j²` (exact in `i32`)
//!   requantized to 15 bits with one tile-wide shift; `γ` per row to 14 bits with a power-of-two
//!   scale; the sum in `i64` (exact, no overflow: 64 terms of at most 2²⁹); `β_i` rounded at the
//!   sum's scale (an exact power-of-two product in `f64`); the exponent made even by doubling
//!   the sum; the square root by [`u64::isqrt`] of the sum shifted by [`SQRT_EXTRA_BITS`]·2
//!   (exact integer square root); the product with `a_i` in `i64`.
//! - **Output**: the last layer's sums become 8-bit samples as `clamp(round(acc · 255 · 2^−e))`
//!   in `i64` (round half up), the same rounding as the float path's `round(v · 255)` up to ties.
//!
//! What must hold for exact decoding: the input latent is itself exact (it is: entropy decoding
//! and the fixed-order hyper-synthesis), every per-element step above is a function of integer
//! inputs (or of single IEEE operations on exactly representable values), and sums are integer.
//! Nothing here reads the CPU's features except to choose how fast the same sums are computed.

use rayon::prelude::*;

/// Largest activation magnitude (symmetric, so no `−32 768`).
const ACT_MAX: i64 = 32_767;
/// Largest quantized weight magnitude (14 bits: a pair of products fits `i32` even at ±32 767).
const WEIGHT_MAX: f64 = 16_383.0;
/// Extra fractional bits of the inverse GDN's square root.
pub const SQRT_EXTRA_BITS: u32 = 13;
/// Bound on any exponent chosen for a layer (an all-zero layer would otherwise have none).
const EXP_CAP: i32 = 40;

/// Which code computes the sums (the results are the same; only the speed differs).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum IntPath {
    /// The widest vector instructions this CPU has (AVX-512BW, AVX2), chosen at run time.
    Native,
    /// Code compiled for the baseline target only (`KILN_SIMD=off`).
    Portable,
}

impl IntPath {
    /// `Portable` when the environment variable `KILN_SIMD` is `off`, else `Native`.
    pub fn from_env() -> Self {
        if std::env::var("KILN_SIMD").is_ok_and(|v| v == "off") { IntPath::Portable } else { IntPath::Native }
    }

    /// The instruction set the sums run on with this choice, in words.
    pub fn describe(self) -> &'static str {
        match (self, isa()) {
            (IntPath::Portable, _) | (_, Isa::Baseline) => "portable",
            (_, Isa::Avx2) => "AVX2",
            (_, Isa::Avx512) => "AVX-512BW",
        }
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Isa {
    Baseline,
    Avx2,
    Avx512,
}

fn isa() -> Isa {
    #[cfg(target_arch = "x86_64")]
    {
        if std::arch::is_x86_feature_detected!("avx512bw") && std::arch::is_x86_feature_detected!("avx512f") {
            return Isa::Avx512;
        }
        if std::arch::is_x86_feature_detected!("avx2") {
            return Isa::Avx2;
        }
    }
    Isa::Baseline
}

/// The largest `t` (possibly negative) with `m · 2^t ≤ limit`; [`EXP_CAP`] for `m = 0`.
pub fn headroom(m: u64, limit: u64) -> i32 {
    if m == 0 {
        return EXP_CAP;
    }
    if m <= limit {
        return ((limit / m).ilog2() as i32).min(EXP_CAP);
    }
    // Smallest u ≥ 1 with m ≤ limit · 2^u, i.e. m · 2^−u ≤ limit.
    let mut u = 1;
    while (limit as u128) << u < m as u128 {
        u += 1;
    }
    -u
}

/// `v · 2^−e` rounded half up (`e > 0`), or `v · 2^−e` exactly (`e ≤ 0`), in `i64`.
#[inline(always)]
pub fn round_shift(v: i64, e: i32) -> i64 {
    if e > 0 {
        if e >= 63 {
            return 0;
        }
        (v + (1i64 << (e - 1))) >> e
    } else {
        v.checked_shl((-e) as u32).filter(|r| r >> (-e) == v).unwrap_or(if v < 0 { i64::MIN } else { i64::MAX })
    }
}

#[inline(always)]
fn to_act(v: i64) -> i16 {
    v.clamp(-ACT_MAX, ACT_MAX) as i16
}

/// `x · 2^e` for a float and an exponent, exactly (outside the normal range it saturates).
fn scaled(x: f64, e: i32) -> f64 {
    x * 2f64.powi(e)
}

/// A quantized 3×3 (any odd `k`) stride-1 convolution.
#[derive(Debug, Clone)]
struct IntConv {
    cin: usize,
    cout: usize,
    k: usize,
    /// `[cout][ky][kx][cin]`.
    weights: Vec<i16>,
    /// Per output channel: the weights' exponent `s_c`.
    shifts: Vec<i32>,
    bias: Vec<f32>,
}

impl IntConv {
    /// From float weights `[cout][cin][k][k]` and bias `[cout]`.
    fn new(w: &[f32], bias: &[f32], cout: usize, cin: usize, k: usize) -> Self {
        let per = cin * k * k;
        let mut weights = vec![0i16; cout * per];
        let mut shifts = vec![0i32; cout];
        for co in 0..cout {
            let row = &w[co * per..(co + 1) * per];
            let m = row.iter().fold(0f32, |a, &v| a.max(v.abs())) as f64;
            let s = if m == 0.0 { 0 } else { (0..).map(|i| 30 - i).find(|&s| scaled(m, s) <= WEIGHT_MAX).unwrap_or(-30) };
            shifts[co] = s;
            for ci in 0..cin {
                for ky in 0..k {
                    for kx in 0..k {
                        let v = scaled(row[(ci * k + ky) * k + kx] as f64, s).round();
                        weights[co * per + (ky * k + kx) * cin + ci] = v as i16;
                    }
                }
            }
        }
        IntConv { cin, cout, k, weights, shifts, bias: bias.to_vec() }
    }

    /// Sums of this layer over an `h × w` input with exponent `f`: `[h·w][cout]`, channel `c`
    /// at exponent `f + s_c`.
    fn sums(&self, x: &[i16], h: usize, w: usize, f: i32, path: IntPath) -> Vec<i32> {
        let bias: Vec<i32> = (0..self.cout)
            .map(|c| scaled(self.bias[c] as f64, f + self.shifts[c]).round().clamp(i32::MIN as f64, i32::MAX as f64) as i32)
            .collect();
        let mut out = vec![0i32; h * w * self.cout];
        let row_len = w * self.cout;
        out.par_chunks_mut(row_len).enumerate().for_each(|(y, row)| {
            let mut patch = vec![0i16; self.k * self.k * self.cin];
            conv_row(self, x, h, w, y, &bias, &mut patch, row, path);
        });
        out
    }
}

/// One output row: for each position, gathers the zero-padded patch `[ky][kx][cin]`, then one
/// dot product per output channel.
#[allow(clippy::too_many_arguments)]
fn conv_row(c: &IntConv, x: &[i16], h: usize, w: usize, y: usize, bias: &[i32], patch: &mut [i16], row: &mut [i32], path: IntPath) {
    let dots = |patch: &[i16], out: &mut [i32]| match (path, isa()) {
        #[cfg(target_arch = "x86_64")]
        (IntPath::Native, Isa::Avx512) => unsafe { dots_avx512(&c.weights, patch, bias, out) },
        #[cfg(target_arch = "x86_64")]
        (IntPath::Native, Isa::Avx2) => unsafe { dots_avx2(&c.weights, patch, bias, out) },
        _ => dots_portable(&c.weights, patch, bias, out),
    };
    let (k, cin) = (c.k, c.cin);
    let pad = k / 2;
    for xo in 0..w {
        for ky in 0..k {
            let yi = y as isize + ky as isize - pad as isize;
            for kx in 0..k {
                let xi = xo as isize + kx as isize - pad as isize;
                let dst = &mut patch[(ky * k + kx) * cin..][..cin];
                if yi < 0 || yi >= h as isize || xi < 0 || xi >= w as isize {
                    dst.fill(0);
                } else {
                    dst.copy_from_slice(&x[(yi as usize * w + xi as usize) * cin..][..cin]);
                }
            }
        }
        dots(patch, &mut row[xo * c.cout..(xo + 1) * c.cout]);
    }
}

/// `out[c] = bias[c] + Σ_k weights[c][k] · patch[k]`, wrapping `i32` sums.
#[inline(always)]
fn dots_impl(weights: &[i16], patch: &[i16], bias: &[i32], out: &mut [i32]) {
    let n = patch.len();
    for (c, o) in out.iter_mut().enumerate() {
        let wr = &weights[c * n..(c + 1) * n];
        let mut acc = 0i32;
        for (a, b) in wr.iter().zip(patch) {
            acc = acc.wrapping_add(*a as i32 * *b as i32);
        }
        *o = acc.wrapping_add(bias[c]);
    }
}

fn dots_portable(weights: &[i16], patch: &[i16], bias: &[i32], out: &mut [i32]) {
    dots_impl(weights, patch, bias, out)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn dots_avx2(weights: &[i16], patch: &[i16], bias: &[i32], out: &mut [i32]) {
    dots_impl(weights, patch, bias, out)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f,avx512bw")]
unsafe fn dots_avx512(weights: &[i16], patch: &[i16], bias: &[i32], out: &mut [i32]) {
    dots_impl(weights, patch, bias, out)
}

/// A quantized inverse GDN over `c` channels.
#[derive(Debug, Clone)]
struct IntIgdn {
    c: usize,
    beta: Vec<f32>,
    /// `[i][j]`, row `i` at exponent `g_i`.
    gamma: Vec<i16>,
    gamma_shifts: Vec<i32>,
}

impl IntIgdn {
    /// From the effective `β` `[c]` and `γ` `[c][c]` (both non-negative).
    fn new(beta: &[f32], gamma: &[f32], c: usize) -> Self {
        let mut q = vec![0i16; c * c];
        let mut shifts = vec![0i32; c];
        for i in 0..c {
            let row = &gamma[i * c..(i + 1) * c];
            let m = row.iter().fold(0f32, |a, &v| a.max(v.abs())) as f64;
            let s = if m == 0.0 { 0 } else { (0..).map(|k| 40 - k).find(|&s| scaled(m, s) <= WEIGHT_MAX).unwrap_or(-40) };
            shifts[i] = s;
            for j in 0..c {
                q[i * c + j] = scaled(row[j] as f64, s).round() as i16;
            }
        }
        IntIgdn { c, beta: beta.to_vec(), gamma: q, gamma_shifts: shifts }
    }

    /// Applies the layer to `n` positions of `x` (exponent `f`); returns the outputs and the
    /// exponent they share.
    fn forward(&self, x: &[i16], f: i32) -> (Vec<i16>, i32) {
        let c = self.c;
        let max_a = x.iter().map(|v| v.unsigned_abs() as u64).max().unwrap_or(0);
        // Squares to 15 bits with one shift t ≥ 0: exponent 2f − t.
        let t = (-headroom(max_a * max_a, ACT_MAX as u64)).max(0);
        // Per row i: the sum's exponent E_i = 2f − t + g_i, made even; β at that scale.
        let mut exps = vec![0i32; c];
        let mut doubled = vec![false; c];
        let mut beta_q = vec![0i64; c];
        for i in 0..c {
            let e = 2 * f - t + self.gamma_shifts[i];
            doubled[i] = e % 2 != 0;
            exps[i] = if doubled[i] { e + 1 } else { e };
            beta_q[i] = scaled(self.beta[i] as f64, e).round().min((1u64 << 62) as f64) as i64;
        }
        // Per channel i, the output exponent: f + E_i/2 + SQRT_EXTRA_BITS.
        let out_exp: Vec<i32> = exps.iter().map(|e| f + e / 2 + SQRT_EXTRA_BITS as i32).collect();
        let (beta_q, doubled) = (&beta_q, &doubled);
        let products: Vec<i64> = x
            .par_chunks(c)
            .flat_map_iter(|a| {
                let sq: Vec<i64> = a.iter().map(|&v| round_shift(v as i64 * v as i64, t)).collect();
                (0..c).map(move |i| {
                    let row = &self.gamma[i * c..(i + 1) * c];
                    let mut s: i64 = 0;
                    for (g, q) in row.iter().zip(&sq) {
                        s += *g as i64 * q;
                    }
                    let s = s.saturating_add(beta_q[i]);
                    let s = if doubled[i] { s.saturating_mul(2) } else { s }.max(0) as u128;
                    // s < 2⁶³, so r < 2^(31.5 + SQRT_EXTRA_BITS) and a·r fits i64.
                    let r = (s << (2 * SQRT_EXTRA_BITS)).isqrt() as i64;
                    a[i] as i64 * r
                })
            })
            .collect();
        requantize(&products, c, &out_exp)
    }
}

/// Requantizes `[n][c]` values, channel `i` at exponent `exps[i]`, to `i16` with one shared
/// exponent (the largest at which every value fits); returns the values and that exponent.
fn requantize(v: &[i64], c: usize, exps: &[i32]) -> (Vec<i16>, i32) {
    let f = channel_maxima(v, c)
        .iter()
        .zip(exps)
        .map(|(&m, &e)| e + headroom(m, ACT_MAX as u64))
        .min()
        .unwrap_or(0)
        .min(EXP_CAP);
    let out = v.par_chunks(c).flat_map_iter(|px| px.iter().zip(exps).map(move |(&p, &e)| to_act(round_shift(p, e - f)))).collect();
    (out, f)
}

fn channel_maxima(v: &[i64], c: usize) -> Vec<u64> {
    v.chunks(c).fold(vec![0u64; c], |mut m, px| {
        for (m, p) in m.iter_mut().zip(px) {
            *m = (*m).max(p.unsigned_abs());
        }
        m
    })
}

/// `g_s` in integer arithmetic (see the module docs).
#[derive(Debug, Clone)]
pub struct IntSynthesis {
    convs: Vec<IntConv>,
    igdns: Vec<IntIgdn>,
}

/// The float parameters of one synthesis stage: conv weight `[cout][cin][k][k]`, bias, and
/// the effective inverse-GDN `(β, γ)` after every stage but the last.
pub struct StageParameters {
    /// Convolution weight, `[4·C_out][C_in][k][k]` row-major.
    pub weight: Vec<f32>,
    /// Convolution bias, `[4·C_out]`.
    pub bias: Vec<f32>,
    /// `(C_in, 4·C_out, k)`.
    pub shape: (usize, usize, usize),
    /// Effective `β` `[C_out]` and `γ` `[C_out][C_out]` of the inverse GDN after the layer.
    pub igdn: Option<(Vec<f32>, Vec<f32>)>,
}

impl IntSynthesis {
    /// Quantizes the stages of a float synthesis (deterministic: see the module docs).
    pub fn new(stages: &[StageParameters]) -> Self {
        let mut convs = Vec::new();
        let mut igdns = Vec::new();
        for s in stages {
            let (cin, cout, k) = s.shape;
            convs.push(IntConv::new(&s.weight, &s.bias, cout, cin, k));
            if let Some((beta, gamma)) = &s.igdn {
                igdns.push(IntIgdn::new(beta, gamma, cout / 4));
            }
        }
        IntSynthesis { convs, igdns }
    }

    /// Decodes latent `y` (`[m][hy][wy]`, already multiplied by the inverse gains) to 8-bit RGB,
    /// cropped to `tw × th`, interleaved.
    pub fn decode_rgb8(&self, y: &[f32], m: usize, hy: usize, wy: usize, tw: usize, th: usize, path: IntPath) -> Vec<u8> {
        // Input: one exponent from the exact largest magnitude (a power-of-two product of a
        // float is exact, so is the rounding).
        let max = y.iter().fold(0f32, |a, &v| a.max(v.abs())) as f64;
        let mut f = -EXP_CAP;
        while f < EXP_CAP && scaled(max, f + 1) <= ACT_MAX as f64 {
            f += 1;
        }
        let plane = hy * wy;
        let mut x = vec![0i16; plane * m];
        for ch in 0..m {
            for p in 0..plane {
                x[p * m + ch] = to_act(scaled(y[ch * plane + p] as f64, f).round() as i64);
            }
        }
        let (mut h, mut w) = (hy, wy);
        let last = self.convs.len() - 1;
        for (i, conv) in self.convs.iter().enumerate() {
            let sums = conv.sums(&x, h, w, f, path);
            let exps: Vec<i32> = conv.shifts.iter().map(|s| f + s).collect();
            if i == last {
                return to_rgb8(&sums, &exps, h, w, tw, th);
            }
            let (q, f_out) = requantize(&sums.iter().map(|&v| v as i64).collect::<Vec<_>>(), conv.cout, &exps);
            let c = conv.cout / 4;
            let mut up = vec![0i16; 4 * h * w * c];
            let w2 = 2 * w;
            for yy in 0..h {
                for xx in 0..w {
                    let src = &q[(yy * w + xx) * conv.cout..][..conv.cout];
                    for ch in 0..c {
                        for d in 0..4 {
                            let (dy, dx) = (d / 2, d % 2);
                            up[((2 * yy + dy) * w2 + 2 * xx + dx) * c + ch] = src[4 * ch + d];
                        }
                    }
                }
            }
            (h, w) = (2 * h, 2 * w);
            let (a, f_next) = self.igdns[i].forward(&up, f_out);
            x = a;
            f = f_next;
        }
        unreachable!("the last stage returns")
    }
}

/// The last layer's sums (`[h·w][12]`, channel `4c + 2dy + dx` at exponent `exps[·]`) as 8-bit
/// RGB after depth-to-space, cropped to `tw × th`.
fn to_rgb8(sums: &[i32], exps: &[i32], h: usize, w: usize, tw: usize, th: usize) -> Vec<u8> {
    let mut out = vec![0u8; tw * th * 3];
    out.par_chunks_mut(tw * 3).enumerate().for_each(|(y, row)| {
        let (yy, dy) = (y / 2, y % 2);
        if yy >= h {
            return;
        }
        for x in 0..tw {
            let (xx, dx) = (x / 2, x % 2);
            if xx >= w {
                continue;
            }
            for ch in 0..3 {
                let k = 4 * ch + 2 * dy + dx;
                let v = round_shift(sums[(yy * w + xx) * 12 + k] as i64 * 255, exps[k]);
                row[x * 3 + ch] = v.clamp(0, 255) as u8;
            }
        }
    });
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn headroom_is_the_largest_fitting_exponent() {
        for m in [1u64, 2, 3, 100, 32_767, 32_768, 65_535, 1 << 40] {
            let t = headroom(m, 32_767);
            let fits = |t: i32| if t >= 0 { (m << t) <= 32_767 } else { (m as f64) * 2f64.powi(t) <= 32_767.0 };
            assert!(fits(t) && !fits(t + 1), "m={m} t={t}");
        }
        assert_eq!(headroom(0, 32_767), EXP_CAP);
    }

    #[test]
    fn round_shift_rounds_half_up() {
        assert_eq!(round_shift(5, 1), 3); // 2.5 → 3
        assert_eq!(round_shift(-5, 1), -2); // −2.5 → −2
        assert_eq!(round_shift(7, 2), 2); // 1.75 → 2
        assert_eq!(round_shift(3, -2), 12);
    }
}
