//! Growing a trained model without losing what it has learned: more latent channels `M`
//! ([`widen_latent`]) or more hidden channels `N` in the transforms ([`widen_hidden`]).
//!
//! A model with a grown latent starts out reconstructing exactly what the old one did, with new
//! channels that carry a signal from the first step. The analysis computes each new channel with
//! a fresh model's initial row rescaled to the old rows' mean norm, so the new channels are as
//! large as the old ones and most of their values do not round to zero. The synthesis reads them
//! with zero weights: the image is unchanged, and since the rounded values are not zero those
//! weights get a distortion gradient at once. The first hyper-analysis layer reads them with
//! zero weights too (the hyper-latent is unchanged), and the hyper-synthesis predicts mean 0 for
//! them at the wide scale [`NEW_CHANNEL_SCALE`]; the training's rate warm-up
//! ([`crate::train::checkpoint::LatentWarmup`]) keeps their bits out of the loss at first, so
//! that the rate cannot pull them to zero before the synthesis has learned to use them. Their
//! gains start at the mean of the old channels' gains for the same anchor.
//!
//! Measured: a first rule (rows and synthesis weights a tenth of a fresh model's, new values
//! predicted at scale 0.2) started cheaper (+0.007 bpp) but its channels never came alive: after
//! 18 000 steps none of their values rounded to anything but zero on the validation photographs
//! (`examples/latent_usage`), since the rate pulled them to zero (`y / 0.04`) before the
//! synthesis could use them. The same happened to this rule's channels when their bits counted
//! from the start, or rose linearly from 0 (collapsed within 1000 steps): Adam moves a weight
//! as fast for a small consistent gradient as for a large one, so only a hold at 0 protects them.
//!
//! Which rule a tensor gets is decided by its shape (a dimension that was `M`, or `2M` for the
//! hyper-synthesis output: means then log-scales) and, for reading weights, by its transform.
//!
//! ```
//! use std::collections::HashMap;
//! use kiln::{Model, ModelConfig};
//! use kiln::train::widen::widen_latent;
//!
//! let small = Model::new(ModelConfig::tiny(), 1).unwrap();
//! let tensors: HashMap<_, _> = small.named_vars().into_iter().map(|(n, v)| (n, v.as_tensor().clone())).collect();
//! let grown = widen_latent(&tensors, &small.config, 20, 7).unwrap();
//! assert_eq!(grown["g_a.6.weight"].dims()[0], 20);
//! assert_eq!(grown["g_s.0.weight"].dims()[1], 20);
//! ```

use std::collections::HashMap;

use candle_core::{D, Tensor};

use crate::error::{KilnError, Result};
use crate::model::{Model, ModelConfig};

/// Scale the hyper-synthesis predicts for a new channel at first (with zero weights). The old
/// channels' gained values have an RMS of about 1 at the lowest anchor and 4.5 at the highest
/// (default model, validation photographs); at scale 4 a value costs about 3–4 bits, and the
/// rate's gradient on it is a sixteenth of what it would be at scale 1.
pub const NEW_CHANNEL_SCALE: f64 = 4.0;

/// What the new slice of a grown tensor starts as.
enum Fill {
    /// Zero (the synthesis' and hyper-analysis' weights reading the new channels).
    Zero,
    /// A fresh model's seeded initial rows, each rescaled to the old rows' mean L2 norm (the
    /// analysis' weights computing the new channels; a bias is taken as initialised).
    MatchedRows,
    /// Each row's mean over the old channels (log-gain tables, `(L, M)`).
    RowMean,
}

