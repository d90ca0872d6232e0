//! What Kiln never does to a user's files, one test per rule, with hostile inputs: existing
//! files and inputs as outputs, links and FIFOs, catalog rows that point outside, same-stem and
//! non-UTF-8 names, images of one pixel, damaged containers, a storage that stops accepting
//! writes. Every test runs the real binary on real files.

mod common;

use std::os::unix::fs::{FileTypeExt, PermissionsExt};
use std::path::{Path, PathBuf};
use std::process::{Command, Output, Stdio};
use std::time::{Duration, Instant};

use common::{synthetic_picture, tiny_model_bytes};

fn kiln(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_kiln")).args(args).output().unwrap()
}

/// Runs the binary with a deadline: a test of "never hangs" must itself not hang.
fn kiln_within(secs: u64, args: &[&str]) -> Output {
    let mut child = Command::new(env!("CARGO_BIN_EXE_kiln"))
        .args(args)
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let t0 = Instant::now();
    while child.try_wait().unwrap().is_none() {
        if t0.elapsed() > Duration::from_secs(secs) {
            child.kill().unwrap();
            panic!("kiln {args:?} did not finish within {secs} s");
        }
        std::thread::sleep(Duration::from_millis(20));
    }
    child.wait_with_output().unwrap()
}

fn s(p: &Path) -> String {
    p.display().to_string()
}

fn err(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).to_string()
}

fn png(path: &Path, w: u32, h: u32, seed: u64) {
    std::fs::write(path, synthetic_picture(w, h, 3, seed).to_png().unwrap()).unwrap();
}

fn mkfifo(path: &Path) {
    let c = std::ffi::CString::new(path.as_os_str().as_encoded_bytes()).unwrap();
    // SAFETY: `c` is a valid NUL-terminated path.
    assert_eq!(unsafe { libc::mkfifo(c.as_ptr(), 0o644) }, 0, "mkfifo failed");
}

fn setup() -> (tempfile::TempDir, PathBuf) {
    let tmp = tempfile::tempdir().unwrap();
    let model = tmp.path().join("m.safetensors");
    std::fs::write(&model, tiny_model_bytes(5)).unwrap();
    (tmp, model)
}

