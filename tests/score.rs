//! End-to-end tests of `tamis score`: one output row per input record, in input
//! order, with the label and score the model's weights give (recomputed here
//! from the model file and the dataset's rows); binary labels by the sign of the
//! score; probabilities of logistic models; JSON Lines output; skipped records
//! reported with line and reason; the same bytes whatever the thread count;
//! standard input, several inputs, a closed pipe; and damaged model files,
//! refused by `score`, `eval` and `verify` with the file named; a calibrated
//! model's stored threshold and Platt probabilities (`--probabilities`).

mod common;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use common::*;

/// `fixtures/inbox.tsv` ingested with 2^16 buckets into `work/NAME` and a
/// model trained on it at `work/NAME.tmm`.
fn fixture_model(work: &Path, name: &str, ingest_extra: &[&str], train_extra: &[&str]) -> PathBuf {
    let dir = work.join(name);
    let mut a = vec!["--log2-buckets", "16", "-q"];
    a.extend_from_slice(ingest_extra);
    ingest(&[&fixture("inbox.tsv")], &dir, &a).ok();
    let model = work.join(format!("{name}.tmm"));
    let mut a = vec!["--epochs", "5", "-q"];
    a.extend_from_slice(train_extra);
    train(&dir, &model, &a).ok();
    model
}

/// The scored rows of an output, asserting that nothing was skipped.
fn scored_rows(out: &[Scored]) -> Vec<(String, String, f64, Option<f64>)> {
    out.iter()
        .map(|o| match o {
            Scored::Row {
                place,
                label,
                score,
                probability,
            } => (place.clone(), label.clone(), *score, *probability),
            other => panic!("unexpected {other:?}"),
        })
        .collect()
}

/// Places `1`, `2`, ... `n`.
fn places(n: usize) -> Vec<String> {
    (1..=n).map(|i| i.to_string()).collect()
}

#[test]
fn one_row_per_record_with_the_scores_of_the_weights() {
    let t = tmp();
    let model = fixture_model(t.path(), "d", &[], &[]);
    let o = score(&model, &[s(&fixture("inbox.tsv"))]);
    o.stderr_has("scored 300 records, skipped 0");
    let out = scored_rows(&parse_scores(&o.stdout));
    assert_eq!(
        out.iter().map(|r| r.0.clone()).collect::<Vec<_>>(),
        places(300)
    );
    assert!(
        out.iter().all(|r| r.3.is_none()),
        "a hinge model has no probability"
    );
    let meta = model_meta(&model);
    let labels: Vec<String> = meta["model_labels"]
        .as_array()
        .unwrap()
        .iter()
        .map(|l| l.as_str().unwrap().to_string())
        .collect();
    assert_eq!(labels.len(), 6);
    // Recompute every score from the model file's weights and the dataset's
    // rows: the largest one-vs-rest margin w_k·x + b_k and its label. The
    // dataset's rows are the same records, hashed by `ingest`, in another order:
    // compare the multisets.
    let bytes = std::fs::read(&model).unwrap();
    let w = f32_section(&bytes, MODEL_WEIGHTS);
    let b = f32_section(&bytes, MODEL_BIASES);
    let d = 1usize << 16;
    let mut want: Vec<(f64, String)> = rows(&t.path().join("d"), None)
        .iter()
        .map(|r| {
            let scores: Vec<f64> = (0..6)
                .map(|k| {
                    r.indices
                        .iter()
                        .zip(&r.values)
                        .map(|(&i, &v)| w[k * d + i as usize] as f64 * v as f64)
                        .sum::<f64>()
                        + b[k] as f64
                })
                .collect();
            let best = (0..6).fold(0, |a, k| if scores[k] > scores[a] { k } else { a });
            (scores[best], labels[best].clone())
        })
        .collect();
    assert_eq!(want.len(), 300);
    let mut got: Vec<(f64, String)> = out.iter().map(|r| (r.2, r.1.clone())).collect();
    want.sort_by(|a, b| a.0.total_cmp(&b.0));
    got.sort_by(|a, b| a.0.total_cmp(&b.0));
    for (g, w) in got.iter().zip(&want) {
        assert!(
            (g.0 - w.0).abs() < 1e-5,
            "score {} vs recomputed {}",
            g.0,
            w.0
        );
    }
    let count = |v: &[(f64, String)]| {
        let mut m = BTreeMap::new();
        for (_, l) in v {
            *m.entry(l.clone()).or_insert(0) += 1;
        }
        m
    };
    assert_eq!(count(&got), count(&want));
    // The model tells the classes apart: most records get their own label.
    let truth = tsv_labels(&fixture_bytes("inbox.tsv"));
    let right = out.iter().zip(&truth).filter(|(r, t)| &r.1 == *t).count();
    assert!(right >= 240, "{right} of 300 right");
}

