//! End-to-end tests of `tamis calibrate`: each target is met by the threshold
//! with the best other side (checked against every distinct validation score
//! by brute force), the reported counts and Wilson intervals agree with a
//! recount, the model stores the thresholds and Platt scaling and `score` and
//! `eval` apply them; an unmeetable target shows the closest point, exits 1 and
//! leaves the model alone; validation splits lacking a class are refused.

mod common;

use common::*;
use serde_json::Value;
use std::path::{Path, PathBuf};
use tamis::dataset::Split;

fn f(v: &Value) -> f64 {
    v.as_f64().unwrap_or_else(|| panic!("not a number: {v}"))
}

/// Counts `(tp, fp, tn, fn)` of labelling positive the scores `≥ t`.
fn counts(v: &[(f64, bool)], t: f64) -> (u64, u64, u64, u64) {
    let mut c = (0, 0, 0, 0);
    for &(s, y) in v {
        match (y, s >= t) {
            (true, true) => c.0 += 1,
            (false, true) => c.1 += 1,
            (false, false) => c.2 += 1,
            (true, false) => c.3 += 1,
        }
    }
    c
}

/// The Wilson score interval at 95% (Wilson 1927; formula from memory):
/// `(p + z²/2n ± z√(p(1−p)/n + z²/4n²)) / (1 + z²/n)`, `z = 1.959964`.
fn wilson(k: u64, n: u64) -> (f64, f64) {
    let (k, n, z) = (k as f64, n as f64, 1.959964f64);
    let p = k / n;
    let c = (p + z * z / (2.0 * n)) / (1.0 + z * z / n);
    let h = z / (1.0 + z * z / n) * (p * (1.0 - p) / n + z * z / (4.0 * n * n)).sqrt();
    (c - h, c + h)
}

#[test]
fn each_target_is_met_with_the_best_other_side() {
    let t = tmp();
    let (dir, model) = spam_model(t.path(), "d", "hinge");
    let v: Vec<(f64, bool)> = split_scores(&model, &dir, Split::Validation)
        .into_iter()
        .map(|(s, l)| (s[0], l == "spam"))
        .collect();
    let mut distinct: Vec<f64> = v.iter().map(|x| x.0).collect();
    distinct.sort_by(|a, b| b.total_cmp(a));
    distinct.dedup();
    let rate = |a: u64, b: u64| a as f64 / (a + b) as f64;
    for (flag, value) in [
        ("--max-false-positive-rate", 0.01),
        ("--min-precision", 0.98),
        ("--min-recall", 0.9),
    ] {
        let out = t.path().join("c.tmm");
        let (o, rep) = calibrate_json(&model, &dir, &[flag, &value.to_string(), "--out", s(&out)]);
        o.ok();
        assert_eq!(rep["met"], true, "{flag}");
        assert_eq!(rep["rows"].as_u64().unwrap(), v.len() as u64);
        let p = &rep["models"][0]["point"];
        let th = f(&p["threshold"]);
        let (tp, fp, tn, fn_) = counts(&v, th);
        assert_eq!(p["counts"]["tp"], tp);
        assert_eq!(p["counts"]["fp"], fp);
        assert_eq!(p["counts"]["tn"], tn);
        assert_eq!(p["counts"]["fn"], fn_);
        let meets = |c: (u64, u64, u64, u64)| match flag {
            "--max-false-positive-rate" => rate(c.1, c.2) <= value,
            "--min-precision" => rate(c.0, c.1) >= value,
            _ => rate(c.0, c.3) >= value,
        };
        assert!(meets((tp, fp, tn, fn_)), "{flag}: {tp} {fp} {tn} {fn_}");
        // No other threshold meeting the target does better on the other side.
        for &d in &distinct {
            let c = counts(&v, d);
            if c.0 == 0 || !meets(c) {
                continue;
            }
            if flag == "--min-recall" {
                assert!(c.1 >= fp, "{flag}: {d} has fewer false positives than {th}");
            } else {
                assert!(c.0 <= tp, "{flag}: {d} has more true positives than {th}");
            }
        }
        // Rates and their Wilson intervals.
        for (key, k, n) in [
            ("precision", tp, tp + fp),
            ("recall", tp, tp + fn_),
            ("false_positive_rate", fp, fp + tn),
        ] {
            let r = &p[key];
            let (lo, hi) = wilson(k, n);
            assert!((f(&r["value"]) - k as f64 / n as f64).abs() < 1e-12);
            assert!((f(&r["low"]) - lo.max(0.0)).abs() < 1e-6, "{key}");
            assert!((f(&r["high"]) - hi.min(1.0)).abs() < 1e-6, "{key}");
        }
        // Stored, and applied by eval on the same split.
        let meta = model_meta(&out);
        assert_eq!(f(&meta["calibration"]["thresholds"][0]), th);
        let m = eval_json(&out, &[s(&dir)], &[]);
        assert_eq!(f(&m["thresholds"][0]), th);
        assert!((f(&m["precision"]) - rate(tp, fp)).abs() < 1e-12);
        assert!((f(&m["recall"]) - rate(tp, fn_)).abs() < 1e-12);
        assert!((f(&m["false_positive_rate"]) - rate(fp, tn)).abs() < 1e-12);
    }
}

