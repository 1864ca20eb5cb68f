//! End-to-end tests of `tamis explain`: the total it prints is the score that
//! `tamis score` prints for the same text; contributions are value × idf ×
//! weight read independently from the model file; masking, stdin, models
//! without a token sketch, and bad input.

mod common;

use std::path::{Path, PathBuf};

use common::*;
use serde_json::Value;

/// Ingest `rows` invented messages into `work/NAME` (2^16 buckets) with
/// `extra` options and train a model on it; returns the model's path.
fn model(
    work: &Path,
    name: &str,
    rows: u64,
    ingest_extra: &[&str],
    train_extra: &[&str],
) -> PathBuf {
    let mut a = vec!["--log2-buckets", "16"];
    a.extend_from_slice(ingest_extra);
    synth_model(work, name, rows, 7, &a, train_extra).1
}

fn explain_json(model: &Path, text: &str, extra: &[&str]) -> Value {
    let mut args = vec!["explain", s(model), text, "--json"];
    args.extend_from_slice(extra);
    let o = tamis(&args);
    o.ok();
    serde_json::from_str(&o.stdout).unwrap_or_else(|e| panic!("{e}\n{}", o.stdout))
}

/// Score lines of text with `tamis score` (stdin): (label, score) per line.
fn scores(model: &Path, texts: &[&str]) -> Vec<(String, String)> {
    let input = texts.join("\n") + "\n";
    let o = tamis_with_stdin(["score", s(model), "-q"], Some(input.as_bytes()));
    o.ok();
    o.stdout
        .lines()
        .map(|l| {
            let f: Vec<&str> = l.split('\t').collect();
            (f[1].to_string(), f[2].to_string())
        })
        .collect()
}

const TEXTS: [&str; 5] = [
    "Claim your FREE prize now",
    "my umbrella was left on the quillmere ferry",
    "Is there a ramp for wheelchair boarding at Pellow pier?",
    "The 7:40 sailing from Osk was cancelled again, is there a later crossing?",
    "refund refund refund my season pass please",
];

/// The total equals `score`'s margin; the contributions add up to it and each is
/// value × idf × weight with the weight read from the model file.
fn check_against_score(model: &Path) {
    let bytes = std::fs::read(model).unwrap();
    let h = file_header(&bytes);
    let dim = h.params[1] as usize;
    let weights = f32_section(&bytes, MODEL_WEIGHTS);
    let idf = (h.params[2] == 1).then(|| f32_section(&bytes, MODEL_IDF));
    let meta = model_meta(model);
    let labels: Vec<String> = meta["model_labels"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_str().unwrap().to_string())
        .collect();
    let scored = scores(model, &TEXTS);
    for (text, (label, score)) in TEXTS.iter().zip(&scored) {
        let e = explain_json(model, text, &[]);
        let total = e["total"].as_f64().unwrap();
        assert_eq!(&format!("{total:.6}"), score, "{text}");
        assert_eq!(e["predicted"], label.as_str(), "{text}");
        let m = labels
            .iter()
            .position(|l| l == e["class"].as_str().unwrap())
            .unwrap();
        let mut sum = e["bias"].as_f64().unwrap();
        for c in e["contributions"].as_array().unwrap() {
            let b = c["bucket"].as_u64().unwrap() as usize;
            let w = weights[m * dim + b];
            assert_eq!(c["weight"].as_f64().unwrap() as f32, w);
            let v = c["value"].as_f64().unwrap() as f32;
            let x = match &idf {
                Some(d) => v * d[b],
                None => v,
            };
            assert_eq!(c["contribution"].as_f64().unwrap(), (w * x) as f64);
            sum += c["contribution"].as_f64().unwrap();
            assert!(
                !c["features"].as_array().unwrap().is_empty(),
                "bucket {b} has no feature of the text"
            );
        }
        assert!(
            (sum - total).abs() <= 1e-9 * total.abs().max(1.0),
            "{text}: {sum} vs {total}"
        );
        // Sorted by |contribution|.
        let mags: Vec<f64> = e["contributions"]
            .as_array()
            .unwrap()
            .iter()
            .map(|c| c["contribution"].as_f64().unwrap().abs())
            .collect();
        assert!(mags.windows(2).all(|w| w[0] >= w[1]));
    }
}

