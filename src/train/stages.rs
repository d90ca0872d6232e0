//! Halving a trained model's latent stride by removing one stride-2 stage from each transform
//! ([`drop_stage`]), as the starting point of a finer-latent model.
//!
//! Every remaining weight keeps its shape, so the new model starts from the old one's weights:
//! - the analysis drops its second-to-last stage (for four stages `g_a.4` and the GDN `g_a.5`);
//!   the layers before it still see the image at their own resolutions, and the last layer, which
//!   makes the latent, now reads features one octave finer than it was trained on;
//! - the synthesis drops its second stage (`g_s.2` and the IGDN `g_s.3`); the layers after it
//!   still write the image at their own resolutions, and the first layer, which reads the latent,
//!   now writes features one octave finer;
//! - the hyper-analysis, hyper-synthesis, gains and hyper-latent density are kept as they are
//!   (they see the latent at the same relative stride, 4).
//!
//! The result does not reconstruct what the old model did; it is a start that training adapts
//! (the old latent's channels keep their meaning only roughly). Later layers are renumbered
//! (`g_a.6` becomes `g_a.4`, `g_s.4…6` become `g_s.2…4`), their Adam moments with them.
//!
//! ```
//! use std::collections::HashMap;
//! use kiln::{Model, ModelConfig};
//! use kiln::train::stages::drop_stage;
//!
//! let four = Model::new(ModelConfig::tiny(), 1).unwrap();
//! let tensors: HashMap<_, _> = four.named_vars().into_iter().map(|(n, v)| (n, v.as_tensor().clone())).collect();
//! let three = drop_stage(&tensors, &four.config).unwrap();
//! assert!(!three.contains_key("g_a.6.weight"));
//! assert_eq!(three["g_a.4.weight"].dims(), tensors["g_a.6.weight"].dims());
//! let model = Model::new(ModelConfig { stages: 3, ..ModelConfig::tiny() }, 1).unwrap();
//! model.load_weights(&three).unwrap();
//! ```

use std::collections::HashMap;

use candle_core::Tensor;

use crate::error::{KilnError, Result};
use crate::model::ModelConfig;

/// Where a tensor of the old model goes: `Some(new name)`, or `None` when its layer is dropped.
fn new_name(name: &str, old_stages: usize) -> Option<String> {
    let (prefix, var) = name
        .strip_prefix("adam.m.")
        .map(|v| ("adam.m.", v))
        .unwrap_or_else(|| name.strip_prefix("adam.v.").map(|v| ("adam.v.", v)).unwrap_or(("", name)));
    let renumber = |module: &str, dropped_stage: usize| -> Option<String> {
        let rest = var.strip_prefix(module)?.strip_prefix('.')?;
        let (index, tail) = rest.split_once('.')?;
        let index: usize = index.parse().ok()?;
        let dropped = [2 * dropped_stage, 2 * dropped_stage + 1];
        Some(match index {
            i if dropped.contains(&i) => String::new(),
            i if i > dropped[1] => format!("{prefix}{module}.{}.{tail}", i - 2),
            _ => name.to_string(),
        })
    };
    let renamed = renumber("g_a", old_stages - 2).or_else(|| renumber("g_s", 1));
    match renamed {
        Some(n) if n.is_empty() => None,
        Some(n) => Some(n),
        None => Some(name.to_string()),
    }
}

/// The variables (and Adam moments, `adam.m.*` / `adam.v.*`, when present) of a model with
/// configuration `old` rearranged for `ModelConfig { stages: old.stages − 1, ..old }`: see the
/// module docs for which layers go. Fails for a model with fewer than three stages (the
/// smallest supported is two).
pub fn drop_stage(tensors: &HashMap<String, Tensor>, old: &ModelConfig) -> Result<HashMap<String, Tensor>> {
    if old.stages < 3 {
        return Err(KilnError::InvalidArgument(format!(
            "the model has {} stages; at least 2 must remain\nhint: --stages can only go down by one from 3 or 4",
            old.stages
        )));
    }
    Ok(tensors.iter().filter_map(|(name, t)| new_name(name, old.stages).map(|n| (n, t.clone()))).collect())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_follow_the_dropped_stages() {
        assert_eq!(new_name("g_a.0.weight", 4).as_deref(), Some("g_a.0.weight"));
        assert_eq!(new_name("g_a.3.beta", 4).as_deref(), Some("g_a.3.beta"));
        assert_eq!(new_name("g_a.4.weight", 4), None);
        assert_eq!(new_name("g_a.5.beta", 4), None);
        assert_eq!(new_name("g_a.6.bias", 4).as_deref(), Some("g_a.4.bias"));
        assert_eq!(new_name("g_s.0.weight", 4).as_deref(), Some("g_s.0.weight"));
        assert_eq!(new_name("g_s.1.gamma", 4).as_deref(), Some("g_s.1.gamma"));
        assert_eq!(new_name("g_s.2.weight", 4), None);
        assert_eq!(new_name("adam.v.g_s.3.beta", 4), None);
        assert_eq!(new_name("adam.m.g_s.6.weight", 4).as_deref(), Some("adam.m.g_s.4.weight"));
        assert_eq!(new_name("g_s.5.beta", 4).as_deref(), Some("g_s.3.beta"));
        assert_eq!(new_name("h_s.4.weight", 4).as_deref(), Some("h_s.4.weight"));
        assert_eq!(new_name("g_a.2.weight", 3), None);
        assert_eq!(new_name("g_a.4.bias", 3).as_deref(), Some("g_a.2.bias"));
        assert_eq!(new_name("g_s.4.bias", 3).as_deref(), Some("g_s.2.bias"));
    }
}
