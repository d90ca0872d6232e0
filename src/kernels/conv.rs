//! Convolution building blocks: im2col in two layouts (channel-major columns and NHWC patch
//! rows) followed by candle's matrix product, with their adjoints as backward passes so candle's
//! autograd differentiates the whole convolution; and the backend switch. The fastest variant,
//! used by the model, is the fused operation in [`super::fused_conv`]; the variants here are
//! kept as references and for the benches.
//!
//! `conv2d(x, w)` = `W (O × C·k²) · cols(x) (B × C·k² × L)`, `L = H_out · W_out`. The gradients
//! are two more matrix products (`dW = dY · colsᵀ`, `dcols = Wᵀ · dY`) and one col2im, instead
//! of candle's transposed convolution.
//!
//! This is the fast path: its summation order follows gemm's blocking and threads, so it is
//! used for `g_a`, `g_s` and training, never for the table-selecting hyper-synthesis (see
//! [`super::fixed`]).

use std::sync::atomic::{AtomicU8, Ordering};

use candle_core::{CpuStorage, CustomOp1, Layout, Result, Shape, Tensor, bail};
use rayon::prelude::*;

/// Which implementation the model's convolution layers use.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ConvBackend {
    /// The fused patch-rows + gemm convolution ([`super::fused_conv`]), 3×3 stride-1 layers by
    /// Winograd's method (`kernels::winograd`) and stride-2 layers over few input channels by
    /// a vectorized direct kernel (`kernels::few_inputs`): the default.
    Fast,
    /// As `Fast`, but every layer as a gemm (implicit GEMM or patch rows): for comparison.
    GemmOnly,
    /// candle's built-in `conv2d` (for comparison in benches).
    Candle,
}

static BACKEND: AtomicU8 = AtomicU8::new(0);

/// Selects the backend for the whole process (`KILN_CONV=candle` or `KILN_CONV=gemm` in the
/// environment selects one at start-up of the command-line tool).
pub fn set_backend(b: ConvBackend) {
    BACKEND.store(b as u8, Ordering::Relaxed);
}

/// The backend in use.
pub fn backend() -> ConvBackend {
    match BACKEND.load(Ordering::Relaxed) {
        1 => ConvBackend::GemmOnly,
        2 => ConvBackend::Candle,
        _ => ConvBackend::Fast,
    }
}

/// Convolution plus per-channel bias through the selected backend.
pub fn conv2d_selected(x: &Tensor, weight: &Tensor, bias: &Tensor, stride: usize, pad: usize) -> Result<Tensor> {
    match backend() {
        ConvBackend::Fast | ConvBackend::GemmOnly => super::fused_conv::conv2d_fused(x, weight, bias, stride, pad),
        ConvBackend::Candle => x.conv2d(weight, pad, stride, 1, 1)?.broadcast_add(&bias.reshape((1, (), 1, 1))?),
    }
}

/// Geometry of a square convolution.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Im2Col {
    /// Kernel size.
    pub k: usize,
    /// Stride.
    pub stride: usize,
    /// Zero padding on every side.
    pub pad: usize,
}

impl Im2Col {
    /// Output height and width for an `h × w` input.
    pub fn output_size(&self, h: usize, w: usize) -> (usize, usize) {
        ((h + 2 * self.pad - self.k) / self.stride + 1, (w + 2 * self.pad - self.k) / self.stride + 1)
    }

    /// Output positions `ox0..ox1` whose tap `t` falls inside an input row of length `n`.
    #[inline]
    fn valid_range(&self, t: usize, n: usize, out: usize) -> (usize, usize) {
        // ox·s + t − pad ≥ 0  and  ox·s + t − pad ≤ n − 1
        let lo = self.pad.saturating_sub(t).div_ceil(self.stride);
        let hi = if n + self.pad > t { ((n + self.pad - t - 1) / self.stride + 1).min(out) } else { 0 };
        (lo.min(hi), hi)
    }

