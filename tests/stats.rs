//! End-to-end tests of `tamis stats`: the JSON keys and their values checked
//! against the shards themselves, the text summary, errors, and output into a
//! closed pipe.

mod common;

use std::collections::{BTreeMap, BTreeSet};
use std::path::Path;

use common::*;
use serde_json::Value;
use tamis::dataset::Split;

/// Rows per label of `fixtures/inbox.tsv` (fixtures/README.md).
const INBOX_LABELS: [(&str, u64); 6] = [
    ("spam", 72),
    ("schedule", 61),
    ("tickets", 54),
    ("lost_property", 45),
    ("accessibility", 29),
    ("feedback", 39),
];

fn inbox_dataset(dir: &Path, extra: &[&str]) {
    ingest(&[&fixture("inbox.tsv")], dir, extra).ok();
}

fn u(v: &Value) -> u64 {
    v.as_u64().unwrap_or_else(|| panic!("not a count: {v}"))
}

fn f(v: &Value) -> f64 {
    v.as_f64().unwrap_or_else(|| panic!("not a number: {v}"))
}

#[test]
fn json_keys_and_counts_agree_with_the_shards() {
    let t = tmp();
    let out = t.path().join("d");
    // 2^14 buckets, so that enough buckets are shared for the estimate to matter.
    inbox_dataset(&out, &["--validation", "0.2", "--log2-buckets", "14"]);
    let st = stats_json(&out);
    for key in ["rows", "train_rows", "validation_rows", "nnz", "labels"] {
        assert!(st.get(key).is_some(), "key {key} missing");
    }
    assert_eq!(u(&st["rows"]), 300);
    assert_eq!(u(&st["train_rows"]) + u(&st["validation_rows"]), 300);

    // Recount everything from the shard files.
    let train = rows(&out, Some(Split::Train));
    let valid = rows(&out, Some(Split::Validation));
    assert_eq!(u(&st["train_rows"]), train.len() as u64);
    assert_eq!(u(&st["validation_rows"]), valid.len() as u64);
    assert!(!valid.is_empty());
    let nnz: u64 = train
        .iter()
        .chain(&valid)
        .map(|r| r.indices.len() as u64)
        .sum();
    assert_eq!(u(&st["nnz"]), nnz);
    assert!((f(&st["mean_nnz_per_row"]) - nnz as f64 / 300.0).abs() < 1e-9);
    let (pt, pv) = (per_label(&train), per_label(&valid));
    let labels = st["labels"].as_array().unwrap();
    assert_eq!(labels.len(), 6);
    for l in labels {
        let name = l["name"].as_str().unwrap();
        let want = INBOX_LABELS.iter().find(|(n, _)| *n == name).unwrap().1;
        assert_eq!(u(&l["rows"]), want, "{name}");
        assert_eq!(
            u(&l["train_rows"]),
            pt.get(name).copied().unwrap_or(0),
            "{name}"
        );
        assert_eq!(
            u(&l["validation_rows"]),
            pv.get(name).copied().unwrap_or(0),
            "{name}"
        );
        assert_eq!(
            u(&l["rows"]),
            u(&l["train_rows"]) + u(&l["validation_rows"])
        );
    }

    // Buckets used by training rows, and the estimate of distinct features
    // behind them by linear counting (Whang, Vander-Zanden and Taylor, "A
    // linear-time probabilistic counting algorithm for database applications",
    // ACM TODS 1990, from memory): n ≈ −m·ln(V), V the share of empty buckets.
    let m = 1u64 << 14;
    assert_eq!(u(&st["buckets"]), m);
    let used: BTreeSet<u32> = train
        .iter()
        .flat_map(|r| r.indices.iter().copied())
        .collect();
    assert_eq!(u(&st["buckets_used"]), used.len() as u64);
    let fill = used.len() as f64 / m as f64;
    assert!((f(&st["bucket_fill"]) - fill).abs() < 1e-12);
    let est = -(m as f64) * (1.0 - fill).ln();
    assert!((f(&st["estimated_distinct_features"]) - est).abs() < 1e-6 * est);
    assert!(
        est > used.len() as f64,
        "collisions make the estimate exceed the used buckets"
    );
    // Under uniform hashing, 1 − e^(−n/m) of the features share a bucket.
    let share = 1.0 - (-est / m as f64).exp();
    assert!((f(&st["estimated_collision_share"]) - share).abs() < 1e-9);

    // The shard list is the manifest's, with the sizes on disk.
    let man = manifest(&out);
    let shards = st["shards"].as_array().unwrap();
    assert_eq!(shards.len(), man.shards.len());
    let mut total = 0;
    for (s, e) in shards.iter().zip(&man.shards) {
        assert_eq!(s["file"], e.file.as_str());
        let size = std::fs::metadata(out.join(&e.file)).unwrap().len();
        assert_eq!(u(&s["bytes"]), size);
        assert_eq!(u(&s["rows"]), e.rows);
        assert_eq!(
            s["split"],
            if e.split == Split::Train {
                "train"
            } else {
                "validation"
            }
        );
        total += size;
    }
    assert_eq!(u(&st["shard_bytes"]), total);
    assert_eq!(u(&st["batches"]), 1);
    assert!(st["positive"].is_null());
    assert_eq!(u(&st["lossy_utf8_rows"]), 0);
}