#[test]
fn records_of_csv_and_json_lines_are_placed_at_their_first_line() {
    let t = tmp();
    // CSV: fixtures/README.md lists 60 records on lines 2-63; the records on
    // lines 17-18 and 25-26 span two lines each.
    let csv = t.path().join("csv");
    ingest(
        &[&fixture("inbox.csv")],
        &csv,
        &[
            "--format",
            "csv",
            "--text-column",
            "subject",
            "--text-column",
            "body",
            "--log2-buckets",
            "16",
            "-q",
        ],
    )
    .ok();
    let model = t.path().join("csv.tmm");
    train(&csv, &model, &["-q"]).ok();
    // The model's format and fields are the default.
    let out = scored_rows(&parse_scores(
        &score(&model, &[s(&fixture("inbox.csv"))]).stdout,
    ));
    let want: Vec<String> = (2..=63)
        .filter(|l| *l != 18 && *l != 26)
        .map(|l| l.to_string())
        .collect();
    assert_eq!(out.iter().map(|r| r.0.clone()).collect::<Vec<_>>(), want);
    // JSON Lines with a numeric field: one record per line.
    let jsonl = t.path().join("jsonl");
    ingest(
        &[&fixture("inbox.jsonl")],
        &jsonl,
        &[&JSONL_FIELDS[..], &["--log2-buckets", "16", "-q"]].concat(),
    )
    .ok();
    train(&jsonl, &model, &["-q"]).ok();
    let out = scored_rows(&parse_scores(
        &score(&model, &[s(&fixture("inbox.jsonl"))]).stdout,
    ));
    assert_eq!(
        out.iter().map(|r| r.0.clone()).collect::<Vec<_>>(),
        places(60)
    );
}

#[test]
fn binary_labels_follow_the_sign_of_the_score() {
    let t = tmp();
    // Six labels, spam positive: the negative class is `not-spam`.
    let model = fixture_model(t.path(), "d", &["--positive", "spam"], &[]);
    let out = scored_rows(&parse_scores(
        &score(&model, &[s(&fixture("inbox.tsv"))]).stdout,
    ));
    assert_eq!(out.len(), 300);
    for (place, label, score, _) in &out {
        let want = if *score > 0.0 { "spam" } else { "not-spam" };
        assert_eq!(label, want, "line {place}: score {score}");
    }
    let truth = tsv_labels(&fixture_bytes("inbox.tsv"));
    let spam = out.iter().filter(|r| r.1 == "spam").count();
    let true_spam = truth.iter().filter(|l| *l == "spam").count();
    assert_eq!(true_spam, 72);
    assert!((60..=85).contains(&spam), "{spam} predicted spam");
    // Two labels: the other label names the negative class, and the
    // alphabetically later one (spam over ham) is positive.
    let two = t.path().join("two.tsv");
    let text: String = String::from_utf8(fixture_bytes("inbox.tsv"))
        .unwrap()
        .lines()
        .map(|l| {
            let (label, rest) = l.split_once('\t').unwrap();
            let label = if label.trim() == "spam" {
                "spam"
            } else {
                "ham"
            };
            format!("{label}\t{rest}\n")
        })
        .collect();
    std::fs::write(&two, &text).unwrap();
    let dir = t.path().join("two");
    ingest(&[&two], &dir, &["--log2-buckets", "16", "-q"]).ok();
    let model = t.path().join("two.tmm");
    train(&dir, &model, &["-q"]).ok();
    assert_eq!(model_meta(&model)["positive"], "spam");
    let out = scored_rows(&parse_scores(&score(&model, &[s(&two)]).stdout));
    assert_eq!(out.len(), 300);
    for (place, label, score, _) in &out {
        let want = if *score > 0.0 { "spam" } else { "ham" };
        assert_eq!(label, want, "line {place}: score {score}");
    }
    assert!(out.iter().any(|r| r.1 == "ham") && out.iter().any(|r| r.1 == "spam"));
}

