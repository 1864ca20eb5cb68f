//! Correctness checks of tamis's hashing, checked against sources outside the
//! project wherever one exists:
//!
//! * xxh3-64 against the xxHash reference sanity vectors;
//! * bucket and sign of those vector hashes, worked out by hand from the rule in
//!   the module docs of `src/features/mod.rs`;
//! * the documented feature scheme end to end, recomputed here without calling
//!   the featurizer, plus golden rows;
//! * the unbiasedness of signed feature hashing (Weinberger et al. 2009, Lemma 2)
//!   and the upward bias of an unsigned variant;
//! * tokenizer properties, against a plain reference tokenizer built on `std`.

use std::collections::BTreeMap;

use proptest::prelude::*;
use proptest::test_runner::RngSeed;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use xxhash_rust::xxh3::xxh3_64_with_seed;

use tamis::features::{
    bucket_sign, field_seed, tokenize, CharNgrams, FeatureConfig, Featurizer, MAX_TOKEN_BYTES,
};

/// Deterministic proptest settings: a fixed seed, so a run fails only for a
/// reason that shows again on every run, and no regression files are written.
fn fixed(cases: u32, seed: u64) -> ProptestConfig {
    ProptestConfig {
        cases,
        failure_persistence: None,
        rng_seed: RngSeed::Fixed(seed),
        ..ProptestConfig::default()
    }
}

// ---------------------------------------------------------------------------
// xxh3-64 sanity vectors
// ---------------------------------------------------------------------------

/// PRIME32 and PRIME64 of the xxHash reference code (`XSUM_PRIME32`,
/// `XSUM_PRIME64` in cli/xsum_sanity_check.c; the same numbers are XXH_PRIME32_1
/// and XXH_PRIME64_1 in xxhash.h).
const PRIME32: u64 = 2_654_435_761;
const PRIME64: u64 = 11_400_714_785_074_694_797;
/// Length of the sanity buffer (`SANITY_BUFFER_SIZE` in cli/xsum_sanity_check.c).
const SANITY_LEN: usize = 2367;

/// The sanity buffer of the xxHash reference tests (`XSUM_fillTestBuffer` in
/// cli/xsum_sanity_check.c): byte i is the top byte of PRIME32 · PRIME64^i mod 2^64.
fn sanity_buffer() -> Vec<u8> {
    let mut buf = vec![0u8; SANITY_LEN];
    let mut g = PRIME32;
    for b in buf.iter_mut() {
        *b = (g >> 56) as u8;
        g = g.wrapping_mul(PRIME64);
    }
    buf
}

/// `(len, seed, XXH3_64bits_withSeed(buffer[..len], seed))`.
///
/// Source: the xxHash reference repository, cli/xsum_sanity_check.c, table
/// `XSUM_XXH3_testdata` (XXH3-64 with seed 0 and with seed PRIME64). The values
/// were handed to this check's author with that citation and agree with the
/// table as the author recalls it (from memory); they were not re-fetched from
/// the repository.
const XXH3_VECTORS: [(usize, u64, u64); 8] = [
    (0, 0, 0x2D06_8005_38D3_94C2),
    (1, 0, 0xC44B_DFF4_074E_ECDB),
    (6, 0, 0x27B5_6A84_CD2D_7325),
    (12, 0, 0xA713_DAF0_DFBB_77E7),
    (24, 0, 0xA3FE_70BF_9D35_10EB),
    (2367, 0, 0xCB37_AEB9_E5D3_61ED),
    (0, PRIME64, 0xA8A6_B918_B2F0_364A),
    (6, PRIME64, 0x8458_9C11_6AB5_9AB9),
];

#[test]
fn sanity_buffer_starts_as_the_reference_generator_does() {
    // The first byte is the top byte of PRIME32 itself (0x9E3779B1 < 2^32, so 0),
    // the second the top byte of PRIME32·PRIME64 mod 2^64, computed here in u128.
    let buf = sanity_buffer();
    assert_eq!(buf[0], 0);
    let second = ((PRIME32 as u128 * PRIME64 as u128) as u64 >> 56) as u8;
    assert_eq!(buf[1], second);
    assert_eq!(buf.len(), SANITY_LEN);
}

