//! End-to-end tests of `tamis ingest`: every input format and compression, bad
//! lines, the folder rules (--force, leftovers of an interrupted run, the lock),
//! --append, the validation split and determinism across thread counts.
//!
//! The expected counts come from `fixtures/README.md`; where a test depends on
//! them it also recounts the fixture itself.

mod common;

use std::collections::BTreeMap;
use std::io::Write;
use std::path::Path;

use common::*;
use serde_json::{json, Value};
use tamis::dataset::Split;
use xxhash_rust::xxh3::xxh3_64_with_seed;

/// Rows per label of `fixtures/inbox.tsv` (fixtures/README.md).
const INBOX_LABELS: [(&str, u64); 6] = [
    ("spam", 72),
    ("schedule", 61),
    ("tickets", 54),
    ("lost_property", 45),
    ("accessibility", 29),
    ("feedback", 39),
];
/// Rows per label of `fixtures/inbox.csv`.
const CSV_LABELS: [(&str, u64); 6] = [
    ("spam", 15),
    ("schedule", 13),
    ("tickets", 12),
    ("lost_property", 9),
    ("accessibility", 4),
    ("feedback", 7),
];
/// Rows per label of `fixtures/inbox.jsonl`.
const JSONL_LABELS: [(&str, u64); 6] = [
    ("spam", 16),
    ("schedule", 12),
    ("tickets", 12),
    ("lost_property", 8),
    ("accessibility", 6),
    ("feedback", 6),
];
/// The skipped lines of `fixtures/bad.tsv` read with `--max-line-bytes 300`.
const BAD_LINES: [(u64, &str); 12] = [
    (6, "no_tab"),
    (13, "missing_field"),
    (18, "nul_byte"),
    (21, "empty_text"),
    (26, "too_long"),
    (32, "no_tab"),
    (33, "missing_field"),
    (37, "empty_text"),
    (38, "nul_byte"),
    (47, "too_long"),
    (48, "no_tab"),
    (49, "empty_text"),
];
/// Rows kept from `fixtures/bad.tsv`, per label (two of them with invalid UTF-8).
const BAD_GOOD_LABELS: [(&str, u64); 6] = [
    ("spam", 6),
    ("schedule", 6),
    ("tickets", 7),
    ("lost_property", 7),
    ("accessibility", 6),
    ("feedback", 6),
];

const CSV_FIELDS: [&str; 6] = [
    "--format",
    "csv",
    "--text-column",
    "subject",
    "--text-column",
    "body",
];

fn label_map(v: &[(&str, u64)]) -> BTreeMap<String, u64> {
    v.iter().map(|(k, n)| (k.to_string(), *n)).collect()
}

fn stats_labels(st: &Value) -> BTreeMap<String, u64> {
    st["labels"]
        .as_array()
        .unwrap()
        .iter()
        .map(|l| {
            (
                l["name"].as_str().unwrap().to_string(),
                l["rows"].as_u64().unwrap(),
            )
        })
        .collect()
}

fn all_bad_zero_except(st: &Value, want: &[(&str, u64)]) {
    let bad = st["bad"].as_object().expect("bad is an object");
    for (k, v) in bad {
        let expected = want.iter().find(|(n, _)| n == k).map_or(0, |(_, c)| *c);
        assert_eq!(v.as_u64(), Some(expected), "bad[{k}]");
    }
    for (k, _) in want {
        assert!(bad.contains_key(*k), "no key {k} in bad");
    }
}

// ------------------------------------------------------------------ formats

#[test]
fn tsv_fixture_gives_every_row_and_label() {
    let text = fixture_bytes("inbox.tsv");
    // The fixture is what its README says (an independent recount).
    assert_eq!(tsv_label_counts(&text), label_map(&INBOX_LABELS));
    let t = tmp();
    let out = t.path().join("d");
    ingest(&[&fixture("inbox.tsv")], &out, &[])
        .ok()
        .stderr_has("ingested 300 rows");
    let st = stats_json(&out);
    assert_eq!(st["rows"], 300);
    assert_eq!(stats_labels(&st), label_map(&INBOX_LABELS));
    // Labels padded with spaces (lines 91 and 251) are trimmed, not new labels.
    assert_eq!(st["labels"].as_array().unwrap().len(), 6);
    all_bad_zero_except(&st, &[]);
    assert_eq!(st["lossy_utf8_rows"], 0);
    // Class ids are 0..n in the order of the dictionary.
    for (i, l) in st["labels"].as_array().unwrap().iter().enumerate() {
        assert_eq!(l["id"], i as u64);
    }
    // Rows read back from the shards carry the same labels.
    assert_eq!(per_label(&rows(&out, None)), label_map(&INBOX_LABELS));
    tamis(["verify", s(&out)]).ok();
}

#[test]
fn csv_fixture_gives_every_record() {
    let t = tmp();
    let out = t.path().join("d");
    let mut args = CSV_FIELDS.to_vec();
    args.extend(["--max-bad-fraction", "0"]);
    ingest(&[&fixture("inbox.csv")], &out, &args).ok();
    let st = stats_json(&out);
    assert_eq!(st["rows"], 60);
    assert_eq!(stats_labels(&st), label_map(&CSV_LABELS));
    all_bad_zero_except(&st, &[]);
    let m = manifest_json(&out);
    assert_eq!(m["features"]["text_fields"], json!(["subject", "body"]));
    // The file has 63 physical lines: the header, 60 records (two of them span
    // two lines) and no line break after the last record (RFC 4180 section 2,
    // rule 2 allows that).
    let text = fixture_bytes("inbox.csv");
    assert_eq!(text.iter().filter(|&&b| b == b'\n').count(), 62);
    assert!(!text.ends_with(b"\n"));
}

#[test]
fn csv_quoting_matches_a_reference_reader() {
    // The same records read by the `csv` crate (an RFC 4180 reader) and written
    // as JSON Lines must give byte-identical shards; --validation 0 keeps every
    // row in training, so the split hash of the raw record plays no part.
    let mut rdr = csv::ReaderBuilder::new()
        .has_headers(true)
        .from_path(fixture("inbox.csv"))
        .unwrap();
    let mut jsonl = String::new();
    let mut bodies = Vec::new();
    let mut subjects = Vec::new();
    for rec in rdr.records() {
        let rec = rec.unwrap();
        assert_eq!(rec.len(), 3);
        jsonl.push_str(&json!({"label": &rec[0], "subject": &rec[1], "body": &rec[2]}).to_string());
        jsonl.push('\n');
        subjects.push(rec[1].to_string());
        bodies.push(rec[2].to_string());
    }
    assert_eq!(bodies.len(), 60);
    // The fixture holds the RFC 4180 cases it claims to hold.
    assert!(subjects.iter().any(|s| s == "Refund, please")); // rule 6: comma
    assert!(subjects
        .iter()
        .any(|s| s == "The \"quiet deck\" is not quiet")); // rule 7
    assert!(bodies.iter().any(|b| b.contains("note.\nLine two"))); // rule 6: LF
    assert!(bodies.iter().any(|b| b.contains("cancelled.\r\nPlease"))); // rule 6: CRLF
    assert!(subjects.iter().any(|s| s.is_empty()));
    let t = tmp();
    let j = t.path().join("inbox-from-csv.jsonl");
    std::fs::write(&j, jsonl).unwrap();
    let (a, b) = (t.path().join("csv"), t.path().join("json"));
    let mut ca = CSV_FIELDS.to_vec();
    ca.extend(["--validation", "0"]);
    ingest(&[&fixture("inbox.csv")], &a, &ca).ok();
    ingest(
        &[&j],
        &b,
        &[
            "--format",
            "jsonl",
            "--text-field",
            "subject",
            "--text-field",
            "body",
            "--validation",
            "0",
        ],
    )
    .ok();
    assert_same_data(&a, &b);
}

#[test]
fn csv_rfc4180_examples() {
    // RFC 4180 section 2, the examples of rules 6 and 7 (with a header row of
    // our own): a quoted field holding CRLF, and doubled quotes.
    let csv_text = b"label,text,note\r\n\"aaa\",\"b\r\nbb\",\"ccc\"\r\nzzz,yyy,xxx\r\n\"aaa\",\"b\"\"bb\",\"ccc\"\r\n";
    let jsonl = concat!(
        "{\"label\":\"aaa\",\"text\":\"b\\r\\nbb\"}\n",
        "{\"label\":\"zzz\",\"text\":\"yyy\"}\n",
        "{\"label\":\"aaa\",\"text\":\"b\\\"bb\"}\n",
    );
    let t = tmp();
    let (c, j) = (t.path().join("r.csv"), t.path().join("r.jsonl"));
    std::fs::write(&c, csv_text).unwrap();
    std::fs::write(&j, jsonl).unwrap();
    let (a, b) = (t.path().join("a"), t.path().join("b"));
    ingest(&[&c], &a, &["--format", "csv", "--validation", "0"]).ok();
    ingest(&[&j], &b, &["--format", "jsonl", "--validation", "0"]).ok();
    assert_same_data(&a, &b);
    let st = stats_json(&a);
    assert_eq!(st["rows"], 3);
    assert_eq!(
        stats_labels(&st),
        BTreeMap::from([("aaa".to_string(), 2), ("zzz".to_string(), 1)])
    );
}

