//! GDN and inverse GDN as one operation with a hand-written backward pass.
//!
//! `n = γ·x² + β` per pixel (a C×C product over channels), then `y = x / √n` (GDN) or
//! `y = x · √n` (inverse). With `s = n^(∓½)` and `g_j = dy_j · ∂y_j/∂n_j`
//! (`−½·x_j·n_j^(−3/2)` for GDN, `½·x_j·n_j^(−½)` for the inverse):
//! `dx = dy·s + 2x·(γᵀg)`, `dγ = Σ_pixels g·(x²)ᵀ`, `dβ = Σ_pixels g`.
//! The three products run on gemm over tiles of pixels (all channels of a tile at once, so the
//! scratch stays in cache); everything else is one pass over each tile. `β` and `γ` come in already re-parameterised, so candle differentiates that part.

use candle_core::{CpuStorage, CustomOp2, CustomOp3, Layout, Result, Shape, Tensor, bail};
use rayon::prelude::*;

use super::conv::contiguous_f32;
use super::fused_conv::{View, batch_parallel, images_per_group, nested};

/// `dst (m × n, row-major) [+]= lhs (m × k, strides) · rhs (k × n, strides)`, on gemm.
#[allow(clippy::too_many_arguments)]
fn matmul(
    m: usize,
    n: usize,
    k: usize,
    dst: &mut [f32],
    acc: bool,
    lhs: &[f32],
    l_rs: usize,
    l_cs: usize,
    rhs: &[f32],
    r_rs: usize,
    r_cs: usize,
) {
    let lhs = View { data: lhs, rs: l_rs, cs: l_cs };
    let rhs = View { data: rhs, rs: r_rs, cs: r_cs };
    super::fused_conv::matmul(m, n, k, dst, n, 1, acc, lhs, rhs);
}

/// Pixels per tile: every per-pixel quantity is computed for a tile of pixels at a time (all
/// channels), so the scratch buffers stay in cache and no image-sized temporaries are made
/// (the decoder's widest layer would otherwise allocate and page-fault three 25 MB buffers).
const TILE: usize = 1024;

/// `γ` with subnormal entries set to zero. Trained GDN layers have thousands of off-diagonal
/// `γ = raw²` that underflow into the subnormal range, and arithmetic on subnormals runs many
/// times slower on x86 (measured: the trained default decoded a 768×512 image in 224 ms, 164 ms
/// with the CPU flushing subnormals). Their contribution is below 1e-38 of a normal entry's.
/// Only this fast path flushes; the fixed-order path has no GDN.
pub(crate) fn flush_subnormal(gamma: &[f32]) -> Vec<f32> {
    gamma.iter().map(|&g| if g.is_subnormal() { 0.0 } else { g }).collect()
}

/// Scratch for one tile: `x²` and `n`, each `C × TILE`.
fn tile_scratch(c: usize) -> (Vec<f32>, Vec<f32>) {
    (vec![0f32; c * TILE], vec![0f32; c * TILE])
}

/// `x²` and `n = γ·x² + β` for pixels `p0..p0 + len` of one image `x (C, P)`, each `(C × len)`.
#[allow(clippy::too_many_arguments)]
fn tile_norm(
    x: &[f32],
    beta: &[f32],
    gamma: &[f32],
    c: usize,
    p: usize,
    p0: usize,
    len: usize,
    x2: &mut [f32],
    n: &mut [f32],
) {
    for ch in 0..c {
        let src = &x[ch * p + p0..][..len];
        x2[ch * len..(ch + 1) * len].iter_mut().zip(src).for_each(|(o, v)| *o = v * v);
    }
    matmul(c, len, c, &mut n[..c * len], false, gamma, c, 1, &x2[..c * len], len, 1);
    for (ch, row) in n[..c * len].chunks_mut(len).enumerate() {
        row.iter_mut().for_each(|v| *v += beta[ch]);
    }
}

/// GDN of one image `x (C, P)` into `y`, tile by tile (tiles in parallel unless [`nested`]).
fn forward_image(x: &[f32], beta: &[f32], gamma: &[f32], c: usize, p: usize, inverse: bool, y: &mut [f32]) {
    // Each tile gets its segment of every channel row of `y`.
    let tiles = p.div_ceil(TILE);
    let mut segments: Vec<Vec<&mut [f32]>> = (0..tiles).map(|_| Vec::with_capacity(c)).collect();
    for row in y.chunks_mut(p) {
        for (t, seg) in row.chunks_mut(TILE).enumerate() {
            segments[t].push(seg);
        }
    }
    let work = |(x2, n): &mut (Vec<f32>, Vec<f32>), (t, segs): (usize, Vec<&mut [f32]>)| {
        let (p0, len) = (t * TILE, segs[0].len());
        tile_norm(x, beta, gamma, c, p, p0, len, x2, n);
        for (ch, seg) in segs.into_iter().enumerate() {
            let (xs, ns) = (&x[ch * p + p0..][..len], &n[ch * len..][..len]);
            for ((o, &xv), &nv) in seg.iter_mut().zip(xs).zip(ns) {
                *o = if inverse { xv * nv.sqrt() } else { xv / nv.sqrt() };
            }
        }
    };
    if nested() || tiles == 1 {
        let mut s = tile_scratch(c);
        segments.into_iter().enumerate().for_each(|a| work(&mut s, a));
    } else {
        segments.into_par_iter().enumerate().for_each_init(|| tile_scratch(c), work);
    }
}