#[test]
fn xxh3_matches_published_sanity_vectors() {
    let buf = sanity_buffer();
    let mut wrong = Vec::new();
    for &(len, seed, want) in &XXH3_VECTORS {
        let got = xxh3_64_with_seed(&buf[..len], seed);
        if got != want {
            wrong.push(format!(
                "len {len} seed {seed}: want {want:#018X}, got {got:#018X}"
            ));
        }
    }
    assert!(
        wrong.is_empty(),
        "xxh3 vectors differ:\n{}",
        wrong.join("\n")
    );
}

#[test]
fn tamis_field_seed_is_xxh3_of_the_name() {
    // Module docs: field seed = xxh3_64(field name, seed: hash_seed). Checked on
    // the sanity buffer read as a "name", so it rests on the vectors above.
    let buf = sanity_buffer();
    let name = std::str::from_utf8(&buf[..1]).unwrap(); // byte 0x00 is valid UTF-8
    assert_eq!(field_seed(0, name), 0xC44B_DFF4_074E_ECDB);
    assert_eq!(field_seed(PRIME64, ""), 0xA8A6_B918_B2F0_364A);
    assert_eq!(field_seed(0, ""), 0x2D06_8005_38D3_94C2);
}

// ---------------------------------------------------------------------------
// Bucket and sign
// ---------------------------------------------------------------------------

/// `(hash, log2 buckets, bucket, sign)`, worked out by hand from the rule in the
/// module docs of src/features/mod.rs (bucket = h & (2^K − 1), sign −1 when bit
/// 63 is set): the bucket is the low K bits of the hex digits, the sign is −
/// when the first hex digit is 8 or more.
const BUCKET_SIGN: [(u64, u32, u32, f32); 24] = [
    (0x2D06_8005_38D3_94C2, 10, 0x0C2, 1.0),
    (0x2D06_8005_38D3_94C2, 20, 0x394C2, 1.0),
    (0x2D06_8005_38D3_94C2, 28, 0x8D3_94C2, 1.0),
    (0xC44B_DFF4_074E_ECDB, 10, 0x0DB, -1.0),
    (0xC44B_DFF4_074E_ECDB, 20, 0xEECDB, -1.0),
    (0xC44B_DFF4_074E_ECDB, 28, 0x74E_ECDB, -1.0),
    (0x27B5_6A84_CD2D_7325, 10, 0x325, 1.0),
    (0x27B5_6A84_CD2D_7325, 20, 0xD7325, 1.0),
    (0x27B5_6A84_CD2D_7325, 28, 0xD2D_7325, 1.0),
    (0xA713_DAF0_DFBB_77E7, 10, 0x3E7, -1.0),
    (0xA713_DAF0_DFBB_77E7, 20, 0xB77E7, -1.0),
    (0xA713_DAF0_DFBB_77E7, 28, 0xFBB_77E7, -1.0),
    (0xA3FE_70BF_9D35_10EB, 10, 0x0EB, -1.0),
    (0xA3FE_70BF_9D35_10EB, 20, 0x510EB, -1.0),
    (0xA3FE_70BF_9D35_10EB, 28, 0xD35_10EB, -1.0),
    (0xCB37_AEB9_E5D3_61ED, 10, 0x1ED, -1.0),
    (0xCB37_AEB9_E5D3_61ED, 20, 0x361ED, -1.0),
    (0xCB37_AEB9_E5D3_61ED, 28, 0x5D3_61ED, -1.0),
    (0xA8A6_B918_B2F0_364A, 10, 0x24A, -1.0),
    (0xA8A6_B918_B2F0_364A, 20, 0x0364A, -1.0),
    (0xA8A6_B918_B2F0_364A, 28, 0x2F0_364A, -1.0),
    (0x8458_9C11_6AB5_9AB9, 10, 0x2B9, -1.0),
    (0x8458_9C11_6AB5_9AB9, 20, 0x59AB9, -1.0),
    (0x8458_9C11_6AB5_9AB9, 28, 0xAB5_9AB9, -1.0),
];

#[test]
fn bucket_and_sign_of_the_vector_hashes() {
    for &(h, k, bucket, sign) in &BUCKET_SIGN {
        let mask = (1u64 << k) - 1;
        assert_eq!(
            bucket_sign(h, mask),
            (bucket, sign),
            "hash {h:#018X} with 2^{k} buckets"
        );
    }
    // Every hash in the table is one of the published vectors.
    for &(h, ..) in &BUCKET_SIGN {
        assert!(XXH3_VECTORS.iter().any(|v| v.2 == h));
    }
}

