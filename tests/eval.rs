//! End-to-end tests of `tamis eval`: the JSON report on a dataset split is
//! consistent with itself and with `tamis stats` (row counts, accuracy from the
//! confusion matrix, per-class figures, macro-F1, splits that add up); on
//! labelled raw text it gives the figures recomputed here from `tamis score`
//! output and the true labels; the log loss is reported for binary logistic
//! models only; datasets hashed or labelled otherwise than the model, damaged
//! shards and inputs without labels are refused with clear errors.

mod common;

use std::path::{Path, PathBuf};

use common::*;
use serde_json::Value;

/// `fixtures/inbox.tsv` ingested with 2^16 buckets into `work/NAME` and a
/// model trained on it at `work/NAME.tmm`.
fn fixture_model(work: &Path, name: &str, ingest_extra: &[&str], train_extra: &[&str]) -> PathBuf {
    let dir = work.join(name);
    let mut a = vec!["--log2-buckets", "16", "-q"];
    a.extend_from_slice(ingest_extra);
    ingest(&[&fixture("inbox.tsv")], &dir, &a).ok();
    let model = work.join(format!("{name}.tmm"));
    let mut a = vec!["--epochs", "4", "-q"];
    a.extend_from_slice(train_extra);
    train(&dir, &model, &a).ok();
    model
}

fn f(v: &Value) -> f64 {
    v.as_f64().unwrap_or_else(|| panic!("not a number: {v}"))
}

fn strings(v: &Value) -> Vec<String> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_str().unwrap().to_string())
        .collect()
}

fn matrix(v: &Value) -> Vec<Vec<u64>> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|r| {
            r.as_array()
                .unwrap()
                .iter()
                .map(|x| x.as_u64().unwrap())
                .collect()
        })
        .collect()
}

/// Precision, recall and F1 per class from a confusion matrix `[truth][prediction]`,
/// by their usual definitions: P = tp/(tp+fp), R = tp/(tp+fn), F1 = 2PR/(P+R)
/// (van Rijsbergen's F-measure with β = 1; from memory), 0 where undefined.
fn prf(conf: &[Vec<u64>]) -> Vec<(f64, f64, f64)> {
    let k = conf.len();
    (0..k)
        .map(|c| {
            let tp = conf[c][c] as f64;
            let fp: f64 = (0..k).filter(|&t| t != c).map(|t| conf[t][c] as f64).sum();
            let fn_: f64 = (0..k).filter(|&p| p != c).map(|p| conf[c][p] as f64).sum();
            let p = if tp + fp > 0.0 { tp / (tp + fp) } else { 0.0 };
            let r = if tp + fn_ > 0.0 { tp / (tp + fn_) } else { 0.0 };
            let f1 = if p + r > 0.0 {
                2.0 * p * r / (p + r)
            } else {
                0.0
            };
            (p, r, f1)
        })
        .collect()
}

fn close(a: f64, b: f64, tol: f64, what: &str) {
    assert!((a - b).abs() <= tol, "{what}: {a} vs {b}");
}

