//! Replicas (`train --replicas R --sync-every ROWS`), end to end through the
//! binary: the model depends on the replicas but not on the threads, one
//! replica is the plain path, the settings are recorded and checked, and mixed
//! replicas reach what a single copy reaches when the data is plentiful. Kills
//! between two mixes are in `tests/checkpoint.rs`.

mod common;

use std::path::{Path, PathBuf};

use common::*;

/// `rows` invented messages ingested as a binary task (spam or not) with
/// `2^log2` buckets.
fn spam_dataset(dir: &Path, name: &str, rows: u64, log2: &str) -> PathBuf {
    let tsv = dir.join(format!("{name}.tsv"));
    synth_tsv(&tsv, rows, 21);
    let out = dir.join(name);
    ingest(
        &[&tsv],
        &out,
        &["--positive", "spam", "--log2-buckets", log2, "-q"],
    )
    .ok();
    out
}

fn settings(path: &Path) -> serde_json::Value {
    model_meta(path)["training"].clone()
}

/// Several mixes inside each epoch, and an odd replica count (so that some
/// rounds end with a replica that holds): the model file is the same bytes
/// with 1 and 2 threads.
#[test]
fn the_threads_do_not_change_a_replicated_model() {
    let t = tmp();
    let ds = spam_dataset(t.path(), "ds", 4000, "14");
    for r in ["2", "3"] {
        let mut files = Vec::new();
        for j in ["1", "2"] {
            let m = t.path().join(format!("r{r}-j{j}.tmm"));
            train(
                &ds,
                &m,
                &[
                    "--replicas",
                    r,
                    "--sync-every",
                    "500",
                    "--batch",
                    "16",
                    "-j",
                    j,
                    "-q",
                ],
            )
            .ok();
            files.push(std::fs::read(&m).unwrap());
        }
        assert!(files[0] == files[1], "{r} replicas: -j 1 and -j 2 differ");
        let st = settings(&t.path().join(format!("r{r}-j1.tmm")));
        assert_eq!(st["replicas"], r.parse::<u64>().unwrap());
        assert_eq!(st["sync_every"], 500);
    }
}

/// One replica is the single-copy path: the same file as a run that leaves
/// `--replicas` to the default on a dataset below the default's threshold;
/// two replicas give other weights and record their mixing interval.
#[test]
fn one_replica_is_the_plain_path_and_the_settings_are_recorded() {
    let t = tmp();
    let ds = spam_dataset(t.path(), "ds", 3000, "14");
    let (plain, one, two) = (
        t.path().join("plain.tmm"),
        t.path().join("one.tmm"),
        t.path().join("two.tmm"),
    );
    train(&ds, &plain, &["-q"]).ok();
    train(&ds, &one, &["--replicas", "1", "-q"]).ok();
    train(&ds, &two, &["--replicas", "2", "-q"]).ok();
    assert!(std::fs::read(&plain).unwrap() == std::fs::read(&one).unwrap());
    assert_eq!(settings(&plain)["replicas"], 1);
    assert_eq!(settings(&plain)["sync_every"], 0);
    let st = settings(&two);
    assert_eq!(st["replicas"], 2);
    // The default interval: about 16 nonzeros per feature per replica, in
    // whole rounds of 2 × 64 rows.
    let every = st["sync_every"].as_u64().unwrap();
    assert!(every > 0 && every.is_multiple_of(128), "sync_every {every}");
    let m = manifest(&ds);
    let nnz_per_row = m.nnz() as f64 / (m.train_rows() + m.validation_rows()) as f64;
    let want = 2.0 * 16.0 * (1 << 14) as f64 / nnz_per_row;
    assert!(
        (every as f64 - want).abs() <= 128.0,
        "sync_every {every}, expected about {want:.0}"
    );
    let w = |p: &Path| f32_section(&std::fs::read(p).unwrap(), MODEL_WEIGHTS);
    assert_ne!(w(&one), w(&two));
}

/// Two mixed replicas act like one copy with a batch twice as large (the mean
/// of two copies that each took a step of B rows from the same weights is a
/// step of 2B rows): their validation accuracy is within 0.5 points of one
/// copy's with the default batch, and their primal objective within 3% of one
/// copy's with batch 2B. Measured when this test was written, 5 epochs on
/// these 135,000 training rows: objective 0.0936 (one copy, B = 64), 0.1081
/// (two replicas), 0.1115 (one copy, B = 128); accuracy 97.18% and 97.13%.
/// The gap to B = 64 is the price of the larger batch, and shrinks with more
/// rows or epochs (README, "Replicas").
#[test]
fn mixed_replicas_act_like_one_copy_with_a_larger_batch() {
    let t = tmp();
    let ds = spam_dataset(t.path(), "ds", 150_000, "18");
    let lambda = 1e-5;
    let run = |name: &str, args: &[&str]| {
        let m = t.path().join(format!("{name}.tmm"));
        let mut a = vec!["--epochs", "5", "-q"];
        a.extend_from_slice(args);
        train(&ds, &m, &a).ok();
        let e = eval_json(&m, &[s(&ds)], &[]);
        (
            e["accuracy"].as_f64().unwrap(),
            binary_objective_and_accuracy(&m, &ds, lambda).0,
        )
    };
    let (acc1, obj1) = run("one", &["--replicas", "1"]);
    let (acc_big, obj_big) = run("one-b128", &["--replicas", "1", "--batch", "128"]);
    let (acc2, obj2) = run("two", &["--replicas", "2"]);
    eprintln!(
        "one copy: accuracy {acc1:.4}, objective {obj1:.5}; batch 128: {acc_big:.4}, \
         {obj_big:.5}; two replicas: {acc2:.4}, {obj2:.5}"
    );
    assert!(
        (acc1 - acc2).abs() <= 0.005,
        "validation accuracy {acc1} with one copy, {acc2} with two replicas"
    );
    assert!(
        obj2 <= obj_big * 1.03,
        "objective {obj2} with two replicas, {obj_big} with one copy of batch 128"
    );
}

/// Out-of-range settings are refused before anything is written; a resume
/// refuses replicas or an interval that contradict the checkpoint's.
#[test]
fn bad_replica_settings_are_refused() {
    let t = tmp();
    let ds = spam_dataset(t.path(), "ds", 1500, "12");
    let m = t.path().join("m.tmm");
    for (args, says) in [
        (
            &["--replicas", "0"][..],
            "--replicas must be in 1..=64, got 0",
        ),
        (
            &["--replicas", "65"][..],
            "--replicas must be in 1..=64, got 65",
        ),
        (
            &["--sync-every", "0"][..],
            "--sync-every must be at least 1 row",
        ),
    ] {
        train(&ds, &m, args).fails().stderr_has(says);
        assert!(!m.exists(), "{args:?} wrote a model");
    }
    // A checkpoint of a replicated run, then resumes that contradict it.
    let ck = t.path().join("m.tmc");
    train(
        &ds,
        &m,
        &[
            "--replicas",
            "2",
            "--sync-every",
            "256",
            "--epochs",
            "1",
            "--checkpoint",
            s(&ck),
            "-q",
        ],
    )
    .ok();
    tamis(["train", "--resume", s(&ck), "--replicas", "3"])
        .fails()
        .stderr_has("--replicas 3 (the checkpoint has 2)");
    tamis(["train", "--resume", s(&ck), "--sync-every", "512"])
        .fails()
        .stderr_has("--sync-every 512 (the checkpoint has 256)");
    tamis(["verify", s(&ck)]).ok();
}