/// Grows the weights in `tensors` (a model's variables by name, and their Adam moments when
/// present: old entries keep theirs) of a model with configuration `old` to `m` latent channels.
///
/// Returns the variables of a model with `ModelConfig { m, ..old }`; new analysis rows come from
/// `Model::new(.., seed)`, rescaled. Fails when `m` is not larger than `old.m` or
/// when a tensor's shape does not match the configuration.
pub fn widen_latent(
    tensors: &HashMap<String, Tensor>,
    old: &ModelConfig,
    m: usize,
    seed: u64,
) -> Result<HashMap<String, Tensor>> {
    if m <= old.m {
        return Err(KilnError::InvalidArgument(format!(
            "--latent-channels {m} must be larger than the model's {}\nhint: a latent can only grow",
            old.m
        )));
    }
    let mut out = HashMap::new();
    for (name, t, new) in paired(tensors, &ModelConfig { m, ..old.clone() }, seed)? {
        let (t, new) = (&t, &new);
        let bad = || cannot_grow(&name, t, new);
        if t.rank() != new.rank() {
            return Err(bad());
        }
        let differing: Vec<usize> = (0..t.rank()).filter(|&d| t.dims()[d] != new.dims()[d]).collect();
        let (grown, halves) = match differing.as_slice() {
            [] => (t.clone(), false),
            &[d] if t.dims()[d] == old.m && new.dims()[d] == m => {
                let fill = if name.starts_with("gain.") {
                    Fill::RowMean
                } else if d == 0 {
                    Fill::MatchedRows
                } else {
                    Fill::Zero
                };
                (grow(t, new, d, old.m, m, fill)?, false)
            }
            [0] if t.dims()[0] == 2 * old.m && new.dims()[0] == 2 * m => (grow_mean_scale(t, new, old.m, m)?, true),
            _ => return Err(bad()),
        };
        if grown.dims() != t.dims() {
            out.extend(grow_moments(tensors, &name, new.dims(), halves)?);
        }
        out.insert(name, grown);
    }
    Ok(out)
}

/// Grows the hidden channels `N` of the analysis and synthesis transforms in `tensors` (a
/// model's variables by name, and their Adam moments when present) of a model with
/// configuration `old` to `n`, so that the grown model computes exactly what the old one did.
///
/// Each new hidden channel is computed with a fresh model's initial row (`Model::new(.., seed)`)
/// rescaled to the old rows' mean norm, normalised by its own GDN entries only (the old
/// channels' GDN reads it with zero weight), and read by the next layer with zero weights. So
/// nothing changes at first, and since the new channels' activations are not zero, the weights
/// reading them get a gradient from the first step (no rounding or rate stands in between, as it
/// does for latent channels). The hyper networks keep their width. Fails when `n` is not larger
/// than `old.n` or when a tensor's shape does not match the configuration.
pub fn widen_hidden(
    tensors: &HashMap<String, Tensor>,
    old: &ModelConfig,
    n: usize,
    seed: u64,
) -> Result<HashMap<String, Tensor>> {
    if n <= old.n {
        return Err(KilnError::InvalidArgument(format!(
            "--hidden-channels {n} must be larger than the model's {}\nhint: the transforms can only grow",
            old.n
        )));
    }
    let mut out = HashMap::new();
    for (name, t, new) in paired(tensors, &ModelConfig { n, ..old.clone() }, seed)? {
        let (t, new) = (&t, &new);
        if t.dims() == new.dims() {
            out.insert(name, t.clone());
            continue;
        }
        let transform = name.starts_with("g_a.") || name.starts_with("g_s.");
        if !transform || t.rank() != new.rank() || t.dims().iter().zip(new.dims()).any(|(a, b)| a > b) {
            return Err(cannot_grow(&name, t, new));
        }
        out.extend(grow_moments(tensors, &name, new.dims(), false)?);
        out.insert(name, grow_block(t, new)?);
    }
    Ok(out)
}

/// Each variable of a fresh model with configuration `grown` (seeded with `seed`) as
/// `(name, old tensor from tensors, fresh tensor)`; fails when `tensors` lacks one.
fn paired(tensors: &HashMap<String, Tensor>, grown: &ModelConfig, seed: u64) -> Result<Vec<(String, Tensor, Tensor)>> {
    let fresh = Model::new(grown.clone(), seed)?;
    fresh
        .named_vars()
        .into_iter()
        .map(|(name, var)| {
            let t = tensors.get(&name).ok_or_else(|| KilnError::BadModel(format!("missing weight {name}")))?.clone();
            Ok((name, t, var.as_tensor().clone()))
        })
        .collect()
}

/// The error for a weight whose shape does not grow to the new configuration's.
fn cannot_grow(name: &str, t: &Tensor, new: &Tensor) -> KilnError {
    KilnError::BadModel(format!("weight {name}: shape {:?} cannot grow to {:?}", t.dims(), new.dims()))
}