/// Parameter gradients of a group of images: `dγ (C × C)` and `dβ (C)`.
struct GdnParamGrads {
    dgamma: Vec<f32>,
    dbeta: Vec<f64>,
}

/// Backward over consecutive images `x`, `dy` (each `k · C · P`), writing `dx` and returning the
/// group's parameter gradients. Runs on the calling thread, tile by tile in a fixed order.
#[allow(clippy::too_many_arguments)]
fn backward_images(
    x: &[f32],
    dy: &[f32],
    beta: &[f32],
    gamma: &[f32],
    c: usize,
    p: usize,
    inverse: bool,
    dx: &mut [f32],
) -> GdnParamGrads {
    let mut out = GdnParamGrads { dgamma: vec![0f32; c * c], dbeta: vec![0f64; c] };
    let (mut x2, mut n) = tile_scratch(c);
    let (mut g, mut gt) = tile_scratch(c);
    let mut first = true;
    for ((xb, dyb), dxb) in x.chunks(c * p).zip(dy.chunks(c * p)).zip(dx.chunks_mut(c * p)) {
        for p0 in (0..p).step_by(TILE) {
            let len = TILE.min(p - p0);
            tile_norm(xb, beta, gamma, c, p, p0, len, &mut x2, &mut n);
            // g = dy · ∂y/∂n, and the direct term dy·s into dx.
            for ch in 0..c {
                let r = ch * p + p0..ch * p + p0 + len;
                let (xs, ds, ns) = (&xb[r.clone()], &dyb[r.clone()], &n[ch * len..][..len]);
                let (gs, dxs) = (&mut g[ch * len..][..len], &mut dxb[r]);
                for i in 0..len {
                    let (xv, d, nv) = (xs[i], ds[i], ns[i]);
                    let s = nv.sqrt();
                    if inverse {
                        gs[i] = d * 0.5 * xv / s;
                        dxs[i] = d * s;
                    } else {
                        let inv = 1.0 / s;
                        dxs[i] = d * inv;
                        gs[i] = -0.5 * d * xv * inv / nv;
                    }
                }
            }
            // dx += 2x·(γᵀg): (C × C)ᵀ · (C × len).
            matmul(c, len, c, &mut gt[..c * len], false, gamma, 1, c, &g[..c * len], len, 1);
            for ch in 0..c {
                let r = ch * p + p0..ch * p + p0 + len;
                let ts = &gt[ch * len..][..len];
                for ((d, &xv), &t) in dxb[r.clone()].iter_mut().zip(&xb[r]).zip(ts) {
                    *d += 2.0 * xv * t;
                }
            }
            // dγ += g · (x²)ᵀ: (C × len) · (len × C); dβ += Σ g.
            matmul(c, c, len, &mut out.dgamma, !first, &g[..c * len], len, 1, &x2[..c * len], 1, len);
            first = false;
            for (ch, db) in out.dbeta.iter_mut().enumerate() {
                *db += g[ch * len..(ch + 1) * len].iter().map(|&v| v as f64).sum::<f64>();
            }
        }
    }
    out
}

/// Forward (`inverse == false`) or inverse GDN over `(B, C, H, W)` with `β (C)`, `γ (C, C)`.
///
/// With several images per thread the images run in parallel (one per task); the parameter
/// gradients are summed per fixed group of images and the groups added in order, so results
/// depend on the thread count only, never on scheduling.
#[derive(Debug, Clone, Copy)]
pub struct FusedGdn {
    /// Multiply by `√n` instead of dividing.
    pub inverse: bool,
}