/// Generated messages of six classes (3,000 rows, `seed`), ingested with a 30%
/// validation split and trained for 3 epochs: the input, dataset and model.
fn six_class_model(work: &Path, seed: u64) -> (PathBuf, PathBuf, PathBuf) {
    let tsv = work.join("m.tsv");
    synth_tsv(&tsv, 3000, seed);
    let dir = work.join("m");
    ingest(
        &[&tsv],
        &dir,
        &["--log2-buckets", "18", "--validation", "0.3", "-q"],
    )
    .ok();
    let model = work.join("m.tmm");
    train(&dir, &model, &["--epochs", "3", "-q"]).ok();
    (tsv, dir, model)
}

/// The class of each model, in model order, from a calibration report.
fn report_labels(rep: &Value) -> Vec<String> {
    rep["models"]
        .as_array()
        .unwrap()
        .iter()
        .map(|m| m["label"].as_str().unwrap().to_string())
        .collect()
}

#[test]
fn one_vs_rest_thresholds_leave_rows_undecided() {
    let t = tmp();
    let (tsv, dir, model) = six_class_model(t.path(), 9);
    let (o, rep) = calibrate_json(&model, &dir, &["--min-precision", "0.99"]);
    o.ok();
    let labels = report_labels(&rep);
    assert_eq!(labels.len(), 6);
    let th: Vec<f64> = model_meta(&model)["calibration"]["thresholds"]
        .as_array()
        .unwrap()
        .iter()
        .map(f)
        .collect();
    // Each class's point, recounted one-vs-rest.
    let v = split_scores(&model, &dir, Split::Validation);
    for (c, m) in rep["models"].as_array().unwrap().iter().enumerate() {
        let ovr: Vec<(f64, bool)> = v.iter().map(|(s, l)| (s[c], *l == labels[c])).collect();
        let (tp, fp, _, _) = counts(&ovr, th[c]);
        assert_eq!(m["point"]["counts"]["tp"], tp);
        assert!(tp as f64 / (tp + fp) as f64 >= 0.99);
    }
    // The decision rule, recomputed: the highest score among the classes at or
    // above their threshold, else undecided.
    let mut undecided = 0u64;
    for (s, _) in &v {
        let best = (0..6)
            .filter(|&c| s[c] >= th[c])
            .max_by(|&a, &b| s[a].total_cmp(&s[b]));
        undecided += best.is_none() as u64;
    }
    assert!(undecided > 0);
    let m = eval_json(&model, &[s(&dir)], &[]);
    let got: u64 = m["undecided"]
        .as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_u64().unwrap())
        .sum();
    assert_eq!(got, undecided);
    // A low threshold for one class only: rows can now go to a class that is
    // not the top-scoring one.
    let (o, _) = calibrate_json(
        &model,
        &dir,
        &["--positive", "accessibility", "--min-recall", "0.99"],
    );
    o.ok();
    let th2: Vec<f64> = model_meta(&model)["calibration"]["thresholds"]
        .as_array()
        .unwrap()
        .iter()
        .map(f)
        .collect();
    let acc = labels.iter().position(|l| l == "accessibility").unwrap();
    for c in 0..6 {
        if c == acc {
            assert!(th2[c] < th[c]);
        } else {
            assert_eq!(th2[c], th[c], "other classes keep their thresholds");
        }
    }
    let th = th2;
    // score prints the outcome under its own name, and for a decided row the
    // margin of the class it chose; recomputed here from the model's weights.
    let o = score(&model, &[s(&tsv)]);
    let printed = parse_scores(&o.stdout);
    let m = tamis::model::Model::load(&model).unwrap();
    let mut feat = tamis::features::Featurizer::new(&m.meta.features).unwrap();
    let text = std::fs::read(&tsv).unwrap();
    let lines: Vec<&[u8]> = text
        .split(|&b| b == b'\n')
        .filter(|l| !l.is_empty())
        .collect();
    assert_eq!(printed.len(), lines.len());
    let (mut seen_undecided, mut seen_other_than_top) = (0, 0);
    for (line, p) in lines.iter().zip(&printed) {
        let Scored::Row { label, score, .. } = p else {
            panic!("{p:?}")
        };
        let tab = line.iter().position(|&b| b == b'\t').unwrap();
        feat.begin_row();
        feat.add_text(0, &line[tab + 1..]);
        let (mut idx, mut val) = (Vec::new(), Vec::new());
        feat.finish_row(&mut idx, &mut val);
        let mut sc = Vec::new();
        m.scores(
            &tamis::shard::Row {
                label: 0,
                indices: &idx,
                values: &val,
            },
            &mut sc,
        );
        let top = (0..6).max_by(|&a, &b| sc[a].total_cmp(&sc[b])).unwrap();
        let chosen = (0..6)
            .filter(|&c| sc[c] >= th[c])
            .max_by(|&a, &b| sc[a].total_cmp(&sc[b]));
        match chosen {
            Some(c) => {
                assert_eq!(label, &labels[c]);
                assert!((score - sc[c]).abs() < 1e-5, "{score} vs {}", sc[c]);
                seen_other_than_top += (c != top) as u32;
            }
            None => {
                assert_eq!(label, "?undecided");
                assert!((score - sc[top]).abs() < 1e-5);
                seen_undecided += 1;
            }
        }
    }
    assert!(seen_undecided > 0);
    assert!(
        seen_other_than_top > 0,
        "no row exercised the rule's second class"
    );
}