/// Check an eval report against itself: keys, counts, accuracy from the
/// confusion matrix, per-class figures and macro-F1.
fn check_consistent(m: &Value, labels: &[String]) {
    let keys: Vec<&str> = m.as_object().unwrap().keys().map(|k| k.as_str()).collect();
    let mut keys = keys;
    keys.sort();
    assert_eq!(
        keys,
        [
            "accuracy",
            "average_precision",
            "brier",
            "confusion",
            "confusion_labels",
            "expected_calibration_error",
            "false_positive_rate",
            "hinge_loss",
            "log_loss",
            "macro_f1",
            "per_class",
            "precision",
            "recall",
            "roc_auc",
            "rows",
            "skipped",
            "thresholds",
            "undecided"
        ]
    );
    assert_eq!(strings(&m["confusion_labels"]), labels);
    let conf = matrix(&m["confusion"]);
    let k = labels.len();
    assert_eq!(conf.len(), k);
    assert!(conf.iter().all(|r| r.len() == k));
    let rows = m["rows"].as_u64().unwrap();
    assert_eq!(conf.iter().flatten().sum::<u64>(), rows);
    let trace: u64 = (0..k).map(|i| conf[i][i]).sum();
    close(
        f(&m["accuracy"]),
        trace as f64 / rows as f64,
        1e-12,
        "accuracy",
    );
    let pc = m["per_class"].as_array().unwrap();
    assert_eq!(pc.len(), k);
    let want = prf(&conf);
    for (c, (row, (p, r, f1))) in pc.iter().zip(&want).enumerate() {
        assert_eq!(row["label"], labels[c].as_str());
        assert_eq!(
            row["support"].as_u64().unwrap(),
            conf[c].iter().sum::<u64>()
        );
        close(f(&row["precision"]), *p, 1e-12, "precision");
        close(f(&row["recall"]), *r, 1e-12, "recall");
        close(f(&row["f1"]), *f1, 1e-12, "f1");
    }
    let mean = want.iter().map(|x| x.2).sum::<f64>() / k as f64;
    close(f(&m["macro_f1"]), mean, 1e-12, "macro_f1");
    let h = f(&m["hinge_loss"]);
    assert!(h.is_finite() && h >= 0.0);
    // Without stored thresholds every row is decided.
    if m["thresholds"].is_null() {
        assert!(m["undecided"].as_array().unwrap().iter().all(|x| x == 0));
    }
    // The decision figures: binary those of the positive class, else the means.
    let fpr: Vec<f64> = (0..k)
        .map(|c| {
            let fp: u64 = (0..k).filter(|&t| t != c).map(|t| conf[t][c]).sum();
            let neg: u64 = (0..k)
                .filter(|&t| t != c)
                .map(|t| conf[t].iter().sum::<u64>())
                .sum();
            fp as f64 / neg.max(1) as f64
        })
        .collect();
    if k == 2 {
        close(f(&m["precision"]), want[1].0, 1e-12, "precision");
        close(f(&m["recall"]), want[1].1, 1e-12, "recall");
        close(f(&m["false_positive_rate"]), fpr[1], 1e-12, "fpr");
    } else {
        let kf = k as f64;
        close(
            f(&m["precision"]),
            want.iter().map(|x| x.0).sum::<f64>() / kf,
            1e-12,
            "precision",
        );
        close(
            f(&m["recall"]),
            want.iter().map(|x| x.1).sum::<f64>() / kf,
            1e-12,
            "recall",
        );
        close(
            f(&m["false_positive_rate"]),
            fpr.iter().sum::<f64>() / kf,
            1e-12,
            "fpr",
        );
    }
    for key in ["roc_auc", "average_precision"] {
        let v = f(&m[key]);
        assert!((0.0..=1.0).contains(&v), "{key} {v}");
    }
}

