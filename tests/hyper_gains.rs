//! Hyper gains (`--hyper-gains`): the hyper-synthesis told the quality through per-anchor gains
//! on its output. At zero they change nothing; trained, they change the tables on the exact path.

mod common;

use candle_core::{Device, Tensor};
use common::synthetic_picture;
use kiln::{Codec, Model, ModelConfig, ModelFile};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

fn codec(m: &Model) -> Codec {
    Codec::new(ModelFile::from_bytes(&m.export(&Default::default()).unwrap()).unwrap()).unwrap()
}

/// The tiny model of `seed`, with hyper gains copied from nothing (zero) or set at random.
fn models(seed: u64) -> (Model, Model) {
    let plain = Model::new(ModelConfig::tiny(), seed).unwrap();
    let with = Model::new(ModelConfig { hyper_gains: true, ..ModelConfig::tiny() }, seed).unwrap();
    let tensors: std::collections::HashMap<String, Tensor> =
        plain.named_vars().into_iter().map(|(n, v)| (n, v.as_tensor().clone())).collect();
    for (name, var) in with.named_vars() {
        match tensors.get(&name) {
            Some(t) => var.set(t).unwrap(),
            None => assert!(name.starts_with("gain.hs_"), "unexpected new weight {name}"),
        }
    }
    (plain, with)
}

#[test]
fn zero_hyper_gains_code_exactly_as_without_them() {
    let (plain, with) = models(3);
    let (a, b) = (codec(&plain), codec(&with));
    let pic = synthetic_picture(120, 80, 3, 2);
    for q in [1.0, 37.5, 100.0] {
        let (ea, eb) = (a.encode(&pic, q).unwrap(), b.encode(&pic, q).unwrap());
        assert_eq!(ea.ideal_bits, eb.ideal_bits, "q{q}");
        assert_eq!(a.decode(&ea.bytes).unwrap(), b.decode(&eb.bytes).unwrap(), "q{q}");
    }
    let bytes = with.export(&Default::default()).unwrap();
    let (header, _) = common::split_safetensors(&bytes);
    assert_eq!(header["__metadata__"]["kiln.format"], "kiln-model-2");
}

#[test]
fn trained_hyper_gains_move_the_rate_and_still_decode_exactly() {
    let (_, with) = models(4);
    let mut rng = ChaCha8Rng::seed_from_u64(9);
    let before = codec(&with);
    for (name, var) in with.named_vars() {
        if name.starts_with("gain.hs_") {
            let v: Vec<f32> = (0..var.elem_count()).map(|_| rng.gen_range(-0.4..0.4)).collect();
            var.set(&Tensor::from_vec(v, var.dims(), &Device::Cpu).unwrap()).unwrap();
        }
    }
    let after = codec(&with);
    let pic = synthetic_picture(90, 70, 3, 5);
    let (e0, e1) = (before.encode(&pic, 60.0).unwrap(), after.encode(&pic, 60.0).unwrap());
    assert_ne!(e0.ideal_bits, e1.ideal_bits, "the hyper gains changed nothing");
    let dec = after.decode(&e1.bytes).unwrap();
    assert_eq!((dec.width, dec.height), (90, 70));
    let (by, bz) = after.estimate_bits(&pic, 60.0).unwrap();
    assert!((e1.ideal_bits - (by + bz)).abs() < 0.02 * e1.ideal_bits + 8.0, "{} vs {}", e1.ideal_bits, by + bz);
}