impl CustomOp3 for FusedGdn {
    fn name(&self) -> &'static str {
        if self.inverse { "kiln-fused-igdn" } else { "kiln-fused-gdn" }
    }

    fn cpu_fwd(
        &self,
        s1: &CpuStorage,
        l1: &Layout,
        s2: &CpuStorage,
        l2: &Layout,
        s3: &CpuStorage,
        l3: &Layout,
    ) -> Result<(CpuStorage, Shape)> {
        let (b, c, h, w) = l1.shape().dims4()?;
        let (x, beta, gamma) = (contiguous_f32(s1, l1)?, contiguous_f32(s2, l2)?, contiguous_f32(s3, l3)?);
        if beta.len() != c || gamma.len() != c * c {
            bail!("fused GDN: parameters do not match {c} channels");
        }
        let p = h * w;
        let gamma = &flush_subnormal(gamma)[..];
        let mut y = vec![0f32; x.len()];
        let inverse = self.inverse;
        let image = |(bi, yb): (usize, &mut [f32])| {
            forward_image(&x[bi * c * p..(bi + 1) * c * p], beta, gamma, c, p, inverse, yb)
        };
        if batch_parallel(b) {
            y.par_chunks_mut(c * p).enumerate().for_each(image);
        } else {
            y.chunks_mut(c * p).enumerate().for_each(image);
        }
        Ok((CpuStorage::F32(y), l1.shape().clone()))
    }

    fn bwd(
        &self,
        x: &Tensor,
        beta: &Tensor,
        gamma: &Tensor,
        _res: &Tensor,
        grad: &Tensor,
    ) -> Result<(Option<Tensor>, Option<Tensor>, Option<Tensor>)> {
        let (b, c, h, w) = x.dims4()?;
        let op = FusedGdnGrad {
            inverse: self.inverse,
            beta: beta.to_vec1::<f32>()?,
            gamma: flush_subnormal(&gamma.flatten_all()?.to_vec1::<f32>()?),
        };
        // One buffer [dx | dβ | dγ], split by views.
        let all = x.contiguous()?.apply_op2_no_bwd(&grad.contiguous()?, &op)?;
        let n = b * c * h * w;
        Ok((
            Some(all.narrow(0, 0, n)?.reshape((b, c, h, w))?),
            Some(all.narrow(0, n, c)?),
            Some(all.narrow(0, n + c, c * c)?.reshape((c, c))?),
        ))
    }
}

/// The backward pass of [`FusedGdn`] over `(x, dy)`, both `(B, C, H, W)`: returns `dx`, `dβ`
/// and `dγ` flattened into one buffer, read straight from the tensors' storage.
#[derive(Debug, Clone)]
struct FusedGdnGrad {
    inverse: bool,
    beta: Vec<f32>,
    gamma: Vec<f32>,
}

impl CustomOp2 for FusedGdnGrad {
    fn name(&self) -> &'static str {
        "kiln-fused-gdn-grad"
    }

    fn cpu_fwd(&self, s1: &CpuStorage, l1: &Layout, s2: &CpuStorage, l2: &Layout) -> Result<(CpuStorage, Shape)> {
        let (b, c, h, w) = l1.shape().dims4()?;
        let (xs, dys) = (contiguous_f32(s1, l1)?, contiguous_f32(s2, l2)?);
        let p = h * w;
        let (be, ga, inverse) = (&self.beta, &self.gamma, self.inverse);
        let mut dx = vec![0f32; xs.len() + c + c * c];
        let images = images_per_group(b);
        let per = images * c * p;
        let run = |(i, dxg): (usize, &mut [f32])| {
            let r = i * per..(i * per + dxg.len());
            backward_images(&xs[r.clone()], &dys[r], be, ga, c, p, inverse, dxg)
        };
        let (dxs, params) = dx.split_at_mut(xs.len());
        let parts: Vec<GdnParamGrads> = if images < b {
            dxs.par_chunks_mut(per).enumerate().map(run).collect()
        } else {
            dxs.chunks_mut(per).enumerate().map(run).collect()
        };
        let mut dbeta = vec![0f64; c];
        let (db, dg) = params.split_at_mut(c);
        for part in &parts {
            dg.iter_mut().zip(&part.dgamma).for_each(|(t, v)| *t += v);
            dbeta.iter_mut().zip(&part.dbeta).for_each(|(t, v)| *t += v);
        }
        db.iter_mut().zip(&dbeta).for_each(|(o, v)| *o = *v as f32);
        let n = dx.len();
        Ok((CpuStorage::F32(dx), Shape::from(n)))
    }
}

#[cfg(test)]
mod tests {
    use super::flush_subnormal;

    #[test]
    fn only_subnormal_entries_are_flushed() {
        let tiny = f32::MIN_POSITIVE;
        let v = [1.0, tiny, tiny / 2.0, -tiny / 4.0, 0.0, 1e-30];
        assert_eq!(flush_subnormal(&v), vec![1.0, tiny, 0.0, 0.0, 0.0, 1e-30]);
    }
}