#[test]
fn no_output_replaces_an_existing_file_an_input_a_link_or_a_special_file() {
    let (tmp, model) = setup();
    let m = s(&model);
    let dir = tmp.path();
    let img = dir.join("photo.png");
    png(&img, 40, 30, 1);
    let original = std::fs::read(&img).unwrap();

    // compress writes photo.png.kiln by default; a second run refuses to replace it.
    let o = kiln(&["compress", &s(&img), "--model", &m, "--quality", "10"]);
    assert!(o.status.success(), "{}", err(&o));
    let container = dir.join("photo.png.kiln");
    let first = std::fs::read(&container).unwrap();
    let o = kiln(&["compress", &s(&img), "--model", &m, "--quality", "90"]);
    assert_eq!(o.status.code(), Some(1));
    assert!(err(&o).contains("already exists") && err(&o).contains("--force"), "{}", err(&o));
    assert_eq!(std::fs::read(&container).unwrap(), first, "the existing container changed");
    // --force replaces a regular file...
    let o = kiln(&["compress", &s(&img), "--model", &m, "--quality", "90", "--force"]);
    assert!(o.status.success(), "{}", err(&o));
    assert_ne!(std::fs::read(&container).unwrap(), first);
    // ...but never the input, even with --force.
    let o = kiln(&["compress", &s(&img), "-o", &s(&img), "--model", &m, "--force"]);
    assert_eq!(o.status.code(), Some(1));
    assert!(err(&o).contains("inputs"), "{}", err(&o));
    assert_eq!(std::fs::read(&img).unwrap(), original, "the source image changed");

    // decompress's default name is photo.png: the original is there, so it refuses.
    let o = kiln(&["decompress", &s(&container), "--model", &m]);
    assert_eq!(o.status.code(), Some(1));
    assert!(err(&o).contains("photo.png already exists"), "{}", err(&o));
    assert_eq!(std::fs::read(&img).unwrap(), original, "decompress replaced the original image");

    // A symbolic link as the output is refused, with or without --force; its target is untouched.
    let target = dir.join("target.png");
    std::fs::write(&target, b"keep me").unwrap();
    let link = dir.join("link.png");
    std::os::unix::fs::symlink(&target, &link).unwrap();
    for force in [false, true] {
        let (c, l) = (s(&container), s(&link));
        let mut args = vec!["decompress", &c, "-o", &l, "--model", &m];
        if force {
            args.push("--force");
        }
        let o = kiln(&args);
        assert_eq!(o.status.code(), Some(1));
        assert!(err(&o).contains("symbolic link"), "{}", err(&o));
    }
    assert!(std::fs::symlink_metadata(&link).unwrap().file_type().is_symlink());
    assert_eq!(std::fs::read(&target).unwrap(), b"keep me");

    // A FIFO as the output is refused at once (not opened, not replaced), even with --force.
    let fifo = dir.join("pipe.png");
    mkfifo(&fifo);
    let o = kiln_within(20, &["decompress", &s(&container), "-o", &s(&fifo), "--model", &m, "--force"]);
    assert_eq!(o.status.code(), Some(1));
    assert!(std::fs::symlink_metadata(&fifo).unwrap().file_type().is_fifo());
    // A FIFO as the input is refused without blocking.
    let o = kiln_within(20, &["compress", &s(&fifo), "-o", &s(&dir.join("f.kiln")), "--model", &m]);
    assert_eq!(o.status.code(), Some(1));
    assert!(err(&o).contains("not a regular file"), "{}", err(&o));
    // A folder as the output.
    let o = kiln(&["decompress", &s(&container), "-o", &format!("{}/", dir.display()), "--model", &m]);
    assert_eq!(o.status.code(), Some(1));
    assert!(err(&o).contains("folder"), "{}", err(&o));

    // `-o -` writes to standard output.
    let o = kiln(&["decompress", &s(&container), "-o", "-", "--model", &m]);
    assert!(o.status.success(), "{}", err(&o));
    assert_eq!(image::load_from_memory(&o.stdout).unwrap().width(), 40);
}

#[test]
fn outputs_get_the_usual_umask_permissions() {
    let (tmp, model) = setup();
    let img = tmp.path().join("a.png");
    png(&img, 20, 20, 2);
    for (umask, want) in [("022", 0o644), ("027", 0o640)] {
        let out = tmp.path().join(format!("a{umask}.kiln"));
        let script = format!(
            "umask {umask} && exec '{}' compress '{}' -o '{}' --model '{}'",
            env!("CARGO_BIN_EXE_kiln"),
            img.display(),
            out.display(),
            model.display()
        );
        let o = Command::new("sh").arg("-c").arg(script).output().unwrap();
        assert!(o.status.success(), "{}", err(&o));
        let mode = std::fs::metadata(&out).unwrap().permissions().mode() & 0o777;
        assert_eq!(mode, want, "umask {umask}: mode {mode:o}");
    }
}

fn pack(src: &Path, dest: &Path, model: &Path, extra: &[&str]) -> Output {
    let mut args = vec!["pack".to_string(), s(src), s(dest), "--model".into(), s(model)];
    if !extra.contains(&"--quality") {
        args.extend(["--quality".to_string(), "40".to_string()]);
    }
    args.extend(extra.iter().map(|a| a.to_string()));
    Command::new(env!("CARGO_BIN_EXE_kiln")).args(&args).stdin(Stdio::null()).output().unwrap()
}