#[test]
fn total_equals_the_score_for_multiclass_binary_and_idf_models() {
    let t = tmp();
    check_against_score(&model(t.path(), "multi", 3000, &[], &[]));
    check_against_score(&model(
        t.path(),
        "binary",
        3000,
        &["--positive", "spam"],
        &[],
    ));
    check_against_score(&model(
        t.path(),
        "idf",
        3000,
        &["--char-ngrams", "3..4", "--ngrams", "3"],
        &["--idf", "--loss", "logistic"],
    ));
}

#[test]
fn features_are_named_and_the_table_ends_with_bias_and_total() {
    let t = tmp();
    let m = model(t.path(), "multi", 3000, &[], &[]);
    let e = explain_json(&m, "Claim your FREE prize now", &["--class", "spam"]);
    assert_eq!(e["class"], "spam");
    let feats: Vec<(String, String)> = e["contributions"]
        .as_array()
        .unwrap()
        .iter()
        .flat_map(|c| c["features"].as_array().unwrap().clone())
        .map(|f| {
            (
                f["text"].as_str().unwrap().to_string(),
                f["kind"].to_string(),
            )
        })
        .collect();
    assert!(
        feats.contains(&("prize".into(), "\"word\"".into())),
        "{feats:?}"
    );
    assert!(
        feats.contains(&("free prize".into(), "{\"word_ngram\":2}".into())),
        "{feats:?}"
    );
    // 5 words and 4 pairs (the synthetic vocabulary does not collide them in 2^16
    // buckets: checked by the count of contributions).
    assert_eq!(feats.len(), 9);
    let o = tamis([
        "explain",
        s(&m),
        "Claim your FREE prize now",
        "--class",
        "spam",
    ]);
    o.ok()
        .stdout_has("\"prize\" (word)")
        .stdout_has("bias")
        .stdout_has("total");
    let last = o.stdout.lines().last().unwrap();
    let scored = scores(&m, &["Claim your FREE prize now"]);
    let e2 = explain_json(&m, "Claim your FREE prize now", &[]);
    if e2["class"] == "spam" {
        assert!(last.contains(&scored[0].1), "{last} vs {:?}", scored[0]);
    }
    // --top keeps the total.
    let top = explain_json(&m, "Claim your FREE prize now", &["--top", "2"]);
    assert_eq!(top["contributions"].as_array().unwrap().len(), 2);
    assert_eq!(top["total"], e2["total"]);
}

#[test]
fn text_from_standard_input() {
    let t = tmp();
    let m = model(t.path(), "multi", 2000, &[], &[]);
    let o = tamis_with_stdin(
        ["explain", s(&m), "--json"],
        Some(b"lost my blue umbrella\n"),
    );
    o.ok();
    let a: Value = serde_json::from_str(&o.stdout).unwrap();
    let b = explain_json(&m, "lost my blue umbrella", &[]);
    assert_eq!(a["total"], b["total"]);
}

#[test]
fn masked_models_explain_placeholders_and_score_alike() {
    let t = tmp();
    let m = model(
        t.path(),
        "masked",
        2000,
        &["--mask-digits", "--mask-emails", "--no-sketch"],
        &[],
    );
    assert_eq!(model_meta(&m)["features"]["mask_digits"], true);
    let text = "write to jo.berg@quillmere.example about ticket 40417";
    let e = explain_json(&m, text, &[]);
    let words: Vec<String> = e["contributions"]
        .as_array()
        .unwrap()
        .iter()
        .flat_map(|c| c["features"].as_array().unwrap().clone())
        .map(|f| f["text"].as_str().unwrap().to_string())
        .collect();
    assert!(words.contains(&"@email".to_string()), "{words:?}");
    assert!(words.contains(&"ticket #".to_string()), "{words:?}");
    assert!(
        !words
            .iter()
            .any(|w| w.contains("40417") || w.contains("berg")),
        "{words:?}"
    );
    // Another number and address: the same features, so the same score.
    let other = explain_json(&m, "write to ab@cd.example about ticket 9", &[]);
    assert_eq!(e["total"], other["total"]);
    let scored = scores(&m, &[text]);
    assert_eq!(format!("{:.6}", e["total"].as_f64().unwrap()), scored[0].1);
}