#[test]
fn dataset_reports_are_consistent_across_splits() {
    let t = tmp();
    for (name, ingest_extra) in [("multi", vec![]), ("binary", vec!["--positive", "spam"])] {
        let model = fixture_model(t.path(), name, &ingest_extra, &[]);
        let dir = t.path().join(name);
        let d = s(&dir);
        let st = stats_json(&dir);
        let labels = if name == "binary" {
            vec!["not-spam".to_string(), "spam".to_string()]
        } else {
            strings(&model_meta(&model)["model_labels"])
        };
        let val = eval_json(&model, &[d], &[]);
        let train_ = eval_json(&model, &[d], &["--split", "train"]);
        let all = eval_json(&model, &[d], &["--split", "all"]);
        assert_eq!(val, eval_json(&model, &[d], &["--split", "validation"]));
        for (m, count) in [
            (&val, "validation_rows"),
            (&train_, "train_rows"),
            (&all, "rows"),
        ] {
            check_consistent(m, &labels);
            assert_eq!(m["rows"], st[count], "{name} {count}");
            assert_eq!(m["skipped"], 0);
            assert!(m["log_loss"].is_null(), "a hinge model has no log loss");
        }
        assert!(f(&all["rows"]) > f(&train_["rows"]) && f(&train_["rows"]) > f(&val["rows"]));
        // The splits add up: counts cell by cell, losses weighted by rows.
        let (cv, ct, ca) = (
            matrix(&val["confusion"]),
            matrix(&train_["confusion"]),
            matrix(&all["confusion"]),
        );
        for i in 0..labels.len() {
            for j in 0..labels.len() {
                assert_eq!(ca[i][j], cv[i][j] + ct[i][j]);
            }
        }
        let (nv, nt) = (f(&val["rows"]), f(&train_["rows"]));
        close(
            f(&all["hinge_loss"]),
            (f(&val["hinge_loss"]) * nv + f(&train_["hinge_loss"]) * nt) / (nv + nt),
            1e-9,
            "hinge loss of all rows",
        );
        // Per-class support is the split's label count from `tamis stats`.
        if name == "multi" {
            for l in st["labels"].as_array().unwrap() {
                let c = labels.iter().position(|x| l["name"] == x.as_str()).unwrap();
                assert_eq!(
                    val["per_class"][c]["support"], l["validation_rows"],
                    "{}",
                    l["name"]
                );
            }
        } else {
            let spam = st["labels"]
                .as_array()
                .unwrap()
                .iter()
                .find(|l| l["name"] == "spam")
                .unwrap();
            assert_eq!(train_["per_class"][1]["support"], spam["train_rows"]);
        }
        // The model learnt something: it beats always naming the largest class.
        let largest = train_["per_class"]
            .as_array()
            .unwrap()
            .iter()
            .map(|c| c["support"].as_u64().unwrap())
            .max()
            .unwrap() as f64
            / nt;
        assert!(
            f(&train_["accuracy"]) > largest + 0.05,
            "{name}: accuracy {}, largest class {largest}",
            train_["accuracy"]
        );
    }
}

#[test]
fn the_printed_report_shows_the_json_figures() {
    let t = tmp();
    let model = fixture_model(t.path(), "d", &[], &[]);
    let dir = t.path().join("d");
    let m = eval_json(&model, &[s(&dir)], &["--split", "all"]);
    let o = tamis(["eval", s(&model), s(&dir), "--split", "all"]);
    o.ok()
        .stdout_has(&format!(
            "rows       {:>12}",
            thousands(m["rows"].as_u64().unwrap())
        ))
        .stdout_has(&format!("accuracy   {:>11.2}%", 100.0 * f(&m["accuracy"])))
        .stdout_has(&format!("macro-F1   {:>12.4}", f(&m["macro_f1"])))
        .stdout_has(&format!("hinge loss {:>12.4}", f(&m["hinge_loss"])))
        .stdout_has("confusion (rows: truth, columns: prediction)");
    assert!(!o.stdout.contains("log loss"));
    for c in m["per_class"].as_array().unwrap() {
        let line = o
            .stdout
            .lines()
            .find(|l| l.split_whitespace().next() == c["label"].as_str())
            .unwrap_or_else(|| panic!("no line for {}", c["label"]));
        let t: Vec<&str> = line.split_whitespace().collect();
        assert_eq!(t[1], format!("{:.4}", f(&c["precision"])));
        assert_eq!(t[2], format!("{:.4}", f(&c["recall"])));
        assert_eq!(t[3], format!("{:.4}", f(&c["f1"])));
    }
}

/// Metrics recomputed from `tamis score` output and the true labels of a TSV
/// file: `classes` names the classes; `class_of` maps a true label to its class.
fn recompute(
    model: &Path,
    input: &Path,
    classes: &[String],
    class_of: impl Fn(&str) -> usize,
) -> (Vec<Vec<u64>>, Vec<(f64, usize)>) {
    let out = parse_scores(&score(model, &[s(input)]).stdout);
    let truth = tsv_labels(&std::fs::read(input).unwrap());
    assert_eq!(out.len(), truth.len());
    let k = classes.len();
    let mut conf = vec![vec![0u64; k]; k];
    let mut scores = Vec::new();
    for (o, t) in out.iter().zip(&truth) {
        let Scored::Row { label, score, .. } = o else {
            panic!("{o:?}")
        };
        let pred = classes.iter().position(|c| c == label).unwrap();
        let c = class_of(t);
        conf[c][pred] += 1;
        scores.push((*score, c));
    }
    (conf, scores)
}

