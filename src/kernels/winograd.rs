//! 3×3 stride-1 convolution by Winograd's minimal filtering F(2×2, 3×3) (Lavin & Gray 2016).
//!
//! Each 2×2 block of output positions is computed from the 4×4 block of input around it: with
//! the input block `d`, the filter `g` (3×3) and the constant matrices `Bᵀ`, `G`, `Aᵀ` below,
//! `Y = Aᵀ [(G g Gᵀ) ⊙ (Bᵀ d B)] A`. Summed over input channels, the element-wise product becomes
//! sixteen matrix products, one per position `ξ` of the 4×4 transformed block:
//! `M_ξ (T × O) = U_ξ (T × C) · V_ξ (C × O)` for `T` blocks, `U = Bᵀ d B` per block and channel,
//! `V = G g Gᵀ` per channel pair. That is 16 multiply-adds per channel pair for four outputs
//! where the direct convolution spends 36: 2.25 times fewer, in the same gemm. The transforms
//! themselves are additions (and halvings, for `V`), linear in `C` or `O` per block.
//!
//! Results equal the direct convolution up to float rounding: the transforms add and subtract
//! values of similar size, which costs a few units in the last place, not digits (tested against
//! candle's conv2d at 1e-5 relative, forward and both gradients).

use super::fused_conv::{View, matmul};

/// Weights `(O, C, 3, 3)` transformed to `V` `(16, C, O)`: `V_ξ[c][o] = (G g_oc Gᵀ)_ξ` with
/// `G = [[1, 0, 0], [½, ½, ½], [½, −½, ½], [0, 0, 1]]`.
pub(crate) fn transform_weights(wt: &[f32], o: usize, c: usize) -> Vec<f32> {
    let mut v = vec![0f32; 16 * c * o];
    // One input channel at a time: its 16 transformed values for every output channel, then
    // copied as rows `V_ξ[cc][..]`.
    let mut rows = vec![0f32; 16 * o];
    for cc in 0..c {
        for oo in 0..o {
            let g = &wt[(oo * c + cc) * 9..][..9];
            // G g: 4 × 3, row by row.
            let mut t = [[0f32; 3]; 4];
            for j in 0..3 {
                let (g0, g1, g2) = (g[j], g[3 + j], g[6 + j]);
                t[0][j] = g0;
                t[1][j] = 0.5 * (g0 + g1 + g2);
                t[2][j] = 0.5 * (g0 - g1 + g2);
                t[3][j] = g2;
            }
            // (G g) Gᵀ: 4 × 4.
            for (i, r) in t.iter().enumerate() {
                let u = [r[0], 0.5 * (r[0] + r[1] + r[2]), 0.5 * (r[0] - r[1] + r[2]), r[2]];
                for (j, &val) in u.iter().enumerate() {
                    rows[(4 * i + j) * o + oo] = val;
                }
            }
        }
        for xi in 0..16 {
            v[(xi * c + cc) * o..][..o].copy_from_slice(&rows[xi * o..][..o]);
        }
    }
    v
}

/// Scratch floats [`tile`] needs for `rows` output rows of width `wo`.
pub(crate) fn scratch_len(rows: usize, wo: usize, c: usize, o: usize) -> usize {
    let blocks = rows.div_ceil(2) * wo.div_ceil(2);
    16 * blocks * (c + o)
}