/// The Adam moments of variable `name` in `tensors` (`adam.m.{name}`, `adam.v.{name}`; none
/// when absent) grown to `shape` like the variable: the old entries keep theirs, which spares
/// the trained weights the large first steps of an optimizer without history (with moments
/// restarted at a late step, Adam's first steps are 3–6 times the learning rate: growing all
/// transforms with restarted moments dropped the training PSNR from 32 to about 28 dB within 50
/// steps). New entries start with a zero first moment and the old entries' mean second
/// moment, i.e. steps scaled like their neighbours'. `halves`: the variable is two stacked
/// halves along dimension 0 (means, then log-scales), each grown at its end.
fn grow_moments(
    tensors: &HashMap<String, Tensor>,
    name: &str,
    shape: &[usize],
    halves: bool,
) -> Result<HashMap<String, Tensor>> {
    let mut out = HashMap::new();
    for kind in ["m", "v"] {
        let key = format!("adam.{kind}.{name}");
        let Some(t) = tensors.get(&key) else { continue };
        let t = t.to_dtype(candle_core::DType::F32)?;
        let fill = if kind == "m" { 0.0 } else { t.mean_all()?.to_scalar::<f32>()? };
        let grown = if halves {
            let (old_half, mut half_shape) = (t.dim(0)? / 2, shape.to_vec());
            half_shape[0] /= 2;
            let a = embed(&t.narrow(0, 0, old_half)?, &half_shape, fill)?;
            let b = embed(&t.narrow(0, old_half, old_half)?, &half_shape, fill)?;
            Tensor::cat(&[&a, &b], 0)?
        } else {
            embed(&t, shape, fill)?
        };
        out.insert(key, grown);
    }
    Ok(out)
}

/// `t` as the leading block of a tensor of `shape`, the rest filled with `fill`.
fn embed(t: &Tensor, shape: &[usize], fill: f32) -> Result<Tensor> {
    let mut cur = t.clone();
    for (d, &len) in shape.iter().enumerate() {
        let have = cur.dim(d)?;
        if len > have {
            let mut extra = cur.dims().to_vec();
            extra[d] = len - have;
            let pad = (Tensor::ones(extra, cur.dtype(), cur.device())? * fill as f64)?;
            cur = Tensor::cat(&[&cur, &pad], d)?;
        }
    }
    Ok(cur)
}

/// `t` grown to the shape of `fresh` along dimensions 0 (outputs) and 1 (inputs): the old block
/// kept, old outputs reading new inputs zero, new outputs taken from `fresh` (convolution rows
/// rescaled to the old rows' mean norm).
fn grow_block(t: &Tensor, fresh: &Tensor) -> Result<Tensor> {
    let (old0, new0) = (t.dims()[0], fresh.dims()[0]);
    let mut top = t.clone();
    if t.rank() >= 2 && fresh.dims()[1] > t.dims()[1] {
        let mut shape = t.dims().to_vec();
        shape[1] = fresh.dims()[1] - t.dims()[1];
        top = Tensor::cat(&[t, &Tensor::zeros(shape, t.dtype(), t.device())?], 1)?;
    }
    if new0 == old0 {
        return Ok(top);
    }
    let rows = fresh.narrow(0, old0, new0 - old0)?;
    let rows = if t.rank() == 4 { matched_rows(t, &rows)? } else { rows };
    Ok(Tensor::cat(&[&top, &rows], 0)?)
}

/// `t` with its dimension `d` grown from `old` to `m`, the new slice filled by `fill`.
fn grow(t: &Tensor, fresh: &Tensor, d: usize, old: usize, m: usize, fill: Fill) -> Result<Tensor> {
    let extra = fresh.narrow(d, old, m - old)?;
    let extra = match fill {
        Fill::Zero => extra.zeros_like()?,
        Fill::MatchedRows if t.rank() == 1 => extra,
        Fill::MatchedRows => matched_rows(t, &extra)?,
        Fill::RowMean => t.mean_keepdim(D::Minus1)?.broadcast_as(extra.shape())?.contiguous()?,
    };
    Ok(Tensor::cat(&[t, &extra], d)?)
}

/// `rows` (along dimension 0) each rescaled to the mean L2 norm of `reference`'s rows.
fn matched_rows(reference: &Tensor, rows: &Tensor) -> Result<Tensor> {
    let norms = |x: &Tensor| -> candle_core::Result<Tensor> { x.flatten_from(1)?.sqr()?.sum(1)?.sqrt() };
    let target = norms(reference)?.mean_all()?.to_scalar::<f32>()? as f64;
    let scale = (norms(rows)?.recip()? * target)?;
    let mut shape = vec![1; rows.rank()];
    shape[0] = rows.dim(0)?;
    Ok(rows.broadcast_mul(&scale.reshape(shape)?)?)
}