fn set_row(dest: &Path, rel: &str, column: &str, value: &str) {
    let c = rusqlite::Connection::open(dest.join("catalog.sqlite")).unwrap();
    let n = c.execute(&format!("UPDATE files SET {column} = ?1 WHERE rel_path = ?2"), [value, rel]).unwrap();
    assert_eq!(n, 1, "no row {rel}");
}

#[test]
fn unpack_never_writes_outside_its_folder_and_refuses_bad_rows_by_name() {
    let (tmp, model) = setup();
    let src = tmp.path().join("src");
    std::fs::create_dir_all(src.join("d")).unwrap();
    for (i, name) in ["a.png", "b.png", "c.png", "d/e.png", "d/f.png"].iter().enumerate() {
        png(&src.join(name), 24, 20, i as u64);
    }
    let dest = tmp.path().join("archive");
    assert!(pack(&src, &dest, &model, &[]).status.success());
    // Crafted rows: a relative path climbing out, an absolute one, and a container path out.
    set_row(&dest, "a.png", "rel_path", "../../escaped-a.png");
    set_row(&dest, "b.png", "rel_path", &format!("{}/escaped-b.png", tmp.path().display()));
    set_row(&dest, "c.png", "container_path", "../src/c.png");
    let out = tmp.path().join("work/out");
    std::fs::create_dir_all(&out).unwrap();
    // A link inside OUT that leads outside: the row that would write through it is refused.
    let elsewhere = tmp.path().join("elsewhere");
    std::fs::create_dir_all(&elsewhere).unwrap();
    std::os::unix::fs::symlink(&elsewhere, out.join("d")).unwrap();
    let o = kiln(&["unpack", &s(&dest), &s(&out), "--model", &s(&model)]);
    assert_eq!(o.status.code(), Some(1), "{}", err(&o));
    let e = err(&o);
    for named in ["../../escaped-a.png", "escaped-b.png", "c.png", "d/e.png", "d/f.png"] {
        assert!(e.contains(named), "{named} not named: {e}");
    }
    assert!(!tmp.path().join("escaped-a.png").exists() && !tmp.path().join("escaped-b.png").exists());
    assert_eq!(std::fs::read_dir(&elsewhere).unwrap().count(), 0, "written through a link");
    assert!(std::fs::read(src.join("c.png")).unwrap().starts_with(b"\x89PNG"));
    // verify names the unsafe container path too, and checks the rest.
    let o = kiln(&["verify", &s(&dest), "--model", &s(&model)]);
    assert_eq!(o.status.code(), Some(1));
    assert!(err(&o).contains("c.png") && err(&o).contains("unsafe path"), "{}", err(&o));
}