#[test]
fn text_summary_shows_the_same_numbers() {
    let t = tmp();
    let out = t.path().join("d");
    inbox_dataset(&out, &[]);
    let st = stats_json(&out);
    let o = tamis(["stats", s(&out)]);
    o.ok();
    let lines: Vec<&str> = o.stdout.lines().collect();
    let line = |start: &str| {
        *lines
            .iter()
            .find(|l| l.starts_with(start))
            .unwrap_or_else(|| panic!("no line {start:?} in\n{}", o.stdout))
    };
    let rows_line = line("rows");
    assert!(rows_line.contains(" 300 "), "{rows_line}");
    assert!(rows_line.contains(&format!("train {}", thousands(u(&st["train_rows"])))));
    assert!(rows_line.contains(&format!(
        "validation {}",
        thousands(u(&st["validation_rows"]))
    )));
    let nnz_line = line("nonzeros");
    assert!(nnz_line.contains(&thousands(u(&st["nnz"]))), "{nnz_line}");
    assert!(u(&st["nnz"]) >= 1000, "the thousands separator is checked");
    assert!(line("buckets").contains("1,048,576"));
    assert!(line("shards").contains("1 batch"));
    assert!(line("skipped").split_whitespace().nth(1) == Some("0"));
    assert!(line("task").contains("6 classes, one-vs-rest"));
    for l in st["labels"].as_array().unwrap() {
        let name = l["name"].as_str().unwrap();
        let row = lines
            .iter()
            .find(|x| x.split_whitespace().nth(1) == Some(name))
            .unwrap_or_else(|| panic!("label {name} not listed"));
        let cols: Vec<&str> = row.split_whitespace().collect();
        assert_eq!(cols[0], l["id"].to_string());
        assert_eq!(cols[2], thousands(u(&l["train_rows"])));
        assert_eq!(cols[3], thousands(u(&l["validation_rows"])));
    }
    // --shards lists every shard with its split.
    let o = tamis(["stats", s(&out), "--shards"]);
    o.ok();
    for e in &manifest(&out).shards {
        let row = o
            .stdout
            .lines()
            .find(|l| l.starts_with(&e.file))
            .unwrap_or_else(|| panic!("{} not listed", e.file));
        let split = if e.split == Split::Train {
            "train"
        } else {
            "validation"
        };
        assert_eq!(row.split_whitespace().nth(1), Some(split));
    }
}

