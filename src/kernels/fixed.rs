//! Fixed-order arithmetic for the decoder's table-selecting path.
//!
//! Every output element is `bias + Σ w·x` summed in one fixed order — taps row by row, then input
//! channels — with separate `f32` multiplies and adds (Rust never fuses them on its own). That
//! order does not depend on the thread count or on whether the loop over output channels is
//! vectorized, so the result is bit-identical on every IEEE-754 machine. Tensors are HWC
//! (channels innermost), single image.
//!
//! # Requirements for correctness
//! - never reorder the sums here or call into BLAS/gemm;
//! - [`SimdMode::Scalar`] and [`SimdMode::Vectorized`] must stay bit-identical (a test checks);
//! - only `+`, `*` and `max` are used: no `exp`/`log` whose last bit varies between libraries.

use rayon::prelude::*;

/// How the loop over output channels runs. Both give identical bits.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SimdMode {
    /// Output channels as the innermost loop: the compiler vectorizes it.
    Vectorized,
    /// One output channel at a time: plain scalar code (the reference).
    Scalar,
}

impl SimdMode {
    /// `Scalar` when the environment variable `KILN_FIXED_SCALAR` is set, else `Vectorized`.
    pub fn from_env() -> Self {
        if std::env::var_os("KILN_FIXED_SCALAR").is_some() { SimdMode::Scalar } else { SimdMode::Vectorized }
    }
}

/// Pixels per register block of the vectorized path.
const PIXEL_BLOCK: usize = 4;
/// Output channels per register block of the vectorized path.
const CHANNEL_BLOCK: usize = 16;

/// Where a block of `PIXEL_BLOCK` interior pixels lies: input `x` (`h × w × cin`), output row
/// `oy`, first pixel `ox0`, pixels `step` apart (1, or 2 on a checkerboard).
#[derive(Clone, Copy)]
struct BlockAt<'a> {
    x: &'a [f32],
    h: usize,
    w: usize,
    oy: usize,
    ox0: usize,
    step: usize,
}

/// Which output positions a convolution computes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Positions {
    /// Every position.
    All,
    /// Positions with `(y + x) % 2 == parity` only (the others are left at 0).
    Checkerboard {
        /// 0: anchors; 1: the other half.
        parity: usize,
    },
}

/// A stride-1, zero-padded square convolution with fixed summation order.
#[derive(Debug, Clone)]
pub struct FixedConv {
    cin: usize,
    cout: usize,
    k: usize,
    /// Taps in use (`ky·k + kx`, increasing): all of them unless built with
    /// [`FixedConv::with_taps`].
    taps: Vec<usize>,
    /// Weights of the taps in use as `[tap][ci][co]`.
    w: Vec<f32>,
    b: Vec<f32>,
}

impl FixedConv {
    /// Builds from weights in the usual `(cout, cin, k, k)` layout and a bias of length `cout`.
    pub fn new(weight_oikk: &[f32], bias: &[f32], cout: usize, cin: usize, k: usize) -> Self {
        Self::with_taps(weight_oikk, bias, cout, cin, k, &(0..k * k).collect::<Vec<_>>())
    }

    /// Like [`FixedConv::new`], summing over the taps `taps` only (`ky·k + kx`, increasing): the
    /// others' weights are ignored, as if they were zero, and cost nothing.
    pub fn with_taps(weight_oikk: &[f32], bias: &[f32], cout: usize, cin: usize, k: usize, taps: &[usize]) -> Self {
        assert_eq!(weight_oikk.len(), cout * cin * k * k, "weight size");
        assert_eq!(bias.len(), cout, "bias size");
        assert!(taps.windows(2).all(|t| t[0] < t[1]) && taps.iter().all(|&t| t < k * k), "taps increasing, in range");
        let mut w = vec![0.0; taps.len() * cin * cout];
        for co in 0..cout {
            for ci in 0..cin {
                for (t, &tap) in taps.iter().enumerate() {
                    let (ky, kx) = (tap / k, tap % k);
                    w[(t * cin + ci) * cout + co] = weight_oikk[((co * cin + ci) * k + ky) * k + kx];
                }
            }
        }
        FixedConv { cin, cout, k, taps: taps.to_vec(), w, b: bias.to_vec() }
    }

    /// Output channels.
    pub fn out_channels(&self) -> usize {
        self.cout
    }

    /// Multiply-adds per output position.
    pub fn macs_per_output(&self) -> usize {
        self.cin * self.cout * self.taps.len()
    }

