//! End-to-end tests of `tamis inspect`: the words listed and their weights are
//! checked against the model file and the dataset's sketch read independently;
//! models without a sketch say so and list buckets by id.

mod common;

use std::collections::HashMap;
use std::path::{Path, PathBuf};

use common::*;
use serde_json::Value;
use xxhash_rust::xxh3::xxh3_64_with_seed;

fn model(
    work: &Path,
    name: &str,
    ingest_extra: &[&str],
    train_extra: &[&str],
) -> (PathBuf, PathBuf) {
    synth_model(work, name, 4000, 3, ingest_extra, train_extra)
}

fn inspect_json(model: &Path, extra: &[&str]) -> Value {
    let mut args = vec!["inspect", s(model), "--json"];
    args.extend_from_slice(extra);
    let o = tamis(&args);
    o.ok();
    serde_json::from_str(&o.stdout).unwrap_or_else(|e| panic!("{e}\n{}", o.stdout))
}

#[test]
fn listed_words_carry_their_bucket_weight_and_sign() {
    let t = tmp();
    let (dir, m) = model(t.path(), "multi", &["--log2-buckets", "12"], &["--idf"]);
    let bytes = std::fs::read(&m).unwrap();
    let h = file_header(&bytes);
    let dim = h.params[1] as usize;
    let weights = f32_section(&bytes, MODEL_WEIGHTS);
    let idf = f32_section(&bytes, MODEL_IDF);
    let meta = model_meta(&m);
    let seed = meta["features"]["hash_seed"].as_u64().unwrap();
    // The field seed and unigram hash as documented in src/features/mod.rs.
    let field_seed = xxh3_64_with_seed(b"text", seed);
    // Known words per bucket, from the dataset's sketch file.
    let man = manifest(&dir);
    let (sk, _) = tamis::dataset::sketch::read(&dir.join(&man.sketches[0].file)).unwrap();
    let mut per_bucket: HashMap<u64, usize> = HashMap::new();
    for e in &sk.fields[0].entries {
        *per_bucket.entry(e.hash & (dim as u64 - 1)).or_default() += 1;
    }
    let v = inspect_json(&m, &["--top", "12"]);
    assert_eq!(v["has_sketch"], true);
    assert_eq!(v["sketch_min_count"], 20);
    let classes = v["classes"].as_array().unwrap();
    assert_eq!(classes.len(), 6);
    let mut shared_seen = false;
    for (ci, c) in classes.iter().enumerate() {
        let pos = c["positive"].as_array().unwrap();
        let neg = c["negative"].as_array().unwrap();
        assert_eq!(pos.len(), 12);
        assert_eq!(neg.len(), 12);
        for (list, sign) in [(pos, 1.0), (neg, -1.0)] {
            let ws: Vec<f64> = list.iter().map(|f| f["weight"].as_f64().unwrap()).collect();
            assert!(ws.iter().all(|w| w * sign > 0.0));
            assert!(ws.windows(2).all(|p| p[0] * sign >= p[1] * sign), "{ws:?}");
            for f in list {
                let b = f["bucket"].as_u64().unwrap() as usize;
                let we = weights[ci * dim + b] as f64 * idf[b] as f64;
                match f["token"].as_str() {
                    Some(tok) => {
                        let hh = xxh3_64_with_seed(tok.as_bytes(), field_seed);
                        assert_eq!((hh & (dim as u64 - 1)) as usize, b, "{tok}");
                        let s = if hh >> 63 == 1 { -1.0 } else { 1.0 };
                        assert!((f["weight"].as_f64().unwrap() - s * we).abs() < 1e-9);
                        assert!(f["rows"].as_u64().unwrap() >= 20);
                        let shares = f["shares_with"].as_u64().unwrap() as usize;
                        assert_eq!(shares + 1, per_bucket[&(b as u64)], "{tok}");
                        shared_seen |= shares > 0;
                    }
                    None => {
                        assert!(!per_bucket.contains_key(&(b as u64)));
                        assert!((f["weight"].as_f64().unwrap() - we).abs() < 1e-9);
                    }
                }
            }
        }
    }
    // 2^12 buckets and thousands of words: some listed word shares its bucket.
    assert!(shared_seen);
    // The spam class leans on spam words of the invented inbox.
    let o = tamis(["inspect", s(&m), "--class", "spam", "--top", "20"]);
    o.ok()
        .stdout_has("token sketch:")
        .stdout_has("class spam")
        .stdout_has("pushes towards spam");
    assert!(!o.stdout.contains("class tickets"));
    let spam = inspect_json(&m, &["--class", "spam", "--top", "20"]);
    let words: Vec<&str> = spam["classes"][0]["positive"]
        .as_array()
        .unwrap()
        .iter()
        .filter_map(|f| f["token"].as_str())
        .collect();
    assert!(
        words
            .iter()
            .any(|w| ["prize", "claim", "winner", "crypto", "free"].contains(w)),
        "{words:?}"
    );
}

#[test]
fn a_model_without_a_sketch_says_so_and_lists_buckets() {
    let t = tmp();
    let (_, m) = model(
        t.path(),
        "bare",
        &["--no-sketch", "--positive", "spam"],
        &[],
    );
    let bytes = std::fs::read(&m).unwrap();
    assert!(!file_header(&bytes).ids.contains(&MODEL_SKETCH));
    let o = tamis(["inspect", s(&m), "--top", "3"]);
    o.ok()
        .stdout_has("carries no token sketch")
        .stdout_has("[bucket ");
    let v = inspect_json(&m, &["--top", "3"]);
    assert_eq!(v["has_sketch"], false);
    assert_eq!(v["classes"].as_array().unwrap().len(), 1);
    assert_eq!(v["classes"][0]["label"], "spam");
    let pos = v["classes"][0]["positive"].as_array().unwrap();
    assert_eq!(pos.len(), 3);
    assert!(pos.iter().all(|f| f["token"].is_null()));
    // Binary: only the positive class can be asked for.
    tamis(["inspect", s(&m), "--class", "spam"]).ok();
    tamis(["inspect", s(&m), "--class", "tickets"])
        .fails()
        .stderr_has("positive class");
}

#[test]
fn the_sketch_keeps_only_words_seen_in_enough_rows() {
    let t = tmp();
    let (dir, m) = model(t.path(), "strict", &["--sketch-min-count", "300"], &[]);
    let v = inspect_json(&m, &["--top", "50"]);
    assert_eq!(v["sketch_min_count"], 300);
    // The model's sketch is the dataset's: same number of words.
    let man = manifest(&dir);
    assert_eq!(v["sketch_tokens"], man.sketches[0].tokens);
    for c in v["classes"].as_array().unwrap() {
        for f in c["positive"].as_array().unwrap() {
            if let Some(r) = f["rows"].as_u64() {
                assert!(r >= 300);
            }
        }
    }
}

#[test]
fn unknown_class_and_damaged_model_are_clear_errors() {
    let t = tmp();
    let (_, m) = model(t.path(), "multi", &["--log2-buckets", "12"], &[]);
    tamis(["inspect", s(&m), "--class", "nope"])
        .fails()
        .stderr_has("no class \"nope\"");
    // A flipped byte in the sketch section is named.
    flip_in_section(&m, MODEL_SKETCH);
    tamis(["inspect", s(&m)])
        .fails()
        .stderr_has("checksum mismatch in sketch");
}

#[test]
fn help_explains_every_option() {
    assert_help_explains_everything(&["inspect"]);
}
