//! In-process fuzzing of the container parser and decoder and of the model-file parser, on
//! stable Rust: mutated inputs (checksums recomputed, so the decoder behind them is reached),
//! a counting global allocator, and two properties — no input panics, and no decode's peak
//! live memory exceeds the documented bound ([`kiln::container::decode_memory_bound`]; for an
//! input refused by the parser, twice its size plus 1 MiB), nor does loading a mutated model
//! file take more than twice the memory of loading the intact one.
//!
//! Long: `cargo test --release --test fuzz_parsers -- --ignored --nocapture` (counts from
//! `KILN_FUZZ_CONTAINERS`, default 1 000 000, and `KILN_FUZZ_MODELS`, default 100 000). A
//! short run of the same code is part of the ordinary suite.

mod common;

use std::alloc::{GlobalAlloc, Layout, System};
use std::panic::{AssertUnwindSafe, catch_unwind};
use std::sync::atomic::{AtomicUsize, Ordering};

use byteorder::{ByteOrder, LittleEndian};
use common::{join_safetensors, split_safetensors, synthetic_picture, tiny_model_bytes};
use kiln::{Codec, ModelFile, container};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

struct Counting;

static LIVE: AtomicUsize = AtomicUsize::new(0);
static PEAK: AtomicUsize = AtomicUsize::new(0);
static LARGEST: AtomicUsize = AtomicUsize::new(0);

fn grew(size: usize) {
    let live = LIVE.fetch_add(size, Ordering::Relaxed) + size;
    PEAK.fetch_max(live, Ordering::Relaxed);
    LARGEST.fetch_max(size, Ordering::Relaxed);
}

// SAFETY: every call is forwarded to the system allocator unchanged; the counters are
// bookkeeping only.
unsafe impl GlobalAlloc for Counting {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        grew(layout.size());
        // SAFETY: forwarded with the caller's layout.
        unsafe { System.alloc(layout) }
    }
    unsafe fn alloc_zeroed(&self, layout: Layout) -> *mut u8 {
        grew(layout.size());
        // SAFETY: forwarded with the caller's layout.
        unsafe { System.alloc_zeroed(layout) }
    }
    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        LIVE.fetch_sub(layout.size(), Ordering::Relaxed);
        // SAFETY: forwarded with the caller's pointer and layout.
        unsafe { System.dealloc(ptr, layout) }
    }
    unsafe fn realloc(&self, ptr: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        LIVE.fetch_sub(layout.size(), Ordering::Relaxed);
        grew(new_size);
        // SAFETY: forwarded with the caller's pointer, layout and size.
        unsafe { System.realloc(ptr, layout, new_size) }
    }
}

#[global_allocator]
static ALLOCATOR: Counting = Counting;

/// Peak live bytes above the level at the start of `f`.
fn measured<T>(f: impl FnOnce() -> T) -> (T, usize) {
    let base = LIVE.load(Ordering::Relaxed);
    PEAK.store(base, Ordering::Relaxed);
    let out = f();
    (out, PEAK.load(Ordering::Relaxed).saturating_sub(base))
}

fn fix_crcs(b: &mut [u8]) {
    if b.len() < 80 {
        return;
    }
    let header_len = LittleEndian::read_u32(&b[8..12]) as usize;
    if header_len >= 8 && header_len + 4 <= b.len() {
        let crc = crc32fast::hash(&b[..header_len - 4]);
        LittleEndian::write_u32(&mut b[header_len - 4..header_len], crc);
    }
    let n = b.len();
    let crc = crc32fast::hash(&b[..n - 4]);
    LittleEndian::write_u32(&mut b[n - 4..], crc);
}

const INTERESTING: [u32; 10] = [0, 1, 2, 3, 255, 1536, 1537, 4096, 65_535, u32::MAX];

