//! The decoder's table-selecting path gives the same bits for any thread count and SIMD mode.

use kiln::kernels::{FixedConv, SimdMode};
use kiln::{Model, ModelConfig};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

fn in_pool<T: Send>(threads: usize, f: impl FnOnce() -> T + Send) -> T {
    rayon::ThreadPoolBuilder::new().num_threads(threads).build().unwrap().install(f)
}

fn bits(v: &[f32]) -> Vec<u32> {
    v.iter().map(|x| x.to_bits()).collect()
}

#[test]
fn hyper_synthesis_is_bit_identical_across_threads_and_simd_modes() {
    let model = Model::new(ModelConfig { nz: 16, hyper_hidden: 24, m: 20, ..ModelConfig::tiny() }, 5).unwrap();
    let hs = model.hyper_synthesis_fixed().unwrap();
    let mut rng = ChaCha8Rng::seed_from_u64(1);
    let (hz, wz) = (5, 7);
    let z: Vec<f32> = (0..16 * hz * wz).map(|_| rng.gen_range(-6i32..6) as f32 * 0.7).collect();
    let reference = in_pool(1, || hs.forward(&z, hz, wz, SimdMode::Scalar));
    for threads in [1, 2, 3] {
        for mode in [SimdMode::Scalar, SimdMode::Vectorized] {
            let out = in_pool(threads, || hs.forward(&z, hz, wz, mode));
            assert_eq!(bits(&out.means), bits(&reference.means), "{threads} threads, {mode:?}");
            assert_eq!(bits(&out.log_scales), bits(&reference.log_scales), "{threads} threads, {mode:?}");
        }
    }
}

#[test]
fn fixed_conv_matches_a_direct_definition() {
    // out[y][x][o] = b[o] + Σ_{ky,kx,i} w[o][i][ky][kx] · in[y+ky−1][x+kx−1][i], zero padding.
    let (cin, cout, k, h, w) = (3, 5, 3, 4, 6);
    let mut rng = ChaCha8Rng::seed_from_u64(2);
    let wt: Vec<f32> = (0..cout * cin * k * k).map(|_| rng.gen_range(-1.0..1.0)).collect();
    let b: Vec<f32> = (0..cout).map(|_| rng.gen_range(-1.0..1.0)).collect();
    let x: Vec<f32> = (0..h * w * cin).map(|_| rng.gen_range(-1.0..1.0)).collect();
    let conv = FixedConv::new(&wt, &b, cout, cin, k);
    let out = conv.forward(&x, h, w, SimdMode::Vectorized);
    for y in 0..h as i64 {
        for xx in 0..w as i64 {
            for o in 0..cout {
                let mut s = b[o] as f64;
                for ky in 0..3i64 {
                    for kx in 0..3i64 {
                        let (iy, ix) = (y + ky - 1, xx + kx - 1);
                        if iy < 0 || ix < 0 || iy >= h as i64 || ix >= w as i64 {
                            continue;
                        }
                        for i in 0..cin {
                            s += wt[((o * cin + i) * 3 + ky as usize) * 3 + kx as usize] as f64
                                * x[((iy as usize) * w + ix as usize) * cin + i] as f64;
                        }
                    }
                }
                let got = out[((y as usize) * w + xx as usize) * cout + o] as f64;
                assert!((got - s).abs() < 1e-5, "({y},{xx},{o}): {got} vs {s}");
            }
        }
    }
}

#[test]
fn fixed_hyper_synthesis_agrees_with_the_training_network() {
    use candle_core::{Device, Tensor};
    let model = Model::new(ModelConfig::tiny(), 8).unwrap();
    let hs = model.hyper_synthesis_fixed().unwrap();
    let (nz, hz, wz) = (model.config.nz, 3, 2);
    let z: Vec<f32> = (0..nz * hz * wz).map(|i| ((i * 7 % 11) as f32 - 5.0) * 0.5).collect();
    let fixed = hs.forward(&z, hz, wz, SimdMode::Vectorized);
    let zt = Tensor::from_vec(z, (1, nz, hz, wz), &Device::Cpu).unwrap();
    let (mu, ls) = model.h_s.forward_split(&zt).unwrap();
    let mu = mu.flatten_all().unwrap().to_vec1::<f32>().unwrap();
    let ls = ls.flatten_all().unwrap().to_vec1::<f32>().unwrap();
    for (a, b) in fixed.means.iter().zip(&mu).chain(fixed.log_scales.iter().zip(&ls)) {
        assert!((a - b).abs() < 1e-4 * (1.0 + b.abs()), "{a} vs {b}");
    }
}

#[test]
fn register_blocked_path_gives_the_scalar_bits() {
    // Wide enough for interior pixel blocks, channel counts off the block size.
    let mut rng = ChaCha8Rng::seed_from_u64(3);
    for (cin, cout, k, h, w) in [(24, 40, 3, 9, 13), (7, 16, 3, 5, 11), (5, 33, 5, 8, 14)] {
        let wt: Vec<f32> = (0..cout * cin * k * k).map(|_| rng.gen_range(-1.0..1.0)).collect();
        let b: Vec<f32> = (0..cout).map(|_| rng.gen_range(-1.0..1.0)).collect();
        let x: Vec<f32> = (0..h * w * cin).map(|_| rng.gen_range(-3.0..3.0)).collect();
        let conv = FixedConv::new(&wt, &b, cout, cin, k);
        let scalar = conv.forward(&x, h, w, SimdMode::Scalar);
        for threads in [1, 2] {
            let fast = in_pool(threads, || conv.forward(&x, h, w, SimdMode::Vectorized));
            assert_eq!(bits(&fast), bits(&scalar), "{cin}->{cout} k{k} {h}x{w}, {threads} threads");
        }
    }
}

/// Time of the default model's fixed-order hyper-synthesis for a 768×512 image (hyper-latent
/// 16×24): `cargo test --release --test fixed_path hyper_synthesis_time -- --ignored --nocapture`.
#[test]
#[ignore]
fn hyper_synthesis_time() {
    let f = kiln::ModelFile::load(None).unwrap();
    let hs = f.model.hyper_synthesis_fixed().unwrap();
    let (hz, wz) = (16, 24);
    let z: Vec<f32> = (0..f.model.config.nz * hz * wz).map(|i| (i * 7919 % 13) as f32 - 6.0).collect();
    let mut best = f64::MAX;
    for _ in 0..10 {
        let t = std::time::Instant::now();
        std::hint::black_box(hs.forward(&z, hz, wz, kiln::kernels::SimdMode::Vectorized));
        best = best.min(t.elapsed().as_secs_f64());
    }
    eprintln!("hyper-synthesis {hz}×{wz}: {:.2} ms (fastest of 10)", best * 1e3);
}