/// Output rows `row0..row0 + rows` (all `wo` columns) of a 3×3, stride-1 convolution over a
/// zero-padded HWC image `padded` (`hp × wp × C`, the padding already added: output `(y, x)`
/// reads padded rows `y..y + 3` and columns `x..x + 3`), without the bias.
///
/// The result goes to `out` as `Yᵀ` with positions counted along the padded width: channel `oc`,
/// output row `row0 + r`, column `x` at `oc·m + r·wp + x`; the other elements are not written.
/// `v` comes from [`transform_weights`]; `scratch` holds [`scratch_len`] floats.
#[allow(clippy::too_many_arguments)]
pub(crate) fn tile(
    padded: &[f32],
    [hp, wp, c]: [usize; 3],
    row0: usize,
    rows: usize,
    wo: usize,
    v: &[f32],
    o: usize,
    scratch: &mut [f32],
    out: &mut [f32],
    m: usize,
) {
    let (pr, qc) = (rows.div_ceil(2), wo.div_ceil(2));
    let t = pr * qc;
    let (u, prod) = scratch[..16 * t * (c + o)].split_at_mut(16 * t * c);
    let zeros = vec![0f32; c];
    // Bᵀ d for one block, four rows of four channel vectors.
    let mut bt = vec![0f32; 16 * c];
    // U_ξ[block][c] = (Bᵀ d B)_ξ, Bᵀ = [[1, 0, −1, 0], [0, 1, 1, 0], [0, −1, 1, 0], [0, 1, 0, −1]],
    // as whole channel vectors so that every step is one vectorisable loop.
    for p in 0..pr {
        for q in 0..qc {
            let block = p * qc + q;
            let at = |i: usize, j: usize| -> &[f32] {
                let (y, x) = (row0 + 2 * p + i, 2 * q + j);
                if y < hp && x < wp { &padded[(y * wp + x) * c..][..c] } else { &zeros }
            };
            for j in 0..4 {
                let (d0, d1, d2, d3) = (at(0, j), at(1, j), at(2, j), at(3, j));
                let (r0, rest) = bt.split_at_mut(4 * c);
                let (r1, rest) = rest.split_at_mut(4 * c);
                let (r2, r3) = rest.split_at_mut(4 * c);
                let (r0, r1, r2, r3) =
                    (&mut r0[j * c..][..c], &mut r1[j * c..][..c], &mut r2[j * c..][..c], &mut r3[j * c..][..c]);
                for i in 0..c {
                    r0[i] = d0[i] - d2[i];
                    r1[i] = d1[i] + d2[i];
                    r2[i] = d2[i] - d1[i];
                    r3[i] = d1[i] - d3[i];
                }
            }
            for i in 0..4 {
                let row = &bt[4 * i * c..][..4 * c];
                let (e0, e1, e2, e3) = (&row[..c], &row[c..2 * c], &row[2 * c..3 * c], &row[3 * c..]);
                let dst = |j: usize| ((4 * i + j) * t + block) * c;
                let (o0, o1, o2, o3) = (dst(0), dst(1), dst(2), dst(3));
                for k in 0..c {
                    u[o0 + k] = e0[k] - e2[k];
                    u[o1 + k] = e1[k] + e2[k];
                    u[o2 + k] = e2[k] - e1[k];
                    u[o3 + k] = e1[k] - e3[k];
                }
            }
        }
    }
    // M_ξ, stored channel-major (`O × T`) so that the output transform reads blocks in order.
    for xi in 0..16 {
        let lhs = View { data: &u[xi * t * c..(xi + 1) * t * c], rs: c, cs: 1 };
        let rhs = View { data: &v[xi * c * o..(xi + 1) * c * o], rs: o, cs: 1 };
        matmul(t, o, c, &mut prod[xi * t * o..(xi + 1) * t * o], 1, t, false, lhs, rhs);
    }
    // Y = Aᵀ M A, Aᵀ = [[1, 1, 1, 0], [0, 1, −1, −1]], per channel: Aᵀ M (two rows of four) and
    // then the four outputs, each step a run over all blocks.
    let full = wo / 2; // blocks whose two columns are both inside the output
    let mut sv = vec![0f32; 12 * t];
    for oc in 0..o {
        let e = |xi: usize| &prod[(xi * o + oc) * t..][..t];
        let (s, y) = sv.split_at_mut(8 * t);
        for j in 0..4 {
            let (a, b, c2, d) = (e(j), e(4 + j), e(8 + j), e(12 + j));
            let (s0, s1) = s[2 * j * t..(2 * j + 2) * t].split_at_mut(t);
            for q in 0..t {
                s0[q] = a[q] + b[q] + c2[q];
                s1[q] = b[q] - c2[q] - d[q];
            }
        }
        // s holds (s0_j, s1_j) for j = 0..4; y gets (y00, y01, y10, y11).
        let sj = |j: usize, r: usize| &s[(2 * j + r) * t..][..t];
        for r in 0..2 {
            let (x0, x1, x2, x3) = (sj(0, r), sj(1, r), sj(2, r), sj(3, r));
            let (ya, yb) = y[2 * r * t..(2 * r + 2) * t].split_at_mut(t);
            for q in 0..t {
                ya[q] = x0[q] + x1[q] + x2[q];
                yb[q] = x1[q] - x2[q] - x3[q];
            }
        }
        let dst = &mut out[oc * m..];
        for p in 0..pr {
            let row = 2 * p;
            // The second row of the last block row is outside the output when `rows` is odd
            // (and so is the buffer: the last row of the last channel holds `wo` elements).
            let two_rows = row + 1 < rows;
            let (top, bottom) = dst[row * wp..].split_at_mut(if two_rows { wp } else { wo });
            for (r, line) in [(0, top), (1, bottom)] {
                if r == 1 && !two_rows {
                    break;
                }
                let (ya, yb) = (&y[(2 * r * t) + p * qc..][..qc], &y[(2 * r + 1) * t + p * qc..][..qc]);
                for ((pair, &a), &b) in line[..2 * full].chunks_exact_mut(2).zip(ya).zip(yb) {
                    pair[0] = a;
                    pair[1] = b;
                }
                if wo % 2 == 1 {
                    line[wo - 1] = ya[full];
                }
            }
        }
    }
}