#[test]
fn bucket_and_sign_edges() {
    let m28 = (1u64 << 28) - 1;
    assert_eq!(bucket_sign(0, m28), (0, 1.0));
    assert_eq!(bucket_sign(1 << 63, m28), (0, -1.0));
    assert_eq!(bucket_sign(u64::MAX, m28), (0x0FFF_FFFF, -1.0));
    assert_eq!(bucket_sign(u64::MAX >> 1, m28), (0x0FFF_FFFF, 1.0));
    // Bit 62 and bits above K never leak into the bucket or the sign.
    assert_eq!(bucket_sign(1 << 62, (1 << 10) - 1), (0, 1.0));
    assert_eq!(bucket_sign((1 << 10) | 5, (1 << 10) - 1), (5, 1.0));
}

// ---------------------------------------------------------------------------
// The feature scheme end to end, recomputed without the featurizer
// ---------------------------------------------------------------------------

/// φ = 2^64 / golden ratio, as stated in the module docs of src/features/mod.rs.
const PHI: u64 = 0x9E37_79B9_7F4A_7C15;
/// The character n-gram salt. Not in the module docs; its value is the ASCII of
/// "chargram" read big-endian, as the source comment beside `CHAR_SALT` says.
const CHAR_SALT: u64 = u64::from_be_bytes(*b"chargram");
/// The numeric-feature salt, the ASCII of "numeric!" (source comment beside
/// `NUMERIC_SALT`; not in the module docs).
const NUMERIC_SALT: u64 = u64::from_be_bytes(*b"numeric!");

/// One text field of a reference row: field name and its tokens (already split
/// and lowercased by hand or by the reference tokenizer).
struct RefField<'a> {
    name: &'a str,
    tokens: Vec<String>,
}

/// Bucket and sign by the documented rule, written out again (not calling
/// `bucket_sign`).
fn ref_bucket(h: u64, log2: u32) -> (u32, f64) {
    let b = (h & ((1u64 << log2) - 1)) as u32;
    let s = if h & (1 << 63) != 0 { -1.0 } else { 1.0 };
    (b, s)
}