/// Calibrating one class of a model that had no thresholds leaves the other
/// classes without one: they compete by score alone, so no row is undecided,
/// and the calibrated class wins a row only at or above its threshold.
#[test]
fn one_class_calibrated_alone_leaves_the_others_competing_by_score() {
    let t = tmp();
    let (_, dir, model) = six_class_model(t.path(), 11);
    // A strict target, so that some rows whose top score is spam's stay below
    // its threshold.
    let (o, rep) = calibrate_json(
        &model,
        &dir,
        &["--positive", "spam", "--max-false-positive-rate", "0.001"],
    );
    o.ok();
    let labels = report_labels(&rep);
    let spam = labels.iter().position(|l| l == "spam").unwrap();
    let cal = &model_meta(&model)["calibration"];
    let chosen: Vec<bool> = cal["chosen"]
        .as_array()
        .unwrap()
        .iter()
        .map(|b| b.as_bool().unwrap())
        .collect();
    assert_eq!(chosen, (0..6).map(|c| c == spam).collect::<Vec<_>>());
    let th = f(&cal["thresholds"][spam]);
    // The rule recomputed on the validation rows: the highest score among spam
    // (when at or above its threshold) and every other class.
    let v = split_scores(&model, &dir, Split::Validation);
    let (mut right, mut held_back, mut old_rule_undecided) = (0u64, 0u64, 0u64);
    for (sc, truth) in &v {
        let top = (0..6).max_by(|&a, &b| sc[a].total_cmp(&sc[b])).unwrap();
        let pick = (0..6)
            .filter(|&c| c != spam || sc[c] >= th)
            .max_by(|&a, &b| sc[a].total_cmp(&sc[b]))
            .expect("a class without a threshold always competes");
        right += (labels[pick] == *truth) as u64;
        held_back += (top == spam && pick != spam) as u64;
        // The rule before: the other classes held to threshold 0.
        old_rule_undecided += (0..6).all(|c| sc[c] < if c == spam { th } else { 0.0 }) as u64;
    }
    assert!(held_back > 0, "no row exercised the spam threshold");
    assert!(
        old_rule_undecided > 0,
        "no row would have been undecided under threshold 0"
    );
    let m = eval_json(&model, &[s(&dir)], &[]);
    let undecided: u64 = m["undecided"]
        .as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_u64().unwrap())
        .sum();
    assert_eq!(undecided, 0);
    assert_eq!(m["rows"], v.len() as u64);
    let acc = right as f64 / v.len() as f64;
    assert!(
        (f(&m["accuracy"]) - acc).abs() < 1e-12,
        "{} vs {acc}",
        m["accuracy"]
    );
    // Only spam's threshold is reported; the others are null.
    for c in 0..6 {
        assert_eq!(
            m["thresholds"][c].is_null(),
            c != spam,
            "{}",
            m["thresholds"]
        );
    }
    assert_eq!(f(&m["thresholds"][spam]), th);
    // A second calibration of another class keeps spam's threshold and marks
    // both as chosen.
    let (o, _) = calibrate_json(
        &model,
        &dir,
        &["--positive", "schedule", "--min-precision", "0.9"],
    );
    o.ok();
    let cal = &model_meta(&model)["calibration"];
    let sched = labels.iter().position(|l| l == "schedule").unwrap();
    for c in 0..6 {
        assert_eq!(cal["chosen"][c], c == spam || c == sched, "{cal}");
    }
    assert_eq!(f(&cal["thresholds"][spam]), th);
}