#[test]
fn csv_bad_records_are_counted_with_physical_line_numbers() {
    let data = b"label,text,note\r\n\
spam,\"two\r\nlines\",x\r\n\
ham,only\n\
\n\
ham,\"ok, fine\",y\n\
,\"no label\",z\n\
ham,a,b,c\n\
ham,nul\0here,x\n";
    let t = tmp();
    let p = t.path().join("b.csv");
    std::fs::write(&p, data).unwrap();
    let out = t.path().join("d");
    let o = ingest(
        &[&p],
        &out,
        &["--format", "csv", "--max-bad-fraction", "0.9"],
    );
    o.ok();
    let name = s(&p);
    for (line, reason) in [
        (4, "bad_csv"),
        (7, "missing_field"),
        (8, "bad_csv"),
        (9, "nul_byte"),
    ] {
        o.stderr_has(&format!("{name}:{line}: skipped ({reason})"));
    }
    let st = stats_json(&out);
    assert_eq!(st["rows"], 2);
    all_bad_zero_except(
        &st,
        &[("bad_csv", 2), ("missing_field", 1), ("nul_byte", 1)],
    );
}

#[test]
fn csv_blank_lines_are_counted_once_whatever_the_line_ends() {
    // RFC 4180 section 2, rule 1: records end with CRLF (LF alone is accepted
    // too). The line ending of a record is not a blank line of its own.
    let t = tmp();
    for (name, data, blank) in [
        ("lf.csv", &b"label,text\na,one\nb,two\n\nc,three\n"[..], 1),
        (
            "crlf.csv",
            b"label,text\r\na,one\r\nb,two\r\n\r\nc,three\r\n",
            1,
        ),
        (
            "none.csv",
            b"label,text\r\na,one\r\nb,two\r\nc,three\r\n",
            0,
        ),
    ] {
        let p = t.path().join(name);
        std::fs::write(&p, data).unwrap();
        let out = t.path().join(format!("d-{name}"));
        ingest(&[&p], &out, &["--format", "csv"]).ok();
        assert_eq!(stats_json(&out)["rows"], 3);
        assert_eq!(
            manifest_json(&out)["batches"][0]["blank_lines"],
            blank,
            "{name}"
        );
    }
    // inbox.csv holds no blank line (its header and 20 of its records end with CRLF).
    let out = t.path().join("inbox");
    ingest(&[&fixture("inbox.csv")], &out, &CSV_FIELDS).ok();
    assert_eq!(manifest_json(&out)["batches"][0]["blank_lines"], 0);
}

#[test]
fn csv_stray_quote_spoils_only_its_own_record() {
    // RFC 4180 section 2, rule 5: a field that is not enclosed in quotes may
    // not contain a quote, so line 2 is a bad record. Rule 6: the next record
    // is a valid quoted field holding a line break, and the one after is plain.
    // Expected: 2 rows, one bad_csv record at line 2.
    let data = b"label,text,note\nham,ab\"c,x\nspam,\"two\nlines\",x\nham,plain,y\n";
    let t = tmp();
    let p = t.path().join("q.csv");
    std::fs::write(&p, data).unwrap();
    let out = t.path().join("d");
    let o = ingest(
        &[&p],
        &out,
        &["--format", "csv", "--max-bad-fraction", "0.9"],
    );
    o.ok()
        .stderr_has(&format!("{}:2: skipped (bad_csv)", s(&p)));
    let st = stats_json(&out);
    all_bad_zero_except(&st, &[("bad_csv", 1)]);
    assert_eq!(st["rows"], 2, "{}", o.stderr);
}

#[test]
fn csv_missing_column_lists_the_columns() {
    let t = tmp();
    let out = t.path().join("d");
    ingest(
        &[&fixture("inbox.csv")],
        &out,
        &["--format", "csv", "--text-column", "message"],
    )
    .fails()
    .stderr_has("inbox.csv")
    .stderr_has("no column \"message\"")
    .stderr_has("label, subject, body");
    assert!(!out.join("manifest.json").exists());
    assert!(data_files(&out).is_empty());
    // A missing label column is named the same way.
    ingest(
        &[&fixture("inbox.csv")],
        &out,
        &[
            "--format",
            "csv",
            "--label-column",
            "kind",
            "--text-column",
            "body",
        ],
    )
    .fails()
    .stderr_has("no column \"kind\"")
    .stderr_has("label, subject, body");
}

#[test]
fn jsonl_fixture_gives_every_line_and_numbers() {
    let t = tmp();
    let out = t.path().join("d");
    let mut args = JSONL_FIELDS.to_vec();
    args.extend(["--max-bad-fraction", "0"]);
    ingest(&[&fixture("inbox.jsonl")], &out, &args).ok();
    let st = stats_json(&out);
    assert_eq!(st["rows"], 60);
    assert_eq!(stats_labels(&st), label_map(&JSONL_LABELS));
    all_bad_zero_except(&st, &[]);
    assert_eq!(
        manifest_json(&out)["features"]["numeric_fields"],
        json!(["attachments"])
    );
    // The numeric field is one feature whose value is the number times the
    // feature's sign, neither damped nor normalised (src/features/mod.rs).
    let (bucket, sign) = tamis::features::bucket_sign(
        tamis::features::numeric_hash(1, "attachments"),
        (1u64 << 20) - 1,
    );
    let mut want: Vec<i64> = fixture_text_lines("inbox.jsonl")
        .iter()
        .map(|l| {
            serde_json::from_str::<Value>(l).unwrap()["attachments"]
                .as_i64()
                .unwrap()
        })
        .filter(|&a| a != 0)
        .map(|a| a * sign as i64)
        .collect();
    let mut got: Vec<i64> = Vec::new();
    for r in rows(&out, None) {
        let mut text_norm = 0.0f64;
        for (&i, &v) in r.indices.iter().zip(&r.values) {
            if i == bucket {
                got.push(v.round() as i64);
                assert_eq!(v, v.round(), "numeric value {v} is not the count");
            } else {
                text_norm += (v as f64) * (v as f64);
            }
        }
        // The text part has unit L2 norm.
        assert!((text_norm - 1.0).abs() < 1e-5, "text norm² {text_norm}");
    }
    want.sort();
    got.sort();
    assert_eq!(got, want);
}

fn fixture_text_lines(name: &str) -> Vec<String> {
    String::from_utf8(fixture_bytes(name))
        .unwrap()
        .lines()
        .map(String::from)
        .collect()
}

#[test]
fn jsonl_escapes_are_decoded() {
    // RFC 8259 section 7: any character may be escaped as \uXXXX, and one outside
    // the Basic Multilingual Plane as a UTF-16 surrogate pair. The fixture writes
    // U+20B9F that way; the pair follows RFC 2781 section 2.1.
    let u = 0x20B9Fu32 - 0x10000;
    let (w1, w2) = (0xD800 | (u >> 10), 0xDC00 | (u & 0x3FF));
    assert_eq!((w1, w2), (0xD842, 0xDF9F));
    let escaped = format!("\\u{w1:04x}\\u{w2:04x}");
    let lines = fixture_text_lines("inbox.jsonl");
    assert_eq!(lines.iter().filter(|l| l.contains(&escaped)).count(), 1);
    assert!(lines.iter().filter(|l| l.contains("\\u00")).count() >= 3);
    assert_eq!(
        char::decode_utf16([w1 as u16, w2 as u16])
            .next()
            .unwrap()
            .unwrap(),
        '\u{20B9F}'
    );
    // Re-written by serde_json (a reference JSON library) with the characters
    // themselves instead of escapes, the same records give the same shards.
    let mut plain = String::new();
    for l in &lines {
        let v: Value = serde_json::from_str(l).unwrap();
        plain.push_str(&serde_json::to_string(&v).unwrap());
        plain.push('\n');
    }
    assert!(plain.contains('\u{20B9F}') && !plain.contains("\\u"));
    let t = tmp();
    let p = t.path().join("plain.jsonl");
    std::fs::write(&p, plain).unwrap();
    let (a, b) = (t.path().join("a"), t.path().join("b"));
    let mut args = JSONL_FIELDS.to_vec();
    args.extend(["--validation", "0"]);
    ingest(&[&fixture("inbox.jsonl")], &a, &args).ok();
    ingest(&[&p], &b, &args).ok();
    assert_same_data(&a, &b);
    // A message made of that one character is a word, not an empty text: the
    // pair was decoded to a letter (U+20B9F is a CJK ideograph, Unicode
    // category Lo), not replaced by U+FFFD.
    let one = t.path().join("one.jsonl");
    std::fs::write(
        &one,
        format!("{{\"label\":\"x\",\"text\":\"{escaped}\"}}\n"),
    )
    .unwrap();
    let c = t.path().join("c");
    ingest(&[&one], &c, &["--format", "jsonl"]).ok();
    assert_eq!(stats_json(&c)["rows"], 1);
}

