//! The model store: shipped models keep their bytes, every shipped model's containers decode,
//! lookup by fingerprint in its documented order, archives that carry their models.
//!
//! The fixtures in `tests/fixtures/shipped/` were written by the Kiln binaries of the time each
//! model shipped (built from the commit that shipped it: see `tests/fixtures/shipped/README.md`),
//! together with what those binaries decoded them to; the archive was packed by the first
//! release's binary, before archives carried models.

mod common;

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use common::{synthetic_picture, tiny_model_bytes};
use kiln::decoders::Decoders;
use kiln::model::shipped::{DEFAULT_MODEL_BYTES, DEFAULT_NAME, SHIPPED, ShippedModel};
use kiln::model::store::{ModelStore, stored_name};
use kiln::model::{ModelFile, fingerprint, hex_prefix};
use kiln::{AlphaPolicy, KilnError, Picture};

/// Every model that ever shipped: name, SHA-256, size. Pinned here, apart from the registry in
/// `src/model/shipped.rs`, so that changing a shipped model's bytes (or dropping one) fails
/// even if the registry is edited to match.
const PINNED: &[(&str, &str, u64)] = &[
    ("photo-2026-12-02a", "4a5e71a36543b52c4f199b4eb69222d3e14b7e82312d078828671bceaa249bd5", 6_762_108),
    ("photo-2026-12-02b", "0cbaae960caa91f689082a11afbcd38e91eeb6c1c070247156aa70017ce98d5b", 6_762_472),
    ("photo-2026-12-02c", "cdb1ab042eac0de15785e4ed6eaf2a1b044bb395534e25211f1dde50b58ee6e8", 6_762_816),
    ("photo-2026-12-02d", "f0526dfacbc15c11390ecbbfc71b5e5ba093eb053835858bf8baa2443246690e", 6_762_420),
    ("photo-2026-12-02e", "600b984a4c1db2b7f1bbaaf54e6d81f634f66820a3e0509214dcb071ba0c1896", 6_762_496),
    ("photo-2026-12-02f", "e0c437d795b4507fc6afd3aa6e1e63eb06dad8b6ff6f7aa3594d427a74de62c7", 6_762_504),
    ("photo-2026-12-02g", "7a32abd4e7a60ff513cd39906d6bc2608134ab5c9c2c0d8b8ad8d01663ce4e4a", 6_762_648),
    ("photo-2026-12-03a", "9c799b23b813962d31d3a4241d7f0fdb4ce974cd4d328766be7fb5ad0d6dfcd0", 8_930_864),
    ("photo-2026-12-03b", "9b779777478a33de55653f7134975781114170d885a6b72d9a303e5218b4b1c2", 8_930_872),
    ("photo-2026-12-03c", "f7f855be0a8c37730d8cd045aabce90f85553c52857325a5cf6fbd551f2ee3cc", 7_896_900),
];

fn repo() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn fixtures() -> PathBuf {
    repo().join("tests/fixtures/shipped")
}

fn kiln(args: &[&str]) -> Output {
    kiln_env(args, &[])
}

fn kiln_env(args: &[&str], env: &[(&str, &Path)]) -> Output {
    let mut c = Command::new(env!("CARGO_BIN_EXE_kiln"));
    c.args(args).env_remove("KILN_MODELS");
    for (k, v) in env {
        c.env(k, v);
    }
    c.output().unwrap()
}

fn s(p: &Path) -> String {
    p.display().to_string()
}

fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

fn png(p: &Path) -> Picture {
    Picture::open(p, AlphaPolicy::Refuse).unwrap()
}