#[test]
fn logistic_models_print_the_probability_of_the_score() {
    let t = tmp();
    let model = fixture_model(
        t.path(),
        "d",
        &["--positive", "spam"],
        &["--loss", "logistic"],
    );
    let out = scored_rows(&parse_scores(
        &score(&model, &[s(&fixture("inbox.tsv"))]).stdout,
    ));
    assert_eq!(out.len(), 300);
    for (place, label, score, p) in &out {
        let p = p.unwrap_or_else(|| panic!("line {place}: no probability"));
        // The logistic function σ(s) = 1/(1 + e^−s) (from memory); scores and
        // probabilities are printed with six decimals.
        let want = 1.0 / (1.0 + (-score).exp());
        assert!(
            (p - want).abs() <= 1e-6,
            "line {place}: p {p}, σ({score}) = {want}"
        );
        assert!((0.0..=1.0).contains(&p));
        assert_eq!(label == "spam", *score > 0.0, "line {place}");
    }
    // Not every probability is a rounded 0 or 1.
    assert!(out.iter().any(|r| (0.05..0.95).contains(&r.3.unwrap())));
    // A six-class logistic model prints the probability of its best score.
    let multi = fixture_model(t.path(), "m", &[], &["--loss", "logistic"]);
    let out = scored_rows(&parse_scores(
        &score(&multi, &[s(&fixture("inbox.tsv"))]).stdout,
    ));
    for (_, _, score, p) in &out {
        let want = 1.0 / (1.0 + (-score).exp());
        assert!((p.unwrap() - want).abs() <= 1e-6);
    }
    // Hinge and squared-hinge models print none.
    let sq = fixture_model(t.path(), "q", &[], &["--loss", "squared-hinge"]);
    let out = scored_rows(&parse_scores(
        &score(&sq, &[s(&fixture("inbox.tsv"))]).stdout,
    ));
    assert!(out.iter().all(|r| r.3.is_none()));
}

#[test]
fn json_lines_output_says_the_same_as_tsv() {
    let t = tmp();
    let bad = fixture("bad.tsv");
    for (name, ingest_extra, train_extra) in [
        ("h", vec![], vec![]),
        ("l", vec!["--positive", "spam"], vec!["--loss", "logistic"]),
    ] {
        let model = fixture_model(t.path(), name, &ingest_extra, &train_extra);
        let args = [s(&bad), "--max-line-bytes", "300"];
        let tsv = parse_scores(&score(&model, &args).stdout);
        let mut a = args.to_vec();
        a.extend(["--output-format", "jsonl"]);
        let o = score(&model, &a);
        let lines: Vec<&str> = o.stdout.lines().collect();
        assert_eq!(lines.len(), tsv.len());
        assert_eq!(tsv.len(), 50);
        for (line, row) in lines.iter().zip(&tsv) {
            let v: serde_json::Value =
                serde_json::from_str(line).unwrap_or_else(|e| panic!("{line:?}: {e}"));
            let obj = v.as_object().expect("an object per line");
            match row {
                Scored::Row {
                    place,
                    label,
                    score,
                    probability,
                } => {
                    assert_eq!(obj["where"], place.as_str());
                    assert_eq!(obj["label"], label.as_str());
                    assert!((obj["score"].as_f64().unwrap() - score).abs() < 1e-9);
                    match probability {
                        Some(p) => {
                            assert!((obj["probability"].as_f64().unwrap() - p).abs() < 1e-9);
                            assert_eq!(obj.len(), 4);
                        }
                        None => assert_eq!(obj.len(), 3, "{line}"),
                    }
                }
                Scored::Skipped {
                    place,
                    reason,
                    detail,
                } => {
                    assert_eq!(obj["where"], place.as_str());
                    assert_eq!(obj["skipped"], reason.as_str());
                    assert_eq!(obj["detail"], detail.as_str());
                    assert_eq!(obj.len(), 3);
                }
            }
        }
    }
}