#[test]
fn tsv_refuses_column_options() {
    let t = tmp();
    ingest(
        &[&fixture("inbox.tsv")],
        &t.path().join("d"),
        &["--text-column", "body"],
    )
    .fails()
    .stderr_has("--text-column");
}

// ------------------------------------------------------------------ compression

#[test]
fn compressed_copies_give_identical_shards() {
    let plain = fixture_bytes("inbox.tsv");
    // The fixtures are what they claim: gzip starts with ID1 ID2 = 31 139
    // (RFC 1952 section 2.3.1), a Zstandard frame with the magic number
    // 0xFD2FB528, little-endian (RFC 8878 section 3.1.1). Both decode, with the
    // reference libraries, to inbox.tsv.
    for name in ["inbox.tsv.gz", "inbox-gz-named.txt"] {
        let b = fixture_bytes(name);
        assert_eq!(&b[..2], &[0x1f, 0x8b], "{name}");
        let mut out = Vec::new();
        std::io::Read::read_to_end(&mut flate2::read::GzDecoder::new(&b[..]), &mut out).unwrap();
        assert!(out == plain, "{name}");
    }
    for name in ["inbox.tsv.zst", "inbox-zstd-named.gz"] {
        let b = fixture_bytes(name);
        assert_eq!(&b[..4], &0xFD2FB528u32.to_le_bytes(), "{name}");
        assert!(zstd::decode_all(&b[..]).unwrap() == plain, "{name}");
    }
    let t = tmp();
    let base = t.path().join("plain");
    ingest(&[&fixture("inbox.tsv")], &base, &[]).ok();
    assert_eq!(
        manifest_json(&base)["batches"][0]["inputs"][0]["compression"],
        "none"
    );
    for (name, compression) in [
        ("inbox.tsv.gz", "gzip"),
        ("inbox.tsv.zst", "zstd"),
        ("inbox-gz-named.txt", "gzip"),
        ("inbox-zstd-named.gz", "zstd"),
    ] {
        let out = t.path().join(name);
        ingest(&[&fixture(name)], &out, &[]).ok();
        assert_same_data(&base, &out);
        let input = &manifest_json(&out)["batches"][0]["inputs"][0];
        assert_eq!(input["compression"], compression, "{name}");
        assert_eq!(input["size"], fixture_bytes(name).len() as u64, "{name}");
    }
}

#[test]
fn concatenated_gzip_members_and_zstd_frames_are_read_whole() {
    // A gzip file is a series of members (RFC 1952 section 2.2); a Zstandard
    // stream is one or more frames (RFC 8878 section 3.1). Split inbox.tsv in
    // two, compress each half on its own and concatenate.
    let plain = fixture_bytes("inbox.tsv");
    let cut = plain[..plain.len() / 2]
        .iter()
        .rposition(|&b| b == b'\n')
        .unwrap()
        + 1;
    let (h1, h2) = plain.split_at(cut);
    let mut gz = Vec::new();
    let mut zs = Vec::new();
    for part in [h1, h2] {
        let mut e = flate2::write::GzEncoder::new(Vec::new(), flate2::Compression::default());
        e.write_all(part).unwrap();
        gz.extend(e.finish().unwrap());
        zs.extend(zstd::encode_all(part, 3).unwrap());
    }
    let t = tmp();
    let (pg, pz) = (t.path().join("two.gz"), t.path().join("two.zst"));
    std::fs::write(&pg, gz).unwrap();
    std::fs::write(&pz, zs).unwrap();
    let base = t.path().join("plain");
    ingest(&[&fixture("inbox.tsv")], &base, &[]).ok();
    for p in [&pg, &pz] {
        let out = t
            .path()
            .join(format!("d-{}", p.file_name().unwrap().to_string_lossy()));
        ingest(&[p.as_path()], &out, &[]).ok();
        assert_eq!(stats_json(&out)["rows"], 300);
        assert_same_data(&base, &out);
    }
}

#[test]
fn damaged_compressed_input_fails_and_writes_nothing() {
    let t = tmp();
    let gz = fixture_bytes("inbox.tsv.gz");
    let zs = fixture_bytes("inbox.tsv.zst");
    let cases = [
        ("cut.gz", gz[..gz.len() / 2].to_vec()),
        ("cut.zst", zs[..zs.len() / 2].to_vec()),
    ];
    for (name, bytes) in cases {
        let p = t.path().join(name);
        std::fs::write(&p, bytes).unwrap();
        let out = t.path().join(format!("d-{name}"));
        ingest(&[&p], &out, &[]).fails().stderr_has(name);
        assert!(!out.join("manifest.json").exists(), "{name}");
        assert!(data_files(&out).is_empty(), "{name}");
    }
}

#[test]
fn stdin_gives_the_same_dataset_as_the_file() {
    let t = tmp();
    let (a, b) = (t.path().join("file"), t.path().join("stdin"));
    ingest(&[&fixture("inbox.tsv")], &a, &[]).ok();
    tamis_with_stdin(
        ["ingest", "-", "--out", s(&b)],
        Some(&fixture_bytes("inbox.tsv")),
    )
    .ok();
    assert_same_data(&a, &b);
    assert_eq!(manifest_json(&b)["batches"][0]["inputs"][0]["path"], "-");
    // Compression is recognised on standard input too.
    let c = t.path().join("stdin-gz");
    tamis_with_stdin(
        ["ingest", "-", "--out", s(&c)],
        Some(&fixture_bytes("inbox.tsv.gz")),
    )
    .ok();
    assert_same_data(&a, &c);
    assert_eq!(
        manifest_json(&c)["batches"][0]["inputs"][0]["compression"],
        "gzip"
    );
    // Standard input can be read only once.
    tamis(["ingest", "-", "-", "--out", s(&t.path().join("c"))])
        .fails()
        .stderr_has("standard input");
}

#[test]
fn crlf_line_ends_and_a_byte_order_mark_change_nothing() {
    // The split hash covers the record without its line ending, and a UTF-8
    // byte-order mark (EF BB BF, the encoding of U+FEFF) at the start is dropped.
    let plain = fixture_bytes("inbox.tsv");
    let mut dos = b"\xEF\xBB\xBF".to_vec();
    for line in plain.split_inclusive(|&b| b == b'\n') {
        dos.extend_from_slice(line.strip_suffix(b"\n").unwrap());
        dos.extend_from_slice(b"\r\n");
    }
    let t = tmp();
    let p = t.path().join("dos.tsv");
    std::fs::write(&p, dos).unwrap();
    let (a, b) = (t.path().join("a"), t.path().join("b"));
    ingest(&[&fixture("inbox.tsv")], &a, &["--validation", "0.3"]).ok();
    ingest(&[&p], &b, &["--validation", "0.3"]).ok();
    assert_same_data(&a, &b);
}

// ------------------------------------------------------------------ determinism

#[test]
fn thread_count_does_not_change_the_dataset() {
    let t = tmp();
    let input = t.path().join("big.tsv");
    // About 4.5 MB: several 1 MiB chunks, more than one batch of chunks for two
    // threads.
    synth_tsv(&input, 50_000, 11);
    assert!(std::fs::metadata(&input).unwrap().len() > 4 << 20);
    let mut dirs = Vec::new();
    for threads in ["1", "2"] {
        let out = t.path().join(format!("j{threads}"));
        ingest(
            &[&input],
            &out,
            &[
                "--threads",
                threads,
                "--shard-rows",
                "3000",
                "--log2-buckets",
                "18",
                "--quiet",
            ],
        )
        .ok();
        dirs.push(out);
    }
    assert_same_data(&dirs[0], &dirs[1]);
    let m = manifest(&dirs[0]);
    assert!(m.shards.len() > 16, "{} shards", m.shards.len());
    assert_eq!(m.train_rows() + m.validation_rows(), 50_000);
    // The manifests differ only in the time stamp (and so the checksum).
    let strip = |d: &Path| {
        let mut v = manifest_json(d);
        v["checksum"] = Value::Null;
        v["batches"][0]["created_unix"] = Value::Null;
        v
    };
    assert_eq!(strip(&dirs[0]), strip(&dirs[1]));
    tamis(["verify", s(&dirs[1])]).ok();
}