    /// Applies the convolution to `x` (`h × w × cin`, HWC), giving `h × w × cout`.
    pub fn forward(&self, x: &[f32], h: usize, w: usize, mode: SimdMode) -> Vec<f32> {
        self.forward_at(x, h, w, Positions::All, mode)
    }

    /// [`FixedConv::forward`] at `positions` only; the others' outputs are 0. A computed
    /// element's value does not depend on which positions are computed.
    pub fn forward_at(&self, x: &[f32], h: usize, w: usize, positions: Positions, mode: SimdMode) -> Vec<f32> {
        assert_eq!(x.len(), h * w * self.cin, "input size");
        let mut out = vec![0.0f32; h * w * self.cout];
        let row_len = w * self.cout;
        if row_len == 0 {
            return out;
        }
        let r = self.k / 2;
        let cout = self.cout;
        out.par_chunks_mut(row_len).enumerate().for_each_init(Vec::new, |patch, (oy, row)| {
            let (mut ox, step) = match positions {
                Positions::All => (0, 1),
                Positions::Checkerboard { parity } => ((oy + parity) % 2, 2),
            };
            while ox < w {
                // Blocks of pixels whose taps all fall inside the image.
                let last = ox + (PIXEL_BLOCK - 1) * step;
                let interior = mode == SimdMode::Vectorized && oy >= r && oy + r < h && ox >= r;
                if interior && last + r < w {
                    let at = BlockAt { x, h, w, oy, ox0: ox, step };
                    self.block(at, &mut row[ox * cout..(last + 1) * cout], patch);
                    ox += PIXEL_BLOCK * step;
                    continue;
                }
                let acc = &mut row[ox * cout..(ox + 1) * cout];
                match mode {
                    SimdMode::Vectorized => self.pixel_vectorized(x, h, w, oy, ox, 0..cout, acc),
                    SimdMode::Scalar => self.pixel_scalar(x, h, w, oy, ox, acc),
                }
                ox += step;
            }
        });
        out
    }

