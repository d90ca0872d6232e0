//! Stride-1 convolution with few output channels (the synthesis' last layer: 64 → 3·4),
//! vectorized across output positions.
//!
//! As a gemm, such a layer is a product with only 12 columns: too narrow for gemm's register
//! tiles, which then run far below their rate on the wider layers (`examples/decode_profile`
//! times it step by step). Here each task holds the
//! results of a run of output positions for *every* output channel in vector registers
//! (`O` accumulators per vector of positions) and streams the input once: per input channel and
//! tap, one load of consecutive positions from a zero-padded channel plane and `O` fused
//! multiply-adds with broadcast weights. Positions are counted along the padded width, so the
//! input under a tap is a plain shifted run; the `k − 1` extra positions per row are computed
//! and dropped.
//!
//! The order of the sums differs from the gemm path, so results agree with it to rounding, not
//! bit for bit: the synthesis may do that (it never selects an entropy table).

use std::mem::MaybeUninit;

use rayon::prelude::*;

use super::fused_conv::{SharedDst, nested};

/// Output channel counts with a vectorized kernel.
pub(crate) const NARROW_OUTPUTS: [usize; 1] = [12];

/// The instruction set a kernel runs on.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Isa {
    /// 16 lanes, two vectors (32 positions) per output channel.
    Avx512,
    /// 8 lanes, one vector per output channel.
    Avx2,
}

impl Isa {
    /// The best kernel this CPU runs, if any.
    pub(crate) fn detect() -> Option<Isa> {
        #[cfg(target_arch = "x86_64")]
        {
            if is_x86_feature_detected!("avx512f") {
                return Some(Isa::Avx512);
            }
            if is_x86_feature_detected!("avx2") && is_x86_feature_detected!("fma") {
                return Some(Isa::Avx2);
            }
        }
        None
    }

    /// Output positions one call of the kernel computes.
    fn block(self) -> usize {
        match self {
            Isa::Avx512 => 32,
            Isa::Avx2 => 8,
        }
    }
}

