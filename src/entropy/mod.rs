//! Entropy coding: integer tables built once at model export, and ANS streams over them.
//!
//! # The idea
//! Two kinds of values are coded. Hyper-latents `ẑ` use one learned density per channel
//! ([`hyper`]), tabulated into integer frequencies. Latents are coded as residuals
//! `q = round(y − μ)` under a Gaussian whose scale `σ` the hyper-synthesis predicts; `σ` is
//! snapped to one of 64 log-spaced entries ([`gaussian`]), each with its own integer table.
//! Every table carries an escape symbol, so any integer can be coded ([`coder`]).
//!
//! ```
//! use kiln::entropy::{gaussian, coder::{TableSet, SymbolEncoder, SymbolDecoder}};
//! let set = TableSet::new(gaussian::gaussian_tables()).unwrap();
//! let mut enc = SymbolEncoder::new(&set);
//! for (k, v) in [(0, 0), (10, -3), (63, 250), (5, 1_000_000)] { enc.push(k, v); }
//! let words = enc.finish();
//! let mut dec = SymbolDecoder::new(&set, words).unwrap();
//! for (k, v) in [(0, 0), (10, -3), (63, 250), (5, 1_000_000)] { assert_eq!(dec.pop(k).unwrap(), v); }
//! dec.finish().unwrap();
//! ```
//!
//! # Requirements for correctness
//! Decoding is exact only if the decoder uses, for every value, *the same table* the encoder
//! used. Hence:
//! - tables are integers stored in the model file; nothing is recomputed from floating point
//!   while coding;
//! - the table index of a latent comes from comparing the fixed-order hyper-synthesis output
//!   ([`crate::kernels::HyperSynthesisFixed`]) against stored `f32` thresholds, so it is
//!   bit-identical on every CPU, thread count and build;
//! - values are popped in the order they were pushed, with the same table indices.
//!
//! # Costs
//! Each table has support `±6σ` plus escape; 64 Gaussian tables take about 140 kB. An escape
//! costs the escape symbol (≥ 24 bits at the smallest frequency) plus about `2·log2(distance)`.

pub mod coder;
pub mod gaussian;
pub mod hyper;
pub mod table;

use std::collections::HashMap;

use candle_core::{Device, Tensor};

use crate::error::{KilnError, Result};
pub use table::IntTable;

/// All integer tables of a model, as stored in its file.
#[derive(Debug, Clone, PartialEq)]
pub struct EntropyTables {
    /// Gaussian tables, one per scale entry.
    pub gaussian: Vec<IntTable>,
    /// Log-scale thresholds between Gaussian entries (`len = gaussian.len() − 1`).
    pub log_scale_thresholds: Vec<f32>,
    /// Hyper-latent tables, one per channel.
    pub hyper: Vec<IntTable>,
}

fn pack(tables: &[IntTable], prefix: &str, out: &mut HashMap<String, Tensor>) -> Result<()> {
    let lo: Vec<i64> = tables.iter().map(|t| t.lo as i64).collect();
    let mut offsets = vec![0u32];
    let mut freqs = Vec::new();
    for t in tables {
        freqs.extend_from_slice(&t.freqs);
        offsets.push(freqs.len() as u32);
    }
    let dev = &Device::Cpu;
    out.insert(format!("{prefix}.lo"), Tensor::new(lo, dev)?);
    out.insert(format!("{prefix}.offsets"), Tensor::new(offsets, dev)?);
    out.insert(format!("{prefix}.freqs"), Tensor::new(freqs, dev)?);
    Ok(())
}

fn unpack(tensors: &HashMap<String, Tensor>, prefix: &str) -> Result<Vec<IntTable>> {
    let get = |name: &str| {
        tensors
            .get(&format!("{prefix}.{name}"))
            .ok_or_else(|| KilnError::BadModel(format!("missing tensor {prefix}.{name}")))
    };
    let lo = get("lo")?.to_vec1::<i64>()?;
    let offsets = get("offsets")?.to_vec1::<u32>()?;
    let freqs = get("freqs")?.to_vec1::<u32>()?;
    if offsets.len() != lo.len() + 1
        || offsets.first() != Some(&0)
        || *offsets.last().unwrap_or(&0) as usize != freqs.len()
    {
        return Err(KilnError::BadModel(format!("{prefix}: table offsets do not match")));
    }
    let mut tables = Vec::with_capacity(lo.len());
    for (i, &l) in lo.iter().enumerate() {
        let (a, b) = (offsets[i] as usize, offsets[i + 1] as usize);
        if a >= b || b > freqs.len() {
            return Err(KilnError::BadModel(format!("{prefix}: table {i} has a bad range")));
        }
        let lo =
            i32::try_from(l).map_err(|_| KilnError::BadModel(format!("{prefix}: table {i} offset out of range")))?;
        let t = IntTable { lo, freqs: freqs[a..b].to_vec() };
        t.validate()?;
        tables.push(t);
    }
    Ok(tables)
}

impl EntropyTables {
    /// Tensors under `entropy.*` for the model file.
    pub fn to_tensors(&self) -> Result<HashMap<String, Tensor>> {
        let mut out = HashMap::new();
        pack(&self.gaussian, "entropy.gaussian", &mut out)?;
        pack(&self.hyper, "entropy.hyper", &mut out)?;
        out.insert(
            "entropy.log_scale_thresholds".into(),
            Tensor::new(self.log_scale_thresholds.clone(), &Device::Cpu)?,
        );
        Ok(out)
    }

    /// Reads the tables back from a model file's tensors, validating every table.
    pub fn from_tensors(tensors: &HashMap<String, Tensor>) -> Result<Self> {
        let gaussian = unpack(tensors, "entropy.gaussian")?;
        let hyper = unpack(tensors, "entropy.hyper")?;
        let log_scale_thresholds = tensors
            .get("entropy.log_scale_thresholds")
            .ok_or_else(|| KilnError::BadModel("missing tensor entropy.log_scale_thresholds".into()))?
            .to_vec1::<f32>()?;
        if log_scale_thresholds.len() + 1 != gaussian.len() || !log_scale_thresholds.windows(2).all(|w| w[0] < w[1]) {
            return Err(KilnError::BadModel("scale thresholds do not match the Gaussian tables".into()));
        }
        Ok(EntropyTables { gaussian, log_scale_thresholds, hyper })
    }
}