#[test]
fn raw_input_reports_match_a_recomputation_from_scores() {
    let t = tmp();
    let inbox = fixture("inbox.tsv");
    // Six classes: the confusion matrix from predicted and true labels.
    let model = fixture_model(t.path(), "multi", &[], &[]);
    let labels = strings(&model_meta(&model)["model_labels"]);
    let m = eval_json(&model, &[s(&inbox)], &[]);
    check_consistent(&m, &labels);
    let (conf, _) = recompute(&model, &inbox, &labels, |l| {
        labels.iter().position(|x| x == l).unwrap()
    });
    assert_eq!(matrix(&m["confusion"]), conf);
    assert_eq!(m["rows"], 300);
    assert_eq!(m["skipped"], 0);
    // The same rows as the dataset's two splits together.
    let all = eval_json(&model, &[s(&t.path().join("multi"))], &["--split", "all"]);
    assert_eq!(m["confusion"], all["confusion"]);
    close(
        f(&m["hinge_loss"]),
        f(&all["hinge_loss"]),
        1e-9,
        "hinge loss",
    );
    // Binary logistic: also the mean hinge loss max(0, 1 − y·s) and the mean
    // log loss ln(1 + e^(−y·s)) in nats (the logistic regression loss; from
    // memory), from the printed scores (six decimals).
    let model = fixture_model(
        t.path(),
        "bin",
        &["--positive", "spam"],
        &["--loss", "logistic"],
    );
    let classes = vec!["not-spam".to_string(), "spam".to_string()];
    let m = eval_json(&model, &[s(&inbox)], &[]);
    check_consistent(&m, &classes);
    let (conf, scores) = recompute(&model, &inbox, &classes, |l| (l == "spam") as usize);
    assert_eq!(matrix(&m["confusion"]), conf);
    let n = scores.len() as f64;
    let hinge = scores
        .iter()
        .map(|&(s, c)| {
            let y = if c == 1 { 1.0 } else { -1.0 };
            (1.0 - y * s).max(0.0)
        })
        .sum::<f64>()
        / n;
    let log = scores
        .iter()
        .map(|&(s, c)| {
            let y = if c == 1 { 1.0 } else { -1.0 };
            (1.0 + (-y * s).exp()).ln()
        })
        .sum::<f64>()
        / n;
    close(f(&m["hinge_loss"]), hinge, 1e-5, "hinge loss");
    close(f(&m["log_loss"]), log, 1e-5, "log loss");
    let all = eval_json(&model, &[s(&t.path().join("bin"))], &["--split", "all"]);
    assert_eq!(m["confusion"], all["confusion"]);
    close(f(&m["log_loss"]), f(&all["log_loss"]), 1e-9, "log loss");
    // ROC AUC by counting pairs (a positive above a negative 1, a tie ½: the
    // Mann–Whitney reading of the AUC, Hanley and McNeil 1982) and average
    // precision from its definition Σ (Rₙ − Rₙ₋₁)·Pₙ over distinct
    // thresholds, both from the printed scores.
    let pos: Vec<f64> = scores.iter().filter(|x| x.1 == 1).map(|x| x.0).collect();
    let neg: Vec<f64> = scores.iter().filter(|x| x.1 == 0).map(|x| x.0).collect();
    let mut pairs = 0.0;
    for &p in &pos {
        for &q in &neg {
            pairs += if p > q {
                1.0
            } else if p == q {
                0.5
            } else {
                0.0
            };
        }
    }
    close(
        f(&m["roc_auc"]),
        pairs / (pos.len() * neg.len()) as f64,
        1e-3,
        "roc auc",
    );
    let mut thresholds: Vec<f64> = scores.iter().map(|x| x.0).collect();
    thresholds.sort_by(|a, b| b.total_cmp(a));
    thresholds.dedup();
    let (mut ap, mut prev_r) = (0.0, 0.0);
    for t in thresholds {
        let tp = pos.iter().filter(|&&p| p >= t).count() as f64;
        let fp = neg.iter().filter(|&&q| q >= t).count() as f64;
        let r = tp / pos.len() as f64;
        ap += (r - prev_r) * tp / (tp + fp);
        prev_r = r;
    }
    close(f(&m["average_precision"]), ap, 1e-3, "average precision");
    // Several inputs and standard input count together.
    let o = tamis_with_stdin(
        ["eval", s(&model), s(&inbox), "-", "--json"],
        Some(&fixture_bytes("inbox.tsv")),
    );
    o.ok();
    let twice: Value = serde_json::from_str(&o.stdout).unwrap();
    assert_eq!(twice["rows"], 600);
    let doubled: Vec<Vec<u64>> = conf
        .iter()
        .map(|r| r.iter().map(|x| 2 * x).collect())
        .collect();
    assert_eq!(matrix(&twice["confusion"]), doubled);
}

