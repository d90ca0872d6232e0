//! The checkerboard context model: its fixed-order path against the training graph and across
//! threads and SIMD modes, its containers, and its model-file tag.

mod common;

use candle_core::{Device, Tensor};
use common::synthetic_picture;
use kiln::kernels::{FixedConv, Positions, PriorParameters, SimdMode};
use kiln::model::context::{ContextKind, anchor_mask};
use kiln::{Codec, Model, ModelConfig, ModelFile};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

fn in_pool<T: Send>(threads: usize, f: impl FnOnce() -> T + Send) -> T {
    rayon::ThreadPoolBuilder::new().num_threads(threads).build().unwrap().install(f)
}

fn bits(v: &[f32]) -> Vec<u32> {
    v.iter().map(|x| x.to_bits()).collect()
}

/// A tiny model with a checkerboard context whose layers all carry random weights (a fresh one's
/// output layer is zero).
fn context_model(seed: u64) -> Model {
    let model = Model::new(ModelConfig { context: ContextKind::Checkerboard, ..ModelConfig::tiny() }, seed).unwrap();
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    for (name, var) in model.named_vars() {
        if name.starts_with("ctx.2.") {
            let n = var.elem_count();
            let v: Vec<f32> = (0..n).map(|_| rng.gen_range(-0.3..0.3)).collect();
            var.set(&Tensor::from_vec(v, var.dims(), &Device::Cpu).unwrap()).unwrap();
        }
    }
    model
}

#[test]
fn checkerboard_positions_and_taps_compute_what_the_full_convolution_does_there() {
    // Reference: the same convolution over all taps and positions, with the unused taps' weights
    // set to zero. Sizes exercise the register blocks (cout ≥ 16 plus a remainder) and borders.
    let (cin, cout, k, h, w) = (5, 21, 5, 9, 23);
    let mut rng = ChaCha8Rng::seed_from_u64(3);
    let mut wt: Vec<f32> = (0..cout * cin * k * k).map(|_| rng.gen_range(-1.0..1.0)).collect();
    let b: Vec<f32> = (0..cout).map(|_| rng.gen_range(-1.0..1.0)).collect();
    let x: Vec<f32> = (0..h * w * cin).map(|_| rng.gen_range(-1.0..1.0)).collect();
    let taps: Vec<usize> = (0..k * k).filter(|t| (t / k + t % k) % 2 == 1).collect();
    let sparse = FixedConv::with_taps(&wt, &b, cout, cin, k, &taps);
    for (i, v) in wt.iter_mut().enumerate() {
        if !taps.contains(&(i % (k * k))) {
            *v = 0.0;
        }
    }
    let full = FixedConv::new(&wt, &b, cout, cin, k).forward(&x, h, w, SimdMode::Scalar);
    for parity in [0, 1] {
        for mode in [SimdMode::Scalar, SimdMode::Vectorized] {
            let out = sparse.forward_at(&x, h, w, Positions::Checkerboard { parity }, mode);
            for p in 0..h * w {
                for o in 0..cout {
                    let (got, want) = (out[p * cout + o], full[p * cout + o]);
                    if (p / w + p % w) % 2 == parity {
                        assert_eq!(got, want, "parity {parity} {mode:?} position {p} channel {o}");
                    } else {
                        assert_eq!(got, 0.0, "a position of the other parity was computed");
                    }
                }
            }
        }
    }
}

fn random_prior(m: usize, h: usize, w: usize, seed: u64) -> (Vec<f32>, PriorParameters) {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let n = m * h * w;
    let y: Vec<f32> = (0..n).map(|_| rng.gen_range(-4i32..4) as f32 + rng.gen_range(-0.5..0.5)).collect();
    let means = (0..n).map(|_| rng.gen_range(-0.5..0.5)).collect();
    let log_scales = (0..n).map(|_| rng.gen_range(-2.0..1.5)).collect();
    (y, PriorParameters { means, log_scales, height: h, width: w })
}

#[test]
fn context_parameters_are_bit_identical_across_threads_and_simd_modes() {
    let model = context_model(4);
    let ctx = model.context_fixed().unwrap().expect("a context");
    let (y, prior) = random_prior(model.config.m, 7, 11, 5);
    let run = |mode| {
        let mut p = prior.clone();
        ctx.refine(&y, &mut p, mode);
        p
    };
    let reference = in_pool(1, || run(SimdMode::Scalar));
    assert_ne!(reference.means, prior.means, "the context changed nothing");
    for threads in [1, 2, 3] {
        for mode in [SimdMode::Scalar, SimdMode::Vectorized] {
            let out = in_pool(threads, || run(mode));
            assert_eq!(bits(&out.means), bits(&reference.means), "{threads} threads, {mode:?}");
            assert_eq!(bits(&out.log_scales), bits(&reference.log_scales), "{threads} threads, {mode:?}");
        }
    }
    // Anchors keep the hyper-synthesis' parameters.
    let plane = 7 * 11;
    for i in (0..y.len()).filter(|i| (i % plane / 11 + i % 11) % 2 == 0) {
        assert_eq!(reference.means[i].to_bits(), prior.means[i].to_bits());
    }
}