    /// `PIXEL_BLOCK` interior pixels from `ox0` on row `oy`, `step` apart (`out` starts at the
    /// first and ends with the last), output channels in chunks of
    /// `CHANNEL_BLOCK` held in registers (the remainder per pixel). Each element's sum runs in
    /// the same order as in [`FixedConv::pixel_scalar`]: bias, taps row by row, input channels.
    ///
    /// The same code is compiled for AVX-512 and AVX2 and picked at run time: wider registers
    /// hold more output channels, each lane still a plain sequence of separate `*` and `+` (Rust
    /// never contracts them into fused multiply-adds), so the bits do not change.
    fn block(&self, at: BlockAt, out: &mut [f32], patch: &mut Vec<f32>) {
        #[cfg(target_arch = "x86_64")]
        {
            if is_x86_feature_detected!("avx512f") {
                // SAFETY: the CPU has AVX-512F (checked).
                return unsafe { self.block_avx512(at, out, patch) };
            }
            if is_x86_feature_detected!("avx2") {
                // SAFETY: the CPU has AVX2 (checked).
                return unsafe { self.block_avx2(at, out, patch) };
            }
        }
        self.block_portable(at, out, patch)
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx512f")]
    fn block_avx512(&self, at: BlockAt, out: &mut [f32], patch: &mut Vec<f32>) {
        self.block_portable(at, out, patch)
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    fn block_avx2(&self, at: BlockAt, out: &mut [f32], patch: &mut Vec<f32>) {
        self.block_portable(at, out, patch)
    }

    #[inline(always)]
    fn block_portable(&self, at: BlockAt, out: &mut [f32], patch: &mut Vec<f32>) {
        let BlockAt { x, h, w, oy, ox0, step } = at;
        let (cin, cout, k, r) = (self.cin, self.cout, self.k, self.k / 2);
        let full = cout / CHANNEL_BLOCK * CHANNEL_BLOCK;
        // The block's inputs gathered once, `[tap][ci][pixel]`, so that the loops below run over
        // contiguous memory without index checks; every element's sum keeps its order.
        patch.resize(self.taps.len() * cin * PIXEL_BLOCK, 0.0);
        for (t, &tap) in self.taps.iter().enumerate() {
            let (ky, kx) = (tap / k, tap % k);
            let pos0 = (oy + ky - r) * w + ox0 + kx - r;
            for j in 0..PIXEL_BLOCK {
                let px = pos0 + j * step;
                for (ci, &v) in x[px * cin..(px + 1) * cin].iter().enumerate() {
                    patch[(t * cin + ci) * PIXEL_BLOCK + j] = v;
                }
            }
        }
        for c0 in (0..full).step_by(CHANNEL_BLOCK) {
            let mut acc = [[0f32; CHANNEL_BLOCK]; PIXEL_BLOCK];
            for a in acc.iter_mut() {
                a.copy_from_slice(&self.b[c0..c0 + CHANNEL_BLOCK]);
            }
            for (xs, wrow) in patch.chunks_exact(PIXEL_BLOCK).zip(self.w.chunks_exact(cout)) {
                let wrow: &[f32; CHANNEL_BLOCK] = wrow[c0..c0 + CHANNEL_BLOCK].try_into().expect("a block");
                for (a, &xv) in acc.iter_mut().zip(xs) {
                    for (q, &wv) in wrow.iter().enumerate() {
                        a[q] += xv * wv;
                    }
                }
            }
            for (j, a) in acc.iter().enumerate() {
                let o = j * step * cout + c0;
                out[o..o + CHANNEL_BLOCK].copy_from_slice(a);
            }
        }
        if full < cout {
            for j in 0..PIXEL_BLOCK {
                let o = j * step * cout;
                self.pixel_vectorized(x, h, w, oy, ox0 + j * step, full..cout, &mut out[o + full..o + cout]);
            }
        }
    }

    fn taps(&self, h: usize, w: usize, oy: usize, ox: usize) -> impl Iterator<Item = (usize, usize)> + '_ {
        let r = self.k / 2;
        self.taps.iter().enumerate().filter_map(move |(t, &tap)| {
            let iy = (oy + tap / self.k).checked_sub(r)?;
            let ix = (ox + tap % self.k).checked_sub(r)?;
            (iy < h && ix < w).then_some((t, iy * w + ix))
        })
    }

    /// One pixel, output channels `chans` into `acc`.
    #[allow(clippy::too_many_arguments)]
    fn pixel_vectorized(
        &self,
        x: &[f32],
        h: usize,
        w: usize,
        oy: usize,
        ox: usize,
        chans: std::ops::Range<usize>,
        acc: &mut [f32],
    ) {
        acc.copy_from_slice(&self.b[chans.clone()]);
        for (tap, pos) in self.taps(h, w, oy, ox) {
            let xs = &x[pos * self.cin..(pos + 1) * self.cin];
            for (ci, &xv) in xs.iter().enumerate() {
                let wrow = &self.w
                    [(tap * self.cin + ci) * self.cout + chans.start..(tap * self.cin + ci) * self.cout + chans.end];
                for (a, &wv) in acc.iter_mut().zip(wrow) {
                    *a += xv * wv;
                }
            }
        }
    }

    fn pixel_scalar(&self, x: &[f32], h: usize, w: usize, oy: usize, ox: usize, acc: &mut [f32]) {
        let taps: Vec<(usize, usize)> = self.taps(h, w, oy, ox).collect();
        for (co, a) in acc.iter_mut().enumerate() {
            let mut s = self.b[co];
            for &(tap, pos) in &taps {
                for ci in 0..self.cin {
                    s += x[pos * self.cin + ci] * self.w[(tap * self.cin + ci) * self.cout + co];
                }
            }
            *a = s;
        }
    }
}

/// `max(x, 0)` in place.
pub fn relu_in_place(x: &mut [f32]) {
    for v in x {
        *v = v.max(0.0);
    }
}

/// HWC depth-to-space by 2: channel `4c + 2dy + dx` of `(y, x)` goes to channel `c` of
/// `(2y + dy, 2x + dx)`. Returns the new buffer (`2h × 2w × c/4`).
pub fn depth_to_space_hwc(x: &[f32], h: usize, w: usize, c4: usize) -> Vec<f32> {
    let c = c4 / 4;
    let mut out = vec![0.0; x.len()];
    for y in 0..h {
        for xx in 0..w {
            for ch in 0..c {
                for dy in 0..2 {
                    for dx in 0..2 {
                        let src = (y * w + xx) * c4 + 4 * ch + 2 * dy + dx;
                        let dst = ((2 * y + dy) * (2 * w) + 2 * xx + dx) * c + ch;
                        out[dst] = x[src];
                    }
                }
            }
        }
    }
    out
}