#[test]
fn probability_figures_are_reported_for_logistic_models_only() {
    // (Hinge models get them once calibrated: see tests/calibrate.rs.)
    let t = tmp();
    for (name, ingest_extra, loss, has) in [
        ("bl", vec!["--positive", "spam"], "logistic", true),
        ("bh", vec!["--positive", "spam"], "hinge", false),
        ("ml", vec![], "logistic", true),
        ("mh", vec![], "hinge", false),
    ] {
        let model = fixture_model(t.path(), name, &ingest_extra, &["--loss", loss]);
        let dir = t.path().join(name);
        for data in [s(&dir), s(&fixture("inbox.tsv"))] {
            let m = eval_json(&model, &[data], &[]);
            if has {
                let l = f(&m["log_loss"]);
                assert!(l > 0.0 && l.is_finite(), "{name}: {l}");
                // A trained model beats always saying ½: ln 2.
                assert!(l < std::f64::consts::LN_2, "{name}: {l}");
                let b = f(&m["brier"]);
                assert!(b > 0.0 && b < 0.25, "{name}: Brier {b}");
                let e = f(&m["expected_calibration_error"]);
                assert!((0.0..1.0).contains(&e), "{name}: ECE {e}");
            } else {
                for key in ["log_loss", "brier", "expected_calibration_error"] {
                    assert!(m[key].is_null(), "{name} {data}: {key} {}", m[key]);
                }
            }
        }
    }
}

#[test]
fn unknown_labels_and_unlabelled_records_are_not_counted() {
    let t = tmp();
    let model = fixture_model(t.path(), "d", &[], &[]);
    let input = t.path().join("more.tsv");
    let mut text = fixture_bytes("inbox.tsv");
    text.extend_from_slice(b"charter\tCan we charter the Morning Tide for forty walkers?\n");
    text.extend_from_slice(b"spam\t!!! ???\n");
    std::fs::write(&input, &text).unwrap();
    let o = tamis(["eval", s(&model), s(&input), "--json"]);
    o.ok()
        .stderr_has("1 records carry labels the model does not know");
    let m: Value = serde_json::from_str(&o.stdout).unwrap();
    assert_eq!(m["rows"], 300);
    assert_eq!(m["skipped"], 2);
    // Nothing labelled at all.
    let bare = t.path().join("bare.tsv");
    std::fs::write(&bare, b"Is the ferry running today\nwhere is my umbrella\n").unwrap();
    tamis(["eval", s(&model), s(&bare)])
        .fails()
        .stderr_has("no labelled record");
}

