//! Integer frequency tables with an escape symbol, and their conversion to coding models.

use constriction::stream::model::ContiguousCategoricalEntropyModel;

use crate::error::{KilnError, Result};

/// Fixed-point precision of every table: frequencies sum to `2^PRECISION`.
pub const PRECISION: usize = 24;
/// `2^PRECISION`.
pub const TOTAL: u32 = 1 << PRECISION;

/// A constriction model over the symbols of one [`IntTable`] (support plus escape).
pub type CodingModel = ContiguousCategoricalEntropyModel<u32, Vec<u32>, PRECISION>;

/// A quantized distribution over the integers `lo .. lo + n`, plus one escape symbol (index
/// `n`) for every value outside that range. All frequencies are ≥ 1 and sum to [`TOTAL`].
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct IntTable {
    /// Smallest value in the support.
    pub lo: i32,
    /// Frequencies of `lo, lo+1, …, lo+n−1`, then the escape symbol's.
    pub freqs: Vec<u32>,
}

impl IntTable {
    /// Number of values in the support (without the escape symbol).
    pub fn support(&self) -> usize {
        self.freqs.len() - 1
    }

    /// Checks the invariants (every frequency ≥ 1, sum = [`TOTAL`], at least one value).
    pub fn validate(&self) -> Result<()> {
        let sum: u64 = self.freqs.iter().map(|&f| f as u64).sum();
        if self.freqs.len() < 2 || self.freqs.contains(&0) || sum != TOTAL as u64 {
            return Err(KilnError::BadModel(format!(
                "entropy table with {} entries sums to {sum}, expected {TOTAL} with no zero entry",
                self.freqs.len()
            )));
        }
        Ok(())
    }

    /// The constriction model for this table (integer arithmetic only).
    pub fn coding_model(&self) -> Result<CodingModel> {
        self.validate()?;
        CodingModel::from_nonzero_fixed_point_probabilities(&self.freqs, false)
            .map_err(|()| KilnError::BadModel("entropy table rejected by the coder".into()))
    }

    /// Information content in bits of coding `value` with this table (escape payload excluded).
    pub fn symbol_bits(&self, value: i32) -> f64 {
        let idx = value as i64 - self.lo as i64;
        let f = if idx >= 0 && (idx as usize) < self.support() {
            self.freqs[idx as usize]
        } else {
            self.freqs[self.support()]
        };
        PRECISION as f64 - (f as f64).log2()
    }
}

/// Quantizes probabilities `p` of the support and `escape` (the mass outside it) into integer
/// frequencies summing to [`TOTAL`], each at least 1. Done once, at model export.
pub fn quantize_probabilities(p: &[f64], escape: f64) -> Vec<u32> {
    let n = p.len() + 1;
    let total = TOTAL as f64;
    let mass: f64 = p.iter().sum::<f64>() + escape;
    let mut freqs: Vec<u32> =
        p.iter().chain(std::iter::once(&escape)).map(|&q| ((q / mass) * total).floor().max(1.0) as u32).collect();
    let mut sum: i64 = freqs.iter().map(|&f| f as i64).sum();
    // Hand the rounding remainder to (or take it from) the largest entries.
    let mut order: Vec<usize> = (0..n).collect();
    order.sort_by(|&a, &b| freqs[b].cmp(&freqs[a]).then(a.cmp(&b)));
    let mut i = 0;
    while sum != TOTAL as i64 {
        let j = order[i % n];
        if sum < TOTAL as i64 {
            let add = (TOTAL as i64 - sum).min(u32::MAX as i64 - freqs[j] as i64);
            freqs[j] += add as u32;
            sum += add;
        } else {
            let take = (sum - TOTAL as i64).min(freqs[j] as i64 - 1);
            freqs[j] -= take as u32;
            sum -= take;
        }
        i += 1;
    }
    freqs
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quantized_frequencies_sum_to_total_and_are_nonzero() {
        let p = [0.5, 0.25, 1e-12, 0.25];
        let f = quantize_probabilities(&p, 1e-15);
        assert_eq!(f.iter().map(|&x| x as u64).sum::<u64>(), TOTAL as u64);
        assert!(f.iter().all(|&x| x >= 1));
        let t = IntTable { lo: -1, freqs: f };
        t.validate().unwrap();
        assert!((t.symbol_bits(-1) - 1.0).abs() < 1e-5);
    }

    #[test]
    fn many_tiny_bins_still_sum_exactly() {
        let p = vec![1e-9; 5000];
        let f = quantize_probabilities(&p, 1.0);
        assert_eq!(f.iter().map(|&x| x as u64).sum::<u64>(), TOTAL as u64);
    }
}