#[test]
fn several_fields_and_numbers_follow_the_record_score_reads() {
    // The JSON Lines fixture: subject and body text fields, a numeric field.
    let t = tmp();
    let dir = t.path().join("json");
    ingest(
        &[&fixture("inbox.jsonl")],
        &dir,
        &[&JSONL_FIELDS[..], &["--log2-buckets", "14", "-q"]].concat(),
    )
    .ok();
    let m = t.path().join("json.tmm");
    train(&dir, &m, &["--epochs", "3", "-q"]).ok();
    let e = explain_json(
        &m,
        "Left my phone at Tarn pier",
        &["--field", "body", "--value", "attachments=2"],
    );
    let feats: Vec<Value> = e["contributions"]
        .as_array()
        .unwrap()
        .iter()
        .flat_map(|c| c["features"].as_array().unwrap().clone())
        .collect();
    assert!(feats
        .iter()
        .any(|f| f["kind"] == "numeric" && f["text"] == "attachments = 2"));
    assert!(feats
        .iter()
        .filter(|f| f["kind"] != "numeric")
        .all(|f| f["field"] == "body"));
    let record = r#"{"subject": "", "body": "Left my phone at Tarn pier", "attachments": 2}"#;
    let o = tamis_with_stdin(
        ["score", s(&m), "-q"],
        Some(format!("{record}\n").as_bytes()),
    );
    o.ok();
    let score = o.stdout.trim().split('\t').nth(2).unwrap().to_string();
    assert_eq!(format!("{:.6}", e["total"].as_f64().unwrap()), score);
    // The table names the field of each word.
    tamis(["explain", s(&m), "Left my phone", "--field", "subject"])
        .ok()
        .stdout_has("subject:\"phone\" (word)");
}

#[test]
fn bad_input_is_a_clear_error() {
    let t = tmp();
    let m = model(t.path(), "binary", 1500, &["--positive", "spam"], &[]);
    tamis(["explain", s(&m), "free prize", "--class", "tickets"])
        .fails()
        .stderr_has("one score, for its positive class \"spam\"");
    tamis(["explain", s(&m), "... !!! ..."])
        .fails()
        .stderr_has("no word");
    tamis(["explain", s(&m), "free", "--field", "body"])
        .fails()
        .stderr_has("no text field \"body\"");
    tamis(["explain", s(&m), "free", "--value", "size=3"])
        .fails()
        .stderr_has("no numeric field");
    let bad = t.path().join("bad.tmm");
    std::fs::write(&bad, b"not a model").unwrap();
    tamis(["explain", s(&bad), "free"])
        .fails()
        .stderr_has("bad.tmm");
}

#[test]
fn help_explains_every_option() {
    assert_help_explains_everything(&["explain"]);
}

// ------------------------------------------------------------------ properties

use proptest::prelude::*;
use tamis::features::{FeatureConfig, Featurizer, HASH_SCHEME};

/// Text built from pieces that exercise the tokenizer and the masks.
fn text() -> impl Strategy<Value = String> {
    let piece = prop_oneof![
        "[a-zA-Z]{1,8}",
        "[0-9]{1,6}",
        "[a-z]{1,3}[0-9]{1,3}[a-z]{0,2}",
        "[a-z.]{1,6}@[a-z]{1,5}\\.[a-z]{2,3}",
        Just("Ölmund".to_string()),
        Just("ÉTÉ".to_string()),
        Just("٣٤".to_string()),
        Just("日本".to_string()),
        "[ ,.;:!?()\\-]{1,3}",
    ];
    proptest::collection::vec(piece, 0..14).prop_map(|v| v.join(" "))
}