#[test]
fn shipped_models_keep_their_names_and_bytes() {
    let registry: Vec<(&str, &str, u64)> = SHIPPED.iter().map(|m| (m.name, m.fingerprint, m.size)).collect();
    assert_eq!(registry, PINNED, "a shipped model was changed, removed or reordered; add new models at the end");
    let dir = repo().join(kiln::model::shipped::SHIPPED_DIR);
    let mut on_disk: Vec<String> =
        std::fs::read_dir(&dir).unwrap().map(|e| e.unwrap().file_name().to_string_lossy().into_owned()).collect();
    on_disk.sort();
    let expected: Vec<String> = PINNED.iter().map(|(n, _, _)| format!("{n}.safetensors")).collect();
    assert_eq!(on_disk, expected, "models/shipped holds exactly the shipped models");
    for (name, fp, size) in PINNED {
        let bytes = std::fs::read(dir.join(format!("{name}.safetensors"))).unwrap();
        assert_eq!(bytes.len() as u64, *size, "{name}");
        assert_eq!(hex_prefix(&fingerprint(&bytes), 32), *fp, "{name}: bytes changed");
        // Loading through the registry checks the same hash and parses the model.
        let m = ShippedModel::by_name(name).unwrap();
        assert_eq!(ModelFile::from_bytes(&m.bytes().unwrap()).unwrap().shipped(), Some(m));
    }
    // `default` is the newest, embedded, and what `None` loads.
    assert_eq!(DEFAULT_NAME, PINNED.last().unwrap().0);
    assert_eq!(ShippedModel::by_name("default").unwrap().name, DEFAULT_NAME);
    assert_eq!(hex_prefix(&fingerprint(DEFAULT_MODEL_BYTES), 32), PINNED.last().unwrap().1);
    assert_eq!(ModelFile::load(None).unwrap().shipped().unwrap().name, DEFAULT_NAME);
    assert_eq!(ModelFile::load(Some(Path::new("photo-2026-12-02b"))).unwrap().size as u64, PINNED[1].2);
}

#[test]
fn a_container_of_every_shipped_model_decodes_as_it_did_when_written() {
    let decoders = Decoders::new(ModelStore::new());
    let source = png(&fixtures().join("source.png"));
    for m in SHIPPED {
        let bytes = std::fs::read(fixtures().join(format!("{}.kiln", m.name)))
            .unwrap_or_else(|e| panic!("fixture for {}: {e}", m.name));
        let (_, place) = decoders.codec_for(&kiln::container::read_header(&bytes).unwrap().model_fingerprint).unwrap();
        assert_eq!(place, format!("shipped model {}", m.name));
        let now = decoders.decode(&bytes).unwrap();
        let then = png(&fixtures().join(format!("{}.decoded.png", m.name)));
        assert_eq!((now.width, now.height, now.channels), (source.width, source.height, source.channels));
        // Written and decoded with the float synthesis of the time; the integer synthesis moved
        // samples once, by rounding (at most 1); anything more is a decoding change. From the
        // integer synthesis on, `tests/conformance.rs` pins every decoded byte.
        let worst = now.data.iter().zip(&then.data).map(|(a, b)| a.abs_diff(*b)).max().unwrap();
        assert!(worst <= 1, "{}: decoded pixels moved by up to {worst}", m.name);
        let psnr = kiln::metrics::psnr(&source.data, &now.data);
        assert!(psnr > 30.0, "{}: {psnr:.2} dB", m.name);
    }
}