#[test]
fn skipped_records_are_reported_at_their_line() {
    let t = tmp();
    let model = fixture_model(t.path(), "d", &[], &[]);
    let bytes = fixture_bytes("bad.tsv");
    let o = score(&model, &[s(&fixture("bad.tsv")), "--max-line-bytes", "300"]);
    let out = parse_scores(&o.stdout);
    // What each record of the file is, worked out here from its bytes: blank
    // lines are no records; a NUL byte, more than 300 bytes or a text without a
    // letter or digit make a skipped record; a label is optional, so lines
    // without a tab are scored as text.
    let mut want: Vec<(String, Option<&str>)> = Vec::new();
    for (i, line) in bytes.split(|&b| b == b'\n').enumerate() {
        let line = line.strip_suffix(b"\r").unwrap_or(line);
        if line.iter().all(|b| b.is_ascii_whitespace()) {
            continue;
        }
        let text = match line.iter().position(|&b| b == b'\t') {
            Some(tab) => &line[tab + 1..],
            None => line,
        };
        let reason = if line.contains(&0) {
            Some("nul_byte")
        } else if line.len() > 300 {
            Some("too_long")
        } else if !String::from_utf8_lossy(text)
            .chars()
            .any(char::is_alphanumeric)
        {
            Some("empty_text")
        } else {
            None
        };
        want.push(((i + 1).to_string(), reason));
    }
    let got: Vec<(String, Option<&str>)> = out
        .iter()
        .map(|o| match o {
            Scored::Row { place, .. } => (place.clone(), None),
            Scored::Skipped { place, reason, .. } => (place.clone(), Some(reason.as_str())),
        })
        .collect();
    assert_eq!(got, want);
    // The lines fixtures/README.md lists.
    let skipped: Vec<(&str, &str)> = got
        .iter()
        .filter_map(|(p, r)| r.map(|r| (p.as_str(), r)))
        .collect();
    assert_eq!(
        skipped,
        [
            ("18", "nul_byte"),
            ("21", "empty_text"),
            ("26", "too_long"),
            ("37", "empty_text"),
            ("38", "nul_byte"),
            ("47", "too_long"),
            ("49", "empty_text"),
        ]
    );
    for o in &out {
        if let Scored::Skipped { reason, detail, .. } = o {
            assert!(!detail.is_empty());
            if reason == "too_long" {
                assert!(detail.contains("300"), "{detail}");
            }
        }
    }
    o.stderr_has("scored 43 records, skipped 7");
    // Without the limit the long lines are scored.
    let out = parse_scores(&score(&model, &[s(&fixture("bad.tsv"))]).stdout);
    assert_eq!(out.len(), 50);
    assert_eq!(
        out.iter()
            .filter(|o| matches!(o, Scored::Skipped { .. }))
            .count(),
        5
    );
}

#[test]
fn threads_do_not_change_the_output() {
    let t = tmp();
    let model = fixture_model(t.path(), "d", &[], &[]);
    // About 3 MB: several read chunks of 1 MiB, scored in parallel.
    let input = t.path().join("big.tsv");
    synth_tsv(&input, 30_000, 8);
    assert!(std::fs::metadata(&input).unwrap().len() > 2 << 20);
    for fmt in ["tsv", "jsonl"] {
        let one = score(&model, &[s(&input), "-j", "1", "--output-format", fmt]);
        let two = score(&model, &[s(&input), "-j", "2", "--output-format", fmt]);
        assert!(one.stdout == two.stdout, "{fmt}: -j 1 and -j 2 differ");
        assert_eq!(one.stdout.lines().count(), 30_000);
    }
    let out = scored_rows(&parse_scores(
        &score(&model, &[s(&input), "-j", "2"]).stdout,
    ));
    assert_eq!(
        out.iter().map(|r| r.0.clone()).collect::<Vec<_>>(),
        places(30_000)
    );
}