/// A text that takes every path of the tokenizer and the featurizer: capitals,
/// digits, e-mail-like spans, non-ASCII letters and invalid UTF-8, words
/// repeated past the lookup table of damped counts, overlong tokens, CRLF line
/// ends, blank and bad lines.
fn varied_tsv() -> Vec<u8> {
    let mut t = Vec::new();
    synth_tsv_into(&mut t, 40_000, 23);
    t.extend(fixture_bytes("inbox.tsv"));
    let many = "again ".repeat(70);
    let long = "x".repeat(600);
    for i in 0..400u32 {
        let line = match i % 8 {
            0 => format!("spam\tFREE Prize {i}: write to Win.Now+{i}@prize-desk.example today!\n"),
            1 => format!("tickets\tÜber Straße ΣΊΣΥΦΟΣ café {i} naïve İstanbul 日本語テキスト\r\n"),
            2 => format!("schedule\t{many} and {i}\n"),
            3 => format!("feedback\t{long} ok {i}\n"),
            4 => "\n".to_string(),
            5 => format!("no tab on line {i}\n"),
            6 => format!(
                "lost_property\tOrder {i}A-77b ref AB12cd3, 2026-03-0{}\n",
                i % 10
            ),
            _ => format!("accessibility\tramp RAMP Ramp ramp lift {i} lift LIFT\n"),
        };
        t.extend(line.as_bytes());
        if i % 50 == 7 {
            t.extend(b"feedback\tbroken \xff\xfe bytes \xe2\x82 here\n");
        }
    }
    t
}

fn synth_tsv_into(buf: &mut Vec<u8>, rows: u64, seed: u64) {
    tamis::synth::Synth::new(tamis::synth::SynthConfig {
        seed,
        ..Default::default()
    })
    .write_rows(rows, buf)
    .unwrap();
}

/// One digest of a dataset: its data files (shards, document frequencies,
/// token sketch) by name, and its manifest without the time stamp, version
/// and checksum (and the input paths, which are temporary).
fn dataset_digest(dir: &Path) -> u64 {
    let mut all = Vec::new();
    for (name, bytes) in data_files(dir) {
        all.extend(name.as_bytes());
        all.extend(xxhash_rust::xxh3::xxh3_64(&bytes).to_le_bytes());
    }
    let mut m = manifest_json(dir);
    m["checksum"] = Value::Null;
    m["written_by"] = Value::Null;
    for b in m["batches"].as_array_mut().unwrap() {
        b["created_unix"] = Value::Null;
        for i in b["inputs"].as_array_mut().unwrap() {
            i["path"] = Value::Null;
        }
    }
    all.extend(serde_json::to_vec(&m).unwrap());
    xxhash_rust::xxh3::xxh3_64(&all)
}

/// The datasets written for fixed inputs and settings are pinned, byte for
/// byte: a faster ingest must write exactly what earlier versions wrote (the
/// digests were taken from the version before the ingest speed-ups), with any
/// thread count.
#[test]
fn datasets_are_pinned_byte_for_byte() {
    let t = tmp();
    let input = t.path().join("varied.tsv");
    std::fs::write(&input, varied_tsv()).unwrap();
    let cases: [(&str, &[&str], u64); 4] = [
        (
            "defaults",
            &["--shard-rows", "2000", "--max-bad-fraction", "0.1"],
            0x7b18ddb5593a568c,
        ),
        (
            "trigrams, character n-grams, masks",
            &[
                "--ngrams",
                "3",
                "--char-ngrams",
                "2..4",
                "--mask-digits",
                "--mask-emails",
                "--validation",
                "0.3",
                "--scatter",
                "3",
                "--log2-buckets",
                "16",
                "--max-bad-fraction",
                "0.1",
            ],
            0xb8097496970c9bbb,
        ),
        (
            "unigrams, raw counts, binary, small sketch",
            &[
                "--ngrams",
                "1",
                "--raw-counts",
                "--positive",
                "spam",
                "--sketch-size",
                "50",
                "--sketch-min-count",
                "1",
                "--seed",
                "9",
                "--max-bad-fraction",
                "0.1",
            ],
            0xf1fb98657792c107,
        ),
        (
            "JSON Lines with a numeric field",
            &JSONL_FIELDS,
            0x6850751b6b3b630f,
        ),
    ];
    let mut got = Vec::new();
    let mut same = true;
    for (i, (what, args, want)) in cases.iter().enumerate() {
        let src = if i == 3 {
            fixture("inbox.jsonl")
        } else {
            input.clone()
        };
        for threads in ["1", "2"] {
            let out = t.path().join(format!("c{i}-j{threads}"));
            let mut a = args.to_vec();
            a.extend(["--threads", threads, "--quiet", "--no-sync"]);
            ingest(&[&src], &out, &a).ok();
            let d = dataset_digest(&out);
            got.push(format!(
                "{what} (-j {threads}): {d:#018x}, pinned {want:#018x}"
            ));
            same &= d == *want;
        }
    }
    assert!(same, "{}", got.join("\n"));
}

#[test]
fn thread_count_does_not_change_a_truncated_token_sketch() {
    // A sketch far smaller than the vocabulary, so that chunk summaries drop
    // tokens and merges carry floors: the file must still not depend on the
    // thread count (chunks are summarised in workers, merged in input order).
    let t = tmp();
    let input = t.path().join("big.tsv");
    synth_tsv(&input, 40_000, 5);
    let mut files = Vec::new();
    for threads in ["1", "2"] {
        let out = t.path().join(format!("j{threads}"));
        ingest(
            &[&input],
            &out,
            &[
                "--threads",
                threads,
                "--sketch-size",
                "40",
                "--sketch-min-count",
                "1",
                "--quiet",
            ],
        )
        .ok();
        let m = manifest(&out);
        assert_eq!(m.sketches.len(), 1);
        files.push(std::fs::read(out.join(&m.sketches[0].file)).unwrap());
        let (sk, _) = tamis::dataset::sketch::read(&out.join(&m.sketches[0].file)).unwrap();
        assert_eq!(sk.fields[0].entries.len(), 40);
        assert!(sk.fields[0].floor > 0, "the summary was truncated");
    }
    assert!(
        files[0] == files[1],
        "sketch files differ between 1 and 2 threads"
    );
}

#[test]
fn no_sketch_and_min_count_control_what_is_kept() {
    let t = tmp();
    let (a, b) = (t.path().join("a"), t.path().join("b"));
    ingest(&[&fixture("inbox.tsv")], &a, &["--no-sketch"]).ok();
    let m = manifest(&a);
    assert!(m.sketches.is_empty());
    assert!(!names_in(&a).iter().any(|n| n.starts_with("sketch-")));
    // Old manifests have no `sketches` key; one without sketches writes none.
    assert!(manifest_json(&a).get("sketches").is_none());
    ingest(&[&fixture("inbox.tsv")], &b, &["--sketch-min-count", "5"]).ok();
    let m = manifest(&b);
    let (sk, _) = tamis::dataset::sketch::read(&b.join(&m.sketches[0].file)).unwrap();
    assert!(!sk.is_empty());
    assert!(sk.fields[0].entries.iter().all(|e| e.count - e.error >= 5));
    // Appending adds a sketch of its own batch; readers merge them: the same
    // data twice gives every word twice the rows (exact at this size).
    ingest(&[&fixture("inbox.tsv")], &b, &["--append"]).ok();
    let m2 = manifest(&b);
    assert_eq!(m2.sketches.len(), 2);
    let merged = tamis::dataset::sketch::load(&b, &m2).unwrap().unwrap();
    let once: std::collections::HashMap<&str, u64> = sk.fields[0]
        .entries
        .iter()
        .map(|e| (e.token.as_str(), e.count))
        .collect();
    assert!(!merged.fields[0].entries.is_empty());
    for e in &merged.fields[0].entries {
        if let Some(c) = once.get(e.token.as_str()) {
            assert_eq!(e.count, 2 * c, "{}", e.token);
        }
    }
    // A contradicting mask on append is refused.
    ingest(&[&fixture("inbox.tsv")], &b, &["--append", "--mask-digits"])
        .fails()
        .stderr_has("--mask-digits");
}

// ------------------------------------------------------------------ bad input

#[test]
fn bad_lines_are_counted_by_reason_and_reported_with_line_numbers() {
    let t = tmp();
    let out = t.path().join("d");
    let bad = fixture("bad.tsv");
    let o = ingest(
        &[&bad],
        &out,
        &["--max-line-bytes", "300", "--max-bad-fraction", "0.5"],
    );
    o.ok()
        .stderr_has("ingested 38 rows")
        .stderr_has("12 skipped")
        .stderr_has("2 rows held invalid UTF-8, replaced and kept");
    for (line, reason) in BAD_LINES {
        o.stderr_has(&format!("{}:{line}: skipped ({reason})", s(&bad)));
    }
    assert_eq!(o.stderr.matches(": skipped (").count(), BAD_LINES.len());
    let st = stats_json(&out);
    all_bad_zero_except(
        &st,
        &[
            ("no_tab", 3),
            ("missing_field", 2),
            ("nul_byte", 2),
            ("empty_text", 3),
            ("too_long", 2),
        ],
    );
    assert_eq!(st["rows"], 38);
    assert_eq!(st["lossy_utf8_rows"], 2);
    assert_eq!(stats_labels(&st), label_map(&BAD_GOOD_LABELS));
    let m = manifest_json(&out);
    assert_eq!(m["batches"][0]["blank_lines"], 4);
    assert_eq!(m["batches"][0]["inputs"][0]["rows"], 38);
    assert_eq!(m["batches"][0]["inputs"][0]["bad"], 12);
}