#[test]
fn datasets_that_differ_from_the_model_are_refused() {
    let t = tmp();
    let model = fixture_model(t.path(), "d", &[], &[]);
    let inbox = fixture("inbox.tsv");
    // Other hashing settings.
    for (name, extra) in [
        ("buckets", vec!["--log2-buckets", "17"]),
        ("ngrams", vec!["--log2-buckets", "16", "--ngrams", "1"]),
        ("seed", vec!["--log2-buckets", "16", "--seed", "2"]),
    ] {
        let dir = t.path().join(name);
        let mut a = extra.clone();
        a.push("-q");
        ingest(&[&inbox], &dir, &a).ok();
        let o = tamis(["eval", s(&model), s(&dir)]);
        o.fails()
            .stderr_has(s(&dir))
            .stderr_has("hashing settings differ from the model's");
        assert_eq!(o.stdout, "");
    }
    // The same settings, the labels in another order (first seen last).
    let reversed = t.path().join("reversed.tsv");
    let text = String::from_utf8(fixture_bytes("inbox.tsv")).unwrap();
    let mut lines: Vec<&str> = text.lines().collect();
    lines.reverse();
    std::fs::write(&reversed, lines.join("\n") + "\n").unwrap();
    let dir = t.path().join("reversed");
    ingest(&[&reversed], &dir, &["--log2-buckets", "16", "-q"]).ok();
    assert_ne!(
        manifest(&dir)
            .labels
            .iter()
            .map(|l| l.name.clone())
            .collect::<Vec<_>>(),
        strings(&model_meta(&model)["labels"])
    );
    tamis(["eval", s(&model), s(&dir)])
        .fails()
        .stderr_has(s(&dir))
        .stderr_has("labels");
    // A label the model does not know.
    let extra = t.path().join("extra.tsv");
    std::fs::write(
        &extra,
        "charter\tCan we charter the Morning Tide for forty walkers from Osk?\n".repeat(3),
    )
    .unwrap();
    let dir = t.path().join("extra");
    ingest(&[&inbox, &extra], &dir, &["--log2-buckets", "16", "-q"]).ok();
    tamis(["eval", s(&model), s(&dir), "--split", "all"])
        .fails()
        .stderr_has("charter");
    // A split without rows.
    let dir = t.path().join("novalid");
    ingest(
        &[&inbox],
        &dir,
        &["--log2-buckets", "16", "--validation", "0", "-q"],
    )
    .ok();
    tamis(["eval", s(&model), s(&dir)])
        .fails()
        .stderr_has("no rows in the chosen split");
    assert_eq!(
        eval_json(&model, &[s(&dir)], &["--split", "train"])["rows"],
        300
    );
}

#[test]
fn a_damaged_shard_is_named() {
    let t = tmp();
    let model = fixture_model(t.path(), "d", &[], &[]);
    let dir = t.path().join("d");
    let m = manifest(&dir);
    let e = m
        .shards
        .iter()
        .filter(|e| e.split == tamis::dataset::Split::Validation)
        .max_by_key(|e| e.rows)
        .unwrap();
    let shard = dir.join(&e.file);
    let good = std::fs::read(&shard).unwrap();
    flip_in_section(&shard, SEC_VALUES);
    tamis(["eval", s(&model), s(&dir)])
        .fails()
        .stderr_has(&shard.display().to_string())
        .stderr_has("values");
    std::fs::write(&shard, &good[..good.len() - 64]).unwrap();
    tamis(["eval", s(&model), s(&dir)])
        .fails()
        .stderr_has(&shard.display().to_string());
    // The training split does not read it.
    eval_json(&model, &[s(&dir)], &["--split", "train"]);
    std::fs::write(&shard, &good).unwrap();
    eval_json(&model, &[s(&dir)], &[]);
}

#[test]
fn help_explains_every_option() {
    assert_help_explains_everything(&["eval"]);
}