/// `x (B, C, H, W) ⊛ weight (O, C, k, k) + bias`, stride 1, zero padding `k / 2`, for `O` in
/// [`NARROW_OUTPUTS`] on `isa`; `None` when there is no kernel for `O` (use the gemm path).
pub(crate) fn forward_narrow(
    x: &[f32],
    weight: &[f32],
    bias: &[f32],
    [b, c, h, w]: [usize; 4],
    o: usize,
    k: usize,
    isa: Isa,
) -> Option<Vec<f32>> {
    if !NARROW_OUTPUTS.contains(&o) || c == 0 || k.is_multiple_of(2) || weight.len() != o * c * k * k || bias.len() != o
    {
        return None;
    }
    let pad = k / 2;
    let (hp, wp) = (h + 2 * pad, w + 2 * pad);
    // The padded image is stored row by row, each row holding all channels (H, C, W): a block's
    // k input rows are then k runs of C·Wp floats, where channel planes (C, H, W) would make it
    // read from C·k places megabytes apart (measured on the decoder's 768×512 last layer:
    // 18–21 ms in planes, see DEVELOPERS.md for the figure after).
    let (cstride, rstride) = (wp, c * wp);
    let block = isa.block();
    // Weights as [c][ky][kx][o]: the O weights of one tap are adjacent.
    let mut wk = vec![0f32; weight.len()];
    for oo in 0..o {
        for ci in 0..c {
            for t in 0..k * k {
                wk[(ci * k * k + t) * o + oo] = weight[(oo * c + ci) * k * k + t];
            }
        }
    }
    let l = h * w;
    // Every output element is written once by the blocks below, so `y` starts uninitialised.
    let mut y: Vec<f32> = Vec::with_capacity(b * o * l);
    let dst = SharedDst::new_uninit(&mut y.spare_capacity_mut()[..b * o * l]);
    // Padded rows of one image, with one block of slack: the last run of a row reads up to
    // `block − 1` positions past the last row. Written in one pass, zeros and pixels, instead
    // of clearing megabytes first and copying the pixels over them.
    let pad_image = |bi: usize, padded: &mut Vec<f32>| {
        let len = hp * rstride + block;
        padded.clear();
        padded.reserve(len);
        let img = &x[bi * c * l..(bi + 1) * c * l];
        let fill = |py: usize, row: &mut [MaybeUninit<f32>]| {
            let interior = py.checked_sub(pad).filter(|&yy| yy < h);
            for (ci, run) in row.chunks_mut(cstride).enumerate() {
                match interior {
                    Some(yy) => {
                        let src = &img[(ci * h + yy) * w..][..w];
                        run[..pad].iter_mut().for_each(|v| _ = v.write(0.0));
                        run[pad..pad + w].iter_mut().zip(src).for_each(|(v, &s)| _ = v.write(s));
                        run[pad + w..].iter_mut().for_each(|v| _ = v.write(0.0));
                    }
                    None => run.iter_mut().for_each(|v| _ = v.write(0.0)),
                }
            }
        };
        let spare = &mut padded.spare_capacity_mut()[..len];
        let (rows, slack) = spare.split_at_mut(hp * rstride);
        slack.iter_mut().for_each(|v| _ = v.write(0.0));
        if nested() {
            rows.chunks_mut(rstride).enumerate().for_each(|(py, row)| fill(py, row));
        } else {
            rows.par_chunks_mut(rstride).enumerate().for_each(|(py, row)| fill(py, row));
        }
        // SAFETY: the `hp` rows (each `C` runs of `Wp`: zeros or pad, pixels, pad) and the
        // slack cover all `len` elements, each written above.
        unsafe { padded.set_len(len) };
    };
    // Offset of each (input channel, ky, kx) tap's run from a block's start, in weight order.
    let taps: Vec<usize> =
        (0..c * k * k).map(|t| (t / (k * k)) * cstride + (t % (k * k) / k) * rstride + t % k).collect();
    // Output rows `rows` of image `bi` from its padded rows.
    let rows_task = |padded: &[f32], bi: usize, rows: std::ops::Range<usize>| {
        let mut acc = vec![0f32; o * block];
        for oy in rows {
            let mut ox = 0;
            while ox < w {
                let p0 = oy * rstride + ox;
                assert!((c - 1) * cstride + p0 + (k - 1) * (rstride + 1) + block <= padded.len());
                // SAFETY: the assertion bounds every read: channel `c − 1`, tap (k−1, k−1),
                // lane `block − 1` is the last element touched; the CPU feature was detected.
                unsafe { run_block(isa, o, padded.as_ptr(), p0, &taps, &wk, &mut acc) };
                let n = block.min(w - ox);
                for (oc, &bv) in bias.iter().enumerate() {
                    // SAFETY: this task alone writes output rows `rows` of image `bi`.
                    let out = unsafe { dst.slice_uninit(bi * o * l + oc * l + oy * w + ox, n) };
                    out.iter_mut().zip(&acc[oc * block..]).for_each(|(d, v)| _ = d.write(v + bv));
                }
                ox += block;
            }
        }
    };
    let threads = if nested() { 1 } else { rayon::current_num_threads() };
    let mut padded = Vec::new();
    for bi in 0..b {
        pad_image(bi, &mut padded);
        let chunk = h.div_ceil(threads * 4).max(1);
        let tasks: Vec<_> = (0..h).step_by(chunk).map(|r| r..(r + chunk).min(h)).collect();
        if threads == 1 {
            tasks.into_iter().for_each(|r| rows_task(&padded, bi, r));
        } else {
            tasks.into_par_iter().for_each(|r| rows_task(&padded, bi, r));
        }
    }
    // SAFETY: for every image, the tasks cover all output rows, and along each row the blocks
    // (`ox` in steps of `block`, the last one `w − ox` wide) write every position of every
    // output channel.
    unsafe { y.set_len(b * o * l) };
    Some(y)
}

