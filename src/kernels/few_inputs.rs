//! Stride-2 convolution over few input channels (the analysis' first layer: RGB → N, 5×5),
//! vectorized across output positions.
//!
//! As a gemm, that layer multiplies patch rows only `k²C = 75` deep: gemm spends a large share
//! of its time repacking them (13% of the layer's profile, where the layer reached 54% of
//! `matmul`'s rate). Here a task holds 32 output positions of 8 output channels in 16 vector
//! registers and streams the input once: per input channel and tap, two loads of 16 consecutive
//! positions and 16 fused multiply-adds with broadcast weights. Stride 2 makes the input under a
//! tap every other pixel, so the padded input is stored with even and odd columns apart: the
//! input of output positions `x..x + 32` under tap `(ky, kx)` is then one run in the plane of
//! parity `kx mod 2`, starting at `x + ⌊kx/2⌋`.
//!
//! Sums run in a different order than the gemm path's, so results agree with it to rounding,
//! not bit for bit (the analysis never selects an entropy table).

use std::mem::MaybeUninit;

use rayon::prelude::*;

use super::fused_conv::{SharedDst, nested};
use super::narrow_conv::Isa;

/// The 32-position block kernel shared with the narrow-output convolution.
#[cfg(target_arch = "x86_64")]
use super::narrow_conv::x86::block_avx512;

/// One block: 32 positions × 8 channels into `acc[j·32 + i]` (see `block_avx512`).
///
/// # Safety
/// As `block_avx512`'s: AVX-512F available, every tap's 32 lanes in bounds.
unsafe fn block(planes: *const f32, p0: usize, taps: &[usize], wg: &[f32], acc: &mut [f32]) {
    #[cfg(target_arch = "x86_64")]
    // SAFETY: forwarded from the caller's contract.
    unsafe {
        block_avx512::<GROUP>(planes, p0, taps, wg, acc)
    }
    #[cfg(not(target_arch = "x86_64"))]
    {
        let _ = (planes, p0, taps, wg, acc);
        unreachable!("no AVX-512 kernel on this architecture");
    }
}

/// Output positions per block (two 16-lane vectors).
const BLOCK: usize = 32;
/// Output channels per block (16 accumulators with the two vectors).
const GROUP: usize = 8;
/// Most input channels this kernel takes (more go to the gemm path, which is then deep enough).
pub(crate) const MAX_INPUTS: usize = 4;