#[test]
fn an_unmeetable_target_shows_the_closest_point_and_changes_nothing() {
    let t = tmp();
    // Every text is the same words (spaces differ, so the split differs), half
    // spam: every row scores the same, so no threshold separates anything.
    let mut text = String::new();
    for i in 0..400 {
        let label = if i % 2 == 0 { "spam" } else { "ham" };
        text.push_str(&format!("{label}\tferry{}timetable\n", " ".repeat(1 + i)));
    }
    let tsv = t.path().join("same.tsv");
    std::fs::write(&tsv, text).unwrap();
    let dir = t.path().join("same");
    ingest(
        &[&tsv],
        &dir,
        &[
            "--positive",
            "spam",
            "--validation",
            "0.3",
            "--log2-buckets",
            "12",
            "-q",
        ],
    )
    .ok();
    let model = t.path().join("same.tmm");
    train(&dir, &model, &["--epochs", "2", "-q"]).ok();
    let bytes = std::fs::read(&model).unwrap();
    for (flag, value) in [
        ("--min-precision", "0.9"),
        ("--max-false-positive-rate", "0.1"),
    ] {
        let (o, rep) = calibrate_json(&model, &dir, &[flag, value]);
        o.fails()
            .stderr_has("cannot be met")
            .stderr_has("was not changed");
        assert_eq!(rep["met"], false);
        let p = &rep["models"][0]["point"];
        assert_eq!(p["met"], false);
        // The only reachable point labels every row positive.
        assert_eq!(p["counts"]["tn"], 0);
        assert_eq!(p["counts"]["fn"], 0);
        assert_eq!(std::fs::read(&model).unwrap(), bytes, "model changed");
    }
    // The printed form says so too.
    let o = tamis(["calibrate", s(&model), s(&dir), "--min-precision", "0.9"]);
    o.fails().stdout_has("target not met: closest point");
}