/// Dispatches one block to the kernel for `(isa, o)`.
///
/// # Safety
/// `isa` must be supported by the CPU, `o` one of [`NARROW_OUTPUTS`], and every element read
/// (`planes[p0 + taps[t] + lane]`, lane < block, one `t` per input channel and tap) in bounds.
unsafe fn run_block(isa: Isa, o: usize, planes: *const f32, p0: usize, taps: &[usize], wk: &[f32], acc: &mut [f32]) {
    #[cfg(target_arch = "x86_64")]
    // SAFETY: forwarded from the caller's contract.
    unsafe {
        match (isa, o) {
            (Isa::Avx512, 12) => x86::block_avx512::<12>(planes, p0, taps, wk, acc),
            (Isa::Avx2, 12) => x86::block_avx2::<12>(planes, p0, taps, wk, acc),
            _ => unreachable!("no narrow kernel for {o} outputs"),
        }
    }
    #[cfg(not(target_arch = "x86_64"))]
    {
        let _ = (isa, o, planes, p0, taps, wk, acc);
        unreachable!("no narrow kernels on this architecture");
    }
}

// The two kernels below are the same loop at two register widths (two 16-lane vectors per
// output channel vs one 8-lane vector): written out with intrinsics, not left to the
// autovectorizer, because the accumulators must stay in registers across the whole C·k² loop.
#[cfg(target_arch = "x86_64")]
pub(crate) mod x86 {
    use std::arch::x86_64::*;

    /// 32 positions × `O` channels: `acc[oc·32 + i]`, over the input runs at `planes + p0 +
    /// taps[t]`, one per input channel and tap, with weights `wk` as `[t][O]`. Also the
    /// few-input stride-2 kernel's block, with its own tap offsets.
    ///
    /// # Safety
    /// AVX-512F available; `planes + p0 + taps[t] + lane` in bounds for lane < 32 and every `t`;
    /// `wk` holds `taps.len()·O` weights.
    #[target_feature(enable = "avx512f")]
    pub(crate) unsafe fn block_avx512<const O: usize>(
        planes: *const f32,
        p0: usize,
        taps: &[usize],
        wk: &[f32],
        acc: &mut [f32],
    ) {
        assert!(wk.len() >= taps.len() * O && acc.len() >= 32 * O);
        let mut a0 = [_mm512_setzero_ps(); O];
        let mut a1 = [_mm512_setzero_ps(); O];
        for (&tap, wrow) in taps.iter().zip(wk.chunks_exact(O)) {
            // SAFETY: in bounds by the caller's contract.
            unsafe {
                let src = planes.add(p0 + tap);
                let v0 = _mm512_loadu_ps(src);
                let v1 = _mm512_loadu_ps(src.add(16));
                for oc in 0..O {
                    let wv = _mm512_set1_ps(wrow[oc]);
                    a0[oc] = _mm512_fmadd_ps(wv, v0, a0[oc]);
                    a1[oc] = _mm512_fmadd_ps(wv, v1, a1[oc]);
                }
            }
        }
        for oc in 0..O {
            // SAFETY: acc holds 32·O floats (asserted).
            unsafe {
                _mm512_storeu_ps(acc.as_mut_ptr().add(oc * 32), a0[oc]);
                _mm512_storeu_ps(acc.as_mut_ptr().add(oc * 32 + 16), a1[oc]);
            }
        }
    }