/// The hyper-synthesis output layer (`2M` outputs: means, then log-scales) grown to `2m`: new
/// means predicted as 0, new log-scales as `ln NEW_CHANNEL_SCALE`, both with zero weights.
fn grow_mean_scale(t: &Tensor, fresh: &Tensor, old: usize, m: usize) -> Result<Tensor> {
    let zeros = fresh.narrow(0, 0, m - old)?.zeros_like()?;
    let (mu, log_scale) = (t.narrow(0, 0, old)?, t.narrow(0, old, old)?);
    let new_scale = if t.rank() == 1 { (zeros.ones_like()? * NEW_CHANNEL_SCALE.ln())? } else { zeros.clone() };
    Ok(Tensor::cat(&[&mu, &zeros, &log_scale, &new_scale], 0)?)
}

#[cfg(test)]
mod tests {
    use super::*;
    use candle_core::Device;

    fn tensors(model: &Model) -> HashMap<String, Tensor> {
        model.named_vars().into_iter().map(|(n, v)| (n, v.as_tensor().clone())).collect()
    }

    #[test]
    fn grown_model_reconstructs_and_predicts_the_old_channels_exactly() {
        let small = Model::new(ModelConfig::tiny(), 3).unwrap();
        let old_m = small.config.m;
        let grown_t = widen_latent(&tensors(&small), &small.config, old_m + 5, 9).unwrap();
        let grown = Model::new(ModelConfig { m: old_m + 5, ..small.config.clone() }, 0).unwrap();
        grown.load_weights(&grown_t).unwrap();

        let x = Tensor::rand(0f32, 1.0, (1, 3, 64, 64), &Device::Cpu).unwrap();
        let idx = Tensor::new(&[1u32], &Device::Cpu).unwrap();
        let w = Tensor::new(&[0.3f32], &Device::Cpu).unwrap();
        let nz = Tensor::zeros((1, small.config.nz, 1, 1), candle_core::DType::F32, &Device::Cpu).unwrap();
        let ny = |m: usize| Tensor::zeros((1, m, 4, 4), candle_core::DType::F32, &Device::Cpu).unwrap();
        let a = small.forward_train(&x, &idx, &w, &ny(old_m), &nz).unwrap();
        let b = grown.forward_train(&x, &idx, &w, &ny(old_m + 5), &nz).unwrap();
        let diff = (&a.x_hat - &b.x_hat).unwrap().abs().unwrap().max_all().unwrap().to_scalar::<f32>().unwrap();
        assert!(diff < 1e-5, "reconstruction changed by {diff}");
        let (za, zb) = (a.bits_z.to_vec1::<f32>().unwrap(), b.bits_z.to_vec1::<f32>().unwrap());
        assert!((za[0] - zb[0]).abs() <= 1e-6 * za[0].abs(), "hyper-latent rate changed: {za:?} vs {zb:?}");
        let per_channel = b.bits_y_channels.sum(1).unwrap().to_vec1::<f32>().unwrap()[0];
        let total = b.bits_y.to_vec1::<f32>().unwrap()[0];
        assert!((per_channel - total).abs() <= 1e-4 * total, "channel bits {per_channel} vs {total}");
        // The new channels carry a signal, so they cost bits: the latent rate can only grow.
        assert!(b.bits_y.to_vec1::<f32>().unwrap()[0] >= a.bits_y.to_vec1::<f32>().unwrap()[0]);
        // Old weights are kept bit for bit; new analysis rows have the old rows' mean norm, the
        // synthesis' and hyper-analysis' columns reading the new channels are zero.
        let old_t = tensors(&small);
        let same = |name: &str, d: usize| {
            let kept = grown_t[name].narrow(d, 0, old_t[name].dims()[d]).unwrap();
            let diff = (&kept - &old_t[name]).unwrap().abs().unwrap().max_all().unwrap();
            assert_eq!(diff.to_scalar::<f32>().unwrap(), 0.0, "{name} changed");
        };
        for (name, d) in [("g_a.6.weight", 0), ("g_s.0.weight", 1), ("h_a.0.weight", 1), ("gain.y", 1)] {
            same(name, d);
        }
        let row_norms = |t: &Tensor| -> Vec<f32> {
            t.flatten_from(1).unwrap().sqr().unwrap().sum(1).unwrap().sqrt().unwrap().to_vec1().unwrap()
        };
        let old_norms = row_norms(&old_t["g_a.6.weight"]);
        let target = old_norms.iter().sum::<f32>() / old_m as f32;
        for n in row_norms(&grown_t["g_a.6.weight"].narrow(0, old_m, 5).unwrap()) {
            assert!((n - target).abs() < 1e-4 * target, "new row norm {n}, old rows' mean {target}");
        }
        let abs_max = |name: &str, d: usize| {
            let t = grown_t[name].narrow(d, old_m, 5).unwrap();
            t.abs().unwrap().max_all().unwrap().to_scalar::<f32>().unwrap()
        };
        assert_eq!(abs_max("g_s.0.weight", 1), 0.0);
        assert_eq!(abs_max("h_a.0.weight", 1), 0.0);
        let hs = grown_t["h_s.4.bias"].to_vec1::<f32>().unwrap();
        let m = old_m + 5;
        assert!(hs[old_m..m].iter().all(|&b| b == 0.0), "new means must be predicted as 0");
        let ln_scale = NEW_CHANNEL_SCALE.ln() as f32;
        assert!(hs[m + old_m..].iter().all(|&b| b == ln_scale), "new scales: {:?}", &hs[m + old_m..]);
    }

