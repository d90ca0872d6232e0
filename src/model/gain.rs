//! Gain units for variable rate: one learned per-channel gain vector per trade-off anchor, with
//! exponential interpolation between neighbouring anchors.
//!
//! Four tables, each `(L, C)` and stored as natural-log gains: `gain.y` scales the latent before
//! rounding, `gain.y_inv` undoes it before synthesis, `gain.z` and `gain.z_inv` do the same for
//! the hyper-latent. Interpolating log-gains linearly is the exponential interpolation
//! `g = g_i^(1−l) · g_{i+1}^l`.
//!
//! Gains used on the decoder's table-selecting path come from [`GainUnits::at`], which evaluates
//! `exp` with the pure-software `libm` so the value is the same on every machine.

use candle_core::{Result, Tensor};
use candle_nn::{Init, VarBuilder};

use super::config::ModelConfig;

/// The gain tables of a model: the four above, and with [`ModelConfig::hyper_gains`] two more,
/// `gain.hs_mu` and `gain.hs_ls` `(L, M)`, that tell the hyper-synthesis the quality: its
/// predicted means are multiplied by `exp(hs_mu)` and its log-scales shifted by `hs_ls`
/// (interpolated like the others). They start at zero, i.e. as if absent.
#[derive(Debug, Clone)]
pub struct GainUnits {
    /// Log-gains applied to `y` before rounding, `(L, M)`.
    pub y: Tensor,
    /// Log-gains applied to `ŷ` before synthesis, `(L, M)`.
    pub y_inv: Tensor,
    /// Log-gains applied to `z` before rounding, `(L, Nz)`.
    pub z: Tensor,
    /// Log-gains applied to `ẑ` before hyper-synthesis, `(L, Nz)`.
    pub z_inv: Tensor,
    /// Log-multipliers of the hyper-synthesis' means and shifts of its log-scales, `(L, M)`
    /// each, when the model has them.
    pub hyper: Option<(Tensor, Tensor)>,
}

/// Gain vectors for one quality, evaluated on the CPU.
#[derive(Debug, Clone, PartialEq)]
pub struct GainVectors {
    /// Multiplies `y` (length M).
    pub y: Vec<f32>,
    /// Multiplies `ŷ` (length M).
    pub y_inv: Vec<f32>,
    /// Multiplies `z` (length Nz).
    pub z: Vec<f32>,
    /// Multiplies `ẑ` (length Nz).
    pub z_inv: Vec<f32>,
    /// Multiplies the hyper-synthesis' means and is added to its log-scales (length M each),
    /// when the model has hyper gains.
    pub hyper: Option<(Vec<f32>, Vec<f32>)>,
}

impl GainUnits {
    /// Creates the tables (all zero log-gains, i.e. unit gains) under `vb.pp("gain")`.
    pub fn new(c: &ModelConfig, vb: VarBuilder) -> Result<Self> {
        let l = c.anchors();
        Ok(GainUnits {
            y: vb.get_with_hints((l, c.m), "y", Init::Const(0.0))?,
            y_inv: vb.get_with_hints((l, c.m), "y_inv", Init::Const(0.0))?,
            z: vb.get_with_hints((l, c.nz), "z", Init::Const(0.0))?,
            z_inv: vb.get_with_hints((l, c.nz), "z_inv", Init::Const(0.0))?,
            hyper: if c.hyper_gains {
                Some((
                    vb.get_with_hints((l, c.m), "hs_mu", Init::Const(0.0))?,
                    vb.get_with_hints((l, c.m), "hs_ls", Init::Const(0.0))?,
                ))
            } else {
                None
            },
        })
    }

    /// Gain vectors at anchor position `(i, l)` (see [`ModelConfig::anchor_position`]).
    pub fn at(&self, i: usize, l: f32) -> Result<GainVectors> {
        let mix = |t: &Tensor| -> Result<Vec<f32>> {
            let a = t.get(i)?.to_vec1::<f32>()?;
            let b = t.get(i + 1)?.to_vec1::<f32>()?;
            Ok(a.iter().zip(&b).map(|(a, b)| a * (1.0 - l) + b * l).collect())
        };
        let row = |t: &Tensor| -> Result<Vec<f32>> { Ok(mix(t)?.into_iter().map(libm::expf).collect()) };
        let hyper = match &self.hyper {
            Some((mu, ls)) => Some((row(mu)?, mix(ls)?)),
            None => None,
        };
        Ok(GainVectors {
            y: row(&self.y)?,
            y_inv: row(&self.y_inv)?,
            z: row(&self.z)?,
            z_inv: row(&self.z_inv)?,
            hyper,
        })
    }