#[test]
fn validation_splits_without_both_classes_are_refused() {
    let t = tmp();
    // All validation rows are spam: the split has no negatives.
    let mut text = String::new();
    for i in 0..200 {
        text.push_str(&format!("ham\tthe ferry timetable for pier {i}\n"));
        text.push_str(&format!("spam\tclaim your free prize number {i}\n"));
    }
    let tsv = t.path().join("x.tsv");
    std::fs::write(&tsv, &text).unwrap();
    let dir = t.path().join("x");
    ingest(
        &[&tsv],
        &dir,
        &["--positive", "spam", "--validation", "0.1", "-q"],
    )
    .ok();
    let model = t.path().join("x.tmm");
    train(&dir, &model, &["--epochs", "2", "-q"]).ok();
    // A second dataset with the same settings whose validation rows hold one
    // class only: spam rows only.
    let spam_only: String = text
        .lines()
        .filter(|l| l.starts_with("spam"))
        .map(|l| format!("{l}\n"))
        .collect();
    let tsv2 = t.path().join("y.tsv");
    std::fs::write(&tsv2, format!("ham\tthe ferry timetable\n{spam_only}")).unwrap();
    let dir2 = t.path().join("y");
    ingest(
        &[&tsv2],
        &dir2,
        &["--positive", "spam", "--validation", "0.1", "-q"],
    )
    .ok();
    let rows = split_scores(&model, &dir2, Split::Validation);
    assert!(!rows.is_empty() && rows.iter().all(|r| r.1 == "spam"));
    tamis(["calibrate", s(&model), s(&dir2), "--min-recall", "0.5"])
        .fails()
        .stderr_has("only rows of the class")
        .stderr_has(s(&dir2));
    // No positive row in the validation split: many ham rows and one spam row,
    // whose text is picked so that the seeded split puts it in training.
    let ham: String = text
        .lines()
        .filter(|l| l.starts_with("ham"))
        .map(|l| format!("{l}\n"))
        .collect();
    let mut refused = false;
    for i in 0..20 {
        let dir4 = t.path().join(format!("w{i}"));
        let tsv4 = t.path().join(format!("w{i}.tsv"));
        std::fs::write(&tsv4, format!("{ham}spam\tclaim prize {i}\n")).unwrap();
        ingest(
            &[&tsv4],
            &dir4,
            &["--positive", "spam", "--validation", "0.1", "-q"],
        )
        .ok();
        if split_scores(&model, &dir4, Split::Validation)
            .iter()
            .any(|r| r.1 == "spam")
        {
            continue;
        }
        tamis([
            "calibrate",
            s(&model),
            s(&dir4),
            "--max-false-positive-rate",
            "0.1",
        ])
        .fails()
        .stderr_has("has no rows of the class \"spam\"");
        refused = true;
        break;
    }
    assert!(refused, "no candidate put the spam row in training");
    // No validation split at all.
    let dir3 = t.path().join("z");
    ingest(
        &[&tsv],
        &dir3,
        &["--positive", "spam", "--validation", "0", "-q"],
    )
    .ok();
    tamis(["calibrate", s(&model), s(&dir3)])
        .fails()
        .stderr_has("no rows in the chosen split");
    // Bad options.
    tamis(["calibrate", s(&model), s(&dir), "--min-precision", "1.5"])
        .fails()
        .stderr_has("--min-precision");
    tamis([
        "calibrate",
        s(&model),
        s(&dir),
        "--positive",
        "ham",
        "--min-recall",
        "0.5",
    ])
    .fails()
    .stderr_has("positive label is \"spam\"");
    let o = tamis([
        "calibrate",
        s(&model),
        s(&dir),
        "--min-recall",
        "0.5",
        "--min-precision",
        "0.5",
    ]);
    assert_eq!(o.code, Some(2), "two targets are a usage error");
}

