//! Convolution at Kiln's shapes: ours (`Fast`: implicit GEMM, Winograd for 3×3 stride 1;
//! `GemmOnly`: every layer as a gemm) vs candle's `conv2d` vs a candle `matmul` of equal FLOPs,
//! forward and forward+backward; and one training step with each backend.
//! Throughput is reported in elements = FLOPs, so criterion's "elem/s" reads as FLOP/s.

// The allocator the kiln binary uses, so that timings match it.
#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

use candle_core::{DType, Device, Tensor, Var};
use criterion::{Criterion, Throughput, criterion_group, criterion_main};
use kiln::kernels::conv::{self, ConvBackend};
use kiln::{Model, ModelConfig};

struct Shape {
    name: &'static str,
    batch: usize,
    cin: usize,
    cout: usize,
    size: usize,
    k: usize,
    stride: usize,
}

const SHAPES: [Shape; 3] = [
    Shape { name: "g_a.2 5x5 s2 64->64 @64px b8", batch: 8, cin: 64, cout: 64, size: 64, k: 5, stride: 2 },
    Shape { name: "g_s.4 3x3 s1 64->256 @32px b8", batch: 8, cin: 64, cout: 256, size: 32, k: 3, stride: 1 },
    Shape { name: "g_a.0 5x5 s2 3->64 @128px b8", batch: 8, cin: 3, cout: 64, size: 128, k: 5, stride: 2 },
];

fn conv_benches(c: &mut Criterion) {
    let dev = Device::Cpu;
    for s in &SHAPES {
        let x = Var::from_tensor(&Tensor::rand(-1f32, 1.0, (s.batch, s.cin, s.size, s.size), &dev).unwrap()).unwrap();
        let w = Var::from_tensor(&Tensor::rand(-0.1f32, 0.1, (s.cout, s.cin, s.k, s.k), &dev).unwrap()).unwrap();
        let bias = Var::from_tensor(&Tensor::zeros(s.cout, DType::F32, &dev).unwrap()).unwrap();
        let out = s.size / s.stride;
        let flops = 2 * s.batch * out * out * s.cout * s.cin * s.k * s.k;
        // A square-ish matmul with the same FLOPs.
        let n = ((flops / 2) as f64).cbrt().round() as usize;
        let a = Tensor::rand(-1f32, 1.0, (n, n), &dev).unwrap();
        let mut g = c.benchmark_group(format!("conv forward {}", s.name));
        g.throughput(Throughput::Elements(flops as u64));
        g.sample_size(10);
        for be in [ConvBackend::Fast, ConvBackend::GemmOnly, ConvBackend::Candle] {
            g.bench_function(format!("{be:?}"), |b| {
                conv::set_backend(be);
                b.iter(|| {
                    conv::conv2d_selected(x.as_tensor(), w.as_tensor(), bias.as_tensor(), s.stride, s.k / 2).unwrap()
                })
            });
        }
        g.bench_function(format!("matmul {n}^3"), |b| b.iter(|| a.matmul(&a).unwrap()));
        g.finish();
        let mut g = c.benchmark_group(format!("conv forward+backward {}", s.name));
        g.throughput(Throughput::Elements(3 * flops as u64));
        g.sample_size(10);
        for be in [ConvBackend::Fast, ConvBackend::GemmOnly, ConvBackend::Candle] {
            g.bench_function(format!("{be:?}"), |b| {
                conv::set_backend(be);
                b.iter(|| {
                    let y = conv::conv2d_selected(x.as_tensor(), w.as_tensor(), bias.as_tensor(), s.stride, s.k / 2)
                        .unwrap();
                    y.sum_all().unwrap().backward().unwrap()
                })
            });
        }
        g.finish();
    }
    conv::set_backend(ConvBackend::Fast);
}

fn training_step(c: &mut Criterion) {
    let dev = Device::Cpu;
    let model = Model::new(ModelConfig::default(), 1).unwrap();
    let (b, p) = (8, 128);
    let x = Tensor::rand(0f32, 1.0, (b, 3, p, p), &dev).unwrap();
    let idx = Tensor::new(&[0u32, 1, 2, 3, 4, 0, 1, 2], &dev).unwrap();
    let wt = Tensor::new(&[0.5f32; 8], &dev).unwrap();
    let ny = Tensor::zeros((b, 96, p / 16, p / 16), DType::F32, &dev).unwrap();
    let nz = Tensor::zeros((b, 64, p / 64, p / 64), DType::F32, &dev).unwrap();
    let mut g = c.benchmark_group("training step, shipped config, batch 8 of 128x128");
    g.throughput(Throughput::Elements(b as u64)); // samples/s
    g.sample_size(10);
    for be in [ConvBackend::Fast, ConvBackend::GemmOnly, ConvBackend::Candle] {
        g.bench_function(format!("{be:?}"), |bn| {
            conv::set_backend(be);
            bn.iter(|| {
                let o = model.forward_train(&x, &idx, &wt, &ny, &nz).unwrap();
                let mse = (o.x_hat - &x).unwrap().sqr().unwrap().mean_all().unwrap();
                (mse + o.bits_y.sum_all().unwrap()).unwrap().backward().unwrap()
            })
        });
    }
    g.finish();
    conv::set_backend(ConvBackend::Fast);
}

fn config() -> Criterion {
    kiln::allocator::keep_freed_memory();
    Criterion::default()
        .warm_up_time(std::time::Duration::from_secs(1))
        .measurement_time(std::time::Duration::from_secs(3))
}

criterion_group! { name = benches; config = config(); targets = conv_benches, training_step }
criterion_main!(benches);
