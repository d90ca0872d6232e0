//! Adam with its moments kept as named tensors (so checkpoints can hold them), and gradient
//! clipping by global norm.

use std::collections::HashMap;

use candle_core::{Tensor, Var, backprop::GradStore};

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
    m: Vec<Tensor>,
    v: Vec<Tensor>,
    /// Steps taken (for bias correction).
    pub t: u64,
    config: AdamConfig,
}

impl Adam {
    /// Zero moments for `vars`.
    pub fn new(vars: Vec<(String, Var)>, config: AdamConfig) -> Result<Self> {
        let m = vars.iter().map(|(_, v)| v.zeros_like()).collect::<candle_core::Result<Vec<_>>>()?;
        let v = m.clone();
        Ok(Adam { vars, m, v, t: 0, config })
    }

    /// Global L2 norm of the gradients.
    pub fn grad_norm(&self, grads: &GradStore) -> Result<f64> {
        let mut sq = 0.0f64;
        for (_, var) in &self.vars {
            if let Some(g) = grads.get(var.as_tensor()) {
                sq += g.sqr()?.sum_all()?.to_scalar::<f32>()? as f64;
            }
        }
        Ok(sq.sqrt())
    }

    /// One update with learning rate `lr`, gradients scaled by `grad_scale` (for clipping).
    pub fn step(&mut self, grads: &GradStore, lr: f64, grad_scale: f64) -> Result<()> {
        self.t += 1;
        let c = self.config;
        let bc1 = 1.0 - c.beta1.powi(self.t as i32);
        let bc2 = 1.0 - c.beta2.powi(self.t as i32);
        for (i, (_, var)) in self.vars.iter().enumerate() {
            let Some(g) = grads.get(var.as_tensor()) else { continue };
            let g = (g * grad_scale)?;
            let m = ((&self.m[i] * c.beta1)? + (&g * (1.0 - c.beta1))?)?;
            let v = ((&self.v[i] * c.beta2)? + (g.sqr()? * (1.0 - c.beta2))?)?;
            let update = ((&m / bc1)? / ((&v / bc2)?.sqrt()? + c.eps)?)?;
            var.set(&(var.as_tensor() - (update * lr)?)?)?;
            // Detach, or every step's graph would stay reachable through the moments.
            self.m[i] = m.detach();
            self.v[i] = v.detach();
        }
        Ok(())
    }

    /// Moments as tensors named `adam.m.{var}` and `adam.v.{var}`.
    pub fn state(&self) -> HashMap<String, Tensor> {
        let mut out = HashMap::new();
        for (i, (name, _)) in self.vars.iter().enumerate() {
            out.insert(format!("adam.m.{name}"), self.m[i].clone());
            out.insert(format!("adam.v.{name}"), self.v[i].clone());
        }
        out
    }

    /// Restores moments saved by [`Adam::state`]; missing entries stay zero.
    pub fn load_state(&mut self, tensors: &HashMap<String, Tensor>, t: u64) {
        for (i, (name, _)) in self.vars.iter().enumerate() {
            if let (Some(m), Some(v)) = (tensors.get(&format!("adam.m.{name}")), tensors.get(&format!("adam.v.{name}")))
                && m.dims() == self.m[i].dims()
                && v.dims() == self.v[i].dims()
            {
                self.m[i] = m.clone();
                self.v[i] = v.clone();
            }
        }
        self.t = t;
    }
}
