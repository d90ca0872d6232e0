//! Entropy coding against outside references: the normal CDF table of Abramowitz & Stegun and
//! Shannon's bound on code length.

use kiln::entropy::coder::{SymbolDecoder, SymbolEncoder, TableSet};
use kiln::entropy::gaussian::{self, bin_probability, gaussian_table, normal_cdf};
use kiln::entropy::table::TOTAL;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// Φ(x) from Abramowitz & Stegun, *Handbook of Mathematical Functions*, Table 26.1
/// (normal probability function, printed to 15 places; the values below are quoted to 10
/// places from memory of that table and agree with the closed form erfc).
const AS_TABLE_26_1: [(f64, f64); 6] = [
    (0.5, 0.691_462_461_3),
    (1.0, 0.841_344_746_1),
    (1.5, 0.933_192_798_7),
    (2.0, 0.977_249_868_1),
    (2.5, 0.993_790_334_7),
    (3.0, 0.998_650_102_0),
];

#[test]
fn normal_cdf_matches_abramowitz_stegun_table_26_1() {
    for (x, p) in AS_TABLE_26_1 {
        assert!((normal_cdf(x) - p).abs() < 1e-9, "Φ({x}) = {} vs table {p}", normal_cdf(x));
        assert!((normal_cdf(-x) - (1.0 - p)).abs() < 1e-9);
    }
}

fn phi(x: f64) -> f64 {
    AS_TABLE_26_1.iter().find(|(t, _)| (*t - x).abs() < 1e-12).map(|&(_, p)| p).expect("tabulated point")
}

#[test]
fn gaussian_table_matches_normal_cdf_table_26_1() {
    // σ = 1: P(0) = 2Φ(0.5) − 1, P(±1) = Φ(1.5) − Φ(0.5), P(±2) = Φ(2.5) − Φ(1.5).
    let expected = [(0, 2.0 * phi(0.5) - 1.0), (1, phi(1.5) - phi(0.5)), (2, phi(2.5) - phi(1.5))];
    let table = gaussian_table(1.0);
    for (q, p) in expected {
        assert!((bin_probability(q, 1.0) - p).abs() < 2e-10);
        assert!((bin_probability(-q, 1.0) - p).abs() < 2e-10);
        for v in [q, -q] {
            let f = table.freqs[(v - table.lo as i64) as usize] as f64 / TOTAL as f64;
            // Table precision: 2^-24 per entry, plus the renormalisation of the remainder.
            assert!((f - p).abs() < 3.0 / TOTAL as f64, "q={v}: table {f} vs A&S {p}");
        }
    }
    // σ = 0.5: P(1) = Φ(3) − Φ(1).
    assert!((bin_probability(1, 0.5) - (phi(3.0) - phi(1.0))).abs() < 2e-10);
}

#[test]
fn scale_index_follows_the_thresholds() {
    let t = gaussian::log_scale_thresholds();
    let s = gaussian::scales();
    for (k, sigma) in s.iter().enumerate() {
        assert_eq!(gaussian::scale_index(sigma.ln() as f32, &t), k);
    }
    assert_eq!(gaussian::scale_index(-100.0, &t), 0);
    assert_eq!(gaussian::scale_index(100.0, &t), s.len() - 1);
    assert_eq!(gaussian::scale_index(f32::NAN, &t), s.len() - 1);
}

fn sample_gaussian(rng: &mut ChaCha8Rng, sigma: f64) -> i32 {
    // Box–Muller.
    let u1: f64 = rng.gen_range(f64::EPSILON..1.0);
    let u2: f64 = rng.r#gen();
    (sigma * (-2.0 * u1.ln()).sqrt() * (std::f64::consts::TAU * u2).cos()).round() as i32
}

fn sample_laplace(rng: &mut ChaCha8Rng, b: f64) -> i32 {
    let u: f64 = rng.gen_range(-0.5..0.5);
    (-b * u.signum() * (1.0 - 2.0 * u.abs()).ln()).round() as i32
}

#[test]
fn ans_round_trips_a_million_gaussian_and_laplace_symbols() {
    let set = TableSet::new(gaussian::gaussian_tables()).unwrap();
    let scales = gaussian::scales();
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    let mut values = Vec::new();
    for i in 0..1_200_000usize {
        let k = i % scales.len();
        let v = if i % 2 == 0 { sample_gaussian(&mut rng, scales[k]) } else { sample_laplace(&mut rng, scales[k]) };
        values.push((k, v));
    }
    // A few values far in the tail must survive too (escape path).
    values.extend([(0, 1_000_000), (0, -1_000_000), (3, i32::MAX), (3, i32::MIN), (63, 1 << 20)]);
    let mut enc = SymbolEncoder::new(&set);
    for &(k, v) in &values {
        enc.push(k, v);
    }
    let words = enc.finish();
    let mut dec = SymbolDecoder::new(&set, words).unwrap();
    for &(k, v) in &values {
        assert_eq!(dec.pop(k).unwrap(), v);
    }
    dec.finish().unwrap();
}

#[test]
fn coded_size_is_within_half_a_percent_of_the_information_content() {
    // Shannon (1948): no code beats −Σ log2 p on average; ANS should come close to it.
    let set = TableSet::new(gaussian::gaussian_tables()).unwrap();
    let scales = gaussian::scales();
    let mut rng = ChaCha8Rng::seed_from_u64(12);
    for &k in &[0usize, 8, 20, 40, 63] {
        let mut enc = SymbolEncoder::new(&set);
        for _ in 0..200_000 {
            enc.push(k, sample_gaussian(&mut rng, scales[k]));
        }
        let ideal = enc.ideal_bits();
        let coded = 32.0 * enc.finish().len() as f64;
        let overhead = coded / ideal - 1.0;
        println!(
            "scale {:8.3}: ideal {ideal:10.0} bits, coded {coded:10.0} bits, overhead {:+.4}%",
            scales[k],
            100.0 * overhead
        );
        // At the smallest scale nearly every symbol is 0 and the whole stream is tiny, so
        // compare in absolute terms there (one 64-bit state flush).
        assert!(overhead < 0.005 || coded - ideal <= 64.0, "scale {}: coded {coded} vs ideal {ideal}", scales[k]);
        assert!(coded >= ideal - 64.0);
    }
}

#[test]
fn a_damaged_stream_gives_an_error_or_garbage_but_never_a_panic() {
    let set = TableSet::new(gaussian::gaussian_tables()).unwrap();
    let mut enc = SymbolEncoder::new(&set);
    for i in 0..1000 {
        enc.push(i % 64, (i as i32 % 7) - 3);
    }
    let mut words = enc.finish();
    let mut rng = ChaCha8Rng::seed_from_u64(3);
    for _ in 0..200 {
        let i = rng.gen_range(0..words.len());
        words[i] ^= 1 << rng.gen_range(0..32);
        if let Ok(mut dec) = SymbolDecoder::new(&set, words.clone()) {
            for i in 0..1200 {
                if dec.pop(i % 64).is_err() {
                    break;
                }
            }
        }
    }
}