#[test]
fn skipped_records_and_batches_add_up() {
    let t = tmp();
    let out = t.path().join("d");
    inbox_dataset(&out, &[]);
    ingest(
        &[&fixture("bad.tsv")],
        &out,
        &[
            "--append",
            "--max-line-bytes",
            "300",
            "--max-bad-fraction",
            "0.5",
        ],
    )
    .ok();
    let st = stats_json(&out);
    assert_eq!(u(&st["rows"]), 338);
    assert_eq!(u(&st["batches"]), 2);
    assert_eq!(u(&st["lossy_utf8_rows"]), 2);
    let bad: BTreeMap<String, u64> = st["bad"]
        .as_object()
        .unwrap()
        .iter()
        .map(|(k, v)| (k.clone(), u(v)))
        .filter(|(_, v)| *v > 0)
        .collect();
    let want: BTreeMap<String, u64> = [
        ("empty_text", 3),
        ("missing_field", 2),
        ("no_tab", 3),
        ("nul_byte", 2),
        ("too_long", 2),
    ]
    .iter()
    .map(|(k, v)| (k.to_string(), *v))
    .collect();
    assert_eq!(bad, want);
    let o = tamis(["stats", s(&out)]);
    o.ok()
        .stdout_has("empty_text 3, missing_field 2, no_tab 3, nul_byte 2, too_long 2")
        .stdout_has("in 2 batch(es)");
    let skipped = o.stdout.lines().find(|l| l.starts_with("skipped")).unwrap();
    assert_eq!(skipped.split_whitespace().nth(1), Some("12"));
    let lossy = o
        .stdout
        .lines()
        .find(|l| l.starts_with("lossy UTF-8"))
        .unwrap();
    assert!(lossy.contains(" 2 "), "{lossy}");
}

#[test]
fn missing_or_damaged_datasets_are_errors() {
    let t = tmp();
    tamis(["stats", s(t.path())])
        .fails()
        .stderr_has("no dataset here");
    tamis(["stats", s(&t.path().join("nowhere"))]).fails();
    let out = t.path().join("d");
    inbox_dataset(&out, &[]);
    // A changed byte in the manifest.
    let mp = out.join("manifest.json");
    let good = std::fs::read(&mp).unwrap();
    let mut bad = good.clone();
    let at = bad.len() / 3;
    bad[at] = if bad[at] == b' ' { b'\t' } else { b' ' };
    std::fs::write(&mp, &bad).unwrap();
    tamis(["stats", s(&out)])
        .fails()
        .stderr_has("manifest.json")
        .stderr_has("checksum mismatch");
    // Not a manifest at all.
    std::fs::write(&mp, b"[1, 2, 3]\n").unwrap();
    tamis(["stats", s(&out)])
        .fails()
        .stderr_has("manifest.json");
    std::fs::write(&mp, &good).unwrap();
    // The document-frequency file that stats reads is gone.
    let df = manifest(&out).doc_freq[0].file.clone();
    std::fs::remove_file(out.join(&df)).unwrap();
    tamis(["stats", s(&out)]).fails().stderr_has(&df);
    // Usage error: no folder given.
    assert_eq!(tamis(["stats"]).code, Some(2));
}

#[test]
fn text_into_a_closed_pipe_is_a_quiet_success() {
    let t = tmp();
    let out = t.path().join("d");
    inbox_dataset(&out, &[]);
    let (code, stderr) = tamis_closed_stdout(&["stats", s(&out), "--shards"]);
    assert_eq!((code, stderr.as_str()), (Some(0), ""));
}

#[test]
fn json_into_a_closed_pipe_is_a_quiet_success() {
    // src/main.rs: "Output piped into `head` and closed early: quiet success."
    let t = tmp();
    let out = t.path().join("d");
    inbox_dataset(&out, &[]);
    let (code, stderr) = tamis_closed_stdout(&["stats", s(&out), "--json"]);
    assert_eq!((code, stderr.as_str()), (Some(0), ""));
}

#[test]
fn help_explains_every_option() {
    assert_help_explains_everything(&["stats"]);
}
