//! The integer synthesis transform: the decoder's `g_s` in integer arithmetic, so that a
//! container decodes to the same pixels on every CPU, with any SIMD width and any number of
//! threads.
//!
//! # Arithmetic
//!
//! Activations are `i16` in channel-last layout, every element of a layer sharing one binary
//! exponent `f` (value = `a · 2^−f`), chosen per tile and layer from exact maxima: the largest
//! exponent at which the layer's values fit the limit of the layer that reads them. So the scale
//! follows the data, and is the same everywhere.
//!
//! - **Convolutions** (sub-pixel layers, stride 1, zero padding): each output channel `c`'s
//!   weights are quantized to magnitudes of at most 2047 (11 bits) with a power-of-two scale
//!   (`w_q = round(w · 2^s_c)`: a power-of-two product and a rounding, exact in floating
//!   point). A layer's input is limited to `⌊2³⁰ / max_c Σ|w_q[c]|⌋` (about 12–13 bits for the
//!   shipped models) and its exponent so that every bias `round(b · 2^(f + s_c))` is below
//!   2³⁰: then no `i32` sum can overflow, whatever the image. Integer sums are exact in any
//!   order, so vectorized, blocked and threaded evaluations agree bit for bit. (Why 11 bits:
//!   wider weights leave the activations fewer bits under that limit; `docs/integer-decoder.md`.)
//! - **Requantization**: `round_shift(acc, e)` = `(acc + 2^(e−1)) >> e` (round half up,
//!   arithmetic shift) for `e > 0`, a left shift for `e ≤ 0`, clamped to ±32 767 (never
//!   reached when the exponent came from the data's maxima). Depth-to-space is folded into where
//!   each value is written.
//! - **Inverse GDN** `x_i · sqrt(β_i + Σ_j γ_ij x_j²)`: the squares `a_j²` (exact in `i32`)
//!   requantized to 15 bits with one tile-wide shift `t`; `γ` per row to magnitudes at most
//!   `⌊(2³¹ − 1) / (c · 32 767)⌋` (1023 for 64 channels), so that a row's sum fits `i32` and
//!   runs on the convolution kernel; `β_i` rounded at the sum's scale (an exact power-of-two
//!   product in `f64`); where `β_i` would reach 2³⁴ there, the sum's exponent is lowered by an
//!   even number of bits (the sum shifted right: `β` dominates it); the exponent made even by
//!   doubling the sum; the square root exact ([`isqrt_scaled`], with
//!   [`SQRT_EXTRA_BITS`] more bits); the product with `a_i` in `i64`. The output exponent comes
//!   from a bound (each factor at its channel's largest), so one pass suffices.
//! - **Output**: the last layer's sums become 8-bit samples as `clamp(round(acc · 255 · 2^−e))`
//!   in `i64` (round half up).
//!
//! What must hold for exact decoding: the input latent is itself exact (it is: entropy decoding
//! and the fixed-order hyper-synthesis), every per-element step above is a function of integer
//! inputs (or of single IEEE operations on exactly representable values), and sums are
//! integer. Nothing here reads the CPU's features except to choose how fast the same sums are
//! computed.

use rayon::prelude::*;

/// Largest activation magnitude (symmetric, so no `−32 768`).
const ACT_MAX: i64 = 32_767;
/// Largest quantized weight magnitude of the convolutions (11 bits; see the module docs).
const WEIGHT_MAX: f64 = 2047.0;
/// Extra fractional bits of the inverse GDN's square root.
pub const SQRT_EXTRA_BITS: u32 = 8;
/// Bound on any exponent chosen for a layer (an all-zero layer would otherwise have none).
const EXP_CAP: i32 = 40;

/// Which code computes the sums (the results are the same; only the speed differs).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum IntPath {
    /// The widest vector instructions this CPU has (AVX-512BW, AVX2), chosen at run time.
    Native,
    /// AVX-512BW without VNNI at most (`KILN_SIMD=avx512`: to measure and test those kernels on
    /// a machine that has VNNI).
    Avx512,
    /// AVX2 at most, even where AVX-512 is present (`KILN_SIMD=avx2`: to measure and test the
    /// AVX2 kernels on an AVX-512 machine).
    Avx2,
    /// Code compiled for the baseline target only (`KILN_SIMD=off`).
    Portable,
}

impl IntPath {
    /// From the environment variable `KILN_SIMD`: `off` → `Portable`, `avx2` → `Avx2`,
    /// `avx512` → `Avx512`, anything else or unset → `Native`.
    pub fn from_env() -> Self {
        match std::env::var("KILN_SIMD").as_deref() {
            Ok("off") => IntPath::Portable,
            Ok("avx512") => IntPath::Avx512,
            Ok("avx2") => IntPath::Avx2,
            _ => IntPath::Native,
        }
    }

    /// The instruction set the sums run on with this choice on this CPU.
    fn level(self) -> Isa {
        match (self, isa()) {
            (IntPath::Portable, _) | (_, Isa::Baseline) => Isa::Baseline,
            (IntPath::Avx2, _) | (_, Isa::Avx2) => Isa::Avx2,
            (IntPath::Avx512, _) => Isa::Avx512,
            (IntPath::Native, isa) => isa,
        }
    }