#[test]
fn logistic_models_keep_their_probabilities() {
    let t = tmp();
    let (dir, model) = spam_model(t.path(), "l", "logistic");
    let (o, rep) = calibrate_json(&model, &dir, &["--max-false-positive-rate", "0.02"]);
    o.ok();
    assert!(rep["models"][0]["platt"].is_null());
    assert!(model_meta(&model)["calibration"]["platt"].is_null());
    tamis(["calibrate", s(&model), s(&dir)])
        .fails()
        .stderr_has("nothing to calibrate");
    // σ(score), as before calibration.
    let input = t.path().join("l.tsv");
    for r in parse_scores(&score(&model, &[s(&input)]).stdout)
        .iter()
        .take(50)
    {
        let Scored::Row {
            score, probability, ..
        } = r
        else {
            panic!()
        };
        let want = 1.0 / (1.0 + (-score).exp());
        assert!((probability.unwrap() - want).abs() < 2e-5);
    }
}

#[test]
fn calibration_is_an_optional_field_of_the_same_format() {
    let t = tmp();
    let (dir, model) = spam_model(t.path(), "v", "hinge");
    // An uncalibrated model carries no calibration key: exactly the metadata of
    // files written before calibration existed.
    let before = std::fs::read(&model).unwrap();
    assert_eq!(file_header(&before).version, 1);
    assert!(model_meta(&model).get("calibration").is_none());
    let out = t.path().join("c.tmm");
    let (o, _) = calibrate_json(&model, &dir, &["--min-recall", "0.9", "--out", s(&out)]);
    o.ok();
    assert_eq!(
        std::fs::read(&model).unwrap(),
        before,
        "--out leaves MODEL alone"
    );
    let after = std::fs::read(&out).unwrap();
    assert_eq!(file_header(&after).version, 1);
    for id in [MODEL_WEIGHTS, MODEL_BIASES] {
        assert_eq!(f32_section(&after, id), f32_section(&before, id));
    }
    let meta = model_meta(&out);
    assert_eq!(meta["calibration"]["target"]["min_recall"], 0.9);
    assert_eq!(
        meta["calibration"]["rows"],
        split_scores(&out, &dir, Split::Validation).len()
    );
    tamis(["verify", s(&out)]).ok();
    let left: Vec<String> = std::fs::read_dir(t.path())
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n.contains(".tmp-"))
        .collect();
    assert!(left.is_empty(), "{left:?}");
    // A calibration that does not fit the model is refused, not applied.
    let mut m = tamis::model::Model::load(&out).unwrap();
    m.meta.calibration.as_mut().unwrap().thresholds = Some(vec![0.0, 1.0]);
    let e = m.save(&t.path().join("bad.tmm")).unwrap_err();
    assert!(e.to_string().contains("2 thresholds"), "{e}");
    m.meta.calibration.as_mut().unwrap().thresholds = Some(vec![f64::NAN]);
    assert!(m.save(&t.path().join("bad.tmm")).is_err());
    // A full calibration writes no `chosen` flags; flags that do not fit the
    // model are refused.
    assert!(meta["calibration"].get("chosen").is_none());
    m.meta.calibration.as_mut().unwrap().thresholds = Some(vec![1.0]);
    m.meta.calibration.as_mut().unwrap().chosen = Some(vec![true, false]);
    let e = m.save(&t.path().join("bad.tmm")).unwrap_err();
    assert!(e.to_string().contains("2 chosen flags"), "{e}");
    m.meta.calibration.as_mut().unwrap().thresholds = None;
    m.meta.calibration.as_mut().unwrap().chosen = Some(vec![true]);
    assert!(m.save(&t.path().join("bad.tmm")).is_err());
}

#[test]
fn help_explains_every_option() {
    assert_help_explains_everything(&["calibrate"]);
}