#[test]
fn line_numbers_restart_for_each_input() {
    let t = tmp();
    let out = t.path().join("d");
    let bad = fixture("bad.tsv");
    let o = ingest(
        &[&fixture("inbox.tsv"), &bad],
        &out,
        &["--max-line-bytes", "300", "--max-bad-fraction", "0.5"],
    );
    o.ok();
    for (line, reason) in BAD_LINES {
        o.stderr_has(&format!("{}:{line}: skipped ({reason})", s(&bad)));
    }
    assert!(!o.stderr.contains("inbox.tsv:"), "{}", o.stderr);
    let m = manifest_json(&out);
    let inputs = m["batches"][0]["inputs"].as_array().unwrap();
    assert_eq!(
        (inputs[0]["rows"].as_u64(), inputs[0]["bad"].as_u64()),
        (Some(300), Some(0))
    );
    assert_eq!(
        (inputs[1]["rows"].as_u64(), inputs[1]["bad"].as_u64()),
        (Some(38), Some(12))
    );
    assert_eq!(stats_json(&out)["rows"], 338);
}

#[test]
fn too_many_bad_lines_fail_and_write_nothing() {
    let t = tmp();
    let bad = fixture("bad.tsv");
    // 12 of 50 records (24%) are unusable.
    for limit in [None, Some("0.2")] {
        let out = t.path().join(format!("d{}", limit.unwrap_or("")));
        let mut args = vec!["--max-line-bytes", "300"];
        if let Some(l) = limit {
            args.extend(["--max-bad-fraction", l]);
        }
        ingest(&[&bad], &out, &args)
            .fails()
            .stderr_has("12 of 50")
            .stderr_has("--max-bad-fraction")
            .stderr_has("nothing was written");
        assert!(!out.join("manifest.json").exists());
        let left: Vec<String> = names_in(&out).into_iter().collect();
        assert!(left.is_empty(), "files left: {left:?}");
    }
    let out = t.path().join("ok");
    ingest(
        &[&bad],
        &out,
        &["--max-line-bytes", "300", "--max-bad-fraction", "0.3"],
    )
    .ok();
}

#[test]
fn too_many_bad_lines_on_append_keep_the_dataset_as_it_was() {
    let t = tmp();
    let out = t.path().join("d");
    ingest(&[&fixture("inbox.tsv")], &out, &[]).ok();
    let before = contents(&out);
    ingest(
        &[&fixture("bad.tsv")],
        &out,
        &["--append", "--max-line-bytes", "300"],
    )
    .fails()
    .stderr_has("--max-bad-fraction");
    let after = contents(&out);
    assert_eq!(
        before.keys().collect::<Vec<_>>(),
        after.keys().collect::<Vec<_>>(),
        "files added or removed"
    );
    assert!(before == after, "a file changed");
    tamis(["verify", s(&out)]).ok();
    assert_eq!(stats_json(&out)["batches"], 1);
}

#[test]
fn quiet_prints_nothing_on_success() {
    let t = tmp();
    let o = ingest(
        &[&fixture("bad.tsv")],
        &t.path().join("d"),
        &[
            "--quiet",
            "--max-line-bytes",
            "300",
            "--max-bad-fraction",
            "0.5",
        ],
    );
    o.ok();
    assert_eq!((o.stdout.as_str(), o.stderr.as_str()), ("", ""));
}

#[test]
fn a_record_longer_than_a_chunk_is_skipped_and_numbered() {
    // Line 54 is about 1.8 MB, longer than the default --max-line-bytes (1 MiB)
    // and than a chunk; the reader must skip it and keep counting lines.
    let inbox = fixture_bytes("inbox.tsv");
    let head: Vec<&[u8]> = inbox.split_inclusive(|&b| b == b'\n').take(53).collect();
    let mut data = head.concat();
    data.extend_from_slice(b"spam\t");
    for _ in 0..150_000 {
        data.extend_from_slice(b"win a prize ");
    }
    data.push(b'\n');
    data.extend_from_slice(&inbox);
    data.extend_from_slice(b"a last line without any tab\n");
    let t = tmp();
    let p = t.path().join("long.tsv");
    std::fs::write(&p, &data).unwrap();
    let out = t.path().join("d");
    let o = ingest(&[&p], &out, &["--max-bad-fraction", "0.5"]);
    o.ok()
        .stderr_has(&format!("{}:54: skipped (too_long)", s(&p)))
        .stderr_has(&format!("{}:355: skipped (no_tab)", s(&p)));
    let st = stats_json(&out);
    assert_eq!(st["rows"], 353);
    all_bad_zero_except(&st, &[("too_long", 1), ("no_tab", 1)]);
}

#[test]
fn a_failed_replacement_keeps_the_old_dataset() {
    // --force: "The old dataset stays intact until the new one is complete."
    let t = tmp();
    let out = t.path().join("d");
    ingest(&[&fixture("inbox.tsv")], &out, &[]).ok();
    let before = contents(&out);
    ingest(&[&fixture("bad.tsv")], &out, &["--force"])
        .fails()
        .stderr_has("--max-bad-fraction");
    assert!(contents(&out) == before, "the old dataset changed");
    tamis(["verify", s(&out)]).ok();
}

#[test]
fn io_errors_name_the_file_and_state_the_cause_once() {
    let t = tmp();
    // --out names a regular file.
    let file = t.path().join("not-a-folder");
    std::fs::write(&file, b"x").unwrap();
    let o = ingest(&[&fixture("inbox.tsv")], &file, &[]);
    o.fails().stderr_has("not-a-folder");
    assert_eq!(o.stderr.matches("(os error").count(), 1, "{}", o.stderr);
    // A gzip file cut short: the decoder's complaint, once.
    let gz = fixture_bytes("inbox.tsv.gz");
    let cut = t.path().join("cut.gz");
    std::fs::write(&cut, &gz[..gz.len() / 2]).unwrap();
    let o = ingest(&[&cut], &t.path().join("d"), &[]);
    o.fails().stderr_has("cut.gz");
    let line = o.stderr.lines().find(|l| l.starts_with("error:")).unwrap();
    let after = &line[line.find("cut.gz: ").unwrap() + "cut.gz: ".len()..];
    // "incomplete deflate stream: incomplete deflate stream" says it twice.
    let halves: Vec<&str> = after.split(": ").collect();
    assert!(
        halves.windows(2).all(|w| w[0] != w[1]),
        "cause repeated: {line}"
    );
    assert!(line.contains("the gzip stream is damaged"), "{line}");
    // Other bytes after a whole compressed stream: the message says which
    // format failed, not only the decoder's "unexpected end of file".
    for (name, format) in [("inbox.tsv.gz", "gzip"), ("inbox.tsv.zst", "zstd")] {
        let mut bytes = fixture_bytes(name);
        bytes.extend_from_slice(b"left over after the stream\n");
        let tail = t.path().join(format!("tail-{name}"));
        std::fs::write(&tail, &bytes).unwrap();
        ingest(&[&tail], &t.path().join("d"), &["--force"])
            .fails()
            .stderr_has(&format!("tail-{name}"))
            .stderr_has(&format!("the {format} stream is damaged"));
    }
}

#[test]
fn input_that_is_all_unusable_stops_early_with_a_hint() {
    let t = tmp();
    let p = t.path().join("notabs.tsv");
    let text: String = (0..1500)
        .map(|i| format!("schedule is the {i} sailing from Osk on time\n"))
        .collect();
    std::fs::write(&p, text).unwrap();
    let out = t.path().join("d");
    ingest(&[&p], &out, &["--max-bad-fraction", "1"])
        .fails()
        .stderr_has("--format");
    assert!(!out.join("manifest.json").exists());
}

#[test]
fn empty_and_missing_inputs_are_errors() {
    let t = tmp();
    let empty = t.path().join("empty.tsv");
    std::fs::write(&empty, b"").unwrap();
    let out = t.path().join("d");
    ingest(&[&empty], &out, &[])
        .fails()
        .stderr_has("no usable record");
    assert!(!out.join("manifest.json").exists());
    let missing = t.path().join("nowhere.tsv");
    ingest(&[&missing], &out, &[])
        .fails()
        .stderr_has("nowhere.tsv");
    // A folder is not an input file.
    ingest(&[t.path()], &t.path().join("e"), &[]).fails();
}

