//! GDN and inverse GDN as one operation with a hand-written backward pass.
//!
//! `n = γ·x² + β` per pixel (a C×C product over channels), then `y = x / √n` (GDN) or
//! `y = x · √n` (inverse). With `s = n^(∓½)` and `g_j = dy_j · ∂y_j/∂n_j`
//! (`−½·x_j·n_j^(−3/2)` for GDN, `½·x_j·n_j^(−½)` for the inverse):
//! `dx = dy·s + 2x·(γᵀg)`, `dγ = Σ_pixels g·(x²)ᵀ`, `dβ = Σ_pixels g`.
//! The three products run on gemm, one image at a time; everything else is one pass over the
//! data. `β` and `γ` come in already re-parameterised, so candle differentiates that part.

use candle_core::{CpuStorage, CustomOp3, Layout, Result, Shape, Tensor, bail};
use rayon::prelude::*;

use super::conv::contiguous_f32;
use super::fused_conv::View;

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

/// `n = γ·x² + β` for one image `(C, P)`.
fn norm(x: &[f32], beta: &[f32], gamma: &[f32], c: usize, p: usize, n: &mut [f32]) {
    let x2: Vec<f32> = x.par_iter().map(|v| v * v).collect();
    matmul(c, p, c, n, false, gamma, c, 1, &x2, p, 1);
    n.par_chunks_mut(p).zip(beta.par_iter()).for_each(|(row, &b)| row.iter_mut().for_each(|v| *v += b));
}

/// Forward (`inverse == false`) or inverse GDN over `(B, C, H, W)` with `β (C)`, `γ (C, C)`.
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
        let mut y = vec![0f32; x.len()];
        let mut n = vec![0f32; c * p];
        for bi in 0..b {
            let xb = &x[bi * c * p..(bi + 1) * c * p];
            norm(xb, beta, gamma, c, p, &mut n);
            let inverse = self.inverse;
            y[bi * c * p..(bi + 1) * c * p].par_iter_mut().zip(xb.par_iter().zip(n.par_iter())).for_each(
                |(o, (&xv, &nv))| {
                    *o = if inverse { xv * nv.sqrt() } else { xv / nv.sqrt() };
                },
            );
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
        let p = h * w;
        let xs = x.flatten_all()?.to_vec1::<f32>()?;
        let dys = grad.contiguous()?.flatten_all()?.to_vec1::<f32>()?;
        let be = beta.to_vec1::<f32>()?;
        let ga = gamma.flatten_all()?.to_vec1::<f32>()?;
        let mut dx = vec![0f32; xs.len()];
        let mut dgamma = vec![0f32; c * c];
        let mut dbeta = vec![0f64; c];
        let mut n = vec![0f32; c * p];
        let mut g = vec![0f32; c * p];
        let mut gt = vec![0f32; c * p];
        for bi in 0..b {
            let range = bi * c * p..(bi + 1) * c * p;
            let (xb, dyb) = (&xs[range.clone()], &dys[range.clone()]);
            norm(xb, &be, &ga, c, p, &mut n);
            let inverse = self.inverse;
            // g = dy · ∂y/∂n, and the direct term dy·s into dx.
            g.par_iter_mut()
                .zip(dx[range.clone()].par_iter_mut())
                .zip(xb.par_iter().zip(dyb.par_iter().zip(n.par_iter())))
                .for_each(|((gv, dxv), (&xv, (&dy, &nv)))| {
                    let r = nv.sqrt();
                    if inverse {
                        *gv = dy * 0.5 * xv / r;
                        *dxv = dy * r;
                    } else {
                        *gv = -0.5 * dy * xv / (nv * r);
                        *dxv = dy / r;
                    }
                });
            // γᵀ g: (C × C)ᵀ · (C × P).
            matmul(c, p, c, &mut gt, false, &ga, 1, c, &g, p, 1);
            dx[range]
                .par_iter_mut()
                .zip(xb.par_iter().zip(gt.par_iter()))
                .for_each(|(d, (&xv, &t))| *d += 2.0 * xv * t);
            // dγ += g · (x²)ᵀ: (C × P) · (P × C).
            let x2: Vec<f32> = xb.par_iter().map(|v| v * v).collect();
            matmul(c, c, p, &mut dgamma, bi > 0, &g, p, 1, &x2, 1, p);
            for (ch, db) in dbeta.iter_mut().enumerate() {
                *db += g[ch * p..(ch + 1) * p].iter().map(|&v| v as f64).sum::<f64>();
            }
        }
        let dev = x.device();
        Ok((
            Some(Tensor::from_vec(dx, (b, c, h, w), dev)?),
            Some(Tensor::from_vec(dbeta.into_iter().map(|v| v as f32).collect::<Vec<_>>(), c, dev)?),
            Some(Tensor::from_vec(dgamma, (c, c), dev)?),
        ))
    }
}