#[test]
fn same_stem_sources_stay_distinct_and_non_utf8_names_are_refused_not_merged() {
    use std::os::unix::ffi::OsStrExt;
    let (tmp, model) = setup();
    let src = tmp.path().join("src");
    std::fs::create_dir_all(&src).unwrap();
    // Three sizes, so that three different decodes are told apart whatever the model.
    let sizes = [(30, 22), (26, 31), (40, 12)];
    let pics: Vec<_> = sizes.iter().enumerate().map(|(i, &(w, h))| synthetic_picture(w, h, 3, 10 + i as u64)).collect();
    for (p, ext) in pics.iter().zip(["png", "tif", "bmp"]) {
        let path = src.join(format!("x.{ext}"));
        image::save_buffer(path, &p.data, p.width, p.height, image::ExtendedColorType::Rgb8).unwrap();
    }
    for b in [b"\xff.png", b"\xfe.png"] {
        std::fs::write(src.join(std::ffi::OsStr::from_bytes(b)), pics[0].to_png().unwrap()).unwrap();
    }
    let dest = tmp.path().join("archive");
    let o = pack(&src, &dest, &model, &[]);
    assert_eq!(o.status.code(), Some(1), "{}", err(&o));
    assert!(err(&o).contains("\\xff.png") && err(&o).contains("\\xfe.png"), "{}", err(&o));
    let out = tmp.path().join("out");
    let o = kiln(&["unpack", &s(&dest), &s(&out), "--model", &s(&model)]);
    assert!(o.status.success(), "{}", err(&o));
    let mut names: Vec<String> =
        std::fs::read_dir(&out).unwrap().map(|e| e.unwrap().file_name().to_string_lossy().to_string()).collect();
    names.sort();
    assert_eq!(names, ["x.bmp.png", "x.png", "x.tif.png"]);
    // Each restored file is the decode of its own source's container, and the three differ.
    let codec = kiln::Codec::new(kiln::ModelFile::load(Some(&model)).unwrap()).unwrap();
    let mut decoded = Vec::new();
    for (name, container) in [("x.png", "x.png.kiln"), ("x.tif.png", "x.tif.kiln"), ("x.bmp.png", "x.bmp.kiln")] {
        let back = kiln::Picture::open(&out.join(name), kiln::AlphaPolicy::Refuse).unwrap();
        let want = codec.decode(&std::fs::read(dest.join(container)).unwrap()).unwrap();
        assert_eq!(back, want, "{name} is not the decode of {container}");
        decoded.push((back.width, back.height));
    }
    assert_eq!(decoded, sizes);
    let cat = kiln::archive::catalog::Catalog::open_existing(&dest.join("catalog.sqlite")).unwrap();
    let skipped = cat.skipped().unwrap();
    assert_eq!(skipped.iter().filter(|r| r.error && r.reason.contains("UTF-8")).count(), 2, "{skipped:?}");
}

#[test]
fn every_entry_under_the_source_is_packed_or_listed_with_its_reason() {
    let (tmp, model) = setup();
    let src = tmp.path().join("src");
    std::fs::create_dir_all(src.join("sub")).unwrap();
    let pic = synthetic_picture(24, 18, 3, 3);
    png(&src.join("plain.png"), 24, 18, 3);
    let mut jpeg = Vec::new();
    image::codecs::jpeg::JpegEncoder::new(&mut jpeg).encode(&pic.data, 24, 18, image::ExtendedColorType::Rgb8).unwrap();
    std::fs::write(src.join("frame.jfif"), jpeg).unwrap();
    std::fs::write(src.join("no-extension"), pic.to_png().unwrap()).unwrap();
    let rgba = image::RgbaImage::from_fn(16, 16, |x, y| image::Rgba([x as u8 * 9, y as u8 * 9, 100, 255]));
    image::DynamicImage::ImageRgba8(rgba).save(src.join("opaque.gif")).unwrap();
    // A two-page TIFF, written with the tiff crate.
    {
        let f = std::fs::File::create(src.join("two-pages.tif")).unwrap();
        let mut enc = tiff::encoder::TiffEncoder::new(f).unwrap();
        for _ in 0..2 {
            enc.write_image::<tiff::encoder::colortype::RGB8>(24, 18, &pic.data).unwrap();
        }
    }
    std::fs::write(src.join("notes.txt"), "field notes").unwrap();
    mkfifo(&src.join("pipe.png"));
    std::os::unix::fs::symlink("..", src.join("sub/loop")).unwrap();
    std::os::unix::fs::symlink("/", src.join("root")).unwrap();
    std::os::unix::fs::symlink("../plain.png", src.join("sub/alias.png")).unwrap();
    let dest = tmp.path().join("archive");
    for follow in [false, true] {
        let extra: &[&str] = if follow { &["--follow-symlinks"] } else { &[] };
        let _ = std::fs::remove_dir_all(&dest);
        let t0 = Instant::now();
        let o = pack(&src, &dest, &model, extra);
        assert!(t0.elapsed() < Duration::from_secs(60));
        assert_eq!(o.status.code(), Some(1), "the two-page TIFF is an error: {}", err(&o));
        let e = err(&o);
        let cat = kiln::archive::catalog::Catalog::open_existing(&dest.join("catalog.sqlite")).unwrap();
        let mut packed: Vec<String> = cat.all().unwrap().into_iter().map(|r| r.rel_path).collect();
        packed.sort();
        let mut want = vec!["frame.jfif", "no-extension", "opaque.gif", "plain.png"];
        if follow {
            want.push("sub/alias.png");
        }
        assert_eq!(packed, want, "{e}");
        let skipped = cat.skipped().unwrap();
        let reason = |rel: &str| {
            skipped
                .iter()
                .find(|r| r.rel_path == rel)
                .map(|r| r.reason.clone())
                .unwrap_or_else(|| panic!("{rel} unlisted: {e}"))
        };
        assert!(reason("two-pages.tif").contains("more than one page"));
        assert!(reason("notes.txt").contains("not an image"));
        assert!(reason("pipe.png").contains("special file"));
        assert!(reason("root").contains("link"));
        assert!(reason("sub/loop").contains("link"));
        if follow {
            assert!(reason("sub/loop").contains("loop"));
            assert!(reason("root").contains("outside"));
        } else {
            assert!(reason("sub/alias.png").contains("not followed"));
        }
        for rel in ["two-pages.tif", "notes.txt", "pipe.png", "root", "sub/loop"] {
            assert!(e.contains(rel), "{rel} not printed: {e}");
        }
    }
}