#[test]
fn out_of_range_options_are_named() {
    let t = tmp();
    let inbox = fixture("inbox.tsv");
    for (args, needle) in [
        (vec!["--log2-buckets", "9"], "--log2-buckets"),
        (vec!["--log2-buckets", "29"], "--log2-buckets"),
        (vec!["--ngrams", "0"], "--ngrams"),
        (vec!["--ngrams", "6"], "--ngrams"),
        (vec!["--validation", "1"], "--validation"),
        (vec!["--validation=-0.1"], "--validation"),
        (vec!["--max-bad-fraction", "1.5"], "--max-bad-fraction"),
        (vec!["--positive", "charter"], "--positive"),
    ] {
        let out = t.path().join("d");
        ingest(&[&inbox], &out, &args).fails().stderr_has(needle);
        assert!(!out.join("manifest.json").exists(), "{args:?}");
    }
    // Usage errors (unknown option, bad value, missing --out) exit with 2.
    assert_eq!(tamis(["ingest", s(&inbox)]).code, Some(2));
    assert_eq!(
        tamis(["ingest", s(&inbox), "--out", "x", "--char-ngrams", "5..3"]).code,
        Some(2)
    );
    assert_eq!(
        tamis(["ingest", s(&inbox), "--out", "x", "--colour"]).code,
        Some(2)
    );
}

#[test]
fn positive_label_makes_a_binary_task() {
    let t = tmp();
    let out = t.path().join("d");
    ingest(&[&fixture("inbox.tsv")], &out, &["--positive", "spam"]).ok();
    let st = stats_json(&out);
    assert_eq!(st["positive"], "spam");
    tamis(["stats", s(&out)])
        .ok()
        .stdout_has("binary, positive label \"spam\"");
    // A positive label that is not in the data is refused, listing the labels.
    ingest(
        &[&fixture("inbox.tsv")],
        &t.path().join("e"),
        &["--positive", "charter"],
    )
    .fails()
    .stderr_has("charter")
    .stderr_has("schedule");
}

// ------------------------------------------------------------------ rows

#[test]
fn rows_follow_the_documented_hashing_scheme() {
    // src/features/mod.rs: field seed = xxh3_64(field name, seed: hash_seed);
    // unigram h = xxh3_64(token, seed: field seed); a bigram hashes the two
    // unigram hashes' little-endian bytes with seed field_seed ^ 2·φ; bucket =
    // h & (2^K − 1), sign = −1 when bit 63 is set (signed feature hashing,
    // Weinberger et al. 2009, "Feature Hashing for Large Scale Multitask
    // Learning"). Values: ln(1 + count) per bucket, then unit L2 norm.
    const PHI: u64 = 0x9E37_79B9_7F4A_7C15;
    let field = xxh3_64_with_seed(b"text", 1);
    let uni = |t: &str| xxh3_64_with_seed(t.as_bytes(), field);
    let bi = |a: u64, b: u64| {
        let mut buf = a.to_le_bytes().to_vec();
        buf.extend_from_slice(&b.to_le_bytes());
        xxh3_64_with_seed(&buf, field ^ 2u64.wrapping_mul(PHI))
    };
    let (f, d, a) = (uni("ferry"), uni("delayed"), uni("again"));
    let mask = (1u64 << 20) - 1;
    let mut want: Vec<(u32, f32)> = [f, d, a, bi(f, d), bi(d, a)]
        .iter()
        .map(|&h| ((h & mask) as u32, if h >> 63 == 1 { -1.0 } else { 1.0 }))
        .collect();
    want.sort_by_key(|e| e.0);
    want.dedup_by_key(|e| e.0);
    assert_eq!(want.len(), 5, "the five features share no bucket");

    let t = tmp();
    let p = t.path().join("one.tsv");
    std::fs::write(&p, "feedback\tFerry DELAYED, again!\n").unwrap();
    for (raw, scale) in [(false, 1.0 / 5f32.sqrt()), (true, 1.0)] {
        let out = t.path().join(format!("d{raw}"));
        let mut args = vec!["--validation", "0"];
        if raw {
            args.push("--raw-counts");
        }
        ingest(&[&p], &out, &args).ok();
        let r = rows(&out, None);
        assert_eq!(r.len(), 1);
        let idx: Vec<u32> = want.iter().map(|e| e.0).collect();
        assert_eq!(r[0].indices, idx);
        for (v, (_, sign)) in r[0].values.iter().zip(&want) {
            assert!((v - sign * scale).abs() < 1e-6, "{v} vs {}", sign * scale);
        }
        assert_eq!(stats_json(&out)["nnz"], 5);
    }
    // Repeats are summed: "ferry" three times is one entry of ln(1+3), which
    // normalises to ±1; raw counts keep ±3.
    let q = t.path().join("three.tsv");
    std::fs::write(&q, "feedback\tferry Ferry FERRY\n").unwrap();
    let sign = if f >> 63 == 1 { -1.0 } else { 1.0 };
    for (raw, want_v) in [(false, sign), (true, 3.0 * sign)] {
        let out = t.path().join(format!("e{raw}"));
        let mut args = vec!["--validation", "0", "--ngrams", "1"];
        if raw {
            args.push("--raw-counts");
        }
        ingest(&[&q], &out, &args).ok();
        let r = rows(&out, None);
        assert_eq!(r[0].indices, vec![(f & mask) as u32]);
        assert!((r[0].values[0] - want_v).abs() < 1e-6, "{:?}", r[0].values);
    }
}

#[test]
fn xxh3_matches_a_published_vector() {
    // Anchors the hashes the other tests recompute: XXH3_64bits of the empty
    // input with seed 0 is 0x2D06800538D394C2 (xxHash's sanity-check vector,
    // from memory).
    assert_eq!(xxh3_64_with_seed(b"", 0), 0x2D06_8005_38D3_94C2);
}

// ------------------------------------------------------------------ split

/// Validation rows per label by the rule the manifest names ("xxh3-content"):
/// the xxh3-64 of the record bytes (without line ending), seeded with the split
/// seed, scaled to [0, 1) by its top 53 bits (common practice for a uniform
/// double), is below the fraction.
fn expected_validation(text: &[u8], seed: u64, fraction: f64) -> BTreeMap<String, u64> {
    let mut m = BTreeMap::new();
    for line in text.split(|&b| b == b'\n').filter(|l| !l.is_empty()) {
        let u = (xxh3_64_with_seed(line, seed) >> 11) as f64 / (1u64 << 53) as f64;
        let tab = line.iter().position(|&b| b == b'\t').unwrap();
        let label = String::from_utf8(line[..tab].trim_ascii().to_vec()).unwrap();
        if u < fraction {
            *m.entry(label).or_insert(0) += 1;
        }
    }
    m
}

fn validation_counts(st: &Value) -> BTreeMap<String, u64> {
    st["labels"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|l| l["validation_rows"].as_u64().unwrap() > 0)
        .map(|l| {
            (
                l["name"].as_str().unwrap().to_string(),
                l["validation_rows"].as_u64().unwrap(),
            )
        })
        .collect()
}

#[test]
fn validation_split_does_not_depend_on_order_or_batches() {
    let text = fixture_bytes("inbox.tsv");
    let lines: Vec<&[u8]> = text.split_inclusive(|&b| b == b'\n').collect();
    let t = tmp();
    let reversed = t.path().join("reversed.tsv");
    std::fs::write(
        &reversed,
        lines.iter().rev().copied().collect::<Vec<_>>().concat(),
    )
    .unwrap();
    let (h1, h2) = (t.path().join("h1.tsv"), t.path().join("h2.tsv"));
    std::fs::write(&h2, lines[..150].concat()).unwrap();
    std::fs::write(&h1, lines[150..].concat()).unwrap();

    let args = ["--validation", "0.3", "--seed", "5"];
    let (a, b, c) = (t.path().join("a"), t.path().join("b"), t.path().join("c"));
    ingest(&[&fixture("inbox.tsv")], &a, &args).ok();
    ingest(&[&reversed], &b, &args).ok();
    // The second half first, then the first half as an appended batch.
    ingest(&[&h1], &c, &args).ok();
    ingest(&[&h2], &c, &["--append"]).ok();

    let m = manifest(&a);
    let want = expected_validation(&text, m.split.seed, 0.3);
    assert!(want.values().sum::<u64>() > 60, "{want:?}");
    for d in [&a, &b, &c] {
        let st = stats_json(d);
        assert_eq!(st["rows"], 300);
        assert_eq!(validation_counts(&st), want, "{}", d.display());
    }
    // The very same rows (labels, buckets and values) are held out.
    let va = row_keys(&rows(&a, Some(Split::Validation)));
    assert_eq!(va.len() as u64, want.values().sum::<u64>());
    assert_eq!(va, row_keys(&rows(&b, Some(Split::Validation))));
    assert_eq!(va, row_keys(&rows(&c, Some(Split::Validation))));
    assert_eq!(
        row_keys(&rows(&a, Some(Split::Train))),
        row_keys(&rows(&c, Some(Split::Train)))
    );
}