    /// Source index along one axis of output position `o` and tap `t`, if inside the input.
    #[inline]
    fn source(&self, o: usize, t: usize, n: usize) -> Option<usize> {
        let i = (o * self.stride + t).checked_sub(self.pad)?;
        (i < n).then_some(i)
    }
}

/// The `f32` values of a contiguous CPU tensor (custom ops here require contiguous inputs).
pub(crate) fn contiguous_f32<'a>(storage: &'a CpuStorage, layout: &Layout) -> Result<&'a [f32]> {
    let Some((start, end)) = layout.contiguous_offsets() else { bail!("im2col: input must be contiguous") };
    Ok(&storage.as_slice::<f32>()?[start..end])
}

/// `f` on the data of a CPU f32 tensor in row-major order, read in place (no copy unless the
/// tensor is not contiguous): the decoder's activations are megabytes each.
pub(crate) fn with_f32<T>(t: &Tensor, f: impl FnOnce(&[f32]) -> Result<T>) -> Result<T> {
    let t = t.contiguous()?;
    let (storage, layout) = t.storage_and_layout();
    match &*storage {
        candle_core::Storage::Cpu(cpu) => f(contiguous_f32(cpu, layout)?),
        _ => bail!("kiln's kernels run on the CPU: move the tensor to Device::Cpu first"),
    }
}

impl CustomOp1 for Im2Col {
    fn name(&self) -> &'static str {
        "kiln-im2col"
    }

    fn cpu_fwd(&self, storage: &CpuStorage, layout: &Layout) -> Result<(CpuStorage, Shape)> {
        let (b, c, h, w) = layout.shape().dims4()?;
        let x = contiguous_f32(storage, layout)?;
        let (ho, wo) = self.output_size(h, w);
        let (k, l) = (self.k, ho * wo);
        let mut cols = vec![0f32; b * c * k * k * l];
        // One row per (batch, channel, ky, kx): independent, so rows fill in parallel.
        cols.par_chunks_mut(l).enumerate().for_each(|(row, out)| {
            let kx = row % k;
            let ky = (row / k) % k;
            let plane = row / (k * k); // batch * c + channel
            let src = &x[plane * h * w..(plane + 1) * h * w];
            let (ox0, ox1) = self.valid_range(kx, w, wo);
            for oy in 0..ho {
                let Some(iy) = self.source(oy, ky, h) else { continue };
                let srow = &src[iy * w..(iy + 1) * w];
                let line = &mut out[oy * wo + ox0..oy * wo + ox1];
                let first = ox0 * self.stride + kx - self.pad;
                if self.stride == 1 {
                    line.copy_from_slice(&srow[first..first + line.len()]);
                } else {
                    for (j, v) in line.iter_mut().enumerate() {
                        *v = srow[first + j * self.stride];
                    }
                }
            }
        });
        Ok((CpuStorage::F32(cols), Shape::from((b, c * k * k, l))))
    }

    fn bwd(&self, arg: &Tensor, _res: &Tensor, grad_res: &Tensor) -> Result<Option<Tensor>> {
        let (_, _, h, w) = arg.dims4()?;
        let op = Col2Im { geometry: *self, c: arg.dim(1)?, h, w };
        Ok(Some(grad_res.contiguous()?.apply_op1_no_bwd(&op)?))
    }
}

/// The adjoint of [`Im2Col`]: sums column entries back onto the image they came from.
#[derive(Debug, Clone, Copy)]
pub struct Col2Im {
    geometry: Im2Col,
    c: usize,
    h: usize,
    w: usize,
}