#[test]
fn output_into_a_closed_pipe_is_a_quiet_success() {
    // src/main.rs: "Output piped into `head` and closed early: quiet success."
    let t = tmp();
    let model = fixture_model(t.path(), "d", &[], &[]);
    let big = t.path().join("big.tsv");
    synth_tsv(&big, 20_000, 3);
    for input in [fixture("inbox.tsv"), big] {
        for fmt in ["tsv", "jsonl"] {
            let (code, stderr) = tamis_closed_stdout(&[
                "score",
                s(&model),
                s(&input),
                "--output-format",
                fmt,
                "-j",
                "2",
            ]);
            assert_eq!(
                (code, stderr.as_str()),
                (Some(0), ""),
                "{} {fmt}",
                input.display()
            );
        }
    }
}

#[test]
fn standard_input_is_read() {
    let t = tmp();
    let model = fixture_model(t.path(), "d", &[], &[]);
    let input = fixture_bytes("inbox.tsv");
    let from_file = score(&model, &[s(&fixture("inbox.tsv"))]).stdout;
    for args in [vec!["score", s(&model)], vec!["score", s(&model), "-"]] {
        let o = tamis_with_stdin(&args, Some(&input));
        o.ok().stderr_has("scored 300 records");
        assert!(o.stdout == from_file, "{args:?}");
    }
    // Unlabelled text, one message a line, and an empty input.
    let o = tamis_with_stdin(
        ["score", s(&model)],
        Some(b"Congratulations, you are selected: claim your free cash prize now\n\nI left my blue umbrella on the Tarn ferry\n"),
    );
    o.ok();
    let out = scored_rows(&parse_scores(&o.stdout));
    assert_eq!(
        out.iter().map(|r| r.0.as_str()).collect::<Vec<_>>(),
        ["1", "3"]
    );
    assert_eq!(out[0].1, "spam");
    assert_eq!(out[1].1, "lost_property");
    let o = tamis_with_stdin(["score", s(&model)], Some(b""));
    o.ok().stderr_has("scored 0 records, skipped 0");
    assert_eq!(o.stdout, "");
}

#[test]
fn several_inputs_are_named_file_colon_line() {
    let t = tmp();
    let model = fixture_model(t.path(), "d", &[], &[]);
    let a = t.path().join("a.tsv");
    let b = t.path().join("b.tsv");
    std::fs::write(&a, b"spam\tClaim your free cash prize now, click the link\nschedule\tIs the 7:40 sailing from Osk cancelled?\n").unwrap();
    std::fs::write(
        &b,
        b"\nlost_property\tI left a black wallet on the upper deck\n",
    )
    .unwrap();
    let o = tamis_with_stdin(
        ["score", s(&model), s(&a), "-", s(&b)],
        Some(b"The crew were lovely and the coffee was great\n\x00\n"),
    );
    o.ok().stderr_has("scored 4 records, skipped 1");
    let out = parse_scores(&o.stdout);
    let places: Vec<&str> = out.iter().map(Scored::place).collect();
    let (pa, pb) = (s(&a), s(&b));
    assert_eq!(
        places,
        [
            format!("{pa}:1"),
            format!("{pa}:2"),
            "stdin:1".to_string(),
            "stdin:2".to_string(),
            format!("{pb}:2"),
        ]
    );
    assert!(matches!(&out[3], Scored::Skipped { reason, .. } if reason == "nul_byte"));
    // Each input scores as it does alone.
    let alone = scored_rows(&parse_scores(&score(&model, &[s(&a)]).stdout));
    for (i, r) in alone.iter().enumerate() {
        let Scored::Row { label, score, .. } = &out[i] else {
            panic!()
        };
        assert_eq!((label, *score), (&r.1, r.2));
    }
    // A missing input is an error that names it.
    let missing = t.path().join("missing.tsv");
    let o = tamis(["score", s(&model), s(&a), s(&missing)]);
    o.fails().stderr_has("missing.tsv");
}