#[test]
fn an_archive_packed_before_archives_carried_models_still_verifies_and_unpacks() {
    let tmp = tempfile::tempdir().unwrap();
    let dest = tmp.path().join("old");
    copy_tree(&fixtures().join("archive-photo-2026-12-02a"), &dest);
    let o = kiln(&["verify", &s(&dest)]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert!(stderr(&o).contains("does not carry model 4a5e71a36543b52c"), "{}", stderr(&o));
    let out = tmp.path().join("out");
    let o = kiln(&["unpack", &s(&dest), &s(&out)]);
    assert!(o.status.success(), "{}", stderr(&o));
    let a = png(&out.join("a.png"));
    let then = png(&fixtures().join("photo-2026-12-02a.decoded.png"));
    assert!(a.data.iter().zip(&then.data).all(|(x, y)| x.abs_diff(*y) <= 1));
    assert!(out.join("sub/b.png").is_file());
}

fn copy_tree(from: &Path, to: &Path) {
    std::fs::create_dir_all(to).unwrap();
    for e in std::fs::read_dir(from).unwrap() {
        let e = e.unwrap();
        if e.file_type().unwrap().is_dir() {
            copy_tree(&e.path(), &to.join(e.file_name()));
        } else {
            std::fs::copy(e.path(), to.join(e.file_name())).unwrap();
        }
    }
}

/// A temporary folder with a source tree of three small images and two tiny models.
struct Setup {
    tmp: tempfile::TempDir,
    src: PathBuf,
    model_a: PathBuf,
    model_b: PathBuf,
}

impl Setup {
    fn new() -> Self {
        let tmp = tempfile::tempdir().unwrap();
        let src = tmp.path().join("src");
        std::fs::create_dir_all(src.join("sub")).unwrap();
        for (i, rel) in ["one.png", "two.png", "sub/three.png"].iter().enumerate() {
            let pic = synthetic_picture(40 + 8 * i as u32, 32, 3, i as u64);
            std::fs::write(src.join(rel), pic.to_png().unwrap()).unwrap();
        }
        let model_a = tmp.path().join("tuned-a.safetensors");
        let model_b = tmp.path().join("tuned-b.safetensors");
        std::fs::write(&model_a, tiny_model_bytes(71)).unwrap();
        std::fs::write(&model_b, tiny_model_bytes(72)).unwrap();
        Setup { tmp, src, model_a, model_b }
    }

    fn path(&self, rel: &str) -> PathBuf {
        self.tmp.path().join(rel)
    }
}

fn fp_of(path: &Path) -> [u8; 32] {
    fingerprint(&std::fs::read(path).unwrap())
}

/// Every regular file under `root` (relative path → bytes).
fn files(root: &Path) -> std::collections::BTreeMap<PathBuf, Vec<u8>> {
    let mut out = std::collections::BTreeMap::new();
    let mut stack = vec![root.to_path_buf()];
    while let Some(d) = stack.pop() {
        for e in std::fs::read_dir(&d).unwrap().flatten() {
            if e.file_type().unwrap().is_dir() {
                stack.push(e.path());
            } else {
                out.insert(e.path().strip_prefix(root).unwrap().to_path_buf(), std::fs::read(e.path()).unwrap());
            }
        }
    }
    out
}

#[test]
fn an_archive_outlives_the_model_file_it_was_packed_with() {
    let t = Setup::new();
    let dest = t.path("archive");
    let o = kiln(&["pack", &s(&t.src), &s(&dest), "--model", &s(&t.model_a), "--quality", "60"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let fp = fp_of(&t.model_a);
    let stored = dest.join("models").join(stored_name(&fp));
    assert_eq!(std::fs::read(&stored).unwrap(), std::fs::read(&t.model_a).unwrap());
    let cat = rusqlite::Connection::open(dest.join("catalog.sqlite")).unwrap();
    let (row_fp, name, size): (String, String, i64) = cat
        .query_row("SELECT fingerprint, name, size FROM models", [], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))
        .unwrap();
    assert_eq!(
        (row_fp, name, size as usize),
        (hex_prefix(&fp, 32), "tuned-a.safetensors".into(), std::fs::read(&t.model_a).unwrap().len())
    );
    drop(cat);

    let before = t.path("before");
    let o = kiln(&["unpack", &s(&dest), &s(&before), "--model", &s(&t.model_a)]);
    assert!(o.status.success(), "{}", stderr(&o));
    std::fs::remove_file(&t.model_a).unwrap();

    let o = kiln(&["verify", &s(&dest)]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert!(!stderr(&o).contains("does not carry"), "{}", stderr(&o));
    let after = t.path("after");
    let o = kiln(&["unpack", &s(&dest), &s(&after)]);
    assert!(o.status.success(), "{}", stderr(&o));
    let (b, a) = (files(&before), files(&after));
    assert_eq!(b.len(), 3);
    assert_eq!(b, a, "identical PNGs before and after the model file was deleted");

    // One container on its own: the archive it lies in is found without options.
    let single = t.path("three.png");
    let o = kiln(&["decompress", &s(&dest.join("sub/three.png.kiln")), "-o", &s(&single)]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert_eq!(std::fs::read(&single).unwrap(), b[Path::new("sub/three.png")]);
}

#[test]
fn lookup_goes_explicit_then_archive_then_folders_then_shipped() {
    let t = Setup::new();
    let a = ModelFile::read(&t.model_a).unwrap();
    let b = ModelFile::read(&t.model_b).unwrap();
    let fp = a.fingerprint;
    // An archive folder and a user folder that both hold model A.
    let archive = t.path("arch");
    std::fs::create_dir_all(archive.join("models")).unwrap();
    std::fs::copy(&t.model_a, archive.join("models").join(stored_name(&fp))).unwrap();
    let user = t.path("mine");
    std::fs::create_dir_all(&user).unwrap();
    std::fs::copy(&t.model_a, user.join("any-name.safetensors")).unwrap();

    let base = ModelStore::new().with_folder(&user, "folder mine");
    let place = |s: &ModelStore| s.find(&fp).unwrap().place;
    assert_eq!(place(&base.clone().with_model(a.clone(), "explicit A").with_archive(&archive)), "explicit A");
    // A wrong explicit model is passed over.
    let wrong = base.clone().with_model(b.clone(), "explicit B").with_archive(&archive);
    assert_eq!(place(&wrong), s(&archive.join("models").join(stored_name(&fp))));
    assert_eq!(place(&base), s(&user.join("any-name.safetensors")), "found by hashing the folder's files");
    let shipped = ModelStore::new().find(&fingerprint(DEFAULT_MODEL_BYTES)).unwrap();
    assert_eq!(shipped.place, format!("shipped model {DEFAULT_NAME}"));

    // Nowhere: the error names the fingerprint and every place searched.
    std::fs::remove_file(user.join("any-name.safetensors")).unwrap();
    std::fs::remove_file(archive.join("models").join(stored_name(&fp))).unwrap();
    let fresh = ModelStore::new().with_folder(&user, "folder mine").with_model(b, "explicit B").with_archive(&archive);
    let err = fresh.find(&fp).unwrap_err();
    assert!(matches!(err, KilnError::ModelNotFound { .. }), "{err}");
    let err = err.to_string();
    assert!(err.contains(&hex_prefix(&fp, 8)), "{err}");
    assert!(err.contains("explicit B (model"), "{err}");
    assert!(err.contains(&s(&archive.join("models"))), "{err}");
    assert!(err.contains("folder mine"), "{err}");
    assert!(err.contains("models shipped with Kiln"), "{err}");

    // A file named for A that holds B is never used, and is reported.
    std::fs::copy(&t.model_b, archive.join("models").join(stored_name(&fp))).unwrap();
    let store = ModelStore::new().with_archive(&archive);
    assert!(store.find(&fp).is_err());
    let problems = store.problems();
    assert!(problems.iter().any(|p| p.contains("damaged or replaced")), "{problems:?}");
}

#[test]
fn single_files_warn_and_name_the_model_they_need() {
    let t = Setup::new();
    let input = t.src.join("one.png");
    let out = t.path("one.kiln");
    let o = kiln(&["compress", &s(&input), "-o", &s(&out), "--model", &s(&t.model_a)]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert_eq!(stderr(&o).matches("warning:").count(), 1, "{}", stderr(&o));
    // A shipped model, by name or as a copy of its file, needs no warning.
    let copy = t.path("copy.safetensors");
    std::fs::write(&copy, DEFAULT_MODEL_BYTES).unwrap();
    for model in ["photo-2026-12-02g", "default", &s(&copy)] {
        let o = kiln(&["compress", &s(&input), "-o", &s(&t.path("x.kiln")), "--force", "--model", model]);
        assert!(o.status.success(), "{}", stderr(&o));
        assert!(!stderr(&o).contains("warning"), "{model}: {}", stderr(&o));
    }

    let fp = hex_prefix(&fp_of(&t.model_a), 8);
    let moved = t.path("kept");
    std::fs::create_dir_all(&moved).unwrap();
    std::fs::rename(&t.model_a, moved.join("renamed.safetensors")).unwrap();
    let dec = t.path("one.png");
    // Not found: one line names the fingerprint and the places, then a hint.
    let o = kiln(&["decompress", &s(&out), "-o", &s(&dec)]);
    assert!(!o.status.success());
    let e = stderr(&o);
    assert!(e.contains(&format!("no model with fingerprint {fp}")) && e.contains("shipped with Kiln"), "{e}");
    assert!(e.contains("hint:"), "{e}");
    assert!(!dec.exists());
    // A wrong --model is named in the search, then the folder (option or environment) finds it.
    let o = kiln(&["decompress", &s(&out), "-o", &s(&dec), "--model", &s(&t.model_b)]);
    assert!(!o.status.success());
    assert!(stderr(&o).contains("--model"), "{}", stderr(&o));
    let o = kiln(&["decompress", &s(&out), "-o", &s(&dec), "--models", &s(&moved), "--model", &s(&t.model_b)]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert!(stderr(&o).contains("is not the model this container names"), "{}", stderr(&o));
    std::fs::remove_file(&dec).unwrap();
    let o = kiln_env(&["decompress", &s(&out), "-o", &s(&dec)], &[("KILN_MODELS", &moved)]);
    assert!(o.status.success(), "{}", stderr(&o));
    // `kiln inspect` says where the model was found.
    let o = kiln_env(&["inspect", &s(&out), "--json"], &[("KILN_MODELS", &moved)]);
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(v["model"]["found_in"], s(&moved.join("renamed.safetensors")));
}

#[test]
fn verify_names_a_damaged_model_and_pack_repairs_it() {
    let t = Setup::new();
    let dest = t.path("archive");
    let o = kiln(&["pack", &s(&t.src), &s(&dest), "--model", &s(&t.model_a)]);
    assert!(o.status.success(), "{}", stderr(&o));
    let stored = dest.join("models").join(stored_name(&fp_of(&t.model_a)));
    let mut bytes = std::fs::read(&stored).unwrap();
    let n = bytes.len();
    bytes[n - 5] ^= 0x40;
    std::fs::write(&stored, &bytes).unwrap();

    // No other copy: the model and the containers that need it are named.
    let o = kiln(&["verify", &s(&dest)]);
    assert!(!o.status.success());
    let e = stderr(&o);
    let rel = format!("models/{}", stored_name(&fp_of(&t.model_a)));
    assert!(e.contains(&rel) && e.contains("damaged"), "{e}");
    assert!(e.contains("sub/three.png") && e.contains("not found"), "{e}");
    // Another copy decodes the containers, but the damaged file is still a failure.
    let o = kiln(&["verify", &s(&dest), "--model", &s(&t.model_a)]);
    assert!(!o.status.success());
    assert!(stderr(&o).contains(&rel) && !stderr(&o).contains("sub/three.png"), "{}", stderr(&o));
    // Packing again with the model restores the copy.
    let o = kiln(&["pack", &s(&t.src), &s(&dest), "--model", &s(&t.model_a)]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert_eq!(std::fs::read(&stored).unwrap(), std::fs::read(&t.model_a).unwrap());
    let o = kiln(&["verify", &s(&dest)]);
    assert!(o.status.success(), "{}", stderr(&o));
}

#[test]
fn merged_shards_carry_every_shards_model() {
    let t = Setup::new();
    let dest = t.path("archive");
    for (shard, model) in [("0/2", &t.model_a), ("1/2", &t.model_b)] {
        let o = kiln(&["pack", &s(&t.src), &s(&dest), "--shard", shard, "--model", &s(model)]);
        assert!(o.status.success(), "{}", stderr(&o));
    }
    let o = kiln(&["catalog", "merge", &s(&dest)]);
    assert!(o.status.success(), "{}", stderr(&o));
    let cat = rusqlite::Connection::open(dest.join("catalog.sqlite")).unwrap();
    let n: i64 = cat.query_row("SELECT COUNT(*) FROM models", [], |r| r.get(0)).unwrap();
    assert_eq!(n, 2);
    drop(cat);
    let fp_b = fp_of(&t.model_b);
    std::fs::remove_file(&t.model_a).unwrap();
    std::fs::remove_file(&t.model_b).unwrap();
    let o = kiln(&["verify", &s(&dest)]);
    assert!(o.status.success(), "{}", stderr(&o));
    // A model file missing from the archive is named by the merge.
    std::fs::remove_file(dest.join("models").join(stored_name(&fp_b))).unwrap();
    let o = kiln(&["catalog", "merge", &s(&dest)]);
    assert!(!o.status.success());
    assert!(stderr(&o).contains("missing"), "{}", stderr(&o));
}

#[test]
fn the_models_command_lists_every_shipped_model() {
    let o = kiln(&["models", "--json"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    let names: Vec<&str> = v["shipped"].as_array().unwrap().iter().map(|m| m["name"].as_str().unwrap()).collect();
    assert_eq!(names, PINNED.iter().map(|p| p.0).collect::<Vec<_>>());
    assert!(v["shipped"].as_array().unwrap().iter().all(|m| m["available"] != "MISSING from this installation"));
}
