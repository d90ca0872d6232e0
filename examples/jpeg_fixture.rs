//! Writes tests/fixtures/metrics/chelsea-q50-420.jpg with the jpeg-encoder crate (4:2:0,
//! optimized Huffman tables), for tools/reference-metrics.py to decode with Pillow.
fn main() {
    let img = image::open("tests/fixtures/metrics/chelsea.png").expect("run from the repository root").into_rgb8();
    let bytes = kiln::eval::baselines::encode_jpeg(img.as_raw(), img.width(), img.height(), 50).unwrap();
    std::fs::write("tests/fixtures/metrics/chelsea-q50-420.jpg", bytes).unwrap();
}