#[test]
fn images_of_every_size_the_caps_allow_are_packed_with_undefined_metrics_as_null() {
    let (tmp, model) = setup();
    let src = tmp.path().join("src");
    std::fs::create_dir_all(&src).unwrap();
    for (w, h) in [(1, 1), (1, 40), (40, 1), (10, 10), (11, 11)] {
        png(&src.join(format!("p{w}x{h}.png")), w, h, (w * h) as u64);
    }
    let grey = synthetic_picture(5, 3, 1, 9);
    std::fs::write(src.join("grey5x3.png"), grey.to_png().unwrap()).unwrap();
    let dest = tmp.path().join("archive");
    let o = pack(&src, &dest, &model, &[]);
    assert!(o.status.success(), "{}", err(&o));
    let cat = kiln::archive::catalog::Catalog::open_existing(&dest.join("catalog.sqlite")).unwrap();
    let rows = cat.all().unwrap();
    assert_eq!(rows.len(), 6);
    for r in &rows {
        assert_eq!(r.ms_ssim.is_some(), r.width >= 11 && r.height >= 11, "{}: {:?}", r.rel_path, r.ms_ssim);
    }
    let o = kiln(&["verify", &s(&dest), "--model", &s(&model)]);
    assert!(o.status.success(), "{}", err(&o));
    let out = tmp.path().join("out");
    assert!(kiln(&["unpack", &s(&dest), &s(&out), "--model", &s(&model)]).status.success());
    let back = image::open(out.join("p1x40.png")).unwrap();
    assert_eq!((back.width(), back.height()), (1, 40));
}

#[test]
fn a_catalog_from_before_null_metrics_is_upgraded_in_place_and_keeps_its_rows() {
    let tmp = tempfile::tempdir().unwrap();
    let path = tmp.path().join("catalog.sqlite");
    {
        // The schema of catalogs written before this change, with one row.
        let c = rusqlite::Connection::open(&path).unwrap();
        c.execute_batch(
            "CREATE TABLE files (
               rel_path TEXT PRIMARY KEY, source_size INTEGER NOT NULL, source_mtime_ns INTEGER NOT NULL,
               pixel_sha256 TEXT NOT NULL, container_path TEXT NOT NULL, container_size INTEGER NOT NULL,
               png_size INTEGER NOT NULL, width INTEGER NOT NULL, height INTEGER NOT NULL, channels INTEGER NOT NULL,
               quality REAL NOT NULL, bpp REAL NOT NULL, psnr REAL NOT NULL, ms_ssim REAL NOT NULL,
               model_fingerprint TEXT NOT NULL, packed_at INTEGER NOT NULL);
             CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
             INSERT INTO files VALUES ('a.png', 10, 1, 'h', 'a.png.kiln', 5, 7, 20, 20, 3, 50.0, 0.1, 30.0, 0.95, 'f', 2);",
        )
        .unwrap();
    }
    let mut cat = kiln::archive::catalog::Catalog::open(&path).unwrap();
    let rows = cat.all().unwrap();
    assert_eq!(rows.len(), 1);
    assert_eq!(rows[0].ms_ssim, Some(0.95));
    let mut tiny = rows[0].clone();
    tiny.rel_path = "b.png".into();
    tiny.ms_ssim = None;
    cat.put(&tiny).unwrap();
    assert_eq!(cat.get("b.png").unwrap().unwrap().ms_ssim, None);
}