/// `x (B, C, H, W) ⊛ weight (O, C, k, k) + bias`, stride 2, zero padding `pad`, as
/// `(B, O, Ho, Wo)`; `None` (use the gemm path) unless `C ≤` [`MAX_INPUTS`], `O` is a multiple
/// of 8, `k` is odd and `isa` is AVX-512.
#[allow(clippy::too_many_arguments)]
pub(crate) fn forward_stride2(
    x: &[f32],
    weight: &[f32],
    bias: &[f32],
    [b, c, h, w]: [usize; 4],
    o: usize,
    k: usize,
    pad: usize,
    isa: Isa,
) -> Option<Vec<f32>> {
    let fits = isa == Isa::Avx512 && (1..=MAX_INPUTS).contains(&c) && o > 0 && o.is_multiple_of(GROUP);
    if !fits || k.is_multiple_of(2) || weight.len() != o * c * k * k || bias.len() != o || h + 2 * pad < k {
        return None;
    }
    if w + 2 * pad < k {
        return None;
    }
    let (hp, wp) = (h + 2 * pad, w + 2 * pad);
    let (ho, wo) = ((hp - k) / 2 + 1, (wp - k) / 2 + 1);
    // One parity plane row: every position a block can read (the last block of a row reads up
    // to `BLOCK − 1` positions past the output's end, plus the tap offset ⌊kx/2⌋).
    let wq = wo + k / 2 + BLOCK;
    let plane = hp * wq;
    let image_len = c * 2 * plane;
    // Weights as [group][c][ky][kx][8]: one tap's 8 weights are adjacent.
    let groups = o / GROUP;
    let mut wk = vec![0f32; weight.len()];
    for oo in 0..o {
        let (g, j) = (oo / GROUP, oo % GROUP);
        for t in 0..c * k * k {
            wk[(g * c * k * k + t) * GROUP + j] = weight[oo * c * k * k + t];
        }
    }
    // Padded, column-deinterleaved images: element (ci, parity, py, j) is padded pixel
    // (py, 2j + parity) of channel ci, zero outside the image. Every element is written once.
    let mut planes: Vec<f32> = Vec::with_capacity(b * image_len);
    let fill = |row_index: usize, row: &mut [MaybeUninit<f32>]| {
        let (bi, rest) = (row_index / (c * 2 * hp), row_index % (c * 2 * hp));
        let (ci, parity, py) = (rest / (2 * hp), (rest / hp) % 2, rest % hp);
        let src = py.checked_sub(pad).filter(|&yy| yy < h).map(|yy| &x[((bi * c + ci) * h + yy) * w..][..w]);
        for (j, v) in row.iter_mut().enumerate() {
            let px = (2 * j + parity).checked_sub(pad).filter(|&xx| xx < w);
            v.write(match (src, px) {
                (Some(s), Some(xx)) => s[xx],
                _ => 0.0,
            });
        }
    };
    let spare = &mut planes.spare_capacity_mut()[..b * image_len];
    if nested() {
        spare.chunks_mut(wq).enumerate().for_each(|(i, r)| fill(i, r));
    } else {
        spare.par_chunks_mut(wq).enumerate().for_each(|(i, r)| fill(i, r));
    }
    // SAFETY: the rows above cover all `b · image_len` elements, each written once.
    unsafe { planes.set_len(b * image_len) };

    let l = ho * wo;
    // Every output element is written once by the blocks below, so `y` starts uninitialised.
    let mut y: Vec<f32> = Vec::with_capacity(b * o * l);
    let dst = SharedDst::new_uninit(&mut y.spare_capacity_mut()[..b * o * l]);
    // Offset of each (input channel, ky, kx) tap's run from a block's start, in weight order.
    let taps: Vec<usize> = (0..c * k * k)
        .map(|t| {
            let (ci, ky, kx) = (t / (k * k), t % (k * k) / k, t % k);
            (ci * 2 + kx % 2) * plane + ky * wq + kx / 2
        })
        .collect();
    // One task: output rows `rows` of image `bi`, all channels.
    let task = |bi: usize, rows: std::ops::Range<usize>| {
        let img = &planes[bi * image_len..(bi + 1) * image_len];
        let mut acc = vec![0f32; GROUP * BLOCK];
        for oy in rows {
            for g in 0..groups {
                let wg = &wk[g * c * k * k * GROUP..(g + 1) * c * k * k * GROUP];
                for ox in (0..wo).step_by(BLOCK) {
                    let last = ((c - 1) * 2 + 1) * plane + (2 * oy + k - 1) * wq + ox + k / 2 + BLOCK;
                    assert!(last <= img.len(), "few-input conv: read past the padded image");
                    let p0 = 2 * oy * wq + ox;
                    // SAFETY: AVX-512F was detected (`isa`); the assertion bounds the last
                    // element read (channel c − 1, odd plane, row 2·oy + k − 1, lane 31 of the
                    // largest tap offset), and `wg` holds c·k²·8 weights.
                    unsafe { block(img.as_ptr(), p0, &taps, wg, &mut acc) };
                    let n = BLOCK.min(wo - ox);
                    for j in 0..GROUP {
                        let oc = g * GROUP + j;
                        // SAFETY: this task alone writes output rows `rows` of image `bi`.
                        let out = unsafe { dst.slice_uninit((bi * o + oc) * l + oy * wo + ox, n) };
                        let bv = bias[oc];
                        out.iter_mut().zip(&acc[j * BLOCK..]).for_each(|(d, &v)| _ = d.write(v + bv));
                    }
                }
            }
        }
    };
    let threads = if nested() { 1 } else { rayon::current_num_threads() };
    let chunk = ho.div_ceil(threads * 4).max(1);
    let tasks: Vec<(usize, std::ops::Range<usize>)> =
        (0..b).flat_map(|bi| (0..ho).step_by(chunk).map(move |r| (bi, r..(r + chunk).min(ho)))).collect();
    if threads == 1 {
        tasks.into_iter().for_each(|(bi, r)| task(bi, r));
    } else {
        tasks.into_par_iter().for_each(|(bi, r)| task(bi, r));
    }
    // SAFETY: for every image the tasks cover all output rows, and along each row the blocks
    // (`ox` in steps of 32, the last `wo − ox` wide) write every position of every channel.
    unsafe { y.set_len(b * o * l) };
    Some(y)
}