fn mutate(base: &[u8], rng: &mut ChaCha8Rng) -> Vec<u8> {
    let mut b = base.to_vec();
    for _ in 0..rng.gen_range(1..=4) {
        match rng.gen_range(0..7) {
            0 => {
                let i = rng.gen_range(0..b.len());
                b[i] ^= 1 << rng.gen_range(0..8);
            }
            1 => {
                let i = rng.gen_range(0..b.len());
                b[i] = rng.r#gen();
            }
            2 if b.len() >= 4 => {
                // An interesting value over a header field (or anywhere).
                let at = if rng.gen_bool(0.8) {
                    rng.gen_range(0..b.len().min(120) - 3)
                } else {
                    rng.gen_range(0..b.len() - 3)
                };
                let v = INTERESTING[rng.gen_range(0..INTERESTING.len())];
                if rng.gen_bool(0.5) {
                    LittleEndian::write_u32(&mut b[at..at + 4], v);
                } else {
                    LittleEndian::write_u16(&mut b[at..at + 2], v as u16);
                }
            }
            3 => {
                let n = rng.gen_range(0..b.len());
                b.truncate(n.max(1));
            }
            4 => {
                let extra = rng.gen_range(1..64);
                b.extend((0..extra).map(|_| rng.r#gen::<u8>()));
            }
            5 if b.len() > 8 => {
                // Drop a run of bytes from the middle.
                let i = rng.gen_range(0..b.len() - 4);
                let n = rng.gen_range(1..=(b.len() - i - 1).min(32));
                b.drain(i..i + n);
            }
            _ => {}
        }
    }
    if rng.gen_bool(0.9) {
        fix_crcs(&mut b);
    }
    b
}

fn seeds(codec: &Codec) -> Vec<Vec<u8>> {
    let mut out = Vec::new();
    for (w, h, c, q) in [(1, 1, 3, 50.0), (50, 40, 3, 1.0), (33, 17, 1, 100.0), (70, 9, 3, 60.0)] {
        out.push(codec.encode(&synthetic_picture(w, h, c, w as u64), q).unwrap().bytes);
    }
    out
}

struct Tally {
    runs: usize,
    decoded: usize,
    peak: usize,
    worst_ratio: f64,
}

fn fuzz_containers(n: usize, seed: u64) -> Tally {
    let codec = Codec::new(ModelFile::from_bytes(&tiny_model_bytes(2)).unwrap()).unwrap();
    let bases = seeds(&codec);
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut t = Tally { runs: 0, decoded: 0, peak: 0, worst_ratio: 0.0 };
    for i in 0..n {
        let input = mutate(&bases[i % bases.len()], &mut rng);
        let (result, peak) = measured(|| catch_unwind(AssertUnwindSafe(|| codec.decode(&input))));
        let Ok(result) = result else {
            std::fs::write(format!("/tmp/kiln-fuzz-panic-{i}.kiln"), &input).unwrap();
            panic!("decode panicked on input {i} (written to /tmp)");
        };
        let bound = match container::read_header(&input) {
            Ok(h) => container::decode_memory_bound(&h) as usize,
            Err(_) => 2 * input.len() + (1 << 20),
        };
        assert!(peak <= bound, "input {i}: peak {peak} bytes above the bound {bound}");
        t.runs += 1;
        t.decoded += result.is_ok() as usize;
        t.peak = t.peak.max(peak);
        t.worst_ratio = t.worst_ratio.max(peak as f64 / bound as f64);
    }
    t
}

fn fuzz_model_headers(n: usize, seed: u64) -> Tally {
    let base = tiny_model_bytes(9);
    let header_len = LittleEndian::read_u64(&base[..8]) as usize;
    let (header, data) = split_safetensors(&base);
    // The property: no header makes loading cost more than twice what the intact file costs.
    ModelFile::from_bytes(&base).unwrap(); // one-time initialisations out of the way
    let (_, intact) = measured(|| ModelFile::from_bytes(&base).unwrap());
    let bound = 2 * intact;
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut t = Tally { runs: 0, decoded: 0, peak: 0, worst_ratio: 0.0 };
    for i in 0..n {
        let input = if rng.gen_bool(0.5) {
            // Structured: a config value or a tensor shape replaced, the JSON kept valid.
            let mut h = header.clone();
            let v = INTERESTING[rng.gen_range(0..INTERESTING.len())] as u64;
            if rng.gen_bool(0.5) {
                let meta = h["__metadata__"].as_object_mut().unwrap();
                let mut c: serde_json::Value = serde_json::from_str(meta["kiln.config"].as_str().unwrap()).unwrap();
                let key = ["n", "m", "nz", "hyper_hidden", "analysis_kernel", "synthesis_kernel", "stages"]
                    [rng.gen_range(0..7)];
                c[key] = v.into();
                meta.insert("kiln.config".into(), c.to_string().into());
            } else {
                let names: Vec<String> =
                    h.as_object().unwrap().keys().filter(|k| *k != "__metadata__").cloned().collect();
                let name = &names[rng.gen_range(0..names.len())];
                let shape = h[name]["shape"].as_array_mut().unwrap();
                if !shape.is_empty() {
                    let d = rng.gen_range(0..shape.len());
                    shape[d] = v.into();
                }
            }
            join_safetensors(&h, data)
        } else {
            // Raw: bytes of the header (and its length field) mutated.
            let mut b = base.clone();
            for _ in 0..rng.gen_range(1..=4) {
                let at = rng.gen_range(0..8 + header_len);
                b[at] = if rng.gen_bool(0.5) { b[at] ^ (1 << rng.gen_range(0..8)) } else { rng.r#gen() };
            }
            b
        };
        let (result, peak) = measured(|| catch_unwind(AssertUnwindSafe(|| ModelFile::from_bytes(&input))));
        let Ok(result) = result else {
            std::fs::write(format!("/tmp/kiln-fuzz-panic-{i}.safetensors"), &input).unwrap();
            panic!("model parsing panicked on input {i} (written to /tmp)");
        };
        if peak > bound {
            let n = LittleEndian::read_u64(&input[..8]) as usize;
            std::fs::write("/tmp/kiln-fuzz-model-header.json", &input[8..(8 + n).min(input.len())]).unwrap();
        }
        assert!(
            peak <= bound,
            "input {i}: peak {peak} bytes above {bound} (twice the intact file's {intact}); {:?}",
            result.as_ref().err()
        );
        t.runs += 1;
        t.decoded += result.is_ok() as usize;
        t.peak = t.peak.max(peak);
        t.worst_ratio = t.worst_ratio.max(peak as f64 / bound as f64);
    }
    t
}

/// Error values that capture a backtrace resolve its symbols when displayed (tens of MB of
/// debug information, the same for every input): keep them out of the measurement.
fn without_backtraces() {
    // SAFETY: called first in each test of this binary, before any thread of the test reads
    // the environment; std caches the setting at its first backtrace capture.
    unsafe {
        std::env::set_var("RUST_BACKTRACE", "0");
        std::env::set_var("RUST_LIB_BACKTRACE", "0");
    }
}

fn report(what: &str, t: &Tally, secs: f64) {
    eprintln!(
        "{what}: {} runs, {} accepted, 0 panics, peak live {:.1} MB, worst peak/bound {:.3}, {secs:.0} s",
        t.runs,
        t.decoded,
        t.peak as f64 / 1e6,
        t.worst_ratio
    );
}

#[test]
fn a_short_fuzz_run_finds_no_panic_and_no_allocation_above_the_bounds() {
    without_backtraces();
    fuzz_containers(3000, 1);
    fuzz_model_headers(200, 1);
}

#[test]
#[ignore = "long: about 10^6 containers and 10^5 model headers"]
fn fuzz_containers_and_model_headers_at_length() {
    without_backtraces();
    let count = |var: &str, default: usize| std::env::var(var).ok().and_then(|v| v.parse().ok()).unwrap_or(default);
    let t0 = std::time::Instant::now();
    let c = fuzz_containers(count("KILN_FUZZ_CONTAINERS", 1_000_000), 7);
    report("containers", &c, t0.elapsed().as_secs_f64());
    let t1 = std::time::Instant::now();
    let m = fuzz_model_headers(count("KILN_FUZZ_MODELS", 100_000), 7);
    report("model headers", &m, t1.elapsed().as_secs_f64());
}