#[test]
fn the_fixed_path_computes_what_the_training_graph_does() {
    let model = context_model(6);
    let (m, h, w) = (model.config.m, 6, 9);
    let (y, prior) = random_prior(m, h, w, 7);
    let mut fixed = prior.clone();
    model.context_fixed().unwrap().unwrap().refine(&y, &mut fixed, SimdMode::Vectorized);
    let t = |v: &[f32]| Tensor::from_slice(v, (1, m, h, w), &Device::Cpu).unwrap();
    let anchors = t(&y).broadcast_mul(&anchor_mask(h, w).unwrap()).unwrap();
    let (d_mu, d_ls) = model.ctx.as_ref().unwrap().forward(&anchors, &t(&prior.means), &t(&prior.log_scales)).unwrap();
    let d_mu = d_mu.flatten_all().unwrap().to_vec1::<f32>().unwrap();
    let d_ls = d_ls.flatten_all().unwrap().to_vec1::<f32>().unwrap();
    let plane = h * w;
    for i in (0..m * plane).filter(|i| (i % plane / w + i % w) % 2 == 1) {
        assert!((fixed.means[i] - (prior.means[i] + d_mu[i])).abs() < 1e-4, "mean {i}");
        assert!((fixed.log_scales[i] - (prior.log_scales[i] + d_ls[i])).abs() < 1e-4, "log-scale {i}");
    }
}

#[test]
fn a_context_model_round_trips_and_its_zero_context_decodes_like_no_context() {
    // A fresh context starts at zero: the same model with and without it must decode to the same
    // pixels (same latent values, coded in another order) at the same ideal cost.
    let plain = Model::new(ModelConfig::tiny(), 8).unwrap();
    let with = Model::new(ModelConfig { context: ContextKind::Checkerboard, ..ModelConfig::tiny() }, 8).unwrap();
    let tensors: std::collections::HashMap<String, Tensor> =
        plain.named_vars().into_iter().map(|(n, v)| (n, v.as_tensor().clone())).collect();
    for (name, var) in with.named_vars() {
        if !name.starts_with("ctx.") {
            var.set(&tensors[&name]).unwrap();
        }
    }
    let codec =
        |m: &Model| Codec::new(ModelFile::from_bytes(&m.export(&Default::default()).unwrap()).unwrap()).unwrap();
    let (a, b) = (codec(&plain), codec(&with));
    let pic = synthetic_picture(150, 90, 3, 3);
    let (ea, eb) = (a.encode(&pic, 70.0).unwrap(), b.encode(&pic, 70.0).unwrap());
    assert_eq!(a.decode(&ea.bytes).unwrap(), b.decode(&eb.bytes).unwrap());
    assert!((ea.ideal_bits - eb.ideal_bits).abs() < 1e-6 * ea.ideal_bits, "{} vs {}", ea.ideal_bits, eb.ideal_bits);

    // With a working context the parameters move; the stream still decodes exactly, to the same
    // pixels whatever the thread count.
    let c = codec(&context_model(9));
    for (w, h, ch) in [(1, 1, 3), (150, 90, 3), (70, 41, 1)] {
        let pic = synthetic_picture(w, h, ch, 4);
        let enc = c.encode(&pic, 40.0).unwrap();
        let one = in_pool(1, || c.decode(&enc.bytes).unwrap());
        assert_eq!(one, in_pool(2, || c.decode(&enc.bytes).unwrap()));
        assert_eq!((one.width, one.height, one.channels), (w, h, ch));
        let (by, bz) = c.estimate_bits(&pic, 40.0).unwrap();
        assert!((enc.ideal_bits - (by + bz)).abs() < 0.02 * enc.ideal_bits + 8.0, "{} vs {}", enc.ideal_bits, by + bz);
    }
}

#[test]
fn a_context_model_file_has_its_own_format_tag_and_a_mismatch_is_refused() {
    let bytes = context_model(10).export(&Default::default()).unwrap();
    let (mut header, data) = common::split_safetensors(&bytes);
    assert_eq!(header["__metadata__"]["kiln.format"], "kiln-model-2");
    assert!(ModelFile::from_bytes(&bytes).unwrap().model.ctx.is_some());
    // Earlier Kiln versions read only kiln-model-1; a file claiming it with a context is refused.
    header["__metadata__"]["kiln.format"] = "kiln-model-1".into();
    let err = ModelFile::from_bytes(&common::join_safetensors(&header, data)).unwrap_err();
    assert!(err.to_string().contains("does not match"), "{err}");
    // Models without a context keep the old tag (their files are unchanged).
    let (plain, _) = common::split_safetensors(&common::tiny_model_bytes(1));
    assert_eq!(plain["__metadata__"]["kiln.format"], "kiln-model-1");
}

#[test]
fn the_container_flags_the_two_pass_latent_and_a_mismatch_or_unknown_flag_is_refused() {
    use kiln::container::{self, FLAG_CHECKERBOARD};
    let ctx =
        Codec::new(ModelFile::from_bytes(&context_model(11).export(&Default::default()).unwrap()).unwrap()).unwrap();
    let plain = common::tiny_codec(11);
    let pic = synthetic_picture(64, 48, 3, 1);
    let (a, b) = (ctx.encode(&pic, 50.0).unwrap().bytes, plain.encode(&pic, 50.0).unwrap().bytes);
    assert_eq!(container::read_header(&a).unwrap().flags, FLAG_CHECKERBOARD);
    assert_eq!(container::read_header(&b).unwrap().flags, 0);
    // Rewritten with valid checksums but the flag cleared or set wrongly: refused by name.
    let with_flags = |bytes: &[u8], flags: u16| {
        let (mut h, s) = container::read(bytes).unwrap();
        h.flags = flags;
        container::write(&h, &s).unwrap()
    };
    let err = ctx.decode(&with_flags(&a, 0)).unwrap_err().to_string();
    assert!(err.contains("checkerboard"), "{err}");
    let err = plain.decode(&with_flags(&b, FLAG_CHECKERBOARD)).unwrap_err().to_string();
    assert!(err.contains("checkerboard"), "{err}");
    // A flag this build does not know: refused before anything is decoded.
    let err = container::read(&with_flags(&b, 2)).unwrap_err().to_string();
    assert!(err.contains("unknown flags"), "{err}");
}