    #[test]
    fn model_with_grown_transforms_computes_exactly_what_the_old_one_did() {
        let small = Model::new(ModelConfig::tiny(), 3).unwrap();
        let old_n = small.config.n;
        let grown_t = widen_hidden(&tensors(&small), &small.config, old_n + 6, 9).unwrap();
        let grown = Model::new(ModelConfig { n: old_n + 6, ..small.config.clone() }, 0).unwrap();
        grown.load_weights(&grown_t).unwrap();

        let x = Tensor::rand(0f32, 1.0, (2, 3, 64, 64), &Device::Cpu).unwrap();
        let idx = Tensor::new(&[0u32, 1], &Device::Cpu).unwrap();
        let w = Tensor::new(&[0.3f32, 0.8], &Device::Cpu).unwrap();
        let m = small.config.m;
        let ny = Tensor::rand(-0.5f32, 0.5, (2, m, 4, 4), &Device::Cpu).unwrap();
        let nz = Tensor::rand(-0.5f32, 0.5, (2, small.config.nz, 1, 1), &Device::Cpu).unwrap();
        let a = small.forward_train(&x, &idx, &w, &ny, &nz).unwrap();
        let b = grown.forward_train(&x, &idx, &w, &ny, &nz).unwrap();
        let max_diff =
            |p: &Tensor, q: &Tensor| (p - q).unwrap().abs().unwrap().max_all().unwrap().to_scalar::<f32>().unwrap();
        assert!(max_diff(&a.x_hat, &b.x_hat) < 1e-5, "reconstruction changed");
        assert!(max_diff(&a.bits_y, &b.bits_y) < 1e-3, "latent rate changed");
        assert!(max_diff(&a.bits_z, &b.bits_z) < 1e-3, "hyper-latent rate changed");
        // New rows compute the new channels at the old rows' mean norm; old rows read them
        // with zeros, and so do the old channels' GDN entries.
        let old_t = tensors(&small);
        let rows = |t: &Tensor| -> Vec<f32> {
            t.flatten_from(1).unwrap().sqr().unwrap().sum(1).unwrap().sqrt().unwrap().to_vec1().unwrap()
        };
        let old_rows = rows(&old_t["g_a.2.weight"]);
        let target = old_rows.iter().sum::<f32>() / old_n as f32;
        for r in rows(&grown_t["g_a.2.weight"].narrow(0, old_n, 6).unwrap()) {
            assert!((r - target).abs() < 1e-4 * target, "new row norm {r}, old rows' mean {target}");
        }
        let reading_new = |name: &str| {
            let t = &grown_t[name];
            let d0 = old_t[name].dims()[0];
            t.narrow(0, 0, d0)
                .unwrap()
                .narrow(1, old_n, 6)
                .unwrap()
                .abs()
                .unwrap()
                .max_all()
                .unwrap()
                .to_scalar::<f32>()
                .unwrap()
        };
        for name in ["g_a.2.weight", "g_a.6.weight", "g_s.2.weight", "g_s.6.weight", "g_a.1.gamma", "g_s.3.gamma"] {
            assert_eq!(reading_new(name), 0.0, "{name}: old outputs must read the new channels with zeros");
        }
        assert_eq!(grown_t["g_s.0.weight"].dims()[0], 4 * (old_n + 6));
        let err = widen_hidden(&tensors(&small), &small.config, old_n, 1).unwrap_err();
        assert!(err.to_string().contains("must be larger"), "{err}");
    }