    /// The instruction set the sums run on with this choice on this CPU, in words.
    pub fn describe(self) -> &'static str {
        match self.level() {
            Isa::Baseline => "portable",
            Isa::Avx2 => "AVX2",
            Isa::Avx512 => "AVX-512BW",
            Isa::Avx512Vnni => "AVX-512 VNNI",
        }
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Isa {
    Baseline,
    Avx2,
    Avx512,
    /// AVX-512 with VNNI (`vpdpwssd`): the convolutions use it; the rest is [`Isa::Avx512`]'s.
    Avx512Vnni,
}

fn isa() -> Isa {
    #[cfg(target_arch = "x86_64")]
    {
        if std::arch::is_x86_feature_detected!("avx512bw")
            && std::arch::is_x86_feature_detected!("avx512f")
            && std::arch::is_x86_feature_detected!("avx512dq")
        {
            if std::arch::is_x86_feature_detected!("avx512vnni") {
                return Isa::Avx512Vnni;
            }
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

/// `x · 2^e`, exactly (2^e is built from its bits; `|e|` stays far inside the normal range
/// here, so the product is a power-of-two scaling of `x`, exact unless it overflows).
fn scaled(x: f64, e: i32) -> f64 {
    debug_assert!((-1000..1000).contains(&e));
    x * f64::from_bits(((e + 1023) as u64) << 52)
}

/// Output channels per packed weight block: one 512-bit vector of `i16` pairs.
const CO_BLOCK: usize = 16;

/// An activation plane, channel-last, with a zero border: `[h + 2·pad][w + 2·pad][c]`.
#[derive(Debug, Clone)]
struct Plane {
    data: Vec<i16>,
    h: usize,
    w: usize,
    c: usize,
    pad: usize,
}

impl Plane {
    fn zeroed(h: usize, w: usize, c: usize, pad: usize) -> Self {
        Plane { data: vec![0; (h + 2 * pad) * (w + 2 * pad) * c], h, w, c, pad }
    }

    /// Index of channel 0 at `(y, x)` (unpadded coordinates).
    fn at(&self, y: usize, x: usize) -> usize {
        ((y + self.pad) * (self.w + 2 * self.pad) + x + self.pad) * self.c
    }

    fn row_stride(&self) -> usize {
        (self.w + 2 * self.pad) * self.c
    }
}

/// A quantized stride-1 convolution (odd square kernel, zero padding `k / 2`).
#[derive(Debug, Clone)]
struct IntConv {
    /// Input channels as stored in a [`Plane`]: rounded up to even (the extra one is zero).
    cin: usize,
    cout: usize,
    k: usize,
    /// Weights packed for pairwise multiply-adds: `[cout / 16][k·k·cin / 2][16][2]` (`cout`
    /// rounded up to 16 with zero rows): for each block of 16 output channels and each pair of
    /// elements `(2p, 2p+1)` of the patch `[ky][kx][cin]`, the two weights of each channel.
    packed: Vec<i16>,
    /// Per output channel: the weights' exponent `s_c`.
    shifts: Vec<i32>,
    bias: Vec<f32>,
    /// Largest input magnitude for which no sum can overflow: `⌊2³⁰ / max_c Σ_t |w_q[c][t]|⌋`
    /// (at most 32 767); with the bias below 2³⁰ every sum stays inside `i32`.
    input_limit: u64,
    /// Largest input exponent `f` at which every bias `|b_c| · 2^(f + s_c)` is below 2³⁰.
    bias_cap: i32,
}

impl IntConv {
    /// From float weights `[cout][cin][k][k]` and bias `[cout]`, each output channel's weights
    /// to magnitudes of at most `limit` ([`WEIGHT_MAX`] for the convolutions).
    fn new(w: &[f32], bias: &[f32], cout: usize, cin: usize, k: usize, limit: f64) -> Self {
        let per = cin * k * k;
        let cin_p = cin.next_multiple_of(2);
        let pairs = k * k * cin_p / 2;
        let blocks = cout.div_ceil(CO_BLOCK);
        let mut packed = vec![0i16; blocks * pairs * 2 * CO_BLOCK];
        let mut shifts = vec![0i32; cout];
        for co in 0..cout {
            let row = &w[co * per..(co + 1) * per];
            let m = row.iter().fold(0f32, |a, &v| a.max(v.abs())) as f64;
            let s = if m == 0.0 { 0 } else { (0..).map(|i| 40 - i).find(|&s| scaled(m, s) <= limit).unwrap_or(-40) };
            shifts[co] = s;
            let (b, lane) = (co / CO_BLOCK, co % CO_BLOCK);
            for ci in 0..cin {
                for ky in 0..k {
                    for kx in 0..k {
                        let q = scaled(row[(ci * k + ky) * k + kx] as f64, s).round() as i16;
                        let t = (ky * k + kx) * cin_p + ci; // position in the patch
                        packed[(b * pairs + t / 2) * 2 * CO_BLOCK + 2 * lane + t % 2] = q;
                    }
                }
            }
        }
        let l1 = (0..blocks * CO_BLOCK)
            .map(|co| {
                let (b, lane) = (co / CO_BLOCK, co % CO_BLOCK);
                (0..pairs * 2)
                    .map(|t| packed[(b * pairs + t / 2) * 2 * CO_BLOCK + 2 * lane + t % 2].unsigned_abs() as u64)
                    .sum::<u64>()
            })
            .max()
            .unwrap_or(0);
        let input_limit = ((1u64 << 30) / l1.max(1)).min(ACT_MAX as u64);
        let bias_cap = (0..cout)
            .map(|c| {
                let b = (bias[c] as f64).abs();
                let mut f = EXP_CAP;
                while f > -EXP_CAP && scaled(b, f + shifts[c]) >= (1u64 << 30) as f64 {
                    f -= 1;
                }
                f
            })
            .min()
            .unwrap_or(EXP_CAP);
        IntConv { cin: cin_p, cout, k, packed, shifts, bias: bias.to_vec(), input_limit, bias_cap }
    }

    /// The exponent an input to this layer takes: the largest at which channel maxima `maxima`
    /// (each at exponent `exps[i]`) fit [`IntConv::input_limit`], and at most
    /// [`IntConv::bias_cap`]: no sum of the layer can then overflow.
    fn input_exponent(&self, maxima: &[u64], exps: &[i32]) -> i32 {
        maxima
            .iter()
            .zip(exps)
            .map(|(&m, &e)| e + headroom(m, self.input_limit))
            .min()
            .unwrap_or(EXP_CAP)
            .min(self.bias_cap)
            .min(EXP_CAP)
    }

    /// Sums of this layer over plane `x` (exponent `f`, border `k / 2`): `[h·w][cout]`,
    /// channel `c` at exponent `f + s_c`, and each channel's largest magnitude.
    fn sums(&self, x: &Plane, f: i32, path: IntPath) -> (Vec<i32>, Vec<u64>) {
        assert_eq!((x.c, x.pad), (self.cin, self.k / 2), "plane layout of the convolution's input");
        let bias = self.bias_at(f);
        let (h, w) = (x.h, x.w);
        let mut out = vec![0i32; h * w * self.cout];
        let maxima = out
            .par_chunks_mut(w * self.cout)
            .enumerate()
            .map_init(Vec::new, |acc, (y, row)| {
                let mut m = vec![0u64; self.cout];
                if bias.len() == self.cout {
                    // Whole blocks: the kernel writes the row in place.
                    self.row(x, y, &bias, row, path);
                } else {
                    acc.resize(w * bias.len(), 0);
                    self.row(x, y, &bias, acc, path);
                    for (o, a) in row.chunks_mut(self.cout).zip(acc.chunks(bias.len())) {
                        o.copy_from_slice(&a[..self.cout]);
                    }
                }
                for px in row.chunks(self.cout) {
                    for (m, v) in m.iter_mut().zip(px) {
                        *m = (*m).max(v.unsigned_abs() as u64);
                    }
                }
                m
            })
            .reduce(|| vec![0u64; self.cout], |a, b| a.iter().zip(&b).map(|(x, y)| *x.max(y)).collect());
        (out, maxima)
    }

    /// The bias of each output channel at exponent `f + s_c` (rows padded to a whole block).
    fn bias_at(&self, f: i32) -> Vec<i32> {
        let mut bias = vec![0i32; self.cout.div_ceil(CO_BLOCK) * CO_BLOCK];
        for ((q, &b), &s) in bias.iter_mut().zip(&self.bias).zip(&self.shifts) {
            *q = scaled(b as f64, f + s).round().clamp(i32::MIN as f64, i32::MAX as f64) as i32;
        }
        bias
    }

    /// `acc[x][c]` (`c` over whole blocks) of output row `y`.
    fn row(&self, p: &Plane, y: usize, bias: &[i32], acc: &mut [i32], path: IntPath) {
        let g = RowGeometry {
            src: p.at(y, 0) - p.pad * p.row_stride() - p.pad * p.c,
            stride: p.row_stride(),
            w: p.w,
            k: self.k,
            c: p.c,
        };
        match path.level() {
            #[cfg(target_arch = "x86_64")]
            // SAFETY: the CPU has AVX-512F, BW, DQ and VNNI (checked by `isa`).
            Isa::Avx512Vnni => unsafe { x86::row_avx512_vnni(&self.packed, &p.data, &g, bias, acc) },
            #[cfg(target_arch = "x86_64")]
            // SAFETY: the CPU has AVX-512F, BW and DQ (checked by `isa`).
            Isa::Avx512 => unsafe { x86::row_avx512(&self.packed, &p.data, &g, bias, acc) },
            #[cfg(target_arch = "x86_64")]
            // SAFETY: the CPU has AVX2 (checked by `isa`).
            Isa::Avx2 => unsafe { x86::row_avx2(&self.packed, &p.data, &g, bias, acc) },
            _ => row_portable(&self.packed, &p.data, &g, bias, acc),
        }
    }
}

/// Where the patches of one output row lie in a padded plane: output `x`'s tap row `ky` is the
/// `k·c` contiguous values from `src + ky·stride + x·c` (the `k` taps of that row, each `c`).
struct RowGeometry {
    src: usize,
    stride: usize,
    w: usize,
    k: usize,
    c: usize,
}

/// `acc[x][o] = bias[o] + Σ_{ky, t} src[ky][x·c + t] · weight[o][ky][t]` with wrapping `i32`
/// sums: the reference for the vector kernels, which compute the same sums (so the same bits).
fn row_portable(packed: &[i16], src: &[i16], g: &RowGeometry, bias: &[i32], acc: &mut [i32]) {
    let wide = bias.len();
    let seg = g.k * g.c / 2; // pairs per tap row
    let pairs = g.k * seg;
    for (x, out) in acc.chunks_mut(wide).enumerate().take(g.w) {
        out.copy_from_slice(bias);
        for (b, out) in out.chunks_exact_mut(CO_BLOCK).enumerate() {
            // Fixed-size arrays, so that the compiler keeps the block in vector registers
            // (SSE2, NEON) on targets without a hand-written kernel.
            let out: &mut [i32; CO_BLOCK] = out.try_into().expect("a block");
            let mut sums = *out;
            for ky in 0..g.k {
                let row = &src[g.src + ky * g.stride + x * g.c..][..2 * seg];
                let weights = &packed[(b * pairs + ky * seg) * 2 * CO_BLOCK..][..seg * 2 * CO_BLOCK];
                for (pair, wp) in row.chunks_exact(2).zip(weights.chunks_exact(2 * CO_BLOCK)) {
                    let wp: &[i16; 2 * CO_BLOCK] = wp.try_into().expect("a pair block");
                    let (a0, a1) = (pair[0] as i32, pair[1] as i32);
                    for (lane, o) in sums.iter_mut().enumerate() {
                        let v = a0 * wp[2 * lane] as i32 + a1 * wp[2 * lane + 1] as i32;
                        *o = o.wrapping_add(v);
                    }
                }
            }
            *out = sums;
        }
    }
}

#[cfg(target_arch = "x86_64")]
mod x86 {
    //! The same sums with `vpmaddwd`: each 32-bit lane multiplies a pair of activations by a
    //! pair of weights and adds the two products (exact in `i32`: the factors are at most
    //! 2¹⁵ − 1 and 2¹¹ − 1), then `vpaddd` accumulates, as the portable code does (the layer's
    //! input limit keeps every sum inside `i32`).
    use std::arch::x86_64::*;

    use super::{CO_BLOCK, RowGeometry};

    /// # Safety
    /// The CPU must have AVX-512F and AVX-512BW; `src`, `packed`, `bias` and `acc` must hold
    /// the row `g` describes (as the portable code indexes them).
    #[target_feature(enable = "avx512f,avx512bw")]
    pub unsafe fn row_avx512(packed: &[i16], src: &[i16], g: &RowGeometry, bias: &[i32], acc: &mut [i32]) {
        // SAFETY: the caller's contract.
        unsafe { row512::<false>(packed, src, g, bias, acc) }
    }

    /// [`row_avx512`] with `vpdpwssd`, which multiplies, adds the pair and accumulates (with
    /// the same wrapping) in one instruction.
    ///
    /// # Safety
    /// As [`row_avx512`], and the CPU must have AVX-512 VNNI.
    #[target_feature(enable = "avx512f,avx512bw,avx512vnni")]
    pub unsafe fn row_avx512_vnni(packed: &[i16], src: &[i16], g: &RowGeometry, bias: &[i32], acc: &mut [i32]) {
        // SAFETY: the caller's contract.
        unsafe { row512::<true>(packed, src, g, bias, acc) }
    }

    /// Register blocks (positions × 16-channel blocks; 16 accumulators), as measured by the
    /// `kernel_throughput` test (`docs/integer-decoder.md`).
    #[inline(always)]
    unsafe fn row512<const VNNI: bool>(packed: &[i16], src: &[i16], g: &RowGeometry, bias: &[i32], acc: &mut [i32]) {
        // SAFETY: the caller's contract.
        unsafe {
            if VNNI {
                rows_blocked::<4, 4, VNNI>(packed, src, g, bias, acc)
            } else {
                rows_blocked::<8, 2, VNNI>(packed, src, g, bias, acc)
            }
        }
    }

    #[inline(always)]
    unsafe fn rows_blocked<const P: usize, const B: usize, const VNNI: bool>(
        packed: &[i16],
        src: &[i16],
        g: &RowGeometry,
        bias: &[i32],
        acc: &mut [i32],
    ) {
        let blocks = bias.len() / CO_BLOCK;
        // Blocks of output channels outermost, then one tap row at a time over the whole row
        // of positions: that tap row's weights for the blocks (k·c/2 pairs × B × 64 bytes, 24 KB
        // for 64 input channels and 3×3) stay in L1 while every position uses them. Partial
        // sums go through `acc` between tap rows (integer sums: any order gives the same).
        let mut b = 0;
        while b < blocks {
            let nb = (blocks - b).min(B);
            for ky in 0..g.k {
                let mut x = 0;
                while x < g.w {
                    let np = (g.w - x).min(P);
                    // SAFETY: the caller's contract covers positions x..x+np and blocks b..b+nb.
                    unsafe {
                        if (np, nb) == (P, B) {
                            block512::<P, B, VNNI>(packed, src, g, bias, acc, x, b, ky);
                        } else {
                            for j in 0..np {
                                for i in 0..nb {
                                    block512::<1, 1, VNNI>(packed, src, g, bias, acc, x + j, b + i, ky);
                                }
                            }
                        }
                    }
                    x += np;
                }
            }
            b += nb;
        }
    }

    /// Tap row `ky`'s part of the sums of `NP` positions from `x` and `NB` blocks from `b`,
    /// every accumulator in a register (the bounds are constants, so the loops unroll):
    /// starting from the bias for the first tap row, from `acc` for the others.
    ///
    /// # Safety
    /// As [`row_avx512`], for positions `x..x+NP` and blocks `b..b+NB`.
    #[inline(always)]
    #[allow(clippy::too_many_arguments)]
    unsafe fn block512<const NP: usize, const NB: usize, const VNNI: bool>(
        packed: &[i16],
        src: &[i16],
        g: &RowGeometry,
        bias: &[i32],
        acc: &mut [i32],
        x: usize,
        b: usize,
        ky: usize,
    ) {
        let wide = bias.len();
        let seg = g.k * g.c / 2;
        let pairs = g.k * seg;
        // SAFETY: inside the rows and blocks the caller names.
        unsafe {
            let mut s = [[_mm512_setzero_si512(); NB]; NP];
            for (j, row) in s.iter_mut().enumerate() {
                for (i, v) in row.iter_mut().enumerate() {
                    *v = if ky == 0 {
                        _mm512_loadu_si512(bias.as_ptr().add((b + i) * CO_BLOCK) as *const _)
                    } else {
                        _mm512_loadu_si512(acc.as_ptr().add((x + j) * wide + (b + i) * CO_BLOCK) as *const _)
                    };
                }
            }
            let base = src.as_ptr().add(g.src + ky * g.stride + x * g.c);
            let wbase = packed.as_ptr().add((b * pairs + ky * seg) * 2 * CO_BLOCK);
            for p in 0..seg {
                let mut wv = [_mm512_setzero_si512(); NB];
                for (i, v) in wv.iter_mut().enumerate() {
                    *v = _mm512_loadu_si512(wbase.add((i * pairs + p) * 2 * CO_BLOCK) as *const _);
                }
                for (j, row) in s.iter_mut().enumerate() {
                    let a = _mm512_set1_epi32((base.add(j * g.c + 2 * p) as *const i32).read_unaligned());
                    for (v, w) in row.iter_mut().zip(&wv) {
                        *v = if VNNI {
                            _mm512_dpwssd_epi32(*v, a, *w)
                        } else {
                            _mm512_add_epi32(*v, _mm512_madd_epi16(a, *w))
                        };
                    }
                }
            }
            for (j, row) in s.iter().enumerate() {
                for (i, v) in row.iter().enumerate() {
                    _mm512_storeu_si512(acc.as_mut_ptr().add((x + j) * wide + (b + i) * CO_BLOCK) as *mut _, *v);
                }
            }
        }
    }

    /// # Safety
    /// As [`row_avx512`], with AVX2.
    #[target_feature(enable = "avx2")]
    pub unsafe fn row_avx2(packed: &[i16], src: &[i16], g: &RowGeometry, bias: &[i32], acc: &mut [i32]) {
        let blocks = bias.len() / CO_BLOCK;
        const P: usize = AVX2_POSITIONS;
        let mut x = 0;
        while x < g.w {
            let np = (g.w - x).min(P);
            for b in 0..blocks {
                // SAFETY: the caller's contract covers positions x..x+np and block b.
                unsafe {
                    if np == P {
                        block256::<P>(packed, src, g, bias, acc, x, b);
                    } else {
                        for j in 0..np {
                            block256::<1>(packed, src, g, bias, acc, x + j, b);
                        }
                    }
                }
            }
            x += np;
        }
    }

    /// Positions per AVX2 register block of one 16-channel block (two 8-lane halves each).
    const AVX2_POSITIONS: usize = 4;

    /// Sums of `NP` positions from `x` for block `b`, as two 8-lane halves each.
    ///
    /// # Safety
    /// As [`row_avx2`], for positions `x..x+NP` and block `b`.
    #[inline(always)]
    unsafe fn block256<const NP: usize>(
        packed: &[i16],
        src: &[i16],
        g: &RowGeometry,
        bias: &[i32],
        acc: &mut [i32],
        x: usize,
        b: usize,
    ) {
        let wide = bias.len();
        let seg = g.k * g.c / 2;
        let pairs = g.k * seg;
        // SAFETY: inside the rows and the block the caller names.
        unsafe {
            let mut s = [[_mm256_setzero_si256(); 2]; NP];
            for row in s.iter_mut() {
                for (h, v) in row.iter_mut().enumerate() {
                    *v = _mm256_loadu_si256(bias.as_ptr().add(b * CO_BLOCK + 8 * h) as *const _);
                }
            }
            for ky in 0..g.k {
                let base = src.as_ptr().add(g.src + ky * g.stride + x * g.c);
                let wbase = packed.as_ptr().add((b * pairs + ky * seg) * 2 * CO_BLOCK);
                for p in 0..seg {
                    let w0 = _mm256_loadu_si256(wbase.add(p * 2 * CO_BLOCK) as *const _);
                    let w1 = _mm256_loadu_si256(wbase.add(p * 2 * CO_BLOCK + 16) as *const _);
                    for (j, row) in s.iter_mut().enumerate() {
                        let a = _mm256_set1_epi32((base.add(j * g.c + 2 * p) as *const i32).read_unaligned());
                        row[0] = _mm256_add_epi32(row[0], _mm256_madd_epi16(a, w0));
                        row[1] = _mm256_add_epi32(row[1], _mm256_madd_epi16(a, w1));
                    }
                }
            }
            for (j, row) in s.iter().enumerate() {
                for (h, v) in row.iter().enumerate() {
                    _mm256_storeu_si256(acc.as_mut_ptr().add((x + j) * wide + b * CO_BLOCK + 8 * h) as *mut _, *v);
                }
            }
        }
    }
}

/// Largest channel count of an inverse GDN (its `γ` keeps at least 8 bits per row).
const IGDN_MAX_CHANNELS: usize = 256;

/// A quantized inverse GDN over `c` channels.
#[derive(Debug, Clone)]
struct IntIgdn {
    c: usize,
    beta: Vec<f32>,
    /// `γ` as a 1×1 convolution (no bias): row `i` at exponent `g_i`, magnitudes at most
    /// `⌊(2³¹ − 1) / (c · 32 767)⌋` (1023 for 64 channels), so that a whole row's sum over
    /// 15-bit squares fits `i32` and runs on the convolution's multiply-add kernel.
    gamma: IntConv,
}

impl IntIgdn {
    /// From the effective `β` `[c]` and `γ` `[c][c]` (both non-negative).
    fn new(beta: &[f32], gamma: &[f32], c: usize) -> Self {
        assert!(c <= IGDN_MAX_CHANNELS, "inverse GDN over {c} channels (at most {IGDN_MAX_CHANNELS})");
        let limit = (i32::MAX as u64 / (c as u64 * ACT_MAX as u64)) as f64;
        IntIgdn { c, beta: beta.to_vec(), gamma: IntConv::new(gamma, &vec![0.0; c], c, c, 1, limit) }
    }

    /// Applies the layer to plane `x` (border 0, exponent `f`); returns the outputs as the input
    /// plane of convolution `next` (its border, its input exponent: see
    /// [`IntConv::input_exponent`]), and their exponent.
    ///
    /// The output exponent is chosen before any output is computed, from a bound: channel
    /// `i`'s products are at most `max|a_i| · isqrt_scaled(β_i + Σ_j γ_ij · max q_j)` (each
    /// factor at its largest), so one pass suffices; the bound is loose by the factor between
    /// that combination of per-channel maxima and the largest actual product.
    fn forward(&self, x: &Plane, f: i32, next: &IntConv, path: IntPath) -> (Plane, i32) {
        let c = self.c;
        assert_eq!((x.c, x.pad), (self.gamma.cin, 0), "plane layout of the inverse GDN's input");
        let cp = x.c;
        let max_per_channel = x.data.chunks(cp).fold(vec![0u64; cp], |mut m, px| {
            for (m, v) in m.iter_mut().zip(px) {
                *m = (*m).max(v.unsigned_abs() as u64);
            }
            m
        });
        let max_a = max_per_channel.iter().copied().max().unwrap_or(0);
        // Squares to 15 bits with one shift t ≥ 0: exponent 2f − t.
        let t = (-headroom(max_a * max_a, ACT_MAX as u64)).max(0);
        // Per row i, the sum Σ_j γ_ij q_j (below 2³¹) is at exponent E_i = 2f − t + g_i. Where
        // β_i there is 2^BETA_BITS or more, sum and β are taken at E_i − n_i instead (n_i the
        // smallest even number that brings β below it): β then dominates the sum, whose low
        // n_i bits go. The exponent is made even by doubling.
        let mut rows = RowTerms {
            beta_q: Vec::with_capacity(c),
            sum_shift: Vec::with_capacity(c),
            doubling: Vec::with_capacity(c),
        };
        let mut out_exp = Vec::with_capacity(c);
        for i in 0..c {
            let e = 2 * f - t + self.gamma.shifts[i];
            let mut n = 0;
            while scaled(self.beta[i] as f64, e - n).round() >= (1u64 << BETA_BITS) as f64 {
                n += 2;
            }
            let e = e - n;
            let doubled = e % 2 != 0;
            let e_even = if doubled { e + 1 } else { e };
            rows.beta_q.push(scaled(self.beta[i] as f64, e).round() as i64);
            rows.sum_shift.push(n as u64);
            rows.doubling.push(doubled as u32);
            out_exp.push(f + e_even / 2 + SQRT_EXTRA_BITS as i32);
        }
        // The bound on each channel's products, then the exponent they all fit at.
        let max_q: Vec<i16> = max_per_channel.iter().map(|&m| round_shift((m * m) as i64, t) as i16).collect();
        let mut bound_sums = vec![0i32; c.div_ceil(CO_BLOCK) * CO_BLOCK];
        let q_plane = Plane { data: max_q, h: 1, w: 1, c: cp, pad: 0 };
        self.gamma.row(&q_plane, 0, &vec![0i32; bound_sums.len()], &mut bound_sums, IntPath::Portable);
        let bounds: Vec<u64> = (0..c)
            .map(|i| {
                let shifted = (bound_sums[i] as i64).checked_shr(rows.sum_shift[i] as u32).unwrap_or(0);
                let s = (shifted + rows.beta_q[i]) << rows.doubling[i];
                let s = s as u64;
                max_per_channel[i] * isqrt_scaled(s)
            })
            .collect();
        let f_out = next.input_exponent(&bounds, &out_exp);
        let shifts: Vec<i32> = out_exp.iter().map(|e| e - f_out).collect();
        let rq = Requant::new(&shifts);
        let mut next = Plane::zeroed(x.h, x.w, next.cin, next.k / 2);
        let (stride, start) = (next.row_stride(), next.at(0, 0));
        let wide = bound_sums.len();
        next.data[start..].par_chunks_mut(stride).take(x.h).enumerate().for_each_init(
            || (Plane::zeroed(1, x.w, cp, 0), vec![0i32; x.w * wide], vec![0i32; wide]),
            |(sq, sums, zero), (y, dst)| {
                let src = &x.data[y * x.w * cp..(y + 1) * x.w * cp];
                squares(src, t, &mut sq.data);
                self.gamma.row(sq, 0, zero, sums, path);
                let args = RowArgs { sums, wide, rows: &rows, act: src, cp, rq: &rq, out: dst };
                match path.level() {
                    #[cfg(target_arch = "x86_64")]
                    // SAFETY: the CPU has AVX-512F, BW and DQ (checked by `isa`).
                    Isa::Avx512 | Isa::Avx512Vnni => unsafe { x86_igdn::row_avx512(args) },
                    #[cfg(target_arch = "x86_64")]
                    // SAFETY: the CPU has AVX2 (checked by `isa`).
                    Isa::Avx2 => unsafe { x86_igdn::row_avx2(args) },
                    _ => igdn_row(args),
                }
            },
        );
        (next, f_out)
    }
}

/// `q = round_shift(a², t)` for every activation (at most 32 767 by the choice of `t`; `t` can
/// exceed 31 where `β` dominates, so the general case is computed in `i64`).
fn squares(a: &[i16], t: i32, q: &mut [i16]) {
    if t == 0 {
        for (q, &v) in q.iter_mut().zip(a) {
            *q = (v as i32 * v as i32) as i16;
        }
    } else if t < 31 {
        let half = 1i32 << (t - 1);
        for (q, &v) in q.iter_mut().zip(a) {
            *q = ((v as i32 * v as i32 + half) >> t) as i16;
        }
    } else {
        for (q, &v) in q.iter_mut().zip(a) {
            *q = round_shift(v as i64 * v as i64, t) as i16;
        }
    }
}

/// Per output channel of an inverse GDN: `β_i` at its sum's exponent, the right shift of the
/// `γ` sum to that exponent, and 1 where the sum is doubled to make the exponent even.
struct RowTerms {
    beta_q: Vec<i64>,
    sum_shift: Vec<u64>,
    doubling: Vec<u32>,
}

/// Per output channel: the requantization `round_shift(p, e)` to the output exponent as a
/// right shift with rounding and a left shift (one of them zero): `((p + half) >> right) << left`.
struct Requant {
    half: Vec<i64>,
    right: Vec<u64>,
    left: Vec<u64>,
}

impl Requant {
    fn new(shifts: &[i32]) -> Self {
        let right: Vec<u64> = shifts.iter().map(|&e| e.clamp(0, 62) as u64).collect();
        Requant {
            half: right.iter().map(|&r| if r > 0 { 1i64 << (r - 1) } else { 0 }).collect(),
            left: shifts.iter().map(|&e| (-e).clamp(0, 62) as u64).collect(),
            right,
        }
    }
}

/// One row of an inverse GDN after its `γ` sums.
struct RowArgs<'a> {
    /// `[w][wide]` sums `Σ_j γ_ij q_j`.
    sums: &'a [i32],
    wide: usize,
    rows: &'a RowTerms,
    /// `[w][cp]` input activations.
    act: &'a [i16],
    cp: usize,
    /// Per channel: the requantization to the output exponent.
    rq: &'a Requant,
    /// `[w][cp]` output activations (in a padded plane's row).
    out: &'a mut [i16],
}

/// One output of an inverse GDN: `clamp(((a · isqrt_scaled(s) + half) >> right) << left)` with
/// `s = ((sum >> sum_shift) + β) << doubling` (below 2³⁶: β below 2^BETA_BITS, the γ sum below
/// 2³¹). The left shift wraps like the vector code's; it never overflows, the exponent having
/// come from a bound on the products.
#[inline(always)]
fn igdn_one(sum: i32, rows: &RowTerms, a: i16, rq: &Requant, i: usize) -> i16 {
    // A shift by 64 or more gives 0, as the vector shifts do (the sum is not negative).
    let shifted = (sum as i64).checked_shr(rows.sum_shift[i] as u32).unwrap_or(0);
    let s = ((shifted + rows.beta_q[i]) << rows.doubling[i]) as u64;
    let p = a as i64 * isqrt_scaled(s) as i64;
    (((p + rq.half[i]) >> rq.right[i]).wrapping_shl(rq.left[i] as u32)).clamp(-ACT_MAX, ACT_MAX) as i16
}

/// `out[x][i]` = [`igdn_one`] of every position and channel: the reference for the vector code.
fn igdn_row(mut r: RowArgs) {
    for x in 0..r.act.len() / r.cp {
        igdn_tail(&mut r, x, 0);
    }
}

/// [`igdn_one`] for channels `from..c` of position `x`.
#[inline(always)]
fn igdn_tail(r: &mut RowArgs, x: usize, from: usize) {
    let c = r.rows.beta_q.len();
    let (s, a) = (&r.sums[x * r.wide..][..c], &r.act[x * r.cp..][..c]);
    let o = &mut r.out[x * r.cp..][..c];
    for i in from..c {
        o[i] = igdn_one(s[i], r.rows, a[i], r.rq, i);
    }
}

#[cfg(target_arch = "x86_64")]
mod x86_igdn {
    //! [`super::igdn_one`] on eight (AVX-512) or four (AVX2) channels at once, with the same
    //! integer and IEEE operations, so the same results.
    use std::arch::x86_64::*;

    use super::{ACT_MAX, RowArgs, SQRT_EXTRA_BITS, igdn_tail};

    /// # Safety
    /// The CPU must have AVX-512F and AVX-512DQ; `r` must describe valid rows.
    #[target_feature(enable = "avx512f,avx512bw,avx512dq")]
    pub unsafe fn row_avx512(mut r: RowArgs) {
        let c = r.rows.beta_q.len();
        let w = r.act.len() / r.cp;
        let vec_c = c / 8 * 8;
        // SAFETY: every load and store is inside `sums`, `act`, `out` and the per-channel
        // vectors (channels below `vec_c` of positions below `w`).
        unsafe {
            let one = _mm512_set1_epi64(1);
            let max_r = _mm512_set1_epi64(u32::MAX as i64);
            let (hi, lo) = (_mm512_set1_epi64(ACT_MAX), _mm512_set1_epi64(-ACT_MAX));
            for x in 0..w {
                for i in (0..vec_c).step_by(8) {
                    let sum =
                        _mm512_cvtepi32_epi64(_mm256_loadu_si256(r.sums.as_ptr().add(x * r.wide + i) as *const _));
                    let beta = _mm512_loadu_si512(r.rows.beta_q.as_ptr().add(i) as *const _);
                    let dbl = _mm512_cvtepu32_epi64(_mm256_loadu_si256(r.rows.doubling.as_ptr().add(i) as *const _));
                    let n = _mm512_loadu_si512(r.rows.sum_shift.as_ptr().add(i) as *const _);
                    let s = _mm512_sllv_epi64(_mm512_add_epi64(_mm512_srlv_epi64(sum, n), beta), dbl);
                    let v = _mm512_slli_epi64::<{ 2 * SQRT_EXTRA_BITS }>(s);
                    let mut q = _mm512_cvttpd_epu64(_mm512_sqrt_pd(_mm512_cvtepu64_pd(v)));
                    q = _mm512_min_epu64(q, max_r);
                    let too_big = _mm512_cmpgt_epu64_mask(_mm512_mullo_epi64(q, q), v);
                    q = _mm512_mask_sub_epi64(q, too_big, q, one);
                    let q1 = _mm512_add_epi64(q, one);
                    let fits =
                        _mm512_cmple_epu64_mask(_mm512_mullo_epi64(q1, q1), v) & _mm512_cmplt_epu64_mask(q, max_r);
                    q = _mm512_mask_add_epi64(q, fits, q, one);
                    let a = _mm512_cvtepi16_epi64(_mm_loadu_si128(r.act.as_ptr().add(x * r.cp + i) as *const _));
                    let p = _mm512_mullo_epi64(a, q);
                    let half = _mm512_loadu_si512(r.rq.half.as_ptr().add(i) as *const _);
                    let right = _mm512_loadu_si512(r.rq.right.as_ptr().add(i) as *const _);
                    let left = _mm512_loadu_si512(r.rq.left.as_ptr().add(i) as *const _);
                    let y = _mm512_sllv_epi64(_mm512_srav_epi64(_mm512_add_epi64(p, half), right), left);
                    let y = _mm512_max_epi64(_mm512_min_epi64(y, hi), lo);
                    _mm_storeu_si128(r.out.as_mut_ptr().add(x * r.cp + i) as *mut _, _mm512_cvtepi64_epi16(y));
                }
                igdn_tail(&mut r, x, vec_c);
            }
        }
    }

    /// # Safety
    /// The CPU must have AVX2; `r` must describe valid rows.
    #[target_feature(enable = "avx2")]
    pub unsafe fn row_avx2(mut r: RowArgs) {
        let c = r.rows.beta_q.len();
        let w = r.act.len() / r.cp;
        let vec_c = c / 4 * 4;
        // SAFETY: as in `row_avx512`, four channels at a time.
        unsafe {
            let one = _mm256_set1_epi64x(1);
            let zero = _mm256_setzero_si256();
            // 2⁵²: adding it to a value below 2⁵² puts that value in the mantissa, exactly.
            let magic_bits = _mm256_set1_epi64x(0x4330_0000_0000_0000);
            let magic = _mm256_castsi256_pd(magic_bits);
            let (hi, lo) = (_mm256_set1_epi64x(ACT_MAX), _mm256_set1_epi64x(-ACT_MAX));
            let mut tmp = [0i64; 4];
            for x in 0..w {
                for i in (0..vec_c).step_by(4) {
                    let sum = _mm256_cvtepi32_epi64(_mm_loadu_si128(r.sums.as_ptr().add(x * r.wide + i) as *const _));
                    let beta = _mm256_loadu_si256(r.rows.beta_q.as_ptr().add(i) as *const _);
                    let dbl = _mm256_cvtepu32_epi64(_mm_loadu_si128(r.rows.doubling.as_ptr().add(i) as *const _));
                    let n = _mm256_loadu_si256(r.rows.sum_shift.as_ptr().add(i) as *const _);
                    let s = _mm256_sllv_epi64(_mm256_add_epi64(_mm256_srlv_epi64(sum, n), beta), dbl);
                    let v = _mm256_slli_epi64::<{ 2 * SQRT_EXTRA_BITS as i32 }>(s);
                    // v < 2⁵²: exact as a double through the 2⁵² trick; the root is below 2²⁶,
                    // truncated, then back to an integer the same way.
                    let vf = _mm256_sub_pd(_mm256_castsi256_pd(_mm256_or_si256(v, magic_bits)), magic);
                    let rf = _mm256_round_pd::<{ _MM_FROUND_TO_ZERO | _MM_FROUND_NO_EXC }>(_mm256_sqrt_pd(vf));
                    let mut q = _mm256_xor_si256(_mm256_castpd_si256(_mm256_add_pd(rf, magic)), magic_bits);
                    // Corrections (values below 2⁶³: signed compares are exact).
                    let too_big = _mm256_cmpgt_epi64(_mm256_mul_epu32(q, q), v);
                    q = _mm256_add_epi64(q, too_big); // adds −1 where too big
                    let q1 = _mm256_add_epi64(q, one);
                    let over = _mm256_cmpgt_epi64(_mm256_mul_epu32(q1, q1), v);
                    q = _mm256_add_epi64(q, _mm256_andnot_si256(over, one));
                    let a = _mm256_cvtepi16_epi64(_mm_loadl_epi64(r.act.as_ptr().add(x * r.cp + i) as *const _));
                    let p = _mm256_mul_epi32(a, q);
                    let half = _mm256_loadu_si256(r.rq.half.as_ptr().add(i) as *const _);
                    let right = _mm256_loadu_si256(r.rq.right.as_ptr().add(i) as *const _);
                    let left = _mm256_loadu_si256(r.rq.left.as_ptr().add(i) as *const _);
                    // Arithmetic right shift from a logical one and the sign.
                    let t = _mm256_add_epi64(p, half);
                    let sign = _mm256_cmpgt_epi64(zero, t);
                    let fill = _mm256_sllv_epi64(sign, _mm256_sub_epi64(_mm256_set1_epi64x(64), right));
                    let y = _mm256_sllv_epi64(_mm256_or_si256(_mm256_srlv_epi64(t, right), fill), left);
                    let y = _mm256_blendv_epi8(y, hi, _mm256_cmpgt_epi64(y, hi));
                    let y = _mm256_blendv_epi8(y, lo, _mm256_cmpgt_epi64(lo, y));
                    _mm256_storeu_si256(tmp.as_mut_ptr() as *mut _, y);
                    for (k, v) in tmp.iter().enumerate() {
                        *r.out.get_unchecked_mut(x * r.cp + i + k) = *v as i16;
                    }
                }
                igdn_tail(&mut r, x, vec_c);
            }
        }
    }
}

/// The largest exponent at which every channel fits ±32 767, channel `i` having largest
/// magnitude `maxima[i]` at exponent `exps[i]`.
fn shared_exponent(maxima: &[u64], exps: &[i32]) -> i32 {
    maxima.iter().zip(exps).map(|(&m, &e)| e + headroom(m, ACT_MAX as u64)).min().unwrap_or(EXP_CAP).min(EXP_CAP)
}

/// `β` at its sum's scale stays below `2^BETA_BITS` (the sum's exponent is lowered until it
/// does), so every inverse-GDN sum, doubled, is below 2³⁶ and `sum · 2^(2·SQRT_EXTRA_BITS)`
/// below 2⁵².
const BETA_BITS: u32 = 34;

/// `⌊sqrt(s · 2^(2·SQRT_EXTRA_BITS))⌋` for `s < 2³⁶`, exactly: `v = s · 2^(2·SQRT_EXTRA_BITS)`
/// is below 2⁵², so exact as a double; its correctly rounded square root truncated is the
/// integer square root (for `v < 2⁵²` rounding cannot reach the next integer), and one integer
/// step each way is kept as a guard. No branches, so it vectorizes; the vector code does the
/// same operations.
#[inline(always)]
fn isqrt_scaled(s: u64) -> u64 {
    let v = s << (2 * SQRT_EXTRA_BITS);
    let r = ((v as f64).sqrt() as u64).min(u32::MAX as u64);
    let r = r - (r * r > v) as u64;
    r + ((r < u32::MAX as u64) & ((r + 1) * (r + 1) <= v)) as u64
}

/// `g_s` in integer arithmetic (see the module docs).
#[derive(Debug, Clone)]
pub struct IntSynthesis {
    convs: Vec<IntConv>,
    igdns: Vec<IntIgdn>,
}

/// The float parameters of one synthesis stage.
pub struct StageParameters {
    /// Convolution weight, `[4·C_out][C_in][k][k]` row-major.
    pub weight: Vec<f32>,
    /// Convolution bias, `[4·C_out]`.
    pub bias: Vec<f32>,
    /// `(C_in, 4·C_out, k)`.
    pub shape: (usize, usize, usize),
    /// Effective `β` `[C_out]` and `γ` `[C_out][C_out]` of the inverse GDN after the layer
    /// (every stage but the last).
    pub igdn: Option<(Vec<f32>, Vec<f32>)>,
}

impl IntSynthesis {
    /// Quantizes the stages of a float synthesis (deterministic: see the module docs).
    pub fn new(stages: &[StageParameters]) -> Self {
        let mut convs = Vec::new();
        let mut igdns = Vec::new();
        for s in stages {
            let (cin, cout, k) = s.shape;
            convs.push(IntConv::new(&s.weight, &s.bias, cout, cin, k, WEIGHT_MAX));
            if let Some((beta, gamma)) = &s.igdn {
                igdns.push(IntIgdn::new(beta, gamma, cout / 4));
            }
        }
        IntSynthesis { convs, igdns }
    }

    /// Decodes latent `y` (`[m][hy][wy]`, already multiplied by the inverse gains) to 8-bit RGB,
    /// cropped to `tw × th`, interleaved.
    #[allow(clippy::too_many_arguments)]
    pub fn decode_rgb8(
        &self,
        y: &[f32],
        m: usize,
        hy: usize,
        wy: usize,
        tw: usize,
        th: usize,
        path: IntPath,
    ) -> Vec<u8> {
        // Input: one exponent from the exact largest magnitude (a power-of-two product of a
        // float is exact, so is the rounding).
        let first = &self.convs[0];
        let max = y.iter().fold(0f32, |a, &v| a.max(v.abs())) as f64;
        let mut f = -EXP_CAP;
        while f < first.bias_cap && scaled(max, f + 1) <= first.input_limit as f64 {
            f += 1;
        }
        let mut x = Plane::zeroed(hy, wy, first.cin, first.k / 2);
        let plane = hy * wy;
        let (start, stride, cp) = (x.at(0, 0), x.row_stride(), x.c);
        let scale = scaled(1.0, f);
        x.data[start..].par_chunks_mut(stride).take(hy).enumerate().for_each(|(yy, row)| {
            for xx in 0..wy {
                let p = yy * wy + xx;
                for ch in 0..m {
                    row[xx * cp + ch] = to_act((y[ch * plane + p] as f64 * scale).round() as i64);
                }
            }
        });
        let last = self.convs.len() - 1;
        for (i, conv) in self.convs.iter().enumerate() {
            let (sums, maxima) = conv.sums(&x, f, path);
            let exps: Vec<i32> = conv.shifts.iter().map(|s| f + s).collect();
            if i == last {
                return to_rgb8(&sums, &exps, x.h, x.w, tw, th);
            }
            let f_out = shared_exponent(&maxima, &exps);
            let up = depth_to_space(&sums, &exps, f_out, x.h, x.w, conv.cout / 4, self.igdns[i].gamma.cin);
            (x, f) = self.igdns[i].forward(&up, f_out, &self.convs[i + 1], path);
        }
        unreachable!("the last stage returns")
    }
}

/// Requantizes conv sums `[h·w][4c]` (channel `o` at exponent `exps[o]`) to exponent `f` and
/// rearranges them: channel `4ch + 2dy + dx` of `(y, x)` goes to channel `ch` of
/// `(2y + dy, 2x + dx)`, in a border-less plane of `cp ≥ c` channels.
fn depth_to_space(sums: &[i32], exps: &[i32], f: i32, h: usize, w: usize, c: usize, cp: usize) -> Plane {
    let mut up = Plane::zeroed(2 * h, 2 * w, cp, 0);
    // `round_shift(v, e)` as `((v + half) >> right) << left`: the same values, since the
    // exponent `f` came from these sums' maxima (nothing reaches the clamp or overflows).
    let rq = Requant::new(&exps.iter().map(|e| e - f).collect::<Vec<_>>());
    let row = 2 * w * cp;
    up.data.par_chunks_mut(row).enumerate().for_each(|(yy, out)| {
        let (y, dy) = (yy / 2, yy % 2);
        for (xx, px) in out.chunks_exact_mut(cp).enumerate() {
            let (x, dx) = (xx / 2, xx % 2);
            let src = &sums[(y * w + x) * 4 * c..][..4 * c];
            let d = 2 * dy + dx;
            for (ch, o) in px[..c].iter_mut().enumerate() {
                let k = 4 * ch + d;
                let v = ((src[k] as i64 + rq.half[k]) >> rq.right[k]).wrapping_shl(rq.left[k] as u32);
                *o = v.clamp(-ACT_MAX, ACT_MAX) as i16;
            }
        }
    });
    up
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

    /// A deterministic pseudo-random sequence for the kernel tests.
    fn noise(n: usize, seed: u64, range: i64) -> Vec<i64> {
        let mut state = seed.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
        (0..n)
            .map(|_| {
                state = state.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
                ((state >> 33) as i64 % (2 * range + 1)) - range
            })
            .collect()
    }

    #[test]
    fn every_path_computes_the_same_convolution_sums() {
        for (cin, cout, k, h, wd) in [
            (12, 20, 3, 5, 9),
            (64, 256, 3, 5, 9),
            (7, 12, 3, 5, 9),
            (64, 64, 1, 5, 9),
            (96, 256, 3, 2, 2),
            (64, 12, 3, 1, 3),
        ] {
            let w: Vec<f32> = noise(cout * cin * k * k, 1, 1000).iter().map(|&v| v as f32 / 997.0).collect();
            let b: Vec<f32> = noise(cout, 2, 1000).iter().map(|&v| v as f32 / 300.0).collect();
            let conv = IntConv::new(&w, &b, cout, cin, k, WEIGHT_MAX);
            let mut x = Plane::zeroed(h, wd, conv.cin, k / 2);
            let vals = noise(h * wd * cin, 3, conv.input_limit as i64);
            for (p, v) in vals.chunks(cin).enumerate() {
                let at = x.at(p / wd, p % wd);
                for (ch, &v) in v.iter().enumerate() {
                    x.data[at + ch] = v as i16;
                }
            }
            let reference = conv.sums(&x, 3, IntPath::Portable);
            for path in [IntPath::Avx2, IntPath::Avx512, IntPath::Native] {
                assert_eq!(conv.sums(&x, 3, path), reference, "{cin}→{cout} k{k} on {}", path.describe());
            }
        }
    }

    #[test]
    fn every_path_computes_the_same_inverse_gdn() {
        let c = 64;
        let gamma: Vec<f32> = noise(c * c, 5, 1000).iter().map(|&v| v.abs() as f32 / 4000.0).collect();
        // Small β, and β large enough that the squares' shift passes 31 at high exponents.
        for beta_scale in [1.0 / 500.0, 50.0] {
            let beta: Vec<f32> = noise(c, 4, 1000).iter().map(|&v| (v.abs() + 1) as f32 * beta_scale).collect();
            let igdn = IntIgdn::new(&beta, &gamma, c);
            // A next layer with large weights (a small input limit: outputs shifted right) and one
            // with a single small weight (a large limit: outputs of small inputs shifted left).
            let mut sparse = vec![0.0; 12 * c * 9];
            sparse[0] = 1e-3;
            for next in [
                IntConv::new(&vec![0.01; 12 * c * 9], &[0.0; 12], 12, c, 3, WEIGHT_MAX),
                IntConv::new(&sparse, &[0.0; 12], 12, c, 3, WEIGHT_MAX),
            ] {
                for (seed, f, h, w) in
                    [(6, 10, 3, 11), (7, 4, 3, 11), (8, 14, 3, 11), (9, 12, 2, 2), (10, 40, 1, 1), (11, 16, 4, 4)]
                {
                    for range in [32_767, 300, 3] {
                        let mut x = Plane::zeroed(h, w, c, 0);
                        for (d, v) in x.data.iter_mut().zip(noise(h * w * c, seed, range)) {
                            *d = v as i16;
                        }
                        let (reference, fr) = igdn.forward(&x, f, &next, IntPath::Portable);
                        for path in [IntPath::Avx2, IntPath::Native] {
                            let (out, fo) = igdn.forward(&x, f, &next, path);
                            assert_eq!(fo, fr);
                            assert_eq!(out.data, reference.data, "f={f} range {range} {h}×{w} on {}", path.describe());
                            assert!(out.data.iter().all(|v| v.abs() < 32_767), "no output reaches the clamp");
                        }
                    }
                }
            }
        }
    }

    /// Multiply-adds per second of the convolution kernels on the default model's largest
    /// layer shape (64 → 256 channels, 3×3, 240×160 positions): `cargo test --release --lib
    /// kernel_throughput -- --ignored --nocapture`.
    #[test]
    #[ignore]
    fn kernel_throughput() {
        let (cin, cout, k, h, wd) = (64, 256, 3, 160, 240);
        let w: Vec<f32> = noise(cout * cin * k * k, 1, 1000).iter().map(|&v| v as f32 / 997.0).collect();
        let conv = IntConv::new(&w, &vec![0.0; cout], cout, cin, k, WEIGHT_MAX);
        let mut x = Plane::zeroed(h, wd, cin, 1);
        let n = x.data.len();
        for (d, v) in x.data.iter_mut().zip(noise(n, 3, 2000)) {
            *d = v as i16;
        }
        let macs = (h * wd * cout * cin * k * k) as f64;
        for path in [IntPath::Native, IntPath::Avx512, IntPath::Avx2, IntPath::Portable] {
            let mut best = f64::MAX;
            for _ in 0..3 {
                let t = std::time::Instant::now();
                std::hint::black_box(conv.sums(&x, 3, path));
                best = best.min(t.elapsed().as_secs_f64());
            }
            eprintln!("{}: {:.1} ms, {:.1} GMAC/s", path.describe(), best * 1e3, macs / best / 1e9);
        }
    }

    #[test]
    fn round_shift_rounds_half_up() {
        assert_eq!(round_shift(5, 1), 3); // 2.5 → 3
        assert_eq!(round_shift(-5, 1), -2); // −2.5 → −2
        assert_eq!(round_shift(7, 2), 2); // 1.75 → 2
        assert_eq!(round_shift(3, -2), 12);
    }
}