impl CustomOp1 for Col2Im {
    fn name(&self) -> &'static str {
        "kiln-col2im"
    }

    fn cpu_fwd(&self, storage: &CpuStorage, layout: &Layout) -> Result<(CpuStorage, Shape)> {
        let (b, _, l) = layout.shape().dims3()?;
        let g = self.geometry;
        let cols = contiguous_f32(storage, layout)?;
        let (ho, wo) = g.output_size(self.h, self.w);
        if ho * wo != l {
            bail!("col2im: {l} columns do not match a {ho}×{wo} output");
        }
        let (k, h, w) = (g.k, self.h, self.w);
        let mut img = vec![0f32; b * self.c * h * w];
        // One plane per (batch, channel); taps added in a fixed order.
        img.par_chunks_mut(h * w).enumerate().for_each(|(plane, out)| {
            for ky in 0..k {
                for kx in 0..k {
                    let row = &cols[((plane * k + ky) * k + kx) * l..((plane * k + ky) * k + kx + 1) * l];
                    let (ox0, ox1) = g.valid_range(kx, w, wo);
                    for oy in 0..ho {
                        let Some(iy) = g.source(oy, ky, h) else { continue };
                        let orow = &mut out[iy * w..(iy + 1) * w];
                        let first = ox0 * g.stride + kx - g.pad;
                        for (j, &v) in row[oy * wo + ox0..oy * wo + ox1].iter().enumerate() {
                            orow[first + j * g.stride] += v;
                        }
                    }
                }
            }
        });
        Ok((CpuStorage::F32(img), Shape::from((b, self.c, h, w))))
    }
}

/// Patch-major im2col on an NHWC input: row `(b, oy, ox)` holds the patch as `[ky][kx][c]`, so
/// each kernel row of a patch is one contiguous copy of `k·C` values (or `C` values per tap at
/// the borders). Output `(B·Ho·Wo, k·k·C)`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct PatchRows(pub Im2Col);

impl CustomOp1 for PatchRows {
    fn name(&self) -> &'static str {
        "kiln-patch-rows"
    }

    fn cpu_fwd(&self, storage: &CpuStorage, layout: &Layout) -> Result<(CpuStorage, Shape)> {
        let (b, h, w, c) = layout.shape().dims4()?;
        let x = contiguous_f32(storage, layout)?;
        let g = self.0;
        let (ho, wo) = g.output_size(h, w);
        let row = g.k * g.k * c;
        let mut cols = vec![0f32; b * ho * wo * row];
        cols.par_chunks_mut(wo * row).enumerate().for_each(|(line, out)| {
            let (bi, oy) = (line / ho, line % ho);
            let img = &x[bi * h * w * c..(bi + 1) * h * w * c];
            for ky in 0..g.k {
                let Some(iy) = g.source(oy, ky, h) else { continue };
                let src = &img[iy * w * c..(iy + 1) * w * c];
                for ox in 0..wo {
                    let dst = &mut out[ox * row + ky * g.k * c..ox * row + (ky + 1) * g.k * c];
                    let x0 = (ox * g.stride) as isize - g.pad as isize;
                    if x0 >= 0 && x0 as usize + g.k <= w {
                        let x0 = x0 as usize;
                        dst.copy_from_slice(&src[x0 * c..(x0 + g.k) * c]);
                    } else {
                        for kx in 0..g.k {
                            if let Some(ix) = g.source(ox, kx, w) {
                                dst[kx * c..(kx + 1) * c].copy_from_slice(&src[ix * c..(ix + 1) * c]);
                            }
                        }
                    }
                }
            }
        });
        Ok((CpuStorage::F32(cols), Shape::from((b * ho * wo, row))))
    }

    fn bwd(&self, arg: &Tensor, _res: &Tensor, grad_res: &Tensor) -> Result<Option<Tensor>> {
        let (b, h, w, c) = arg.dims4()?;
        let op = PatchRowsAdjoint { geometry: self.0, b, h, w, c };
        Ok(Some(grad_res.contiguous()?.apply_op1_no_bwd(&op)?))
    }
}

/// The adjoint of [`PatchRows`]: sums patch rows back onto the NHWC image.
#[derive(Debug, Clone, Copy)]
pub struct PatchRowsAdjoint {
    geometry: Im2Col,
    b: usize,
    h: usize,
    w: usize,
    c: usize,
}