    /// 8 positions × `O` channels: `acc[oc·8 + i]`, over the runs at `planes + p0 + taps[t]`.
    ///
    /// # Safety
    /// AVX2 and FMA available; reads in bounds (see `run_block`); `wk` holds `taps.len()·O`
    /// weights.
    #[target_feature(enable = "avx2,fma")]
    pub(super) unsafe fn block_avx2<const O: usize>(
        planes: *const f32,
        p0: usize,
        taps: &[usize],
        wk: &[f32],
        acc: &mut [f32],
    ) {
        assert!(wk.len() >= taps.len() * O && acc.len() >= 8 * O);
        let mut a = [_mm256_setzero_ps(); O];
        for (&tap, wrow) in taps.iter().zip(wk.chunks_exact(O)) {
            // SAFETY: as in `block_avx512`.
            unsafe {
                let v = _mm256_loadu_ps(planes.add(p0 + tap));
                for (oc, a) in a.iter_mut().enumerate() {
                    *a = _mm256_fmadd_ps(_mm256_set1_ps(wrow[oc]), v, *a);
                }
            }
        }
        for (oc, a) in a.iter().enumerate() {
            // SAFETY: acc holds 8·O floats (asserted).
            unsafe { _mm256_storeu_ps(acc.as_mut_ptr().add(oc * 8), *a) };
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    /// Direct definition of the convolution (f64 sums), for reference.
    fn reference(x: &[f32], wt: &[f32], bias: &[f32], [b, c, h, w]: [usize; 4], o: usize, k: usize) -> Vec<f32> {
        let pad = (k / 2) as isize;
        let mut y = vec![0f32; b * o * h * w];
        for bi in 0..b {
            for oc in 0..o {
                for oy in 0..h {
                    for ox in 0..w {
                        let mut s = bias[oc] as f64;
                        for ci in 0..c {
                            for ky in 0..k {
                                for kx in 0..k {
                                    let (iy, ix) = (oy as isize + ky as isize - pad, ox as isize + kx as isize - pad);
                                    if iy >= 0 && ix >= 0 && (iy as usize) < h && (ix as usize) < w {
                                        let v = x[((bi * c + ci) * h + iy as usize) * w + ix as usize];
                                        s += v as f64 * wt[((oc * c + ci) * k + ky) * k + kx] as f64;
                                    }
                                }
                            }
                        }
                        y[((bi * o + oc) * h + oy) * w + ox] = s as f32;
                    }
                }
            }
        }
        y
    }

    #[test]
    fn narrow_kernels_match_the_definition_on_odd_shapes() {
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let mut isas = vec![];
        #[cfg(target_arch = "x86_64")]
        {
            if is_x86_feature_detected!("avx512f") {
                isas.push(Isa::Avx512);
            }
            if is_x86_feature_detected!("avx2") && is_x86_feature_detected!("fma") {
                isas.push(Isa::Avx2);
            }
        }
        for (b, c, h, w, k) in [(1, 64, 9, 37, 3), (2, 5, 1, 1, 3), (1, 3, 17, 33, 5), (3, 16, 8, 8, 1)] {
            let x: Vec<f32> = (0..b * c * h * w).map(|_| rng.gen_range(-1.0..1.0)).collect();
            let wt: Vec<f32> = (0..12 * c * k * k).map(|_| rng.gen_range(-0.3..0.3)).collect();
            let bias: Vec<f32> = (0..12).map(|_| rng.gen_range(-1.0..1.0)).collect();
            let want = reference(&x, &wt, &bias, [b, c, h, w], 12, k);
            for &isa in &isas {
                let got = forward_narrow(&x, &wt, &bias, [b, c, h, w], 12, k, isa).unwrap();
                let scale = want.iter().fold(0f32, |m, v| m.max(v.abs())).max(1.0);
                for (i, (g, r)) in got.iter().zip(&want).enumerate() {
                    assert!((g - r).abs() <= 1e-5 * scale, "{isa:?} {:?} at {i}: {g} vs {r}", (b, c, h, w, k));
                }
            }
        }
        // No kernel for other output counts: the caller keeps the gemm path.
        assert!(forward_narrow(&[0.0; 16], &[0.0; 9], &[0.0], [1, 1, 4, 4], 1, 3, Isa::Avx2).is_none());
    }
}
