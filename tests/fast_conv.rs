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