#[test]
fn damaged_models_are_refused_by_score_eval_and_verify() {
    let t = tmp();
    let model = fixture_model(t.path(), "d", &[], &[]);
    let data = t.path().join("d");
    let good = std::fs::read(&model).unwrap();
    let inbox = fixture("inbox.tsv");
    let bad = t.path().join("bad.tmm");
    let refused_by = |needle: &str, verify_too: bool| {
        let mut runs = vec![
            tamis(["score", s(&bad), s(&inbox)]),
            tamis(["eval", s(&bad), s(&data)]),
            tamis(["eval", s(&bad), s(&inbox)]),
        ];
        if verify_too {
            runs.push(tamis(["verify", s(&bad)]));
        }
        for o in runs {
            o.fails().stderr_has(s(&bad)).stderr_has(needle);
            assert_eq!(o.stdout, "", "{:?}", o.args);
        }
    };
    let refused = |needle: &str| refused_by(needle, true);
    // A changed bit in each section.
    for (id, what) in [
        (MODEL_META, "meta"),
        (MODEL_WEIGHTS, "weights"),
        (MODEL_BIASES, "biases"),
    ] {
        std::fs::write(&bad, &good).unwrap();
        flip_in_section(&bad, id);
        refused(&format!("checksum mismatch in {what}"));
    }
    // A changed header byte (the dimension parameter).
    let mut b = good.clone();
    b[41] ^= 0x01;
    std::fs::write(&bad, &b).unwrap();
    refused("damaged");
    // Cut short, anywhere.
    for keep in [good.len() - 1, good.len() - 50, good.len() / 2, 200, 40] {
        std::fs::write(&bad, &good[..keep]).unwrap();
        refused("truncated");
    }
    // Empty, or not a model at all.
    std::fs::write(&bad, b"").unwrap();
    refused("not a tamis");
    std::fs::write(&bad, fixture_bytes("inbox.tsv")).unwrap();
    refused("not a tamis");
    let shard = manifest(&data).shards[0].file.clone();
    std::fs::copy(data.join(shard), &bad).unwrap();
    // (An intact shard, which `verify` accepts as such.)
    refused_by("shard", false);
    tamis(["verify", s(&bad)]).ok().stdout_has("ok: shard");
    // Missing.
    std::fs::remove_file(&bad).unwrap();
    refused("bad.tmm");
    // The intact model still works.
    score(&model, &[s(&inbox)]);
}

/// Checksums that fit over idf factors that do not (resealed by hand): not
/// finite, or present while the header's idf flag says there are none (the
/// factors would be dropped and every score change) are refused.
#[test]
fn models_with_bad_idf_factors_are_refused() {
    let t = tmp();
    let model = fixture_model(t.path(), "d", &[], &["--idf"]);
    let good = std::fs::read(&model).unwrap();
    let inbox = fixture("inbox.tsv");
    let bad = t.path().join("bad.tmm");
    let refused = |bytes: &[u8], needle: &str| {
        std::fs::write(&bad, bytes).unwrap();
        for o in [
            tamis(["score", s(&bad), s(&inbox)]),
            tamis(["eval", s(&bad), s(&inbox)]),
            tamis(["verify", s(&bad)]),
        ] {
            o.fails().stderr_has(s(&bad)).stderr_has(needle);
            assert_eq!(o.stdout, "", "{:?}", o.args);
        }
    };
    let (off, _) = section(&good, MODEL_IDF);
    for x in [f32::NAN, f32::INFINITY] {
        let mut b = good.clone();
        b[off + 8..off + 12].copy_from_slice(&x.to_le_bytes());
        reseal(&mut b);
        refused(&b, "idf factors are not finite");
    }
    // The third header parameter is the idf flag (1 when section 4 is there).
    for flag in [0u64, 2] {
        let mut b = good.clone();
        b[48..56].copy_from_slice(&flag.to_le_bytes());
        reseal(&mut b);
        refused(&b, "idf");
    }
    score(&model, &[s(&inbox)]);
}

#[test]
fn help_explains_every_option() {
    assert_help_explains_everything(&["score"]);
}

fn f(v: &serde_json::Value) -> f64 {
    v.as_f64().unwrap_or_else(|| panic!("not a number: {v}"))
}

