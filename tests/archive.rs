//! Archive workflow: pack → verify → unpack, resumability after kill -9, shards and merge.

mod common;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use common::{synthetic_picture, tiny_model_bytes};
use sha2::{Digest, Sha256};

fn kiln(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_kiln")).args(args).output().unwrap()
}

fn s(p: &Path) -> String {
    p.display().to_string()
}

/// Every file under `root` with the SHA-256 of its bytes.
fn tree_hashes(root: &Path) -> BTreeMap<PathBuf, String> {
    let mut out = BTreeMap::new();
    let mut stack = vec![root.to_path_buf()];
    while let Some(d) = stack.pop() {
        // Tolerant of files appearing and vanishing: a pack may be running.
        let Ok(entries) = std::fs::read_dir(&d) else { continue };
        for e in entries.flatten() {
            let p = e.path();
            if p.is_dir() {
                stack.push(p);
            } else if let Ok(bytes) = std::fs::read(&p) {
                let h = Sha256::digest(bytes);
                out.insert(p.strip_prefix(root).unwrap().to_path_buf(), kiln::model::hex_prefix(&h, 32));
            }
        }
    }
    out
}

fn source_tree(root: &Path, n: usize) {
    source_tree_scaled(root, n, 1)
}

fn source_tree_scaled(root: &Path, n: usize, scale: u32) {
    std::fs::create_dir_all(root.join("a/b")).unwrap();
    std::fs::create_dir_all(root.join("c")).unwrap();
    for i in 0..n {
        let dir = ["", "a", "a/b", "c"][i % 4];
        let (w, h) = [(70, 50), (64, 64), (33, 97), (101, 45)][i % 4];
        let pic = synthetic_picture(w * scale, h * scale, if i % 3 == 2 { 1 } else { 3 }, i as u64);
        std::fs::write(root.join(dir).join(format!("img{i:02}.png")), pic.to_png().unwrap()).unwrap();
    }
}

fn setup(n: usize) -> (tempfile::TempDir, PathBuf, PathBuf) {
    let tmp = tempfile::tempdir().unwrap();
    let model = tmp.path().join("m.safetensors");
    std::fs::write(&model, tiny_model_bytes(51)).unwrap();
    let src = tmp.path().join("src");
    source_tree(&src, n);
    (tmp, model, src)
}