/// A row computed from the module docs of src/features/mod.rs alone, in f64.
fn reference_row(
    cfg: &FeatureConfig,
    fields: &[RefField<'_>],
    numeric: &[(&str, f64)],
) -> Vec<(u32, f64)> {
    let k = cfg.log2_buckets;
    let mut text: BTreeMap<u32, f64> = BTreeMap::new();
    for f in fields {
        let fs = xxh3_64_with_seed(f.name.as_bytes(), cfg.hash_seed);
        let mut add = |h: u64| {
            let (b, s) = ref_bucket(h, k);
            *text.entry(b).or_insert(0.0) += s;
        };
        let uni: Vec<u64> = f
            .tokens
            .iter()
            .map(|t| xxh3_64_with_seed(t.as_bytes(), fs))
            .collect();
        for &h in &uni {
            add(h);
        }
        for n in 2..=cfg.ngrams as usize {
            for w in uni.windows(n) {
                let bytes: Vec<u8> = w.iter().flat_map(|h| h.to_le_bytes()).collect();
                add(xxh3_64_with_seed(&bytes, fs ^ (n as u64).wrapping_mul(PHI)));
            }
        }
        if let Some(cn) = cfg.char_ngrams {
            for t in &f.tokens {
                let padded: Vec<char> = format!("<{t}>").chars().collect();
                for n in cn.min as usize..=cn.max as usize {
                    for g in padded.windows(n) {
                        let gram: String = g.iter().collect();
                        let seed = fs ^ CHAR_SALT ^ (n as u64).wrapping_mul(PHI);
                        add(xxh3_64_with_seed(gram.as_bytes(), seed));
                    }
                }
            }
        }
    }
    let mut row: BTreeMap<u32, f64> = text.into_iter().filter(|e| e.1 != 0.0).collect();
    if !cfg.raw_counts {
        for v in row.values_mut() {
            *v = v.signum() * v.abs().ln_1p();
        }
        let norm = row.values().map(|v| v * v).sum::<f64>().sqrt();
        if norm > 0.0 {
            for v in row.values_mut() {
                *v /= norm;
            }
        }
    }
    for &(name, value) in numeric {
        let h = xxh3_64_with_seed(name.as_bytes(), cfg.hash_seed ^ NUMERIC_SALT);
        let (b, s) = ref_bucket(h, k);
        *row.entry(b).or_insert(0.0) += s * value;
    }
    row.into_iter().filter(|e| e.1 != 0.0).collect()
}

fn config(hash_seed: u64, log2: u32, ngrams: u32) -> FeatureConfig {
    FeatureConfig {
        ngrams,
        ..FeatureConfig::plain(hash_seed, log2)
    }
}

fn featurize(cfg: &FeatureConfig, texts: &[&[u8]], numbers: &[f64]) -> Vec<(u32, f32)> {
    let mut f = Featurizer::new(cfg).unwrap();
    let (mut i, mut v) = (Vec::new(), Vec::new());
    f.begin_row();
    for (n, t) in texts.iter().enumerate() {
        f.add_text(n, t);
    }
    for (n, &x) in numbers.iter().enumerate() {
        f.add_numeric(n, x);
    }
    f.finish_row(&mut i, &mut v);
    i.into_iter().zip(v).collect()
}

/// Indices equal, values within `tol` (the featurizer works in f32, the
/// reference in f64).
fn assert_rows_match(got: &[(u32, f32)], want: &[(u32, f64)], tol: f64) {
    let gi: Vec<u32> = got.iter().map(|e| e.0).collect();
    let wi: Vec<u32> = want.iter().map(|e| e.0).collect();
    assert_eq!(gi, wi, "buckets differ");
    for ((b, g), (_, w)) in got.iter().zip(want) {
        assert!(
            (*g as f64 - w).abs() <= tol * w.abs().max(1.0),
            "bucket {b}: featurizer {g}, reference {w}"
        );
    }
}

/// The golden sentence, an invented notice of the Quillmere Ferry Cooperative.
const GOLDEN_TEXT: &str =
    "Quillmere ferry: the 07:40 sailing to Wrenhaven is DELAYED, ferry fares unchanged.";
/// Its tokens, split and lowercased by hand.
const GOLDEN_TOKENS: [&str; 13] = [
    "quillmere",
    "ferry",
    "the",
    "07",
    "40",
    "sailing",
    "to",
    "wrenhaven",
    "is",
    "delayed",
    "ferry",
    "fares",
    "unchanged",
];

/// The golden row of `GOLDEN_TEXT` with hash_seed 1, 2^20 buckets, bigrams, field
/// "text", as (bucket, signed count). The buckets were recorded by running
/// `reference_row` (which does not call tamis) on x86_64 Linux; they are not from
/// a source outside the project. They freeze scheme `tamis-xxh3-signed-1`: if
/// they change, models trained before no longer score the same, and the scheme
/// name must change. Bucket 233899 is "ferry", met twice.
const GOLDEN_ROW: [(u32, i32); 24] = [
    (41415, -1),
    (81193, 1),
    (93764, -1),
    (102092, -1),
    (132972, -1),
    (147713, -1),
    (194057, 1),
    (215348, -1),
    (233899, -2),
    (286348, 1),
    (383922, -1),
    (402421, -1),
    (429653, 1),
    (447025, -1),
    (604992, 1),
    (632587, 1),
    (693370, -1),
    (697427, -1),
    (708016, 1),
    (758883, -1),
    (769027, 1),
    (793967, -1),
    (864933, 1),
    (876694, -1),
];

#[test]
fn golden_row_matches_the_documented_scheme() {
    let cfg = config(1, 20, 2);
    let tokens: Vec<String> = GOLDEN_TOKENS.iter().map(|t| t.to_string()).collect();
    assert_eq!(reference_tokens(GOLDEN_TEXT), tokens);
    let want = reference_row(
        &cfg,
        &[RefField {
            name: "text",
            tokens,
        }],
        &[],
    );
    // 12 distinct words ("ferry" twice) and 12 distinct bigrams, barring a
    // collision among 24 features in 2^20 buckets.
    assert_eq!(want.len(), 24);
    let got = featurize(&cfg, &[GOLDEN_TEXT.as_bytes()], &[]);
    assert_rows_match(&got, &want, 1e-6);
    // The golden values follow from the counts alone: 23 entries of ±ln 2 and one
    // of −ln 3, scaled to unit norm.
    let norm = (23.0 * 2f64.ln().powi(2) + 3f64.ln().powi(2)).sqrt();
    assert_eq!(got.len(), GOLDEN_ROW.len(), "golden row length");
    for (g, &(bucket, count)) in got.iter().zip(&GOLDEN_ROW) {
        let value = (count as f64).signum() * (count.abs() as f64).ln_1p() / norm;
        assert_eq!(g.0, bucket);
        assert!((g.1 as f64 - value).abs() < 1e-6, "{g:?} vs {value}");
    }
}

/// A small invented vocabulary, so that words and n-grams repeat within a row and
/// buckets collide (with 2^10 buckets) and sometimes cancel.
const VOCAB: [&str; 12] = [
    "ferry",
    "Quillmere",
    "HARBOUR",
    "wrenhaven",
    "tide",
    "delayed",
    "fare",
    "dock",
    "pier",
    "Ölmund",
    "straße",
    "ΣΚΑΦΟΣ",
];
const SEPARATORS: [&str; 6] = [" ", ", ", "\t", " -- ", "!\n", "/"];

fn reference_tokens(s: &str) -> Vec<String> {
    s.split(|c: char| !c.is_alphanumeric())
        .filter(|t| !t.is_empty())
        .map(|t| t.chars().flat_map(char::to_lowercase).collect())
        .collect()
}

fn sentence(words: &[(usize, usize)]) -> String {
    let mut s = String::new();
    for &(w, sep) in words {
        s.push_str(VOCAB[w]);
        s.push_str(SEPARATORS[sep]);
    }
    s
}

proptest! {
    #![proptest_config(fixed(300, 0x7A31_5EED))]

    /// The featurizer agrees with the reference derivation for any word order,
    /// n-gram order, seed, bucket count, char n-grams, raw or damped values and
    /// numeric fields.
    #[test]
    fn featurizer_matches_reference_derivation(
        subject in prop::collection::vec((0..VOCAB.len(), 0..SEPARATORS.len()), 0..8),
        body in prop::collection::vec((0..VOCAB.len(), 0..SEPARATORS.len()), 0..40),
        ngrams in 1u32..=5,
        log2 in prop::sample::select(vec![10u32, 12, 20, 28]),
        hash_seed in any::<u64>(),
        raw in any::<bool>(),
        chars in prop::option::of((1u32..=4, 0u32..=3)),
        weight in prop::option::of(-1e3f64..1e3),
    ) {
        let mut cfg = config(hash_seed, log2, ngrams);
        cfg.raw_counts = raw;
        cfg.char_ngrams = chars.map(|(min, extra)| CharNgrams { min, max: min + extra });
        cfg.text_fields = vec!["subject".into(), "body".into()];
        let (s, b) = (sentence(&subject), sentence(&body));
        let mut numeric = vec![];
        let mut numbers = vec![];
        if let Some(w) = weight {
            cfg.numeric_fields = vec!["crossings".into()];
            numeric.push(("crossings", w));
            numbers.push(w);
        }
        let want = reference_row(
            &cfg,
            &[
                RefField { name: "subject", tokens: reference_tokens(&s) },
                RefField { name: "body", tokens: reference_tokens(&b) },
            ],
            &numeric,
        );
        let got = featurize(&cfg, &[s.as_bytes(), b.as_bytes()], &numbers);
        // Raw counts are small integers (exact in f32); damped values are unit
        // scale; numeric values are carried in f32.
        assert_rows_match(&got, &want, 2e-6);
    }
}

// ---------------------------------------------------------------------------
// Signed hashing is unbiased for inner products
// ---------------------------------------------------------------------------

/// A sparse vector: feature ids and values.
type Sparse = Vec<(u64, f64)>;

/// Hash a sparse vector into `2^log2` buckets with hash seed `seed`, signed as
/// tamis does (bucket and sign from `bucket_sign` of xxh3 of the id's bytes), or
/// with every sign +1.
fn hashed(x: &Sparse, seed: u64, log2: u32, signed: bool) -> Vec<f64> {
    let mask = (1u64 << log2) - 1;
    let mut out = vec![0.0; 1 << log2];
    for &(id, v) in x {
        let (b, s) = bucket_sign(xxh3_64_with_seed(&id.to_le_bytes(), seed), mask);
        out[b as usize] += if signed { s as f64 } else { 1.0 } * v;
    }
    out
}

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

/// Two random sparse vectors with nonnegative values (so that the cross terms
/// an unsigned hash adds are positive) and partly shared support.
fn random_pair(rng: &mut ChaCha8Rng) -> (Sparse, Sparse) {
    let shared = 15 + rng.random_range(0..10);
    let own = 20 + rng.random_range(0..10);
    let base: u64 = rng.random();
    let ids: Vec<u64> = (0..(shared + 2 * own) as u64)
        .map(|i| base.wrapping_add(i.wrapping_mul(0x1_0000_0001)))
        .collect();
    let mut x = Vec::new();
    let mut y = Vec::new();
    for (i, &id) in ids.iter().enumerate() {
        if i < shared + own {
            x.push((id, rng.random_range(0.05..1.0)));
        }
        if i < shared || i >= shared + own {
            y.push((id, rng.random_range(0.05..1.0)));
        }
    }
    (x, y)
}

/// Weinberger, Dasgupta, Langford, Smola, Attenberg (2009), "Feature Hashing for
/// Large Scale Multitask Learning", ICML, Lemma 2: with a random bucket map h and
/// random signs ξ, E[<φ(x), φ(x')>] = <x, x'>, and the variance is
/// σ² = (1/m) Σ_{i≠j} (x_i² x'_j² + x_i x'_i x_j x'_j) (the variance formula from
/// memory). Without signs the expectation is <x, x'> + (1/m) Σ_{i≠j} x_i x'_j
/// (each pair i≠j shares a bucket with probability 1/m; derived here).
#[test]
fn signed_hashing_is_unbiased_and_unsigned_is_not() {
    const SEEDS: u64 = 3000;
    const LOG2: u32 = 5; // m = 32 buckets: many collisions, so the bias shows.
    let m = (1u64 << LOG2) as f64;
    let mut rng = ChaCha8Rng::seed_from_u64(20_090_614);
    for pair in 0..4 {
        let (x, y) = random_pair(&mut rng);
        let dense = |v: &Sparse| -> BTreeMap<u64, f64> { v.iter().copied().collect() };
        let (dx, dy) = (dense(&x), dense(&y));
        let truth: f64 = dx
            .iter()
            .filter_map(|(i, a)| dy.get(i).map(|b| a * b))
            .sum();
        // Cross sums over i ≠ j.
        let sx: f64 = x.iter().map(|e| e.1).sum();
        let sy: f64 = y.iter().map(|e| e.1).sum();
        let cross = sx * sy - truth;
        let sx2: f64 = x.iter().map(|e| e.1 * e.1).sum();
        let sy2: f64 = y.iter().map(|e| e.1 * e.1).sum();
        let diag2: f64 = dx
            .iter()
            .filter_map(|(i, a)| dy.get(i).map(|b| (a * a) * (b * b)))
            .sum();
        let variance = ((sx2 * sy2 - diag2) + (truth * truth - diag2)) / m;

        let base: u64 = rng.random();
        let (mut signed, mut unsigned) = (Vec::new(), Vec::new());
        for s in 0..SEEDS {
            let seed = base.wrapping_add(s.wrapping_mul(PHI));
            signed.push(dot(
                &hashed(&x, seed, LOG2, true),
                &hashed(&y, seed, LOG2, true),
            ));
            unsigned.push(dot(
                &hashed(&x, seed, LOG2, false),
                &hashed(&y, seed, LOG2, false),
            ));
        }
        let stats = |v: &[f64]| {
            let n = v.len() as f64;
            let mean = v.iter().sum::<f64>() / n;
            let var = v.iter().map(|a| (a - mean) * (a - mean)).sum::<f64>() / (n - 1.0);
            (mean, var, (var / n).sqrt())
        };
        let (ms, vs, ses) = stats(&signed);
        let (mu, _, seu) = stats(&unsigned);
        // Unbiased: within 4 standard errors of the true inner product (a
        // 4-sigma band: common practice; the RNG seed is fixed, so the outcome
        // is the same on every run).
        assert!(
            (ms - truth).abs() < 4.0 * ses,
            "pair {pair}: signed mean {ms:.4}, true {truth:.4}, s.e. {ses:.4}"
        );
        // Lemma 2's variance, within 20% (the sample variance of 3000 draws is
        // good to a few percent).
        assert!(
            (vs / variance - 1.0).abs() < 0.2,
            "pair {pair}: sample variance {vs:.4}, Lemma 2 gives {variance:.4}"
        );
        // Unsigned: biased upward by about cross/m, far beyond the noise.
        let bias = cross / m;
        assert!(
            mu - truth > 10.0 * seu && mu - truth > 0.5 * bias,
            "pair {pair}: unsigned mean {mu:.4}, true {truth:.4}, s.e. {seu:.4}"
        );
        assert!(
            (mu - (truth + bias)).abs() < 4.0 * seu,
            "pair {pair}: unsigned mean {mu:.4}, expected {:.4}, s.e. {seu:.4}",
            truth + bias
        );
    }
}

// ---------------------------------------------------------------------------
// Tokenizer
// ---------------------------------------------------------------------------

fn tokens_of(bytes: &[u8]) -> (Vec<Vec<u8>>, u32) {
    let mut out = Vec::new();
    let mut buf = Vec::new();
    let bad = tokenize(bytes, &mut buf, |t| out.push(t.to_vec()));
    (out, bad)
}

fn strings(tokens: &[Vec<u8>]) -> Vec<String> {
    tokens
        .iter()
        .map(|t| String::from_utf8(t.clone()).expect("tokens are UTF-8"))
        .collect()
}

/// The one character outside the alphanumeric classes that Unicode's
/// unconditional lowercase mappings produce: U+0130 → U+0069 U+0307
/// (SpecialCasing.txt; from memory, and confirmed by the exhaustive check below).
const COMBINING_DOT: char = '\u{307}';

/// Properties every token has, whatever the input.
fn check_token_shape(t: &[u8]) {
    assert!(!t.is_empty(), "empty token");
    assert!(t.len() <= MAX_TOKEN_BYTES, "token of {} bytes", t.len());
    let s = std::str::from_utf8(t).expect("token is UTF-8");
    for c in s.chars() {
        assert!(
            c.is_alphanumeric() || c == COMBINING_DOT,
            "token {s:?} holds {c:?}"
        );
    }
    let lower: String = s.chars().flat_map(char::to_lowercase).collect();
    assert_eq!(lower, s, "token is not lowercase");
}

#[test]
fn every_single_character_tokenizes_as_std_classifies_it() {
    // Reference: std's Unicode tables (char::is_alphanumeric, char::to_lowercase).
    let mut seen_dot = false;
    let mut buf = [0u8; 4];
    for c in (0..=0x10FFFFu32).filter_map(char::from_u32) {
        let (toks, bad) = tokens_of(c.encode_utf8(&mut buf).as_bytes());
        assert_eq!(bad, 0, "{c:?} counted as invalid UTF-8");
        if c.is_alphanumeric() {
            let want: String = c.to_lowercase().collect();
            assert_eq!(strings(&toks), [want], "{c:?}");
            for t in &toks {
                check_token_shape(t);
            }
            seen_dot |= c.to_lowercase().any(|l| l == COMBINING_DOT);
        } else {
            assert!(toks.is_empty(), "separator {c:?} gave {toks:?}");
        }
    }
    assert!(seen_dot);
}

/// Lowercased byte length of a char.
fn lower_len(c: char) -> usize {
    c.to_lowercase().map(char::len_utf8).sum()
}

#[test]
fn tokens_up_to_the_limit_are_kept_whole() {
    // MAX_TOKEN_BYTES is documented as the "longest token kept whole". For each
    // last character, a token of exactly MAX_TOKEN_BYTES bytes (after
    // lowercasing) must come out as one token.
    let mut failures = Vec::new();
    for last in ['a', 'Z', '7', 'é', '中', '𠀀', '𐐀', 'İ', 'Ⱥ'] {
        let head = MAX_TOKEN_BYTES - lower_len(last);
        let text = format!("{}{last}", "q".repeat(head));
        let want: String = text.chars().flat_map(char::to_lowercase).collect();
        assert_eq!(want.len(), MAX_TOKEN_BYTES);
        let got = strings(&tokens_of(format!("x {text} y").as_bytes()).0);
        if got != ["x", want.as_str(), "y"] {
            let lens: Vec<usize> = got.iter().map(String::len).collect();
            failures.push(format!("last char {last:?}: token lengths {lens:?}"));
        }
    }
    assert!(
        failures.is_empty(),
        "{MAX_TOKEN_BYTES}-byte tokens were cut:\n{}",
        failures.join("\n")
    );
}

#[test]
fn long_runs_are_cut_without_losing_bytes() {
    for unit in ["a", "é", "中", "𠀀", "İ", "aé", "a中𠀀"] {
        for reps in [255, 256, 257, 600, 2000] {
            let text = unit.repeat(reps);
            let want: String = text.chars().flat_map(char::to_lowercase).collect();
            let (toks, bad) = tokens_of(text.as_bytes());
            assert_eq!(bad, 0);
            for t in &toks {
                assert!(!t.is_empty() && t.len() <= MAX_TOKEN_BYTES);
                assert!(std::str::from_utf8(t).is_ok());
            }
            assert_eq!(strings(&toks).concat(), want, "{unit:?} × {reps}");
        }
    }
}

/// Printable and control ASCII that is not alphanumeric: all separators.
fn ascii_separators() -> Vec<u8> {
    (0u8..128).filter(|b| !b.is_ascii_alphanumeric()).collect()
}

fn text_strategy() -> impl Strategy<Value = String> {
    prop_oneof![
        any::<String>(),
        "[a-zA-Z0-9 ,.;:!?'\"()\\t\\n-]{0,120}",
        "[a-zéÉ中𠀀𐐀İΣσςßẞ日本 .,€𝄞]{0,300}",
        "([a-zé中𠀀𐐀İ]{200,270}[ ,.€]){1,3}",
        // Runs of lowercase ASCII around the cut length, continued by other
        // characters or not.
        "([a-z0-9]{0,300}[A-Zé中İ]?[a-z]{0,8}[ .]){1,4}",
    ]
}

proptest! {
    #![proptest_config(fixed(1000, 0x70C3_15E5))]

    #[test]
    fn tokens_have_the_documented_shape(s in text_strategy()) {
        let (toks, bad) = tokens_of(s.as_bytes());
        prop_assert_eq!(bad, 0);
        for t in &toks {
            check_token_shape(t);
        }
        // Cutting never loses or adds a byte: the tokens concatenate to the
        // reference tokens concatenated.
        prop_assert_eq!(strings(&toks).concat(), reference_tokens(&s).concat());
    }

    #[test]
    fn tokens_match_a_plain_reference_tokenizer(s in text_strategy()) {
        // Reference: split at non-alphanumeric chars, drop empties, lowercase.
        // Compared for inputs where no token is longer than the cut length.
        let want = reference_tokens(&s);
        prop_assume!(want.iter().all(|t| t.len() <= MAX_TOKEN_BYTES));
        prop_assert_eq!(strings(&tokens_of(s.as_bytes()).0), want);
    }

    #[test]
    fn changing_ascii_separators_changes_nothing(
        s in text_strategy(),
        picks in prop::collection::vec(any::<prop::sample::Index>(), 1..64),
    ) {
        let seps = ascii_separators();
        let mut k = 0;
        let changed: String = s
            .chars()
            .map(|c| {
                if c.is_ascii() && !c.is_ascii_alphanumeric() {
                    k += 1;
                    seps[picks[k % picks.len()].index(seps.len())] as char
                } else {
                    c
                }
            })
            .collect();
        prop_assert_eq!(tokens_of(s.as_bytes()), tokens_of(changed.as_bytes()));
    }

    #[test]
    fn invalid_utf8_never_panics_and_acts_as_a_separator(
        bytes in prop_oneof![
            prop::collection::vec(any::<u8>(), 0..300),
            prop::collection::vec(prop::sample::select(
                vec![b'a', b'Z', b' ', 0x80, 0xBF, 0xC0, 0xC3, 0xA9, 0xE2, 0x82, 0xAC,
                     0xED, 0xA0, 0xF0, 0x9D, 0x84, 0x9E, 0xF4, 0x90, 0xFF]), 0..300),
        ],
    ) {
        let (toks, bad) = tokens_of(&bytes);
        for t in &toks {
            check_token_shape(t);
        }
        // Counted exactly when the input is not UTF-8.
        prop_assert_eq!(bad > 0, std::str::from_utf8(&bytes).is_err());
        // Reference: std's lossy decoding turns every invalid sequence into
        // U+FFFD, which is not alphanumeric, so it separates tokens.
        let lossy = String::from_utf8_lossy(&bytes);
        let want = reference_tokens(&lossy);
        if want.iter().all(|t| t.len() <= MAX_TOKEN_BYTES) {
            prop_assert_eq!(strings(&toks), want);
        }
    }
}