fn damage(path: &Path) {
    let mut b = std::fs::read(path).unwrap();
    let i = b.len() - 9;
    b[i] ^= 0x21;
    std::fs::write(path, b).unwrap();
}

#[test]
fn the_archive_heals_on_a_rerun_and_names_every_damaged_file() {
    let (tmp, model) = setup();
    let src = tmp.path().join("src");
    std::fs::create_dir_all(&src).unwrap();
    for i in 0..5 {
        png(&src.join(format!("i{i}.png")), 30, 26, i);
    }
    let dest = tmp.path().join("archive");
    assert!(pack(&src, &dest, &model, &[]).status.success());
    damage(&dest.join("i1.png.kiln"));
    damage(&dest.join("i3.png.kiln"));
    // unpack goes on past the damage, names both, restores the rest, exits 1.
    let out = tmp.path().join("out");
    let o = kiln(&["unpack", &s(&dest), &s(&out), "--model", &s(&model)]);
    assert_eq!(o.status.code(), Some(1));
    assert!(err(&o).contains("i1.png") && err(&o).contains("i3.png"), "{}", err(&o));
    for i in [0, 2, 4] {
        assert!(out.join(format!("i{i}.png")).is_file());
    }
    // unpack again does not replace what it restored, unless told to.
    let o = kiln(&["unpack", &s(&dest), &s(&out), "--model", &s(&model)]);
    assert!(err(&o).contains("already exists"), "{}", err(&o));
    // verify names both.
    let o = kiln(&["verify", &s(&dest), "--model", &s(&model)]);
    assert_eq!(o.status.code(), Some(1));
    assert!(err(&o).contains("i1.png") && err(&o).contains("i3.png"), "{}", err(&o));
    // A rerun of pack re-encodes exactly the damaged ones; the archive verifies again.
    let o = pack(&src, &dest, &model, &[]);
    assert!(o.status.success(), "{}", err(&o));
    assert!(err(&o).contains("packed 2, unchanged 3, repaired 2"), "{}", err(&o));
    let o = kiln(&["verify", &s(&dest), "--model", &s(&model)]);
    assert!(o.status.success(), "{}", err(&o));
    let o = kiln(&["unpack", &s(&dest), &s(&out), "--model", &s(&model), "--force"]);
    assert!(o.status.success(), "{}", err(&o));
    // A catalog without rows beside containers is an error, not "verified 0 files".
    let c = rusqlite::Connection::open(dest.join("catalog.sqlite")).unwrap();
    c.execute("DELETE FROM files", []).unwrap();
    drop(c);
    let o = kiln(&["verify", &s(&dest), "--model", &s(&model)]);
    assert_eq!(o.status.code(), Some(1));
    assert!(err(&o).contains("lists no files") && err(&o).contains("5 container"), "{}", err(&o));
}

