//! Conformance: every container in `tests/conformance/` (written by each shipped model: RGB at
//! odd sizes and the lowest and highest quality, grey, two tiles) decodes to exactly the pixels
//! whose SHA-256 `manifest.json` records, on this CPU's widest vector path, on AVX-512BW and
//! AVX2 (where the CPU has them) and on the portable one,
//! with one thread and with two. A change that alters one decoded byte fails here; such a
//! change needs a new model name (DEVELOPERS.md, "Formats and compatibility").
//!
//! The manifest was written by `examples/make_conformance` on the machine the integer synthesis
//! was developed on (AVX-512); CI checks whatever CPU it runs on against it.

use std::collections::BTreeMap;
use std::path::PathBuf;

use kiln::archive::pixel_hash;
use kiln::kernels::IntPath;
use kiln::model::shipped::{SHIPPED, ShippedModel};
use kiln::{Codec, ModelFile};

fn dir() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/conformance")
}

#[test]
fn every_shipped_models_containers_decode_to_the_recorded_pixels_on_every_path() {
    let manifest: BTreeMap<String, serde_json::Value> =
        serde_json::from_slice(&std::fs::read(dir().join("manifest.json")).unwrap()).unwrap();
    // Every shipped model has its containers.
    for m in SHIPPED {
        let n = manifest.values().filter(|v| v["model"] == m.name).count();
        assert!(n >= 4, "{}: {n} conformance containers", m.name);
    }
    let pools: Vec<(usize, rayon::ThreadPool)> =
        [1, 2].iter().map(|&n| (n, rayon::ThreadPoolBuilder::new().num_threads(n).build().unwrap())).collect();
    let mut checked = 0;
    for m in SHIPPED {
        let file = ModelFile::from_bytes(&ShippedModel::bytes(m).unwrap()).unwrap();
        for path in [IntPath::Native, IntPath::Avx512, IntPath::Avx2, IntPath::Portable] {
            let codec = Codec::new(file.clone()).unwrap().with_int_path(path);
            for (name, entry) in manifest.iter().filter(|(_, v)| v["model"] == m.name) {
                let bytes = std::fs::read(dir().join(name)).unwrap();
                for (threads, pool) in &pools {
                    let pic = pool.install(|| codec.decode(&bytes)).unwrap();
                    assert_eq!(
                        pixel_hash(&pic),
                        entry["decoded_sha256"].as_str().unwrap(),
                        "{name}: {} path, {threads} thread(s)",
                        path.describe()
                    );
                    assert_eq!(
                        (pic.width as u64, pic.height as u64),
                        (entry["width"].as_u64().unwrap(), entry["height"].as_u64().unwrap())
                    );
                    checked += 1;
                }
            }
        }
    }
    assert_eq!(checked, manifest.len() * 8);
    eprintln!(
        "{checked} decodes matched ({}, {} and portable paths)",
        IntPath::Native.describe(),
        IntPath::Avx2.describe()
    );
}

#[test]
fn the_native_and_portable_paths_agree_on_a_larger_image() {
    // A 300×200 photograph crop at three qualities through the default model: more tiles of
    // the row kernels, the inverse GDN's bound and every requantization than the fixtures.
    let pic = kiln::Picture::open(
        &PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/metrics/chelsea.png"),
        kiln::AlphaPolicy::Refuse,
    )
    .unwrap();
    let codec = Codec::new(ModelFile::load(None).unwrap()).unwrap();
    let portable = Codec::new(ModelFile::load(None).unwrap()).unwrap().with_int_path(IntPath::Portable);
    for q in [1.0, 60.0, 100.0] {
        let bytes = codec.encode(&pic, q).unwrap().bytes;
        assert_eq!(pixel_hash(&codec.decode(&bytes).unwrap()), pixel_hash(&portable.decode(&bytes).unwrap()), "q{q}");
    }
}
