//! The im2col + gemm convolution against candle's own `conv2d`: forward and both gradients,
//! and a finite-difference check of the gradient.

use candle_core::{Device, Tensor, Var};
use kiln::kernels::conv::{conv2d, conv2d_channel_major};
use kiln::kernels::fused_conv::conv2d_fused;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

fn random(rng: &mut ChaCha8Rng, shape: &[usize]) -> Tensor {
    let n: usize = shape.iter().product();
    let v: Vec<f32> = (0..n).map(|_| rng.gen_range(-1.0..1.0)).collect();
    Tensor::from_vec(v, shape, &Device::Cpu).unwrap()
}

fn rel_err(a: &Tensor, b: &Tensor) -> f32 {
    let d = (a - b).unwrap().sqr().unwrap().sum_all().unwrap().to_scalar::<f32>().unwrap().sqrt();
    let n = b.sqr().unwrap().sum_all().unwrap().to_scalar::<f32>().unwrap().sqrt();
    d / n.max(1e-12)
}

#[test]
fn matches_candle_conv2d_forward_and_gradients() {
    let mut rng = ChaCha8Rng::seed_from_u64(4);
    // (batch, cin, cout, h, w, k, stride): odd sizes, stride 2, one and many channels.
    let shapes = [
        (1, 1, 1, 7, 5, 3, 1),
        (2, 3, 8, 17, 13, 5, 2),
        (1, 8, 5, 16, 16, 5, 2),
        (2, 6, 4, 9, 11, 3, 1),
        (1, 16, 12, 12, 10, 3, 2),
        (3, 4, 7, 33, 31, 5, 1),
        // k²C ≥ 256 at stride 2: the product goes through a channels-innermost tile result.
        (2, 12, 10, 15, 13, 5, 2),
        // 3×3 stride 1 with 16 or more channels each way: Winograd's F(2×2, 3×3), forward and
        // (adjoint weights) input gradient; odd sizes leave partial 2×2 blocks at the edges.
        (2, 16, 20, 9, 11, 3, 1),
        (1, 32, 64, 14, 10, 3, 1),
        // Stride 2 over 1–4 input channels into a multiple of 8: the vectorized few-input
        // kernel (AVX-512), rows wider than its 32-position blocks. (Odd sizes: at 37×70 and
        // 20×9, candle's own conv2d backward fails on a shape mismatch in its input gradient.)
        (2, 3, 64, 37, 69, 5, 2),
        (1, 1, 16, 21, 19, 5, 2),
    ];
    for (b, ci, co, h, w, k, s) in shapes {
        let pad = k / 2;
        let x = Var::from_tensor(&random(&mut rng, &[b, ci, h, w])).unwrap();
        let wt = Var::from_tensor(&random(&mut rng, &[co, ci, k, k])).unwrap();
        let theirs = x.as_tensor().conv2d(wt.as_tensor(), pad, s, 1, 1).unwrap();
        let other = conv2d_channel_major(x.as_tensor(), wt.as_tensor(), s, pad).unwrap();
        assert!(rel_err(&other, &theirs) <= 1e-5, "channel-major forward");
        let bias = Var::from_tensor(&random(&mut rng, &[co])).unwrap();
        let fused = conv2d_fused(x.as_tensor(), wt.as_tensor(), bias.as_tensor(), s, pad).unwrap();
        let theirs_b = theirs.broadcast_add(&bias.as_tensor().reshape((1, co, 1, 1)).unwrap()).unwrap();
        assert!(rel_err(&fused, &theirs_b) <= 1e-5, "fused forward");
        let g = random(&mut rng, fused.dims());
        let gf = (&fused * &g).unwrap().sum_all().unwrap().backward().unwrap();
        let gc = (&theirs_b * &g).unwrap().sum_all().unwrap().backward().unwrap();
        for v in [&x, &wt, &bias] {
            let (a, c) = (gf.get(v.as_tensor()).unwrap(), gc.get(v.as_tensor()).unwrap());
            assert!(rel_err(a, c) <= 1e-5, "fused gradient {:?}: {}", (b, ci, co, h, w, k, s), rel_err(a, c));
        }
        let ours = conv2d(x.as_tensor(), wt.as_tensor(), s, pad).unwrap();
        assert_eq!(ours.dims(), theirs.dims());
        assert!(rel_err(&ours, &theirs) <= 1e-5, "forward {:?}", (b, ci, co, h, w, k, s));
        // Same upstream gradient through both: compare dL/dx and dL/dw.
        let g = random(&mut rng, ours.dims());
        let go = (&ours * &g).unwrap().sum_all().unwrap().backward().unwrap();
        let gt = (&theirs * &g).unwrap().sum_all().unwrap().backward().unwrap();
        for v in [&x, &wt] {
            let (a, c) = (go.get(v.as_tensor()).unwrap(), gt.get(v.as_tensor()).unwrap());
            assert!(rel_err(a, c) <= 1e-5, "gradient {:?}: {}", (b, ci, co, h, w, k, s), rel_err(a, c));
        }
    }
}