impl CustomOp1 for PatchRowsAdjoint {
    fn name(&self) -> &'static str {
        "kiln-patch-rows-adjoint"
    }

    fn cpu_fwd(&self, storage: &CpuStorage, layout: &Layout) -> Result<(CpuStorage, Shape)> {
        let (g, b, h, w, c) = (self.geometry, self.b, self.h, self.w, self.c);
        let cols = contiguous_f32(storage, layout)?;
        let (ho, wo) = g.output_size(h, w);
        let row = g.k * g.k * c;
        if cols.len() != b * ho * wo * row {
            bail!("patch-rows adjoint: {} values do not match {b}×{ho}×{wo} patches of {row}", cols.len());
        }
        let mut img = vec![0f32; b * h * w * c];
        // One input row (b, iy) at a time: the sums into it run in a fixed order.
        img.par_chunks_mut(w * c).enumerate().for_each(|(line, out)| {
            let (bi, iy) = (line / h, line % h);
            for ky in 0..g.k {
                // Output rows oy with oy·s + ky − pad = iy.
                let t = iy + g.pad;
                if t < ky || (t - ky) % g.stride != 0 {
                    continue;
                }
                let oy = (t - ky) / g.stride;
                if oy >= ho {
                    continue;
                }
                for ox in 0..wo {
                    let patch = &cols[((bi * ho + oy) * wo + ox) * row + ky * g.k * c..][..g.k * c];
                    for kx in 0..g.k {
                        if let Some(ix) = g.source(ox, kx, w) {
                            for (o, &v) in out[ix * c..(ix + 1) * c].iter_mut().zip(&patch[kx * c..(kx + 1) * c]) {
                                *o += v;
                            }
                        }
                    }
                }
            }
        });
        Ok((CpuStorage::F32(img), Shape::from((b, h, w, c))))
    }
}

/// Below this many input channels the patch rows are too short to pay for the NHWC copy, and
/// the channel-major layout is faster (measured: 3→64 5×5 s2 at 128², fwd+bwd 39 vs 55 ms).
pub const PATCH_ROWS_MIN_CHANNELS: usize = 8;

/// Convolution of `x` `(B, C, H, W)` with `weight` `(O, C, k, k)`, zero padding `pad`, stride
/// `stride`; differentiable in both arguments.
///
/// The input is turned to NHWC and unrolled into patch rows `(B·L, k²C)`, so the whole batch is
/// one tall matrix product `(B·L × k²C)·(k²C × O)` — the shape gemm runs fastest on — and both
/// gradients are single products too.
pub fn conv2d(x: &Tensor, weight: &Tensor, stride: usize, pad: usize) -> Result<Tensor> {
    let (b, c, h, w) = x.dims4()?;
    let (o, _, k, _) = weight.dims4()?;
    if c < PATCH_ROWS_MIN_CHANNELS {
        return conv2d_channel_major(x, weight, stride, pad);
    }
    let geometry = Im2Col { k, stride, pad };
    let (ho, wo) = geometry.output_size(h, w);
    let rows = x.permute((0, 2, 3, 1))?.contiguous()?.apply_op1(PatchRows(geometry))?;
    let wm = weight.permute((2, 3, 1, 0))?.reshape((k * k * c, o))?;
    rows.matmul(&wm)?.reshape((b, ho, wo, o))?.permute((0, 3, 1, 2))?.contiguous()
}

/// The channel-major variant: `W (O × C·k²) · cols (B × C·k² × L)`, one product per image
/// (kept for comparison in benches).
pub fn conv2d_channel_major(x: &Tensor, weight: &Tensor, stride: usize, pad: usize) -> Result<Tensor> {
    let (b, _, h, w) = x.dims4()?;
    let (o, c, k, _) = weight.dims4()?;
    let geometry = Im2Col { k, stride, pad };
    let (ho, wo) = geometry.output_size(h, w);
    let cols = x.contiguous()?.apply_op1(geometry)?; // (B, C·k², L)
    let wm = weight.reshape((o, c * k * k))?;
    wm.broadcast_matmul(&cols)?.reshape((b, o, ho, wo))
}
