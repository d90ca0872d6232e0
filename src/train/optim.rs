//! Adam with its moments kept per variable (so checkpoints can hold them), and gradient
//! clipping by global norm. The update runs in plain Rust over each variable's values: one
//! pass, instead of a dozen small tensor operations per variable.

use std::collections::HashMap;

use candle_core::{Device, Tensor, Var, backprop::GradStore};

use rayon::prelude::*;

use crate::error::Result;

/// Adam hyper-parameters.
#[derive(Debug, Clone, Copy)]
pub struct AdamConfig {
    /// First-moment decay.
    pub beta1: f64,
    /// Second-moment decay.
    pub beta2: f64,
    /// Denominator floor.
    pub eps: f64,
}

impl Default for AdamConfig {
    fn default() -> Self {
        AdamConfig { beta1: 0.9, beta2: 0.999, eps: 1e-8 }
    }
}

/// Adam over a fixed list of named variables.
#[derive(Debug)]
pub struct Adam {
    vars: Vec<(String, Var)>,
    m: Vec<Vec<f32>>,
    v: Vec<Vec<f32>>,
    /// Steps taken (for bias correction).
    pub t: u64,
    config: AdamConfig,
}

fn values(t: &Tensor) -> Result<Vec<f32>> {
    Ok(t.flatten_all()?.to_dtype(candle_core::DType::F32)?.to_vec1::<f32>()?)
}

impl Adam {
    /// Zero moments for `vars`.
    pub fn new(vars: Vec<(String, Var)>, config: AdamConfig) -> Result<Self> {
        let m: Vec<Vec<f32>> = vars.iter().map(|(_, v)| vec![0.0; v.elem_count()]).collect();
        let v = m.clone();
        Ok(Adam { vars, m, v, t: 0, config })
    }

    /// The variables' names, in the order of [`Adam::gradients`].
    pub fn names(&self) -> impl Iterator<Item = &str> {
        self.vars.iter().map(|(n, _)| n.as_str())
    }

    /// The gradients of every variable that has one, flattened.
    pub fn gradients(&self, grads: &GradStore) -> Result<Vec<Option<Vec<f32>>>> {
        self.vars.iter().map(|(_, var)| grads.get(var.as_tensor()).map(values).transpose()).collect()
    }

    /// Global L2 norm of flattened gradients.
    pub fn grad_norm(grads: &[Option<Vec<f32>>]) -> f64 {
        grads.iter().flatten().flat_map(|g| g.iter()).map(|&x| (x as f64) * (x as f64)).sum::<f64>().sqrt()
    }

    /// One update with learning rate `lr`, gradients scaled by `grad_scale` (for clipping).
    pub fn step(&mut self, grads: &[Option<Vec<f32>>], lr: f64, grad_scale: f64) -> Result<()> {
        self.t += 1;
        let c = self.config;
        let bc1 = 1.0 - c.beta1.powi(self.t as i32);
        let bc2 = 1.0 - c.beta2.powi(self.t as i32);
        let (b1, b2, gs) = (c.beta1 as f32, c.beta2 as f32, grad_scale as f32);
        let step = (lr / bc1) as f32;
        let inv_bc2 = (1.0 / bc2) as f32;
        let eps = c.eps as f32;
        // Variables are independent: update them in parallel, then hand the values to candle.
        let updated: Vec<Option<Vec<f32>>> = self
            .vars
            .par_iter()
            .zip(self.m.par_iter_mut().zip(self.v.par_iter_mut()))
            .zip(grads.par_iter())
            .map(|(((_, var), (m, v)), g)| -> Result<Option<Vec<f32>>> {
                let Some(g) = g else { return Ok(None) };
                let mut p = values(var.as_tensor())?;
                for j in 0..p.len() {
                    let gj = g[j] * gs;
                    m[j] = b1 * m[j] + (1.0 - b1) * gj;
                    v[j] = b2 * v[j] + (1.0 - b2) * gj * gj;
                    p[j] -= step * m[j] / ((v[j] * inv_bc2).sqrt() + eps);
                }
                Ok(Some(p))
            })
            .collect::<Result<_>>()?;
        for ((_, var), p) in self.vars.iter().zip(updated) {
            if let Some(p) = p {
                var.set(&Tensor::from_vec(p, var.dims(), &Device::Cpu)?)?;
            }
        }
        Ok(())
    }

    /// Moments as tensors named `adam.m.{var}` and `adam.v.{var}`.
    pub fn state(&self) -> Result<HashMap<String, Tensor>> {
        let mut out = HashMap::new();
        for (i, (name, var)) in self.vars.iter().enumerate() {
            out.insert(format!("adam.m.{name}"), Tensor::from_slice(&self.m[i], var.dims(), &Device::Cpu)?);
            out.insert(format!("adam.v.{name}"), Tensor::from_slice(&self.v[i], var.dims(), &Device::Cpu)?);
        }
        Ok(out)
    }

    /// Restores moments saved by [`Adam::state`]; entries missing or of another shape stay zero.
    pub fn load_state(&mut self, tensors: &HashMap<String, Tensor>, t: u64) -> Result<()> {
        for (i, (name, var)) in self.vars.iter().enumerate() {
            if let (Some(m), Some(v)) = (tensors.get(&format!("adam.m.{name}")), tensors.get(&format!("adam.v.{name}")))
                && m.dims() == var.dims()
                && v.dims() == var.dims()
            {
                self.m[i] = values(m)?;
                self.v[i] = values(v)?;
            }
        }
        self.t = t;
        Ok(())
    }
}