/// The report parsed with an HTML5 parser (the `scraper` crate, which uses the
/// html5ever tree builder of the WHATWG parsing algorithm): the six figures in
/// order, one `<svg>` each and no other, no script, nothing fetched from
/// elsewhere, the key figures of `--json` in the table, labels escaped.
fn check_report(path: &Path, m: &Value, labels: &[String]) {
    let text = std::fs::read_to_string(path).unwrap();
    let doc = scraper::Html::parse_document(&text);
    assert!(doc.errors.is_empty(), "HTML parse errors: {:?}", doc.errors);
    let sel = |s: &str| scraper::Selector::parse(s).unwrap();
    let ids: Vec<&str> = doc
        .select(&sel("figure"))
        .map(|f| f.value().attr("id").unwrap())
        .collect();
    assert_eq!(
        ids,
        [
            "roc",
            "pr",
            "histograms",
            "confusion",
            "reliability",
            "training"
        ]
    );
    for f in doc.select(&sel("figure")) {
        let n = f.select(&sel("svg")).count();
        assert_eq!(n, 1, "figure {:?} holds {n} svg", f.value().attr("id"));
        // Something is drawn in it.
        assert!(f.select(&sel("svg polyline, svg path, svg rect")).count() > 3);
    }
    assert_eq!(doc.select(&sel("svg")).count(), 6);
    assert_eq!(doc.select(&sel("script")).count(), 0);
    let external: Vec<_> = doc.select(&sel("[src], [href], link")).collect();
    assert!(external.is_empty(), "external references {external:?}");
    let rest = text.replace("xmlns=\"http://www.w3.org/2000/svg\"", "");
    assert!(!rest.contains("http:") && !rest.contains("https:") && !rest.contains("url("));
    let cells: Vec<String> = doc
        .select(&sel("td"))
        .map(|c| c.text().collect::<String>())
        .collect();
    assert!(cells.contains(&format!("{:.4}", f(&m["accuracy"]))));
    assert!(cells.contains(&format!("{:.4}", f(&m["roc_auc"]))));
    // Every class is named in the confusion grid.
    let grid: String = doc
        .select(&sel("figure#confusion svg text"))
        .map(|t| t.text().collect::<String>())
        .collect();
    for l in labels {
        assert!(grid.contains(l.as_str()), "{l} missing from the grid");
    }
}

#[test]
fn the_report_has_one_svg_per_plot() {
    let t = tmp();
    for (name, ingest_extra) in [("multi", vec![]), ("binary", vec!["--positive", "spam"])] {
        let model = fixture_model(t.path(), name, &ingest_extra, &[]);
        let dir = t.path().join(name);
        let page = t.path().join(format!("{name}.html"));
        let o = tamis(["eval", s(&model), s(&dir), "--json", "--report", s(&page)]);
        o.ok().stderr_has("wrote");
        let m: Value = serde_json::from_str(&o.stdout).unwrap();
        let labels = strings(&m["confusion_labels"]);
        check_report(&page, &m, &labels);
        // On raw text too, and no temporary file is left beside it.
        let page2 = t.path().join(format!("{name}-raw.html"));
        let o = tamis([
            "eval",
            s(&model),
            s(&fixture("inbox.tsv")),
            "--report",
            s(&page2),
            "--json",
        ]);
        o.ok();
        let m: Value = serde_json::from_str(&o.stdout).unwrap();
        check_report(&page2, &m, &labels);
    }
    let left: Vec<String> = std::fs::read_dir(t.path())
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n.contains(".tmp-"))
        .collect();
    assert!(left.is_empty(), "{left:?}");
    // A label that needs escaping stays text.
    let tsv = t.path().join("odd.tsv");
    std::fs::write(
        &tsv,
        "<b>&co\tclaim your free prize now\nferry\tthe ferry timetable for the pier\n".repeat(40),
    )
    .unwrap();
    let dir = t.path().join("odd");
    ingest(&[&tsv], &dir, &["--validation", "0", "-q"]).ok();
    let model = t.path().join("odd.tmm");
    train(&dir, &model, &["--epochs", "2", "-q"]).ok();
    let page = t.path().join("odd.html");
    let o = tamis([
        "eval",
        s(&model),
        s(&dir),
        "--split",
        "train",
        "--json",
        "--report",
        s(&page),
    ]);
    o.ok();
    let m: Value = serde_json::from_str(&o.stdout).unwrap();
    check_report(&page, &m, &strings(&m["confusion_labels"]));
    assert!(!std::fs::read_to_string(&page).unwrap().contains("<b>&co"));
}

