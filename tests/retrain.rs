//! Warm starts (`tamis train --init-from MODEL`): the daily retraining loop
//! with `ingest --append`, and the checks that keep a model from starting a
//! task it does not fit.

mod common;

use std::path::{Path, PathBuf};

use common::*;

fn day(dir: &Path, name: &str, rows: u64, seed: u64) -> PathBuf {
    let p = dir.join(format!("{name}.tsv"));
    synth_tsv(&p, rows, seed);
    p
}

fn accuracy(model: &Path, ds: &Path) -> f64 {
    eval_json(model, &[s(ds)], &[])["accuracy"]
        .as_f64()
        .unwrap()
}

/// Day one: ingest and train. Day two: append the new day and continue from
/// yesterday's model. The step counter continues, the average restarts, the
/// result is deterministic and at least as good as yesterday's model.
#[test]
fn the_daily_loop_continues_from_yesterdays_model() {
    let t = tmp();
    let ds = t.path().join("inbox");
    ingest(
        &[&day(t.path(), "day1", 6000, 1)],
        &ds,
        &["--log2-buckets", "16", "-q"],
    )
    .ok();
    let m1 = t.path().join("day1.tmm");
    train(&ds, &m1, &["--epochs", "3", "-q"]).ok();
    let steps1 = model_meta(&m1)["steps"].as_u64().unwrap();
    assert!(steps1 > 0);

    ingest(&[&day(t.path(), "day2", 3000, 2)], &ds, &["--append", "-q"]).ok();
    let m2 = t.path().join("day2.tmm");
    let o = train(&ds, &m2, &["--epochs", "2", "--init-from", s(&m1)]);
    o.ok();
    let meta = model_meta(&m2);
    assert_eq!(meta["training"]["init_from"]["model"], s(&m1));
    assert_eq!(meta["training"]["init_from"]["steps"], steps1);
    assert_eq!(
        meta["training"]["solver"]["average_from"], 0,
        "averaging from the first step"
    );
    // The counter continues: this run's steps come on top of yesterday's.
    let cold = t.path().join("cold.tmm");
    train(&ds, &cold, &["--epochs", "2", "-q"]).ok();
    let fresh_steps = model_meta(&cold)["steps"].as_u64().unwrap();
    assert_eq!(meta["steps"].as_u64().unwrap(), steps1 + fresh_steps);
    // Deterministic.
    let again = t.path().join("again.tmm");
    train(&ds, &again, &["--epochs", "2", "--init-from", s(&m1), "-q"]).ok();
    assert_eq!(std::fs::read(&m2).unwrap(), std::fs::read(&again).unwrap());
    // Not worse than yesterday's model on today's validation rows (a small
    // tolerance: the validation split grew with the new day).
    let (a1, a2) = (accuracy(&m1, &ds), accuracy(&m2, &ds));
    assert!(a2 >= a1 - 0.005, "day two {a2} vs day one {a1}");
}

/// A warm start of a new day's dataset (not appended) whose labels include one
/// the model never saw: that class starts from zero, the others from the model.
#[test]
fn a_new_label_starts_from_zero_and_known_ones_from_the_model() {
    let t = tmp();
    let ds1 = t.path().join("d1");
    ingest(
        &[&day(t.path(), "day1", 4000, 1)],
        &ds1,
        &["--log2-buckets", "14", "-q"],
    )
    .ok();
    let m1 = t.path().join("m1.tmm");
    train(&ds1, &m1, &["--epochs", "2", "-q"]).ok();
    // Day two: every tenth "feedback" message is now filed as "charter".
    let text = std::fs::read_to_string(day(t.path(), "raw2", 4000, 2)).unwrap();
    let mut n = 0;
    let relabelled: String = text
        .lines()
        .map(|l| {
            if l.starts_with("feedback\t") {
                n += 1;
                if n % 10 == 0 {
                    return format!("charter{}\n", &l["feedback".len()..]);
                }
            }
            format!("{l}\n")
        })
        .collect();
    let day2 = t.path().join("day2.tsv");
    std::fs::write(&day2, relabelled).unwrap();
    let ds2 = t.path().join("d2");
    ingest(&[&day2], &ds2, &["--log2-buckets", "14", "-q"]).ok();
    let m2 = t.path().join("m2.tmm");
    train(&ds2, &m2, &["--epochs", "1", "--init-from", s(&m1)])
        .ok()
        .stderr_has("class \"charter\" is new");
    let meta = model_meta(&m2);
    assert!(meta["model_labels"]
        .as_array()
        .unwrap()
        .iter()
        .any(|l| l == "charter"));
}

/// Settings that do not fit are refused with a message naming them.
#[test]
fn mismatched_models_are_refused() {
    let t = tmp();
    let raw = day(t.path(), "day1", 3000, 1);
    let ds = t.path().join("ds");
    ingest(&[&raw], &ds, &["--log2-buckets", "14", "-q"]).ok();
    let m = t.path().join("m.tmm");
    train(&ds, &m, &["--epochs", "1", "-q"]).ok();

    let other = t.path().join("other");
    ingest(&[&raw], &other, &["--log2-buckets", "12", "-q"]).ok();
    train(&other, &t.path().join("x.tmm"), &["--init-from", s(&m)])
        .fails()
        .stderr_has("hashing settings differ")
        .stderr_has("log2_buckets: 14 vs 12");

    let binary = t.path().join("binary");
    ingest(
        &[&raw],
        &binary,
        &["--log2-buckets", "14", "--positive", "spam", "-q"],
    )
    .ok();
    train(&binary, &t.path().join("x.tmm"), &["--init-from", s(&m)])
        .fails()
        .stderr_has("cannot warm-start a binary task from a one-vs-rest model");

    train(
        &ds,
        &t.path().join("x.tmm"),
        &["--init-from", s(&m), "--idf"],
    )
    .fails()
    .stderr_has("trained without --idf");

    // A damaged model is reported, not used.
    let bad = t.path().join("bad.tmm");
    std::fs::copy(&m, &bad).unwrap();
    flip_in_section(&bad, MODEL_WEIGHTS);
    train(&ds, &t.path().join("x.tmm"), &["--init-from", s(&bad)])
        .fails()
        .stderr_has("checksum mismatch in weights");
    assert!(!t.path().join("x.tmm").exists());
}