// ------------------------------------------------------------------ folders

#[test]
fn a_folder_with_other_files_needs_force_and_keeps_them() {
    let t = tmp();
    let out = t.path().join("d");
    std::fs::create_dir_all(out.join("sub")).unwrap();
    std::fs::write(out.join("notes.txt"), b"harbour notes\n").unwrap();
    ingest(&[&fixture("inbox.tsv")], &out, &[])
        .fails()
        .stderr_has("notes.txt")
        .stderr_has("--force");
    assert_eq!(
        names_in(&out).into_iter().collect::<Vec<_>>(),
        ["notes.txt", "sub"]
    );
    ingest(&[&fixture("inbox.tsv")], &out, &["--force"]).ok();
    assert_eq!(
        std::fs::read(out.join("notes.txt")).unwrap(),
        b"harbour notes\n"
    );
    assert!(out.join("sub").is_dir());
    tamis(["verify", s(&out)]).ok();
}

#[test]
fn an_existing_dataset_is_replaced_only_with_force() {
    let t = tmp();
    let out = t.path().join("d");
    ingest(&[&fixture("inbox.tsv")], &out, &[]).ok();
    std::fs::write(out.join("README.txt"), b"kept\n").unwrap();
    let before = contents(&out);
    ingest(&[&fixture("inbox.tsv")], &out, &[])
        .fails()
        .stderr_has("already holds a dataset")
        .stderr_has("--append")
        .stderr_has("--force");
    assert!(contents(&out) == before);
    // Replaced by a different dataset: the old files go, other files stay.
    let mut args = JSONL_FIELDS.to_vec();
    args.push("--force");
    ingest(&[&fixture("inbox.jsonl")], &out, &args).ok();
    let st = stats_json(&out);
    assert_eq!(st["rows"], 60);
    assert_eq!(st["batches"], 1);
    assert_eq!(std::fs::read(out.join("README.txt")).unwrap(), b"kept\n");
    let m = manifest(&out);
    let listed: std::collections::BTreeSet<String> = m
        .shards
        .iter()
        .map(|e| e.file.clone())
        .chain(m.doc_freq.iter().map(|d| d.file.clone()))
        .chain(m.sketches.iter().map(|d| d.file.clone()))
        .collect();
    let present: std::collections::BTreeSet<String> = data_files(&out).into_keys().collect();
    assert_eq!(present, listed, "old shards left behind");
    tamis(["verify", s(&out)]).ok();
}

#[test]
fn leftovers_of_an_interrupted_ingest_are_removed() {
    let t = tmp();
    let out = t.path().join("d");
    std::fs::create_dir_all(&out).unwrap();
    // What a killed run leaves: a shard that no manifest lists, a temporary
    // manifest, and a lock whose process is gone.
    std::fs::write(out.join("train-000003.tms"), b"half a shard").unwrap();
    std::fs::write(out.join(".manifest.json.tmp-123"), b"{\"checksum\": ").unwrap();
    std::fs::write(out.join(".lock"), b"4294967290\n").unwrap();
    ingest(&[&fixture("inbox.tsv")], &out, &[])
        .ok()
        .stderr_has("removed 2 file(s)");
    let names = names_in(&out);
    assert!(!names.contains(".manifest.json.tmp-123"));
    assert!(!names.contains(".lock"));
    assert!(!names.iter().any(|n| n.contains(".tmp-")), "{names:?}");
    let m = manifest(&out);
    let listed: std::collections::BTreeSet<String> = m
        .shards
        .iter()
        .map(|e| e.file.clone())
        .chain(m.doc_freq.iter().map(|d| d.file.clone()))
        .chain(m.sketches.iter().map(|d| d.file.clone()))
        .chain(["manifest.json".to_string()])
        .collect();
    assert_eq!(names, listed);
    if out.join("train-000003.tms").exists() {
        assert_ne!(
            std::fs::read(out.join("train-000003.tms")).unwrap(),
            b"half a shard"
        );
    }
    tamis(["verify", s(&out)]).ok();
}

#[test]
fn a_folder_locked_by_a_running_process_is_refused() {
    let t = tmp();
    let out = t.path().join("d");
    std::fs::create_dir_all(&out).unwrap();
    // This test process is alive, so its id makes a live lock.
    std::fs::write(out.join(".lock"), format!("{}\n", std::process::id())).unwrap();
    ingest(&[&fixture("inbox.tsv")], &out, &[])
        .fails()
        .stderr_has("locked");
    assert!(
        out.join(".lock").exists(),
        "someone else's lock was removed"
    );
    assert!(!out.join("manifest.json").exists());
}

// ------------------------------------------------------------------ append

#[test]
fn append_adds_a_batch_and_merges_labels() {
    let t = tmp();
    let out = t.path().join("d");
    ingest(&[&fixture("inbox.tsv")], &out, &[]).ok();
    let first = manifest(&out);
    let first_files = data_files(&out);
    let extra = t.path().join("more.tsv");
    let mut text = String::new();
    for i in 0..25 {
        text.push_str(&format!(
            "charter\tGroup of {} walkers wants to charter the Morning Tide from Osk to Tarn, trip {i}\n",
            10 + i
        ));
        text.push_str(&format!(
            "schedule\tDoes the {:02}:15 from Pellow still run on Sundays, asking for trip {i}?\n",
            6 + i % 12
        ));
    }
    std::fs::write(&extra, &text).unwrap();
    ingest(&[&extra], &out, &["--append"]).ok();
    let m = manifest(&out);
    // Old labels keep their ids; the new one comes last.
    let names: Vec<&str> = m.labels.iter().map(|l| l.name.as_str()).collect();
    let old: Vec<&str> = first.labels.iter().map(|l| l.name.as_str()).collect();
    assert_eq!(&names[..old.len()], &old[..]);
    assert_eq!(names.len(), old.len() + 1);
    assert_eq!(names[old.len()], "charter");
    let mut want = label_map(&INBOX_LABELS);
    for (k, v) in tsv_label_counts(text.as_bytes()) {
        *want.entry(k).or_insert(0) += v;
    }
    let st = stats_json(&out);
    assert_eq!(stats_labels(&st), want);
    assert_eq!(st["rows"], 350);
    assert_eq!(st["batches"], 2);
    assert_eq!(manifest_json(&out)["batches"].as_array().unwrap().len(), 2);
    assert_eq!(m.doc_freq.len(), 2);
    // The first batch's files are untouched and still listed.
    for e in &first.shards {
        assert!(m.shards.contains(e), "{} dropped or changed", e.file);
    }
    for (name, bytes) in &first_files {
        assert!(
            &std::fs::read(out.join(name)).unwrap() == bytes,
            "{name} changed"
        );
    }
    let new: Vec<_> = m.shards.iter().filter(|e| e.batch == 1).collect();
    assert!(!new.is_empty());
    assert!(new.iter().all(|e| !first_files.contains_key(&e.file)));
    assert_eq!(new.iter().map(|e| e.rows).sum::<u64>(), 50);
    // Rows read back: the appended labels are there.
    assert_eq!(per_label(&rows(&out, None)), want);
    tamis(["verify", s(&out)]).ok();
}

#[test]
fn append_refuses_contradicting_options() {
    let t = tmp();
    let out = t.path().join("d");
    ingest(&[&fixture("inbox.tsv")], &out, &[]).ok();
    let before = contents(&out);
    let inbox = fixture("inbox.tsv");
    for (args, needles) in [
        (vec!["--ngrams", "3"], vec!["--ngrams 3", "2"]),
        (
            vec!["--log2-buckets", "18"],
            vec!["--log2-buckets 18", "20"],
        ),
        (vec!["--seed", "9"], vec!["--seed 9"]),
        (vec!["--validation", "0.5"], vec!["--validation 0.5", "0.1"]),
        (vec!["--raw-counts"], vec!["--raw-counts"]),
        (vec!["--char-ngrams", "3..5"], vec!["--char-ngrams"]),
        (vec!["--positive", "spam"], vec!["--positive"]),
        (vec!["--scatter", "3"], vec!["--scatter 3"]),
    ] {
        let mut a = args.clone();
        a.push("--append");
        let o = ingest(&[&inbox], &out, &a);
        o.fails().stderr_has("manifest.json");
        for n in needles {
            o.stderr_has(n);
        }
        assert!(contents(&out) == before, "{args:?} changed the dataset");
    }
    // Other text fields contradict the stored ones.
    ingest(
        &[&fixture("inbox.jsonl")],
        &out,
        &[
            "--append",
            "--format",
            "jsonl",
            "--label-field",
            "tag",
            "--text-field",
            "body",
        ],
    )
    .fails()
    .stderr_has("text fields");
    assert!(contents(&out) == before);
    // Giving the stored values again is fine.
    ingest(
        &[&inbox],
        &out,
        &["--append", "--ngrams", "2", "--log2-buckets", "20"],
    )
    .ok();
    assert_eq!(stats_json(&out)["batches"], 2);
    // --append needs a dataset.
    ingest(&[&inbox], &t.path().join("none"), &["--append"])
        .fails()
        .stderr_has("--append");
}