#[test]
fn scores_that_overflow_are_refused_naming_where() {
    // Invented ferry-inbox records with two numeric fields: `links` goes with
    // spam, `crossings` with the rest. Raw counts keep the values as given.
    let t = tmp();
    let mut text = String::new();
    for i in 0..400 {
        let spam = i % 2 == 0;
        let (label, words, links, crossings) = if spam {
            ("spam", "claim your prize now", 1 + i % 3, 0)
        } else {
            ("other", "when does the Osk ferry leave", 0, 1 + i % 3)
        };
        text.push_str(&format!(
            "{{\"label\":\"{label}\",\"text\":\"{words} w{}\",\"links\":{links},\"crossings\":{crossings}}}\n",
            i % 37
        ));
    }
    let input = t.path().join("inbox.jsonl");
    std::fs::write(&input, &text).unwrap();
    let fields = [
        "--format",
        "jsonl",
        "--numeric-field",
        "links",
        "--numeric-field",
        "crossings",
        "--positive",
        "spam",
        "--raw-counts",
        "--log2-buckets",
        "12",
        "-q",
    ];
    let dir = t.path().join("d");
    ingest(&[&input], &dir, &fields).ok();
    let model = t.path().join("d.tmm");
    train(&dir, &model, &["-q"]).ok();
    // Finite values near the top of f32 overflow the products w·x: +inf from
    // one field and −inf from the other make the score NaN.
    let big = t.path().join("big.jsonl");
    std::fs::write(
        &big,
        "{\"label\":\"spam\",\"text\":\"claim your prize\",\"links\":1,\"crossings\":0}\n\
         {\"label\":\"other\",\"text\":\"ferry\",\"links\":3.4e38,\"crossings\":3.4e38}\n",
    )
    .unwrap();
    tamis_limited(&["eval", s(&model), s(&big)], 2_000_000)
        .fails()
        .stderr_has(&format!("{}:2", big.display()))
        .stderr_has("not finite");
    // The same rows in a dataset's validation split.
    let ds = t.path().join("big");
    let mut a = fields.to_vec();
    a.extend_from_slice(&["--validation", "0.9999"]);
    ingest(&[&big], &ds, &a).ok();
    let shard = manifest(&ds)
        .shards
        .iter()
        .find(|e| e.split == tamis::dataset::Split::Validation)
        .map(|e| ds.join(&e.file))
        .unwrap();
    for cmd in [
        vec!["eval", s(&model), s(&ds)],
        vec!["calibrate", s(&model), s(&ds), "--min-recall", "0.5"],
    ] {
        tamis_limited(&cmd, 2_000_000)
            .fails()
            .stderr_has(&shard.display().to_string())
            .stderr_has("not finite");
    }
}

/// The report never replaces what it reports on: neither the model nor a raw
/// input file, however the path is spelt; both stay as they were.
#[test]
fn the_report_is_refused_over_its_own_inputs() {
    let t = tmp();
    let (_, model) = spam_model(t.path(), "r", "hinge");
    let tsv = t.path().join("new.tsv");
    synth_tsv(&tsv, 200, 5);
    let (model_bytes, tsv_bytes) = (std::fs::read(&model).unwrap(), std::fs::read(&tsv).unwrap());
    let sub = t.path().join("sub");
    std::fs::create_dir(&sub).unwrap();
    let roundabout = sub.join("..").join(tsv.file_name().unwrap());
    for report in [&model, &tsv, &roundabout] {
        tamis(["eval", s(&model), s(&tsv), "--report", s(report)])
            .fails()
            .stderr_has("cannot be written over its own input");
    }
    assert_eq!(std::fs::read(&model).unwrap(), model_bytes);
    assert_eq!(std::fs::read(&tsv).unwrap(), tsv_bytes);
    // Elsewhere the report is written.
    let page = t.path().join("page.html");
    tamis(["eval", s(&model), s(&tsv), "--report", s(&page)]).ok();
    assert!(std::fs::read_to_string(&page).unwrap().contains("<svg"));
}