    /// Per-sample gains for training: `index` `(B,)` u32 anchor indices, `weight` `(B,)` f32
    /// interpolation weights. Returns a `(B, C, 1, 1)` tensor of gains from `table`.
    pub fn batch(table: &Tensor, index: &Tensor, weight: &Tensor) -> Result<Tensor> {
        Self::batch_log(table, index, weight)?.exp()
    }

    /// Like [`GainUnits::batch`], the interpolated table values themselves (not their `exp`).
    pub fn batch_log(table: &Tensor, index: &Tensor, weight: &Tensor) -> Result<Tensor> {
        let lo = table.index_select(index, 0)?;
        let hi = table.index_select(&(index + 1.0)?.to_dtype(candle_core::DType::U32)?, 0)?;
        let w = weight.unsqueeze(1)?;
        let lg = (lo.broadcast_mul(&(1.0 - &w)?)? + hi.broadcast_mul(&w)?)?;
        let (b, c) = lg.dims2()?;
        lg.reshape((b, c, 1, 1))
    }
}

/// Names of the four gain tables every model has.
pub const GAIN_TABLES: [&str; 4] = ["gain.y", "gain.y_inv", "gain.z", "gain.z_inv"];

/// Names of the hyper-gain tables of a model with [`ModelConfig::hyper_gains`].
pub const HYPER_GAIN_TABLES: [&str; 2] = ["gain.hs_mu", "gain.hs_ls"];

/// Re-targets log-gain tables `(L_old, C)` trained at anchors `old` to new anchors `new`.
///
/// Each new row is the old rows' log-gains interpolated linearly in `ln λ` between the two old
/// anchors around it, and extrapolated along the first or last segment outside `old`'s range:
/// the same exponential interpolation the codec uses between anchors, continued. A new anchor
/// equal to an old one gets that row exactly. Both lists must be increasing with at least two
/// entries (as [`ModelConfig::validate`] demands).
///
/// ```
/// use candle_core::{Device, Tensor};
/// use kiln::model::gain::retarget_rows;
/// let old = Tensor::new(&[[0.0f32], [1.0]], &Device::Cpu).unwrap();
/// let out = retarget_rows(&old, &[1.0, std::f64::consts::E], &[std::f64::consts::E.powi(2)]).unwrap();
/// assert!((out.to_vec2::<f32>().unwrap()[0][0] - 2.0).abs() < 1e-6);
/// ```
pub fn retarget_rows(table: &Tensor, old: &[f64], new: &[f64]) -> Result<Tensor> {
    let rows = table.to_vec2::<f32>()?;
    if rows.len() != old.len() || old.len() < 2 {
        candle_core::bail!("gain table has {} rows for {} anchors", rows.len(), old.len());
    }
    let lo: Vec<f64> = old.iter().map(|l| l.ln()).collect();
    let mut out: Vec<Vec<f32>> = Vec::with_capacity(new.len());
    for &lam in new {
        let t = lam.ln();
        if let Some(i) = old.iter().position(|&o| o == lam) {
            out.push(rows[i].clone());
            continue;
        }
        let seg = lo.windows(2).position(|w| t < w[1]).unwrap_or(lo.len() - 2);
        let w = ((t - lo[seg]) / (lo[seg + 1] - lo[seg])) as f32;
        out.push(rows[seg].iter().zip(&rows[seg + 1]).map(|(a, b)| a * (1.0 - w) + b * w).collect());
    }
    let c = rows[0].len();
    Tensor::from_vec(out.concat(), (new.len(), c), table.device())
}

#[cfg(test)]
mod tests {
    use super::*;
    use candle_core::Device;

    #[test]
    fn retargeting_is_exact_for_log_gains_linear_in_log_lambda() {
        // log-gain = a + b·ln λ per channel, interpolated and extrapolated exactly.
        let old = [0.01, 0.02, 0.08];
        let row = |l: f64| [(0.3 + 0.5 * l.ln()) as f32, (-1.0 + 0.25 * l.ln()) as f32];
        let table = Tensor::new(&[row(old[0]), row(old[1]), row(old[2])], &Device::Cpu).unwrap();
        let new = [0.005, 0.02, 0.04, 0.32];
        let got = retarget_rows(&table, &old, &new).unwrap().to_vec2::<f32>().unwrap();
        for (g, &l) in got.iter().zip(&new) {
            for (a, b) in g.iter().zip(row(l)) {
                assert!((a - b).abs() < 1e-5, "λ {l}: {a} vs {b}");
            }
        }
        assert!(retarget_rows(&table, &old[..2], &new).is_err());
    }
}
