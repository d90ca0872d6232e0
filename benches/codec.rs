//! Encode and decode throughput of the embedded default model at three qualities on a 768×512
//! photograph, with PNG and JPEG of the same image in the same groups (pixels/s), and candle's
//! matmul as the ruler for the decoder's GFLOP/s; quality 50 also with every convolution as a gemm
//! (`ConvBackend::GemmOnly`), to show what the Winograd and few-input kernels change. Decoding
//! runs the exact integer synthesis on this CPU's widest path; at each quality the float
//! synthesis (`Codec::decode_float`, not exact across CPUs) and the integer synthesis held to
//! AVX2 run beside it.

// The allocator the kiln binary uses, so that timings match it.
#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

use criterion::{Criterion, Throughput, criterion_group, criterion_main};
use kiln::eval::baselines::{decode_jpeg, encode_jpeg};
use kiln::kernels::IntPath;
use kiln::kernels::conv::{self, ConvBackend};
use kiln::{AlphaPolicy, Codec, ModelFile, Picture};

/// The 768×512 centre of a validation photograph if fetched (tools/fetch-corpus), else of the
/// committed test photograph scaled up.
fn photo() -> Picture {
    let root = std::path::Path::new(env!("CARGO_MANIFEST_DIR"));
    let candidates = [root.join("corpus/val/Storm.png"), root.join("tests/fixtures/metrics/chelsea.png")];
    let path = candidates.iter().find(|p| p.is_file()).expect("a photograph");
    let img = image::open(path).unwrap().into_rgb8();
    let img = if img.width() < 768 || img.height() < 512 {
        image::imageops::resize(
            &img,
            768.max(img.width()),
            512.max(img.height()),
            image::imageops::FilterType::Lanczos3,
        )
    } else {
        img
    };
    let (x, y) = ((img.width() - 768) / 2, (img.height() - 512) / 2);
    let crop = image::imageops::crop_imm(&img, x, y, 768, 512).to_image();
    Picture::from_dynamic(image::DynamicImage::ImageRgb8(crop), AlphaPolicy::Refuse).unwrap()
}

fn codec_benches(c: &mut Criterion) {
    let pic = photo();
    let px = (pic.width * pic.height) as u64;
    let codec = Codec::new(ModelFile::load(None).expect("embedded default model")).unwrap();
    let mut enc = c.benchmark_group("encode 768x512");
    enc.throughput(Throughput::Elements(px));
    enc.sample_size(10);
    for q in [10.0, 50.0, 90.0] {
        enc.bench_function(format!("kiln q{q}"), |b| b.iter(|| codec.encode(&pic, q).unwrap()));
    }
    // The same encode with every convolution as a gemm (no Winograd, no few-input kernel).
    enc.bench_function("kiln q50 gemm only", |b| {
        conv::set_backend(ConvBackend::GemmOnly);
        b.iter(|| codec.encode(&pic, 50.0).unwrap());
        conv::set_backend(ConvBackend::Fast);
    });
    enc.bench_function("jpeg q75 4:2:0", |b| b.iter(|| encode_jpeg(&pic.data, pic.width, pic.height, 75).unwrap()));
    enc.bench_function("png best", |b| b.iter(|| pic.to_png().unwrap()));
    enc.finish();
    let mut dec = c.benchmark_group("decode 768x512");
    dec.throughput(Throughput::Elements(px));
    dec.sample_size(10);
    let avx2 = Codec::new(ModelFile::load(None).unwrap()).unwrap().with_int_path(IntPath::Avx2);
    let native = IntPath::Native.describe();
    for q in [10.0, 50.0, 90.0] {
        let bytes = codec.encode(&pic, q).unwrap().bytes;
        dec.bench_function(format!("kiln q{q} integer {native}"), |b| b.iter(|| codec.decode(&bytes).unwrap()));
        dec.bench_function(format!("kiln q{q} integer {}", IntPath::Avx2.describe()), |b| {
            b.iter(|| avx2.decode(&bytes).unwrap())
        });
        dec.bench_function(format!("kiln q{q} float"), |b| b.iter(|| codec.decode_float(&bytes).unwrap()));
        if q == 50.0 {
            dec.bench_function("kiln q50 float gemm only", |b| {
                conv::set_backend(ConvBackend::GemmOnly);
                b.iter(|| codec.decode_float(&bytes).unwrap());
                conv::set_backend(ConvBackend::Fast);
            });
        }
    }
    let jpeg = encode_jpeg(&pic.data, pic.width, pic.height, 75).unwrap();
    dec.bench_function("jpeg q75 4:2:0", |b| b.iter(|| decode_jpeg(&jpeg, 3).unwrap()));
    let png = pic.to_png().unwrap();
    dec.bench_function("png", |b| b.iter(|| image::load_from_memory(&png).unwrap()));
    dec.finish();
    // The ruler for the decoder's GFLOP/s: candle's matmul on 1024×1024 f32 (2·1024³ FLOPs),
    // run in the same process so that the ratio comes from one run.
    let mut mm = c.benchmark_group("matmul 1024");
    mm.throughput(Throughput::Elements(2 * 1024 * 1024 * 1024));
    mm.sample_size(10);
    let a = candle_core::Tensor::randn(0f32, 1.0, (1024, 1024), &candle_core::Device::Cpu).unwrap();
    mm.bench_function("candle matmul (FLOPs)", |b| b.iter(|| a.matmul(&a).unwrap()));
    mm.finish();
}

fn config() -> Criterion {
    kiln::allocator::keep_freed_memory();
    Criterion::default()
        .warm_up_time(std::time::Duration::from_secs(1))
        .measurement_time(std::time::Duration::from_secs(3))
}

criterion_group! { name = benches; config = config(); targets = codec_benches }
criterion_main!(benches);