#[test]
fn a_storage_that_refuses_writes_stops_pack_at_once_and_a_rerun_resumes() {
    // The storage is made to refuse writes past 256 KiB per file (RLIMIT_FSIZE: writes fail
    // with EFBIG, the signal is ignored), as a full disk would for the containers of these
    // noise images (the embedded model at quality 100 needs more); the catalog stays below it.
    use std::os::unix::process::CommandExt;
    const LIMIT: u64 = 256 << 10;
    let tmp = tempfile::tempdir().unwrap();
    let src = tmp.path().join("src");
    std::fs::create_dir_all(&src).unwrap();
    let mut state = 12345u64;
    for i in 0..8 {
        let data: Vec<u8> = (0..640 * 480 * 3)
            .map(|_| {
                state = state.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
                (state >> 56) as u8
            })
            .collect();
        let pic = kiln::Picture { width: 640, height: 480, channels: 3, data };
        std::fs::write(src.join(format!("big{i:02}.png")), pic.to_png().unwrap()).unwrap();
    }
    let probe = tmp.path().join("probe.kiln");
    let o = kiln(&["compress", &s(&src.join("big00.png")), "-o", &s(&probe), "-q", "100"]);
    assert!(o.status.success());
    let size = std::fs::metadata(&probe).unwrap().len();
    assert!(size > LIMIT, "the container ({size} bytes) would fit under the limit: the test needs larger images");
    let dest = tmp.path().join("archive");
    let limited = || {
        let mut cmd = Command::new(env!("CARGO_BIN_EXE_kiln"));
        cmd.args(["pack", &s(&src), &s(&dest), "--quality", "100", "--jobs", "1"]);
        // SAFETY: only async-signal-safe calls between fork and exec.
        unsafe {
            cmd.pre_exec(|| {
                libc::signal(libc::SIGXFSZ, libc::SIG_IGN);
                let lim = libc::rlimit { rlim_cur: LIMIT, rlim_max: LIMIT };
                if libc::setrlimit(libc::RLIMIT_FSIZE, &lim) != 0 {
                    return Err(std::io::Error::last_os_error());
                }
                Ok(())
            });
        }
        cmd
    };
    // The model (several MB) is stored before any container: that write fails first, and no
    // container is written without the model that decodes it.
    let o = limited().output().unwrap();
    assert_eq!(o.status.code(), Some(1), "{}", err(&o));
    assert!(err(&o).contains("models/") && err(&o).to_lowercase().contains("too large"), "{}", err(&o));
    assert!(!std::fs::read_dir(&dest).unwrap().flatten().any(|e| e.path().extension().is_some_and(|x| x == "kiln")));
    // With the model in place (as an earlier run on a roomier disk would leave it), the
    // containers are what hits the limit.
    let fp = kiln::model::fingerprint(kiln::model::DEFAULT_MODEL_BYTES);
    std::fs::write(dest.join("models").join(kiln::model::store::stored_name(&fp)), kiln::model::DEFAULT_MODEL_BYTES)
        .unwrap();
    let mut cmd = limited();
    let t0 = Instant::now();
    let o = cmd.output().unwrap();
    let elapsed = t0.elapsed();
    let e = err(&o);
    assert_eq!(o.status.code(), Some(1), "{e}");
    assert_eq!(e.lines().filter(|l| l.starts_with("error:")).count(), 1, "{e}");
    assert!(e.contains("big") && e.contains(".kiln") && e.to_lowercase().contains("too large"), "{e}");
    let cat = kiln::archive::catalog::Catalog::open_existing(&dest.join("catalog.sqlite")).unwrap();
    assert!(cat.all().unwrap().is_empty(), "rows were committed for containers that were not written");
    // The other files were not all encoded: the run stopped at the first failure.
    let t1 = Instant::now();
    let o2 = kiln(&["pack", &s(&src), &s(&dest), "--quality", "100", "--jobs", "1"]);
    let full = t1.elapsed();
    assert!(o2.status.success(), "{}", err(&o2));
    assert!(elapsed < full / 2, "the failing run took {elapsed:?}, a full run {full:?}");
    assert!(err(&o2).contains("packed 8"), "{}", err(&o2));
}
