//! The learned non-parametric density of the hyper-latent: one univariate cumulative density per
//! channel, built as a small monotone network (Ballé et al. 2018, appendix 6.1).
//!
//! `c(x) = sigmoid(f_K ∘ … ∘ f_1(x))` with `f_k(x) = g_k(softplus(H_k) x + b_k)` and
//! `g_k(x) = x + tanh(a_k) ⊙ tanh(x)` for `k < K`. Softplus keeps every matrix positive and
//! `|tanh(a)| < 1` keeps every `g_k` increasing, so `c` is a valid CDF. The probability of an
//! integer `k` is `c(k + ½) − c(k − ½)`. Weights: `prior.matrix.{k}` `(C, d_{k+1}, d_k)`,
//! `prior.bias.{k}` `(C, d_{k+1}, 1)`, `prior.factor.{k}` `(C, d_{k+1}, 1)`.

use candle_core::{DType, Result, Tensor};
use candle_nn::{Init, VarBuilder};

/// Widths of the per-channel density network (input and output are 1).
pub const DENSITY_FILTERS: [usize; 5] = [1, 3, 3, 3, 1];
/// The initial spread of the density (common practice: 10).
pub const DENSITY_INIT_SCALE: f64 = 10.0;

/// Per-channel learned density of the hyper-latent.
#[derive(Debug, Clone)]
pub struct FactorizedDensity {
    matrices: Vec<Tensor>,
    biases: Vec<Tensor>,
    factors: Vec<Tensor>,
    channels: usize,
}

fn softplus(x: &Tensor) -> Result<Tensor> {
    x.relu()? + (x.abs()?.neg()?.exp()? + 1.0)?.log()?
}

impl FactorizedDensity {
    /// Creates the density for `channels` channels under `vb` (use `vb.pp("prior")`).
    pub fn new(channels: usize, vb: VarBuilder) -> Result<Self> {
        let f = DENSITY_FILTERS;
        let k_layers = f.len() - 1;
        let (mut matrices, mut biases, mut factors) = (vec![], vec![], vec![]);
        for k in 0..k_layers {
            matrices.push(vb.pp("matrix").get_with_hints(
                (channels, f[k + 1], f[k]),
                &k.to_string(),
                Init::Const(0.0),
            )?);
            biases.push(vb.pp("bias").get_with_hints((channels, f[k + 1], 1), &k.to_string(), Init::Const(0.0))?);
            if k + 1 < k_layers {
                factors.push(vb.pp("factor").get_with_hints(
                    (channels, f[k + 1], 1),
                    &k.to_string(),
                    Init::Const(0.0),
                )?);
            }
        }
        Ok(FactorizedDensity { matrices, biases, factors, channels })
    }

    /// Value the matrices of layer `k` start at (so that the initial density has spread
    /// [`DENSITY_INIT_SCALE`]): `log(expm1(1 / scale / d_{k+1}))` with `scale = init^(1/K)`.
    pub fn initial_matrix_value(k: usize) -> f64 {
        let f = DENSITY_FILTERS;
        let scale = DENSITY_INIT_SCALE.powf(1.0 / (f.len() - 1) as f64);
        (1.0 / scale / f[k + 1] as f64).exp_m1().ln()
    }

    /// Logits of the cumulative density at `x`, `(C, 1, n)` → `(C, 1, n)`.
    fn logits_cumulative(&self, x: &Tensor) -> Result<Tensor> {
        let mut v = x.clone();
        for k in 0..self.matrices.len() {
            v = softplus(&self.matrices[k])?.matmul(&v)?.broadcast_add(&self.biases[k])?;
            if let Some(a) = self.factors.get(k) {
                v = (&v + a.tanh()?.broadcast_mul(&v.tanh()?)?)?;
            }
        }
        Ok(v)
    }

    /// Probability mass of the unit interval around each value of `z` `(B, C, H, W)`.
    pub fn likelihood(&self, z: &Tensor) -> Result<Tensor> {
        let (b, c, h, w) = z.dims4()?;
        let flat = z.permute((1, 0, 2, 3))?.reshape((c, 1, b * h * w))?;
        let lik = self.likelihood_flat(&flat)?;
        lik.reshape((c, b, h, w))?.permute((1, 0, 2, 3))
    }

    /// Probability mass of the unit intervals around `x` `(C, 1, n)`, per channel.
    pub fn likelihood_flat(&self, x: &Tensor) -> Result<Tensor> {
        let lower = self.logits_cumulative(&(x - 0.5)?)?;
        let upper = self.logits_cumulative(&(x + 0.5)?)?;
        // Evaluate in the tail where the sigmoid is accurate: flip sign when above the median.
        let sign = ((&lower + &upper)?.ge(0.0)?.to_dtype(DType::F32)? * -2.0)? + 1.0;
        let sign = sign?.detach();
        let hi = candle_nn::ops::sigmoid(&(&sign * &upper)?)?;
        let lo = candle_nn::ops::sigmoid(&(&sign * &lower)?)?;
        (hi - lo)?.abs()
    }

    /// Number of channels.
    pub fn channels(&self) -> usize {
        self.channels
    }
}
