//! The fused GDN kernel against the layer written as plain candle operations: forward and the
//! gradients of the input and both parameters, in both directions.

use candle_core::{DType, Device, Module, Tensor, Var};
use candle_nn::{VarBuilder, VarMap};
use kiln::model::gdn::{Gdn, GdnDirection};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

fn rel_err(a: &Tensor, b: &Tensor) -> f32 {
    let d = (a - b).unwrap().sqr().unwrap().sum_all().unwrap().to_scalar::<f32>().unwrap().sqrt();
    d / b.sqr().unwrap().sum_all().unwrap().to_scalar::<f32>().unwrap().sqrt().max(1e-12)
}

#[test]
fn fused_gdn_matches_the_reference_forward_and_gradients() {
    let mut rng = ChaCha8Rng::seed_from_u64(9);
    for direction in [GdnDirection::Forward, GdnDirection::Inverse] {
        for (b, c, h, w) in [(2, 5, 7, 3), (1, 16, 9, 12), (3, 8, 4, 4)] {
            let varmap = VarMap::new();
            let layer = Gdn::new(c, direction, VarBuilder::from_varmap(&varmap, DType::F32, &Device::Cpu)).unwrap();
            for (_, var) in varmap.data().lock().unwrap().iter() {
                let n = var.elem_count();
                let v: Vec<f32> = (0..n).map(|_| rng.gen_range(0.2..1.0)).collect();
                var.set(&Tensor::from_vec(v, var.dims(), &Device::Cpu).unwrap()).unwrap();
            }
            let xv: Vec<f32> = (0..b * c * h * w).map(|_| rng.gen_range(-2.0..2.0)).collect();
            let x = Var::from_tensor(&Tensor::from_vec(xv, (b, c, h, w), &Device::Cpu).unwrap()).unwrap();
            let fused = layer.forward(x.as_tensor()).unwrap();
            let reference = layer.forward_reference(x.as_tensor()).unwrap();
            assert!(rel_err(&fused, &reference) < 1e-5, "{direction:?} forward");
            let gv: Vec<f32> = (0..b * c * h * w).map(|_| rng.gen_range(-1.0..1.0)).collect();
            let g = Tensor::from_vec(gv, (b, c, h, w), &Device::Cpu).unwrap();
            let gf = (&fused * &g).unwrap().sum_all().unwrap().backward().unwrap();
            let gr = (&reference * &g).unwrap().sum_all().unwrap().backward().unwrap();
            let mut tensors: Vec<Var> = varmap.data().lock().unwrap().values().cloned().collect();
            tensors.push(x.clone());
            for v in &tensors {
                let (a, r) = (gf.get(v.as_tensor()).unwrap(), gr.get(v.as_tensor()).unwrap());
                assert!(rel_err(a, r) < 1e-4, "{direction:?} {:?} gradient: {}", v.dims(), rel_err(a, r));
            }
        }
    }
}