#[test]
fn append_to_a_damaged_dataset_is_refused() {
    let t = tmp();
    let out = t.path().join("d");
    ingest(&[&fixture("inbox.tsv")], &out, &[]).ok();
    let mp = out.join("manifest.json");
    let mut bytes = std::fs::read(&mp).unwrap();
    let at = bytes.len() / 2;
    bytes[at] = if bytes[at] == b'7' { b'8' } else { b'7' };
    std::fs::write(&mp, &bytes).unwrap();
    let before = contents(&out);
    ingest(&[&fixture("inbox.tsv")], &out, &["--append"])
        .fails()
        .stderr_has("manifest.json");
    assert!(contents(&out) == before);
}

/// A manifest whose checksum is right but whose `next_shard` does not lie
/// above the files it lists (edited by hand and resealed) would make an
/// append write its new shards under the names of existing ones, replacing
/// rows already ingested. The append is refused and nothing changes.
#[test]
fn append_never_replaces_files_the_manifest_lists() {
    let t = tmp();
    let out = t.path().join("d");
    ingest(&[&fixture("inbox.tsv")], &out, &["-q"]).ok();
    let mut m = manifest(&out);
    m.next_shard = 0;
    m.store(&out).unwrap();
    let before = contents(&out);
    ingest(&[&fixture("inbox.tsv")], &out, &["--append", "-q"])
        .fails()
        .stderr_has("manifest.json")
        .stderr_has("next_shard");
    assert!(contents(&out) == before);
}

/// A thread count far above any machine's cores is a usage error (exit 2)
/// naming the option, in every command that takes one, instead of a run that
/// tries to start a million threads (it ran out of memory, panicked or never
/// ended). Each run is limited in memory and time so that a regression fails
/// rather than taking the machine down.
#[test]
fn absurd_thread_counts_are_usage_errors() {
    let t = tmp();
    let out = t.path().join("d");
    ingest(&[&fixture("inbox.tsv")], &out, &["-q"]).ok();
    let model = t.path().join("m.tmm");
    tamis([
        "train",
        s(&out),
        "--model",
        s(&model),
        "--epochs",
        "1",
        "-q",
    ])
    .ok();
    let inbox = fixture("inbox.tsv");
    let other = t.path().join("other");
    let m2 = t.path().join("m2.tmm");
    let demo = t.path().join("demo");
    for j in ["1025", "1000000", "18446744073709551615"] {
        for args in [
            vec!["ingest", s(&inbox), "--out", s(&other), "-q", "-j", j],
            vec!["train", s(&out), "--model", s(&m2), "-q", "-j", j],
            vec!["tune", s(&out), "--model", s(&m2), "-q", "-j", j],
            vec!["score", s(&model), s(&inbox), "-j", j],
            vec!["eval", s(&model), s(&out), "-j", j],
            vec!["demo", "--dir", s(&demo), "--rows", "200", "-j", j],
            vec!["bench", "--size", "100KB", "-j", j],
        ] {
            let o = tamis_limited(&args, 4_000_000);
            let err = &o.stderr;
            assert_eq!(o.code, Some(2), "{args:?}: {err}");
            assert!(
                err.contains("--threads") && err.contains("1024"),
                "{args:?}: {err}"
            );
        }
    }
    assert!(!other.exists() && !m2.exists() && !demo.exists());
}

// ------------------------------------------------------------------ help

#[test]
fn help_explains_every_option() {
    assert_help_explains_everything(&[]);
    assert_help_explains_everything(&["ingest"]);
    let o = tamis(["--version"]);
    o.ok().stdout_has(env!("CARGO_PKG_VERSION"));
    let o = tamis(["help", "ingest"]);
    o.ok().stdout_has("--max-bad-fraction");
}

/// `--parts 3`: every shard belongs to one part, each part gets about a third
/// of the training and of the validation rows, the split and the rows are those
/// of the dataset in one piece (only their shards differ), `--append` keeps the
/// parts, `stats --part-files K` lists what a node of part K needs and
/// `verify --part K` checks only that.
#[test]
fn parts_split_the_rows_for_the_nodes_of_a_cluster() {
    let t = tmp();
    let tsv = t.path().join("in.tsv");
    synth_tsv(&tsv, 30_000, 8);
    let whole = t.path().join("whole");
    let parts = t.path().join("parts");
    ingest(&[&tsv], &whole, &["--shard-rows", "2000", "-q"]).ok();
    ingest(
        &[&tsv],
        &parts,
        &["--shard-rows", "2000", "--parts", "3", "-q"],
    )
    .ok();
    let m = manifest(&parts);
    assert_eq!(m.scatter.parts, 3);
    assert_eq!(
        m.scatter.writers, 9,
        "8 writers rounded up to a multiple of 3"
    );
    for split in [Split::Train, Split::Validation] {
        let per: Vec<u64> = (0..3)
            .map(|k| {
                m.shards_of(split)
                    .filter(|s| s.part == k)
                    .map(|s| s.rows)
                    .sum()
            })
            .collect();
        let total: u64 = per.iter().sum();
        for &n in &per {
            // Binomial share of a third: standard deviation under 1% of the rows.
            assert!(
                (n as f64 - total as f64 / 3.0).abs() < 0.05 * total as f64,
                "{split:?} rows per part {per:?}"
            );
        }
    }
    // The same rows (by content) in each split, whatever the parts.
    for split in [Split::Train, Split::Validation] {
        let mut a = row_keys(&rows(&whole, Some(split)));
        let mut b = row_keys(&rows(&parts, Some(split)));
        a.sort();
        b.sort();
        assert!(a == b, "{split:?} rows differ");
    }
    // A dataset in one piece writes no part fields at all.
    let text = std::fs::read_to_string(whole.join("manifest.json")).unwrap();
    assert!(!text.contains("\"part"), "{text}");
    // Appending keeps the parts; another count is refused.
    ingest(&[&tsv], &parts, &["--append", "--parts", "2"])
        .fails()
        .stderr_has("--parts");
    ingest(&[&tsv], &parts, &["--append", "-q"]).ok();
    let m = manifest(&parts);
    assert!(m.shards.iter().all(|s| s.part < 3));
    assert_eq!(
        m.shards
            .iter()
            .filter(|s| s.batch == 1)
            .map(|s| s.part)
            .max(),
        Some(2)
    );
    // What node 1 needs: the common files and its own shards.
    let o = tamis(["stats", s(&parts), "--part-files", "1"]);
    o.ok();
    let listed: Vec<&str> = o.stdout.lines().collect();
    let mut want = vec!["manifest.json".to_string()];
    want.extend(m.doc_freq.iter().map(|d| d.file.clone()));
    want.extend(m.sketches.iter().map(|d| d.file.clone()));
    want.extend(
        m.shards
            .iter()
            .filter(|s| s.part == 1)
            .map(|s| s.file.clone()),
    );
    assert_eq!(listed, want);
    tamis(["stats", s(&parts), "--part-files", "3"])
        .fails()
        .stderr_has("part 3 does not exist: the dataset has 3 part(s)");
    assert!(tamis(["stats", s(&parts)]).stdout.contains("parts"));
    // A node of part 1 alone: its check passes, the whole check does not.
    let node = t.path().join("node1");
    std::fs::create_dir(&node).unwrap();
    for f in &want {
        std::fs::copy(parts.join(f), node.join(f)).unwrap();
    }
    tamis(["verify", s(&node), "--part", "1"]).ok();
    tamis(["verify", s(&node)]).fails();
}

/// `verify` counts each label's rows in the shards and sets them against the
/// manifest's label dictionary: counts moved from one label to another (the
/// totals unchanged, the manifest resealed) are reported by label.
#[test]
fn verify_checks_label_counts_against_the_shards() {
    let t = tmp();
    let out = t.path().join("d");
    ingest(&[&fixture("inbox.tsv")], &out, &["-q"]).ok();
    tamis(["verify", s(&out)]).ok();
    let mut m = manifest(&out);
    let name = m.labels[0].name.clone();
    m.labels[0].train_rows += 1;
    m.labels[1].train_rows -= 1;
    m.store(&out).unwrap();
    tamis(["verify", s(&out)])
        .fails()
        .stderr_has("manifest.json")
        .stderr_has(&format!("label {name:?}: the manifest counts"));
    // Put back, it verifies again.
    m.labels[0].train_rows -= 1;
    m.labels[1].train_rows += 1;
    m.store(&out).unwrap();
    tamis(["verify", s(&out)]).ok();
}