proptest! {
    // A fixed seed (as in tests/formats.rs): a failure shows on every run, and
    // no regression files are written.
    #![proptest_config(ProptestConfig {
        cases: 200,
        failure_persistence: None,
        rng_seed: proptest::test_runner::RngSeed::Fixed(0x5E7C_0005),
        ..ProptestConfig::default()
    })]

    /// The replayed features of `explain` add up, bucket by bucket, to exactly
    /// the raw counts the featurizer (hence `score`) puts in the row.
    #[test]
    fn replayed_features_sum_to_the_featurizer_row(
        a in text(),
        b in text(),
        ngrams in 1u32..4,
        chars in any::<bool>(),
        digits in any::<bool>(),
        emails in any::<bool>(),
    ) {
        let cfg = FeatureConfig {
            scheme: HASH_SCHEME.into(),
            hash_seed: 11,
            log2_buckets: 10,
            ngrams,
            char_ngrams: chars.then(|| "2..3".parse().unwrap()),
            raw_counts: true,
            text_fields: vec!["subject".into(), "body".into()],
            numeric_fields: vec![],
            mask_digits: digits,
            mask_emails: emails,
        };
        let uses = tamis::explain::feature_origins(&cfg, &[a.as_bytes(), b.as_bytes()], &[]);
        let mut net = std::collections::BTreeMap::<u32, i64>::new();
        for u in &uses {
            *net.entry(u.bucket).or_default() += u.sign as i64 * u.occurrences as i64;
        }
        net.retain(|_, v| *v != 0);
        let mut f = Featurizer::new(&cfg).unwrap();
        f.begin_row();
        f.add_text(0, a.as_bytes());
        f.add_text(1, b.as_bytes());
        let (mut idx, mut val) = (Vec::new(), Vec::new());
        f.finish_row(&mut idx, &mut val);
        let row: std::collections::BTreeMap<u32, i64> =
            idx.iter().zip(&val).map(|(&i, &v)| (i, v as i64)).collect();
        prop_assert_eq!(net, row);
        if digits {
            prop_assert!(!uses.iter().any(|u| u.kind == tamis::explain::FeatureKind::Word
                && u.text.chars().any(|c| c.is_ascii_digit())));
        }
    }

    /// The sketch parser never panics on damaged bytes, and what it accepts
    /// serialises back to the same bytes.
    #[test]
    fn sketch_bytes_never_panic(
        flips in proptest::collection::vec((any::<prop::sample::Index>(), any::<u8>()), 0..4),
        cut in any::<prop::sample::Index>(),
        raw in proptest::collection::vec(any::<u8>(), 0..200),
    ) {
        use tamis::dataset::sketch::{FieldSketch, SketchEntry, TokenSketch};
        let good = TokenSketch {
            capacity: 8,
            min_count: 2,
            fields: vec![FieldSketch {
                total: 40,
                floor: 1,
                entries: vec![
                    SketchEntry { hash: 5, count: 9, error: 0, token: "ferry".into() },
                    SketchEntry { hash: 7, count: 3, error: 1, token: "#".into() },
                ],
            }],
        }
        .to_bytes();
        let p = Path::new("fuzz.tmk");
        let mut bad = good.clone();
        for (i, v) in &flips {
            let at = i.index(bad.len());
            bad[at] = *v;
        }
        for bytes in [&bad[..], &bad[..cut.index(bad.len() + 1)], &raw[..]] {
            if let Ok(s) = TokenSketch::from_bytes(bytes, p) {
                prop_assert_eq!(s.to_bytes(), bytes.to_vec());
            }
        }
    }
}