#[test]
fn gradient_matches_finite_differences() {
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    let x0 = random(&mut rng, &[1, 2, 5, 6]);
    let w0 = random(&mut rng, &[3, 2, 3, 3]);
    let g = random(&mut rng, &[1, 3, 3, 3]);
    let loss = |x: &Tensor, w: &Tensor| -> f64 {
        (conv2d(x, w, 2, 1).unwrap() * &g).unwrap().sum_all().unwrap().to_scalar::<f32>().unwrap() as f64
    };
    let x = Var::from_tensor(&x0).unwrap();
    let w = Var::from_tensor(&w0).unwrap();
    let grads =
        (conv2d(x.as_tensor(), w.as_tensor(), 2, 1).unwrap() * &g).unwrap().sum_all().unwrap().backward().unwrap();
    for (var, base) in [(&x, &x0), (&w, &w0)] {
        let analytic = grads.get(var.as_tensor()).unwrap().flatten_all().unwrap().to_vec1::<f32>().unwrap();
        let flat = base.flatten_all().unwrap().to_vec1::<f32>().unwrap();
        for i in (0..flat.len()).step_by(3) {
            let eps = 1e-2f32;
            let mut plus = flat.clone();
            plus[i] += eps;
            let mut minus = flat.clone();
            minus[i] -= eps;
            let p = Tensor::from_vec(plus, base.dims(), &Device::Cpu).unwrap();
            let m = Tensor::from_vec(minus, base.dims(), &Device::Cpu).unwrap();
            let (lp, lm) =
                if std::ptr::eq(var, &x) { (loss(&p, &w0), loss(&m, &w0)) } else { (loss(&x0, &p), loss(&x0, &m)) };
            let numeric = (lp - lm) / (2.0 * eps as f64);
            assert!((numeric - analytic[i] as f64).abs() < 2e-3, "{i}: numeric {numeric} vs analytic {}", analytic[i]);
        }
    }
}

