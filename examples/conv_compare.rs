use candle_core::{Device, Tensor, Var};
use kiln::kernels::conv::{conv2d, conv2d_channel_major};
use kiln::kernels::fused_conv::conv2d_fused;
use std::time::Instant;
fn t<F: FnMut()>(label: &str, mut f: F) {
    f();
    let s = Instant::now();
    for _ in 0..3 {
        f();
    }
    println!("{label:50} {:7.1} ms", s.elapsed().as_secs_f64() / 3.0 * 1e3);
}
fn main() {
    let dev = Device::Cpu;
    for (b, ci, co, sz, k, st) in [
        (8, 64, 64, 64, 5, 2),
        (8, 64, 256, 32, 3, 1),
        (8, 64, 256, 16, 3, 1),
        (8, 96, 256, 8, 3, 1),
        (8, 3, 64, 128, 5, 2),
        (8, 64, 12, 64, 3, 1),
    ] {
        let x = Var::from_tensor(&Tensor::rand(-1f32, 1.0, (b, ci, sz, sz), &dev).unwrap()).unwrap();
        let w = Var::from_tensor(&Tensor::rand(-0.1f32, 0.1, (co, ci, k, k), &dev).unwrap()).unwrap();
        let bias = Var::from_tensor(&Tensor::zeros(co, candle_core::DType::F32, &dev).unwrap()).unwrap();
        let name = format!("{ci}->{co} k{k} s{st} @{sz}");
        t(&format!("{name} patch fwd+bwd"), || {
            conv2d(x.as_tensor(), w.as_tensor(), st, k / 2).unwrap().sum_all().unwrap().backward().unwrap();
        });
        t(&format!("{name} fused fwd+bwd"), || {
            conv2d_fused(x.as_tensor(), w.as_tensor(), bias.as_tensor(), st, k / 2)
                .unwrap()
                .sum_all()
                .unwrap()
                .backward()
                .unwrap();
        });
        t(&format!("{name} chan  fwd+bwd"), || {
            conv2d_channel_major(x.as_tensor(), w.as_tensor(), st, k / 2)
                .unwrap()
                .sum_all()
                .unwrap()
                .backward()
                .unwrap();
        });
        t(&format!("{name} candle fwd+bwd"), || {
            x.as_tensor().conv2d(w.as_tensor(), k / 2, st, 1, 1).unwrap().sum_all().unwrap().backward().unwrap();
        });
    }
}