    #[test]
    fn adam_moments_grow_with_their_variables_and_keep_the_old_entries() {
        let small = Model::new(ModelConfig::tiny(), 3).unwrap();
        let (old_m, old_n) = (small.config.m, small.config.n);
        let mut t = tensors(&small);
        for (name, var) in small.named_vars() {
            let v = Tensor::rand(1f32, 2.0, var.dims(), &Device::Cpu).unwrap();
            t.insert(format!("adam.m.{name}"), (&v * -1.0).unwrap());
            t.insert(format!("adam.v.{name}"), v);
        }
        let check = |grown: &HashMap<String, Tensor>, name: &str, old_rows: &[(usize, usize)], new_rows: &[usize]| {
            let (m, v) = (&grown[&format!("adam.m.{name}")], &grown[&format!("adam.v.{name}")]);
            assert_eq!(m.dims(), grown[name].dims(), "{name}");
            let v_old = &t[&format!("adam.v.{name}")];
            let mean = v_old.mean_all().unwrap().to_scalar::<f32>().unwrap();
            // (row in the old tensor, row in the grown one): kept; new rows: m 0, v the mean.
            for &(o, g) in old_rows {
                let (a, b) = (v_old.get(o).unwrap(), v.get(g).unwrap());
                let b = b.narrow(0, 0, a.dim(0).unwrap()).unwrap();
                assert_eq!(
                    a.flatten_all().unwrap().to_vec1::<f32>().unwrap(),
                    b.flatten_all().unwrap().to_vec1::<f32>().unwrap(),
                    "{name} row {o}"
                );
            }
            for &g in new_rows {
                let mv = m.get(g).unwrap().flatten_all().unwrap().to_vec1::<f32>().unwrap();
                let vv = v.get(g).unwrap().flatten_all().unwrap().to_vec1::<f32>().unwrap();
                assert!(mv.iter().all(|&x| x == 0.0) && vv.iter().all(|&x| (x - mean).abs() < 1e-6), "{name} row {g}");
            }
        };
        let grown = widen_latent(&t, &small.config, old_m + 2, 1).unwrap();
        check(&grown, "g_a.6.weight", &[(0, 0), (old_m - 1, old_m - 1)], &[old_m, old_m + 1]);
        // Means then log-scales: old log-scale rows move up by the two new means.
        check(&grown, "h_s.4.bias", &[], &[old_m, old_m + 1, 2 * old_m + 2, 2 * old_m + 3]);
        let hs_v = grown["adam.v.h_s.4.weight"].get(old_m + 2).unwrap();
        let hs_old = t["adam.v.h_s.4.weight"].get(old_m).unwrap();
        assert_eq!(
            hs_v.flatten_all().unwrap().to_vec1::<f32>().unwrap(),
            hs_old.flatten_all().unwrap().to_vec1::<f32>().unwrap()
        );
        let grown = widen_hidden(&t, &small.config, old_n + 3, 1).unwrap();
        check(&grown, "g_a.2.weight", &[(0, 0), (old_n - 1, old_n - 1)], &[old_n, old_n + 2]);
        check(&grown, "g_s.1.gamma", &[(1, 1)], &[old_n + 1]);
        // Old rows read the new inputs with a zero first moment and the mean second moment.
        let row = grown["adam.m.g_a.2.weight"].get(0).unwrap().narrow(0, old_n, 3).unwrap();
        assert_eq!(row.abs().unwrap().max_all().unwrap().to_scalar::<f32>().unwrap(), 0.0);
    }

    #[test]
    fn a_latent_cannot_shrink() {
        let small = Model::new(ModelConfig::tiny(), 3).unwrap();
        let err = widen_latent(&tensors(&small), &small.config, small.config.m, 1).unwrap_err();
        assert!(err.to_string().contains("must be larger"), "{err}");
    }
}