/// The decoder's fused sub-pixel layer against the same steps written with candle's own ops:
/// `conv2d`, the depth-to-space rearrangement as reshape/permute (PyTorch's pixel-shuffle
/// order, channel `4c + 2dy + dx`), and the inverse GDN `y = x · √(β + γ·x²)` per pixel.
#[test]
fn fused_subpixel_igdn_matches_conv_depth_to_space_and_igdn_in_candle() {
    use kiln::kernels::fused_conv::subpixel_igdn_forward;
    let mut rng = ChaCha8Rng::seed_from_u64(12);
    // (batch, cin, n, h, w, k): odd sizes, one and many channels, both kernel sizes.
    for (b, ci, n, h, w, k) in [(1, 1, 1, 5, 7, 3), (2, 3, 2, 9, 6, 3), (1, 16, 8, 11, 13, 5), (1, 24, 16, 8, 20, 3)] {
        let x = random(&mut rng, &[b, ci, h, w]);
        let wt = random(&mut rng, &[4 * n, ci, k, k]);
        let bias = random(&mut rng, &[4 * n]);
        let beta = (random(&mut rng, &[n]).abs().unwrap() + 0.1).unwrap();
        let gamma = (random(&mut rng, &[n, n]).abs().unwrap() * 0.2).unwrap();
        let conv =
            x.conv2d(&wt, k / 2, 1, 1, 1).unwrap().broadcast_add(&bias.reshape((1, 4 * n, 1, 1)).unwrap()).unwrap();
        let up = conv
            .reshape((b, n, 2, 2, h, w))
            .unwrap()
            .permute((0, 1, 4, 2, 5, 3))
            .unwrap()
            .reshape((b, n, 2 * h, 2 * w))
            .unwrap();
        let x2 = up.sqr().unwrap().reshape((b, n, 4 * h * w)).unwrap();
        let norm = gamma.broadcast_matmul(&x2).unwrap().broadcast_add(&beta.reshape((1, n, 1)).unwrap()).unwrap();
        let igdn = (&up * norm.sqrt().unwrap().reshape((b, n, 2 * h, 2 * w)).unwrap()).unwrap();
        let plain = subpixel_igdn_forward(&x, &wt, &bias, None).unwrap();
        assert!(rel_err(&plain, &up) <= 1e-5, "depth-to-space {:?}: {}", (b, ci, n, h, w, k), rel_err(&plain, &up));
        let fused = subpixel_igdn_forward(&x, &wt, &bias, Some((&beta, &gamma))).unwrap();
        assert!(rel_err(&fused, &igdn) <= 1e-5, "with IGDN {:?}: {}", (b, ci, n, h, w, k), rel_err(&fused, &igdn));
    }
    let (x, wt, bias) = (random(&mut rng, &[1, 3, 4, 4]), random(&mut rng, &[6, 3, 3, 3]), random(&mut rng, &[6]));
    assert!(subpixel_igdn_forward(&x, &wt, &bias, None).is_err(), "6 output channels are not 4·N");
}

/// The trained default's synthesis (real weights, including the GDN's tiny off-diagonal γ): the
/// decoder's fused path against the training path.
#[test]
fn decode_path_of_the_default_synthesis_matches_its_training_path() {
    let file = kiln::ModelFile::load(None).unwrap();
    let m = file.model.config.m;
    let mut rng = ChaCha8Rng::seed_from_u64(13);
    let y = (random(&mut rng, &[1, m, 3, 5]) * 4.0).unwrap().round().unwrap();
    let reference = candle_core::Module::forward(&file.model.g_s, &y).unwrap();
    let fused = file.model.g_s.forward_decode(&y).unwrap();
    let s = file.model.config.latent_stride();
    assert_eq!(fused.dims(), &[1, 3, 3 * s, 5 * s]);
    assert!(rel_err(&fused, &reference) <= 1e-5, "{}", rel_err(&fused, &reference));
}

#[test]
fn one_thread_reuses_scratch_across_images_without_stale_values() {
    // With one thread the fused kernels run a batch's images one after another on the same
    // scratch (padded copies, patch rows) and write outputs without clearing them first: every
    // image must still match candle, including the narrow 12-output kernel and both strides.
    let pool = rayon::ThreadPoolBuilder::new().num_threads(1).build().unwrap();
    let mut rng = ChaCha8Rng::seed_from_u64(9);
    // (batch, cin, cout, h, w, k, stride)
    for (b, ci, co, h, w, k, s) in [
        (3, 5, 8, 11, 9, 3, 1),
        (3, 16, 12, 10, 13, 3, 1),
        (3, 16, 24, 11, 9, 3, 1),
        (3, 3, 8, 15, 17, 5, 2),
        (3, 16, 9, 13, 11, 5, 2),
    ] {
        let x = random(&mut rng, &[b, ci, h, w]);
        let wt = random(&mut rng, &[co, ci, k, k]);
        let bias = random(&mut rng, &[co]);
        let theirs =
            x.conv2d(&wt, k / 2, s, 1, 1).unwrap().broadcast_add(&bias.reshape((1, co, 1, 1)).unwrap()).unwrap();
        let ours = pool.install(|| conv2d_fused(&x, &wt, &bias, s, k / 2).unwrap());
        assert!(rel_err(&ours, &theirs) <= 1e-5, "{:?}: {}", (b, ci, co, h, w, k, s), rel_err(&ours, &theirs));
    }
}