#[test]
fn score_applies_the_threshold_and_prints_platt_probabilities() {
    let t = tmp();
    let (dir, model) = spam_model(t.path(), "d", "hinge");
    let input = t.path().join("d.tsv");
    // Not calibrated: no probabilities for a hinge model.
    tamis(["score", s(&model), s(&input), "--probabilities"])
        .fails()
        .stderr_has("tamis calibrate");
    assert!(model_meta(&model).get("calibration").is_none());
    let before = score(&model, &[s(&input)]).stdout;
    let (o, _) = calibrate_json(&model, &dir, &["--min-precision", "0.99"]);
    o.ok().stderr_has("wrote");
    let meta = model_meta(&model);
    let th = f(&meta["calibration"]["thresholds"][0]);
    let (a, b) = (
        f(&meta["calibration"]["platt"][0]["a"]),
        f(&meta["calibration"]["platt"][0]["b"]),
    );
    assert!(a < 0.0, "higher scores mean spam: A = {a}");
    // Scores do not change; labels follow the stored threshold.
    let after = parse_scores(&score(&model, &[s(&input)]).stdout);
    let plain = parse_scores(&before);
    assert_eq!(after.len(), plain.len());
    let mut flipped = 0;
    for (x, y) in after.iter().zip(&plain) {
        let (
            Scored::Row {
                label,
                score,
                probability,
                ..
            },
            Scored::Row {
                score: s0,
                label: l0,
                ..
            },
        ) = (x, y)
        else {
            panic!("{x:?}")
        };
        assert_eq!(score, s0);
        assert!(
            probability.is_none(),
            "hinge: no probability without the flag"
        );
        if (score - th).abs() > 1e-5 {
            assert_eq!(label == "spam", *score >= th, "{score} vs {th}");
        }
        flipped += (label != l0) as u32;
    }
    assert!(flipped > 0, "the threshold should move some decisions");
    // Platt probabilities 1/(1 + e^(A·s + B)) (Platt 1999) of the printed scores.
    let o = score(&model, &[s(&input), "--probabilities"]);
    for r in parse_scores(&o.stdout) {
        let Scored::Row {
            score, probability, ..
        } = r
        else {
            panic!()
        };
        let want = 1.0 / (1.0 + (a * score + b).exp());
        assert!((probability.unwrap() - want).abs() < 2e-5, "{score}");
    }
    // The JSON Lines output carries them too.
    let o = score(
        &model,
        &[s(&input), "--probabilities", "--output-format", "jsonl"],
    );
    let first: serde_json::Value = serde_json::from_str(o.stdout.lines().next().unwrap()).unwrap();
    assert!(first["probability"].is_number());
    // eval now reports probability figures, and calibration improved them.
    let m = eval_json(&model, &[s(&dir)], &[]);
    assert!(f(&m["brier"]) < 0.25 && f(&m["log_loss"]) < std::f64::consts::LN_2);
    let (_, rep) = calibrate_json(&model, &dir, &["--out", s(&t.path().join("x.tmm"))]);
    let m0 = &rep["models"][0];
    assert!(f(&m0["after"]["brier"]) <= f(&m0["before"]["brier"]) + 1e-9);
}

/// The fast scorer (class weights side by side) gives exactly the scores of the
/// plain per-class sums, for one-vs-rest with and without idf and for a binary
/// model, on every validation row of the training data.
#[test]
fn the_interleaved_scorer_equals_the_plain_sums_bit_for_bit() {
    let t = tmp();
    for (name, ingest_extra, train_extra) in [
        ("ovr", &[][..], &[][..]),
        ("ovr-idf", &[][..], &["--idf"][..]),
        ("binary", &["--positive", "spam"][..], &[][..]),
    ] {
        let mut ie = vec!["--log2-buckets", "14"];
        ie.extend_from_slice(ingest_extra);
        let (dir, m) = synth_model(t.path(), name, 3000, 5, &ie, train_extra);
        let model = tamis::model::Model::load(&m).unwrap();
        let scorer = model.scorer();
        let (mut a, mut b) = (Vec::new(), Vec::new());
        let mut n = 0;
        for r in rows(&dir, None) {
            let x = tamis::shard::Row {
                label: 0,
                indices: &r.indices,
                values: &r.values,
            };
            model.scores(&x, &mut a);
            scorer.scores(&x, &mut b);
            assert_eq!(a.len(), model.models());
            let bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
            assert_eq!(bits(&a), bits(&b), "{name}");
            n += 1;
        }
        assert!(n > 1000, "{name}: {n} rows");
    }
}