#[test]
fn pack_verify_unpack_leaves_the_source_untouched_and_names_broken_files() {
    let (tmp, model, src) = setup(6);
    std::fs::write(src.join("a/broken.png"), b"\x89PNG truncated").unwrap();
    let before = tree_hashes(&src);
    let dest = tmp.path().join("archive");
    let o = kiln(&["pack", &s(&src), &s(&dest), "--quality", "50", "--model", &s(&model)]);
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(1), "{err}");
    assert!(err.contains("a/broken.png"), "{err}");
    assert_eq!(before, tree_hashes(&src), "the source tree changed");
    assert!(dest.join("a/b/img02.png.kiln").is_file() && dest.join("catalog.sqlite").is_file());

    let o = kiln(&["verify", &s(&dest), "--model", &s(&model)]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let out = tmp.path().join("unpacked");
    let o = kiln(&["unpack", &s(&dest), &s(&out), "--model", &s(&model)]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    for i in 0..6 {
        let dir = ["", "a", "a/b", "c"][i % 4];
        let img = image::open(out.join(dir).join(format!("img{i:02}.png"))).unwrap();
        let orig = image::open(src.join(dir).join(format!("img{i:02}.png"))).unwrap();
        assert_eq!((img.width(), img.height(), img.color()), (orig.width(), orig.height(), orig.color()));
    }
    let o = kiln(&["stats", &s(&dest), "--json"]);
    let st: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(st["files"].as_u64().unwrap(), 6);

    // Damage a container: verify names it and exits 1.
    let victim = dest.join("c/img03.png.kiln");
    let mut b = std::fs::read(&victim).unwrap();
    let last = b.len() - 10;
    b[last] ^= 0x40;
    std::fs::write(&victim, b).unwrap();
    let o = kiln(&["verify", &s(&dest), "--model", &s(&model)]);
    assert_eq!(o.status.code(), Some(1));
    assert!(String::from_utf8_lossy(&o.stderr).contains("c/img03.png"));
    assert_eq!(before, tree_hashes(&src));
}

fn catalog_rows(dest: &Path) -> Vec<(String, String, u64)> {
    let c = kiln::archive::catalog::Catalog::open_existing(&dest.join("catalog.sqlite")).unwrap();
    c.all().unwrap().into_iter().map(|e| (e.rel_path, e.pixel_sha256, e.container_size)).collect()
}

#[test]
fn a_killed_pack_resumes_to_the_same_result_without_temporary_files() {
    let (tmp, model, _) = setup(0);
    let src = tmp.path().join("big");
    source_tree_scaled(&src, 16, 6); // large enough that the run is still going when killed
    let reference = tmp.path().join("reference");
    assert!(kiln(&["pack", &s(&src), &s(&reference), "--quality", "30", "--model", &s(&model)]).status.success());

    let dest = tmp.path().join("archive");
    let mut child = Command::new(env!("CARGO_BIN_EXE_kiln"))
        .args(["pack", &s(&src), &s(&dest), "--quality", "30", "--model", &s(&model), "--jobs", "1"])
        .stderr(std::process::Stdio::null())
        .spawn()
        .unwrap();
    // Kill it once it has started writing containers.
    let t0 = std::time::Instant::now();
    while t0.elapsed().as_secs() < 20 && !tree_hashes(&dest).keys().any(|p| p.to_string_lossy().ends_with(".kiln")) {
        std::thread::sleep(std::time::Duration::from_millis(2));
    }
    child.kill().unwrap(); // SIGKILL: no destructor, no cleanup runs
    child.wait().unwrap();
    let interrupted = kiln::archive::catalog::Catalog::open(&dest.join("catalog.sqlite")).unwrap().all().unwrap().len();
    assert!(interrupted < 16, "the run finished before it could be killed ({interrupted} rows)");
    let o = kiln(&["pack", &s(&src), &s(&dest), "--quality", "30", "--model", &s(&model)]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert_eq!(catalog_rows(&dest), catalog_rows(&reference));
    let (a, b) = (tree_hashes(&dest), tree_hashes(&reference));
    let containers = |t: &BTreeMap<PathBuf, String>| -> Vec<(PathBuf, String)> {
        t.iter().filter(|(p, _)| p.to_string_lossy().ends_with(".kiln")).map(|(p, h)| (p.clone(), h.clone())).collect()
    };
    assert_eq!(containers(&a), containers(&b));
    assert!(!a.keys().any(|p| p.to_string_lossy().contains(".kiln-tmp-")), "temporary files remain");
    // A third run finds nothing to do.
    let o = kiln(&["pack", &s(&src), &s(&dest), "--quality", "30", "--model", &s(&model)]);
    assert!(String::from_utf8_lossy(&o.stderr).contains("packed 0, unchanged 16"));
}

#[test]
fn shards_cover_every_file_once_and_merge_to_the_full_catalog() {
    let (tmp, model, src) = setup(12);
    let dest = tmp.path().join("archive");
    let mut seen = Vec::new();
    for i in 0..3 {
        let shard = format!("{i}/3");
        let o = kiln(&["pack", &s(&src), &s(&dest), "--quality", "20", "--model", &s(&model), "--shard", &shard]);
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        let c = kiln::archive::catalog::Catalog::open_existing(&dest.join(format!("catalog.shard-{i}-of-3.sqlite")))
            .unwrap();
        seen.extend(c.all().unwrap().into_iter().map(|e| e.rel_path));
    }
    seen.sort();
    let mut unique = seen.clone();
    unique.dedup();
    assert_eq!(seen, unique, "a file was packed by two shards");
    assert_eq!(seen.len(), 12);
    assert!(kiln(&["catalog", "merge", &s(&dest)]).status.success());
    assert_eq!(catalog_rows(&dest).len(), 12);
    let o = kiln(&["verify", &s(&dest), "--model", &s(&model)]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
}

/// A smooth picture: gradients and soft shapes, little noise (reachable fidelity for any model).
fn smooth_picture(w: u32, h: u32, seed: u64) -> kiln::Picture {
    let mut data = Vec::with_capacity((w * h * 3) as usize);
    let f = seed as f32 * 0.37;
    for y in 0..h {
        for x in 0..w {
            let (u, v) = (x as f32 / w as f32, y as f32 / h as f32);
            let blob = (-((u - 0.5 - 0.2 * f.sin()).powi(2) + (v - 0.5).powi(2)) * 12.0).exp();
            data.push((70.0 + 120.0 * u + 40.0 * blob) as u8);
            data.push((90.0 + 80.0 * v + 30.0 * (f + 3.0 * u).sin()) as u8);
            data.push((120.0 + 60.0 * blob - 30.0 * v) as u8);
        }
    }
    kiln::Picture { width: w, height: h, channels: 3, data }
}

#[test]
fn target_psnr_holds_on_every_decoded_image() {
    // The embedded default model, real weights.
    let tmp = tempfile::tempdir().unwrap();
    let src = tmp.path().join("src");
    std::fs::create_dir_all(src.join("d")).unwrap();
    for i in 0..4u64 {
        let (w, h) = [(160, 120), (97, 131), (200, 64), (64, 64)][i as usize];
        let sub = if i % 2 == 0 { "" } else { "d" };
        std::fs::write(src.join(sub).join(format!("s{i}.png")), smooth_picture(w, h, i).to_png().unwrap()).unwrap();
    }
    let dest = tmp.path().join("archive");
    let o = kiln(&["pack", &s(&src), &s(&dest), "--target-psnr", "34"]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let out = tmp.path().join("out");
    assert!(kiln(&["unpack", &s(&dest), &s(&out)]).status.success());
    let c = kiln::archive::catalog::Catalog::open_existing(&dest.join("catalog.sqlite")).unwrap();
    let rows = c.all().unwrap();
    assert_eq!(rows.len(), 4);
    for e in rows {
        let orig = kiln::Picture::open(&src.join(&e.rel_path), kiln::AlphaPolicy::Refuse).unwrap();
        let back =
            kiln::Picture::open(&out.join(Path::new(&e.rel_path).with_extension("png")), kiln::AlphaPolicy::Refuse)
                .unwrap();
        let p = kiln::metrics::psnr(&orig.data, &back.data);
        assert!(p >= 34.0, "{}: decoded PSNR {p:.2} dB below the 34 dB target", e.rel_path);
        assert!((p - e.psnr).abs() < 1e-9, "catalog PSNR {} differs from the decoded {p}", e.psnr);
    }
}

#[test]
fn verify_compares_decoded_pixels_exactly_and_pack_records_missing_checksums() {
    let (tmp, model, src) = setup(3);
    let dest = tmp.path().join("archive");
    assert!(kiln(&["pack", &s(&src), &s(&dest), "--model", &s(&model)]).status.success());
    let cat = dest.join("catalog.sqlite");
    let recorded: Vec<Option<String>> = {
        let c = kiln::archive::catalog::Catalog::open_existing(&cat).unwrap();
        c.all().unwrap().into_iter().map(|e| e.decoded_sha256).collect()
    };
    assert!(recorded.iter().all(|h| h.as_ref().is_some_and(|h| h.len() == 64)), "{recorded:?}");
    // The decode of each container hashes to what the catalog recorded.
    let codec = kiln::Codec::new(kiln::ModelFile::read(&model).unwrap()).unwrap();
    let c = kiln::archive::catalog::Catalog::open_existing(&cat).unwrap();
    for e in c.all().unwrap() {
        let pic = codec.decode(&std::fs::read(dest.join(&e.container_path)).unwrap()).unwrap();
        assert_eq!(Some(kiln::archive::pixel_hash(&pic)), e.decoded_sha256);
    }
    drop(c);
    // A checksum that does not match the decode is named, whatever the PSNR.
    let db = rusqlite::Connection::open(&cat).unwrap();
    db.execute("UPDATE files SET decoded_sha256 = ?1 WHERE rel_path = 'a/img01.png'", ["0".repeat(64)]).unwrap();
    let o = kiln(&["verify", &s(&dest)]);
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(1), "{err}");
    assert!(err.contains("a/img01.png") && err.contains("decoded pixels differ"), "{err}");
    // Rows without a checksum (packed before exact decoding) verify by PSNR, and a pack run
    // records their checksums without re-encoding anything.
    db.execute("UPDATE files SET decoded_sha256 = NULL", []).unwrap();
    drop(db);
    let o = kiln(&["verify", &s(&dest)]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(String::from_utf8_lossy(&o.stderr).contains("3 row(s) from before exact decoding"));
    let o = kiln(&["pack", &s(&src), &s(&dest), "--model", &s(&model)]);
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(o.status.success() && err.contains("checksum of 3 unchanged file(s)") && err.contains("packed 0"), "{err}");
    let c = kiln::archive::catalog::Catalog::open_existing(&cat).unwrap();
    assert_eq!(c.all().unwrap().into_iter().map(|e| e.decoded_sha256).collect::<Vec<_>>(), recorded);
}
