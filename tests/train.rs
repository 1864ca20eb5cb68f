//! End-to-end tests of `tamis train`: the model file it writes, determinism
//! (same settings, same bytes, whatever the thread count), the per-epoch table
//! and early stopping, clear refusals of bad settings and damaged datasets, and
//! what the solver reaches on invented data whatever the input order and batch
//! size; class weights; and `tamis demo`, which trains, evaluates and scores.

mod common;

use std::collections::BTreeMap;
use std::path::Path;

use common::*;
use rand::seq::SliceRandom;
use rand::SeedableRng;
use tamis::dataset::Split;
use tamis::synth::{SynthConfig, LABELS};

/// `fixtures/inbox.tsv` (300 rows, 6 labels) ingested into `dir` with 2^16
/// buckets, so that models stay small.
fn fixture_dataset(dir: &Path, extra: &[&str]) {
    let mut a = vec!["--log2-buckets", "16", "-q"];
    a.extend_from_slice(extra);
    ingest(&[&fixture("inbox.tsv")], dir, &a).ok();
}

/// `rows` invented messages (generator seed `seed`) in `work/NAME.tsv`,
/// ingested into `work/NAME` with 2^18 buckets.
fn synth_dataset(
    work: &Path,
    name: &str,
    rows: u64,
    seed: u64,
    extra: &[&str],
) -> std::path::PathBuf {
    let input = work.join(format!("{name}.tsv"));
    synth_tsv(&input, rows, seed);
    let dir = work.join(name);
    let mut a = vec!["--log2-buckets", "18", "-q"];
    a.extend_from_slice(extra);
    ingest(&[&input], &dir, &a).ok();
    dir
}

/// One row of the per-epoch table: epoch, objective, validation loss,
/// validation accuracy (percent) and macro-F1 (`None` when printed as `-`).
#[derive(Debug, Clone, PartialEq)]
struct EpochRow {
    epoch: u32,
    objective: f64,
    val_loss: f64,
    val_acc_pct: f64,
    macro_f1: Option<f64>,
}

/// The per-epoch table printed on standard error: the header (the column names
/// documented in the brief of `train`) and the rows right below it.
fn epoch_table(stderr: &str) -> Vec<EpochRow> {
    let lines: Vec<&str> = stderr.lines().collect();
    let head = lines
        .iter()
        .position(|l| {
            l.split_whitespace().collect::<Vec<_>>()
                == [
                    "epoch",
                    "objective",
                    "val-loss",
                    "val-acc",
                    "macro-F1",
                    "rows/s",
                    "nnz/s",
                    "secs",
                ]
        })
        .unwrap_or_else(|| panic!("no epoch table header in\n{stderr}"));
    assert_eq!(
        lines.iter().filter(|l| l.contains("val-loss")).count(),
        1,
        "the header is printed once:\n{stderr}"
    );
    let mut out = Vec::new();
    for l in &lines[head + 1..] {
        let t: Vec<&str> = l.split_whitespace().collect();
        let Some(epoch) = t.first().and_then(|x| x.parse::<u32>().ok()) else {
            break;
        };
        assert!(t.len() >= 8, "short row {l:?}");
        let num = |x: &str| -> f64 { x.parse().unwrap_or_else(|_| panic!("{x:?} in {l:?}")) };
        out.push(EpochRow {
            epoch,
            objective: num(t[1]),
            val_loss: num(t[2]),
            val_acc_pct: num(t[3].strip_suffix('%').expect("percent")),
            macro_f1: (t[4] != "-").then(|| num(t[4])),
        });
    }
    out
}

/// Validation accuracy from `tamis eval MODEL DIR --json`.
fn accuracy(model: &Path, dir: &Path) -> f64 {
    eval_json(model, &[s(dir)], &[])["accuracy"]
        .as_f64()
        .unwrap()
}

/// Per-label training rows from `tamis stats --json`.
fn train_counts(dir: &Path) -> BTreeMap<String, u64> {
    stats_json(dir)["labels"]
        .as_array()
        .unwrap()
        .iter()
        .map(|l| {
            (
                l["name"].as_str().unwrap().to_string(),
                l["train_rows"].as_u64().unwrap(),
            )
        })
        .collect()
}

// ------------------------------------------------------------------ the model file

#[test]
fn a_model_file_is_written() {
    let t = tmp();
    let multi = t.path().join("multi");
    let binary = t.path().join("binary");
    fixture_dataset(&multi, &[]);
    fixture_dataset(&binary, &["--positive", "spam"]);
    let st = stats_json(&multi);
    let labels: Vec<String> = st["labels"]
        .as_array()
        .unwrap()
        .iter()
        .map(|l| l["name"].as_str().unwrap().to_string())
        .collect();
    for (dir, models, positive) in [(&multi, 6u64, None), (&binary, 1, Some("spam"))] {
        let model = t.path().join(format!(
            "{}.tmm",
            dir.file_name().unwrap().to_string_lossy()
        ));
        let o = train(
            dir,
            &model,
            &[
                "--epochs", "3", "--lambda", "0.0001", "--seed", "5", "-j", "2",
            ],
        );
        o.ok().stderr_has(&format!(
            "wrote {} ({models} model(s) of 65536 features)",
            model.display()
        ));
        let bytes = std::fs::read(&model).unwrap();
        let h = file_header(&bytes);
        // src/container.rs: kind 3 is a model; src/model/mod.rs: version 1,
        // parameters (models, dimension, idf stored, 0), sections meta, weights,
        // biases, and the token sketch of the data (on by default at ingest).
        assert_eq!(h.kind, 3);
        assert_eq!(h.version, 1);
        assert_eq!(h.file_len, bytes.len() as u64);
        assert_eq!(h.params, [models, 1 << 16, 0, 0]);
        assert_eq!(
            h.ids,
            [MODEL_META, MODEL_WEIGHTS, MODEL_BIASES, MODEL_SKETCH]
        );
        let w = f32_section(&bytes, MODEL_WEIGHTS);
        let b = f32_section(&bytes, MODEL_BIASES);
        assert_eq!(w.len() as u64, models << 16);
        assert_eq!(b.len() as u64, models);
        assert!(w.iter().chain(&b).all(|x| x.is_finite()));
        // Every model learnt something.
        for m in 0..models as usize {
            let wm = &w[m << 16..(m + 1) << 16];
            assert!(wm.iter().filter(|x| **x != 0.0).count() > 100, "model {m}");
        }
        let meta = model_meta(&model);
        assert_eq!(meta["format"], "tamis-model");
        assert_eq!(meta["labels"], serde_json::json!(labels));
        assert_eq!(meta["positive"], serde_json::json!(positive));
        let want_models: Vec<String> = match positive {
            Some(p) => vec![p.to_string()],
            None => labels.clone(),
        };
        assert_eq!(meta["model_labels"], serde_json::json!(want_models));
        assert_eq!(meta["loss"], "hinge");
        let tr = &meta["training"];
        assert_eq!(tr["solver"]["lambda"], 0.0001);
        assert_eq!(tr["solver"]["batch"], 64);
        assert_eq!(tr["epochs"], 3);
        assert_eq!(tr["seed"], 5);
        assert_eq!(tr["class_weight_rule"], "none");
        assert_eq!(meta["epochs"].as_array().unwrap().len(), 3);
        assert_eq!(meta["features"]["log2_buckets"], 16);
        tamis(["verify", s(&model)]).ok().stdout_has(&format!(
            "ok: model {} ({models} model(s) of 65,536 features, labels {})",
            model.display(),
            labels.join(", ")
        ));
    }
}

#[test]
fn idf_factors_follow_the_smoothed_formula() {
    let t = tmp();
    let dir = t.path().join("d");
    fixture_dataset(&dir, &[]);
    let model = t.path().join("m.tmm");
    train(&dir, &model, &["--idf", "--epochs", "2", "-q"]).ok();
    let bytes = std::fs::read(&model).unwrap();
    let h = file_header(&bytes);
    assert_eq!(h.params, [6, 1 << 16, 1, 0]);
    assert_eq!(
        h.ids,
        [
            MODEL_META,
            MODEL_WEIGHTS,
            MODEL_BIASES,
            MODEL_IDF,
            MODEL_SKETCH
        ]
    );
    let idf = f32_section(&bytes, MODEL_IDF);
    assert_eq!(idf.len(), 1 << 16);
    // Document frequencies counted here from the training rows themselves.
    let train_rows = rows(&dir, Some(Split::Train));
    let n = train_rows.len() as f64;
    let mut df = vec![0u64; 1 << 16];
    for r in &train_rows {
        for (&i, &v) in r.indices.iter().zip(&r.values) {
            if v != 0.0 {
                df[i as usize] += 1;
            }
        }
    }
    // Smoothed idf, ln((1 + N)/(1 + df)) + 1 (common practice).
    for (j, (&got, &d)) in idf.iter().zip(&df).enumerate() {
        let want = ((1.0 + n) / (1.0 + d as f64)).ln() + 1.0;
        assert!(
            (got as f64 - want).abs() < 1e-5,
            "bucket {j}: idf {got}, df {d}, want {want}"
        );
    }
    assert!(df.iter().any(|&d| d > 20), "some word is common");
    assert_eq!(model_meta(&model)["training"]["idf"], true);
}

/// A document-frequency file that is not the one the manifest lists (here
/// another dataset's, of the same settings, copied over it) is refused by
/// `--idf` as by `verify`, naming the file, rather than weighting features by
/// another dataset's counts.
#[test]
fn idf_refuses_a_document_frequency_file_the_manifest_does_not_list() {
    let t = tmp();
    let dir = t.path().join("d");
    fixture_dataset(&dir, &[]);
    let other = t.path().join("other");
    let half = t.path().join("half.tsv");
    let text = String::from_utf8(fixture_bytes("inbox.tsv")).unwrap();
    let lines: Vec<&str> = text.lines().collect();
    std::fs::write(&half, lines[..lines.len() / 2].join("\n") + "\n").unwrap();
    ingest(&[&half], &other, &["--log2-buckets", "16", "-q"]).ok();
    let ours = &manifest(&dir).doc_freq[0].file;
    let theirs = &manifest(&other).doc_freq[0].file;
    std::fs::copy(other.join(theirs), dir.join(ours)).unwrap();
    tamis(["verify", s(&dir)]).fails().stderr_has(ours);
    let model = t.path().join("m.tmm");
    train(&dir, &model, &["--idf", "--epochs", "1", "-q"])
        .fails()
        .stderr_has(&dir.join(ours).display().to_string())
        .stderr_has("not the one the manifest lists");
    assert!(!model.exists());
    // Without idf the file is not read.
    train(&dir, &model, &["--epochs", "1", "-q"]).ok();
}

/// An output path that is one of the dataset's own files (its manifest or
/// a file the manifest lists) is refused before anything is written: a model,
/// checkpoint, calibrated model or report written there replaced the file and
/// destroyed the dataset.
#[test]
fn outputs_never_replace_the_datasets_own_files() {
    let t = tmp();
    let dir = t.path().join("d");
    fixture_dataset(&dir, &[]);
    let model = t.path().join("m.tmm");
    train(&dir, &model, &["--epochs", "1", "-q"]).ok();
    let before = contents(&dir);
    let manifest_path = dir.join("manifest.json");
    let shard = dir.join(&manifest(&dir).shards[0].file);
    for own in [&manifest_path, &shard] {
        let o = s(own);
        for args in [
            vec!["train", s(&dir), "--model", o, "--epochs", "1", "-q"],
            vec![
                "train",
                s(&dir),
                "--model",
                s(&model),
                "--checkpoint",
                o,
                "-q",
            ],
            vec!["tune", s(&dir), "--model", o, "--epochs", "1", "-q"],
            vec![
                "calibrate",
                s(&model),
                s(&dir),
                "--min-recall",
                "0.5",
                "--out",
                o,
            ],
            vec!["eval", s(&model), s(&dir), "--report", o],
        ] {
            tamis(&args)
                .fails()
                .stderr_has(o)
                .stderr_has("dataset's own");
            assert!(contents(&dir) == before, "{args:?} changed the dataset");
        }
    }
    // The same file named another way.
    let dotted = dir.join(".").join("manifest.json");
    train(&dir, &dotted, &["--epochs", "1", "-q"])
        .fails()
        .stderr_has("dataset's own");
    assert!(contents(&dir) == before);
}

#[test]
fn the_same_settings_give_the_same_bytes_whatever_the_threads() {
    let t = tmp();
    let multi = synth_dataset(t.path(), "multi", 3000, 21, &[]);
    let binary = synth_dataset(t.path(), "binary", 3000, 21, &["--positive", "spam"]);
    for (dir, loss) in [(&multi, "hinge"), (&binary, "hinge"), (&binary, "logistic")] {
        let run = |name: &str, extra: &[&str]| -> Vec<u8> {
            let model = t.path().join(name);
            let mut a = vec!["--epochs", "3", "--loss", loss, "-q"];
            a.extend_from_slice(extra);
            train(dir, &model, &a).ok();
            std::fs::read(&model).unwrap()
        };
        let a = run("a.tmm", &["-j", "2"]);
        let b = run("b.tmm", &["-j", "2"]);
        let c = run("c.tmm", &["-j", "1"]);
        let d = run("d.tmm", &["-j", "2", "--seed", "2"]);
        let what = format!("{} {loss}", dir.display());
        assert!(a == b, "{what}: two runs differ");
        assert!(a == c, "{what}: -j 1 and -j 2 differ");
        assert!(a != d, "{what}: another seed gave the same model");
        // The seed changes the weights, not just the recorded settings.
        assert!(
            f32_section(&a, MODEL_WEIGHTS) != f32_section(&d, MODEL_WEIGHTS),
            "{what}"
        );
    }
}

// ------------------------------------------------------------------ the epoch table

#[test]
fn the_epoch_table_has_one_row_per_epoch() {
    let t = tmp();
    let dir = t.path().join("d");
    fixture_dataset(&dir, &[]);
    let model = t.path().join("m.tmm");
    let o = train(&dir, &model, &["--epochs", "4", "-j", "2"]);
    o.ok();
    let table = epoch_table(&o.stderr);
    assert_eq!(
        table.iter().map(|r| r.epoch).collect::<Vec<_>>(),
        [1, 2, 3, 4],
        "{}",
        o.stderr
    );
    // The printed figures are the ones stored in the model, rounded.
    let meta = model_meta(&model);
    let log = meta["epochs"].as_array().unwrap();
    assert_eq!(log.len(), 4);
    for (row, e) in table.iter().zip(log) {
        let f = |k: &str| e[k].as_f64().unwrap();
        assert_eq!(e["epoch"], row.epoch);
        assert!(
            (row.objective - f("objective")).abs() <= 0.5e-5 + 1e-12,
            "{row:?} {e}"
        );
        assert!((row.val_loss - f("validation_loss")).abs() <= 0.5e-4 + 1e-12);
        assert!((row.val_acc_pct - 100.0 * f("validation_accuracy")).abs() <= 0.005 + 1e-9);
        let mf = row.macro_f1.expect("a 6-class task prints macro-F1");
        assert!((mf - f("validation_macro_f1")).abs() <= 0.5e-4 + 1e-12);
        assert!(row.objective > 0.0 && row.val_loss > 0.0);
        assert!((0.0..=100.0).contains(&row.val_acc_pct));
    }
    // The last epoch's validation accuracy is what `eval` measures.
    let acc = accuracy(&model, &dir);
    assert_eq!(
        acc,
        log[3]["validation_accuracy"].as_f64().unwrap(),
        "eval and the training log disagree"
    );
    // A binary task prints `-` for macro-F1; -q prints nothing at all.
    let bin = t.path().join("b");
    fixture_dataset(&bin, &["--positive", "spam"]);
    let o = train(&bin, &model, &["--epochs", "2"]);
    o.ok();
    let table = epoch_table(&o.stderr);
    assert_eq!(table.len(), 2);
    assert!(table.iter().all(|r| r.macro_f1.is_none()), "{}", o.stderr);
    let o = train(&bin, &model, &["--epochs", "2", "-q"]);
    o.ok();
    assert_eq!(o.stderr, "");
    assert_eq!(o.stdout, "");
}

/// The documented rule of `--patience P`: stop when the validation loss has
/// not improved for P epochs. Returns the number of epochs run.
fn epochs_run(losses: &[f64], patience: u32) -> usize {
    let (mut best, mut since) = (f64::INFINITY, 0);
    for (i, &l) in losses.iter().enumerate() {
        if l < best {
            best = l;
            since = 0;
        } else {
            since += 1;
            if since >= patience {
                return i + 1;
            }
        }
    }
    losses.len()
}

#[test]
fn patience_stops_when_validation_loss_stops_improving() {
    let t = tmp();
    let dir = t.path().join("d");
    fixture_dataset(&dir, &[]);
    // Without averaging (it would start after epoch 100), the last iterate
    // wanders and the validation loss goes up and down.
    let base = ["--epochs", "30", "--average-from", "100", "-j", "2"];
    let full = t.path().join("full.tmm");
    let o = train(&dir, &full, &base);
    o.ok();
    assert!(!o.stderr.contains("stopping early"));
    assert_eq!(epoch_table(&o.stderr).len(), 30);
    let log: Vec<serde_json::Value> = model_meta(&full)["epochs"].as_array().unwrap().clone();
    let losses: Vec<f64> = log
        .iter()
        .map(|e| e["validation_loss"].as_f64().unwrap())
        .collect();
    let want1 = epochs_run(&losses, 1);
    let want2 = epochs_run(&losses, 2);
    assert!(want1 < 30, "the setting never stops: {losses:?}");
    assert!(want1 < want2, "{losses:?}");
    for (p, want) in [(1u32, want1), (2, want2)] {
        let model = t.path().join(format!("p{p}.tmm"));
        let mut a = base.to_vec();
        let ps = p.to_string();
        a.extend(["--patience", &ps]);
        let o = train(&dir, &model, &a);
        o.ok();
        let table = epoch_table(&o.stderr);
        assert_eq!(table.len(), want, "patience {p}:\n{}", o.stderr);
        if want < 30 {
            o.stderr_has(&format!(
                "stopping early: validation loss has not improved for {p} epoch(s)"
            ));
        }
        // The epochs run are those of the full run.
        let meta = model_meta(&model);
        assert_eq!(meta["epochs"].as_array().unwrap()[..], log[..want]);
        assert_eq!(meta["training"]["patience"], p);
    }
    // A patience longer than the run changes nothing.
    let model = t.path().join("p99.tmm");
    let mut a = base.to_vec();
    a.extend(["--patience", "99"]);
    let o = train(&dir, &model, &a);
    o.ok();
    assert_eq!(epoch_table(&o.stderr).len(), 30);
    assert!(
        f32_section(&std::fs::read(&model).unwrap(), MODEL_WEIGHTS)
            == f32_section(&std::fs::read(&full).unwrap(), MODEL_WEIGHTS)
    );
}

// ------------------------------------------------------------------ refusals

#[test]
fn bad_settings_are_refused_and_nothing_is_written() {
    let t = tmp();
    let dir = t.path().join("d");
    fixture_dataset(&dir, &[]);
    let model = t.path().join("m.tmm");
    for (args, needle) in [
        (vec!["--lambda", "0"], "--lambda"),
        (vec!["--lambda=-0.001"], "--lambda"),
        (vec!["--lambda", "NaN"], "--lambda"),
        (vec!["--lambda", "inf"], "--lambda"),
        (vec!["--epochs", "0"], "--epochs"),
        (vec!["--batch", "0"], "--batch"),
        (vec!["--batch", "2000000"], "--batch"),
        (vec!["--eta0", "0"], "--eta0"),
    ] {
        train(&dir, &model, &args)
            .fails()
            .stderr_has(needle)
            .stderr_has(s(&dir));
        assert!(!model.exists(), "{args:?} wrote a model");
    }
    // An earlier model at the destination is left as it was.
    train(&dir, &model, &["--epochs", "1", "-q"]).ok();
    let before = std::fs::read(&model).unwrap();
    train(&dir, &model, &["--lambda", "0"]).fails();
    assert!(std::fs::read(&model).unwrap() == before);
    // Values that are not numbers are usage errors.
    assert_eq!(train(&dir, &model, &["--epochs", "-1"]).code, Some(2));
    assert_eq!(train(&dir, &model, &["--loss", "cubic"]).code, Some(2));
}

#[test]
fn a_folder_without_a_manifest_is_refused() {
    let t = tmp();
    let model = t.path().join("m.tmm");
    let empty = t.path().join("empty");
    std::fs::create_dir_all(&empty).unwrap();
    std::fs::write(empty.join("inbox.tsv"), fixture_bytes("inbox.tsv")).unwrap();
    for dir in [empty, t.path().join("nowhere")] {
        train(&dir, &model, &[])
            .fails()
            .stderr_has(s(&dir))
            .stderr_has("manifest.json");
        assert!(!model.exists());
    }
}

/// The training (or validation) shard with the most rows.
fn biggest_shard(dir: &Path, split: Split) -> std::path::PathBuf {
    let m = manifest(dir);
    let e = m
        .shards
        .iter()
        .filter(|e| e.split == split)
        .max_by_key(|e| e.rows)
        .unwrap();
    dir.join(&e.file)
}

#[test]
fn a_damaged_shard_is_refused_and_named() {
    let t = tmp();
    let dir = t.path().join("d");
    fixture_dataset(&dir, &[]);
    let model = t.path().join("m.tmm");
    for split in [Split::Train, Split::Validation] {
        let shard = biggest_shard(&dir, split);
        let good = std::fs::read(&shard).unwrap();
        for (id, what) in [(SEC_VALUES, "values"), (SEC_INDICES, "indices")] {
            flip_in_section(&shard, id);
            train(&dir, &model, &["-j", "2"])
                .fails()
                .stderr_has(&shard.display().to_string())
                .stderr_has(what)
                .stderr_has("damaged");
            assert!(!model.exists());
            std::fs::write(&shard, &good).unwrap();
        }
    }
    train(&dir, &model, &["--epochs", "1", "-q"]).ok();
}

#[test]
fn a_truncated_shard_is_refused_and_named() {
    let t = tmp();
    let dir = t.path().join("d");
    fixture_dataset(&dir, &[]);
    let model = t.path().join("m.tmm");
    let shard = biggest_shard(&dir, Split::Train);
    let good = std::fs::read(&shard).unwrap();
    for keep in [good.len() - 100, good.len() / 2, 40, 0] {
        std::fs::write(&shard, &good[..keep]).unwrap();
        train(&dir, &model, &[])
            .fails()
            .stderr_has(&shard.display().to_string());
        assert!(!model.exists());
    }
    std::fs::write(&shard, &good[..good.len() - 100]).unwrap();
    train(&dir, &model, &[]).fails().stderr_has("truncated");
    std::fs::remove_file(&shard).unwrap();
    train(&dir, &model, &[])
        .fails()
        .stderr_has(&shard.display().to_string())
        .stderr_has("missing");
}

#[test]
fn a_single_class_is_refused() {
    let t = tmp();
    let input = t.path().join("one.tsv");
    let mut text = String::new();
    for i in 0..40 {
        text.push_str(&format!(
            "schedule\tDoes the {:02}:15 from Pellow to Osk still sail on Sundays?\n",
            6 + i % 12
        ));
    }
    std::fs::write(&input, &text).unwrap();
    let model = t.path().join("m.tmm");
    // One label, one-vs-rest: nothing to tell apart.
    let one = t.path().join("one");
    ingest(&[&input], &one, &["-q"]).ok();
    train(&one, &model, &[]).fails().stderr_has("single label");
    // The same as a binary task: every row is positive.
    let bin = t.path().join("bin");
    ingest(&[&input], &bin, &["-q", "--positive", "schedule"]).ok();
    train(&bin, &model, &[])
        .fails()
        .stderr_has("both classes")
        .stderr_has("schedule");
    assert!(!model.exists());
}

#[test]
fn a_positive_label_that_is_not_in_the_data_is_refused_by_ingest() {
    let t = tmp();
    let dir = t.path().join("d");
    let o = ingest(&[&fixture("inbox.tsv")], &dir, &["--positive", "charter"]);
    o.fails().stderr_has("\"charter\"");
    for l in LABELS {
        o.stderr_has(l);
    }
    assert!(!dir.join("manifest.json").exists());
    train(&dir, &t.path().join("m.tmm"), &[]).fails();
}

#[test]
fn class_weights_naming_an_unknown_label_are_refused() {
    let t = tmp();
    let dir = t.path().join("d");
    fixture_dataset(&dir, &[]);
    let model = t.path().join("m.tmm");
    train(&dir, &model, &["--class-weight", "spam=2,charter=3"])
        .fails()
        .stderr_has("--class-weight")
        .stderr_has("\"charter\"");
    assert!(!model.exists());
    for bad in ["spam=0", "spam=-1", "spam=x", "spam", "balanced,spam=2"] {
        let o = train(&dir, &model, &["--class-weight", bad]);
        assert_eq!(o.code, Some(2), "{bad}: {o:?}");
        assert!(o.stderr.contains("--class-weight"), "{bad}: {}", o.stderr);
    }
    assert!(!model.exists());
}

#[test]
fn class_weights_are_applied_as_documented() {
    let t = tmp();
    let bin = t.path().join("b");
    fixture_dataset(&bin, &["--positive", "accessibility"]);
    let counts = train_counts(&bin);
    let labels: Vec<String> = stats_json(&bin)["labels"]
        .as_array()
        .unwrap()
        .iter()
        .map(|l| l["name"].as_str().unwrap().to_string())
        .collect();
    let n: u64 = counts.values().sum();
    let pos = counts["accessibility"] as f64;
    let model = t.path().join("m.tmm");
    train(
        &bin,
        &model,
        &["--class-weight", "balanced", "--epochs", "1", "-q"],
    )
    .ok();
    let meta = model_meta(&model);
    assert_eq!(meta["training"]["class_weight_rule"], "balanced");
    // Balanced weights n / (K·n_k), K = 2 for a binary task (common practice).
    for (l, w) in labels
        .iter()
        .zip(meta["training"]["class_weights"].as_array().unwrap())
    {
        let want = if l == "accessibility" {
            n as f64 / (2.0 * pos)
        } else {
            n as f64 / (2.0 * (n as f64 - pos))
        };
        assert!(
            (w.as_f64().unwrap() - want).abs() < 1e-12,
            "{l}: {w} vs {want}"
        );
    }
    // Given weights: the named labels get theirs, the others 1.
    let multi = t.path().join("m");
    fixture_dataset(&multi, &[]);
    train(
        &multi,
        &model,
        &[
            "--class-weight",
            "feedback=2.5,spam=0.5",
            "--epochs",
            "1",
            "-q",
        ],
    )
    .ok();
    let meta = model_meta(&model);
    let names: Vec<&str> = meta["labels"]
        .as_array()
        .unwrap()
        .iter()
        .map(|l| l.as_str().unwrap())
        .collect();
    let want: Vec<f64> = names
        .iter()
        .map(|l| match *l {
            "feedback" => 2.5,
            "spam" => 0.5,
            _ => 1.0,
        })
        .collect();
    assert_eq!(meta["training"]["class_weights"], serde_json::json!(want));
    // Weights change the model.
    let plain = t.path().join("plain.tmm");
    train(&multi, &plain, &["--epochs", "1", "-q"]).ok();
    assert!(
        f32_section(&std::fs::read(&model).unwrap(), MODEL_WEIGHTS)
            != f32_section(&std::fs::read(&plain).unwrap(), MODEL_WEIGHTS)
    );
}

// ------------------------------------------------------------------ what training reaches

#[test]
fn input_order_does_not_change_the_accuracy_reached() {
    let t = tmp();
    let text = synth_bytes(
        SynthConfig {
            seed: 31,
            ..SynthConfig::default()
        },
        8000,
    );
    let mut lines: Vec<&[u8]> = text.split_inclusive(|&b| b == b'\n').collect();
    assert_eq!(lines.len(), 8000);
    let label = |l: &[u8]| l[..l.iter().position(|&b| b == b'\t').unwrap()].to_vec();
    lines.sort_by_key(|l| label(l));
    let sorted: Vec<u8> = lines.concat();
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(99);
    lines.shuffle(&mut rng);
    let shuffled: Vec<u8> = lines.concat();
    // Sorted really is sorted: each label in one run.
    let runs = sorted
        .split_inclusive(|&b| b == b'\n')
        .map(label)
        .collect::<Vec<_>>()
        .windows(2)
        .filter(|w| w[0] != w[1])
        .count();
    assert_eq!(runs, 5);
    let mut acc = Vec::new();
    for (name, bytes) in [("sorted", &sorted), ("shuffled", &shuffled)] {
        let input = t.path().join(format!("{name}.tsv"));
        std::fs::write(&input, bytes).unwrap();
        let dir = t.path().join(name);
        ingest(&[&input], &dir, &["--log2-buckets", "18", "-q"]).ok();
        let model = t.path().join(format!("{name}.tmm"));
        train(&dir, &model, &["--epochs", "5", "-q"]).ok();
        acc.push((accuracy(&model, &dir), dir));
    }
    // The validation split is chosen by content: the same rows in both.
    assert_eq!(
        row_keys(&rows(&acc[0].1, Some(Split::Validation))),
        row_keys(&rows(&acc[1].1, Some(Split::Validation)))
    );
    let (a, b) = (acc[0].0, acc[1].0);
    assert!(a > 0.85 && b > 0.85, "sorted {a}, shuffled {b}");
    assert!(
        (a - b).abs() <= 0.005,
        "sorted input reached {:.2}%, shuffled {:.2}%",
        100.0 * a,
        100.0 * b
    );
}

/// The default batch reaches the accuracy of single-row steps within 0.3
/// points. The validation split is made large enough for that tolerance to
/// mean something: both models are scored on the same 60,000 rows, and the
/// standard error of the difference of their accuracies is √(d/n) for a share
/// d of rows on which they disagree (common practice: the paired difference of
/// two proportions). The test checks that the tolerance is at least two of
/// those errors; on the 2,000 validation rows of a 20,000-row dataset it
/// would be about 0.4 points, more than the tolerance itself.
#[test]
fn a_batch_of_one_reaches_the_accuracy_of_the_default_batch() {
    let t = tmp();
    let dir = synth_dataset(t.path(), "d", 200_000, 41, &["--validation", "0.3"]);
    let mut acc = Vec::new();
    let mut predicted = Vec::new();
    for batch in ["1", "64"] {
        let model = t.path().join(format!("b{batch}.tmm"));
        train(&dir, &model, &["--epochs", "5", "--batch", batch, "-q"]).ok();
        assert_eq!(
            model_meta(&model)["training"]["solver"]["batch"],
            batch.parse::<u64>().unwrap()
        );
        acc.push(accuracy(&model, &dir));
        let argmax = |s: &[f64]| (0..s.len()).max_by(|&a, &b| s[a].total_cmp(&s[b])).unwrap();
        predicted.push(
            split_scores(&model, &dir, Split::Validation)
                .iter()
                .map(|(s, _)| argmax(s))
                .collect::<Vec<_>>(),
        );
    }
    let (one, default) = (acc[0], acc[1]);
    let n = predicted[0].len() as f64;
    let disagree = predicted[0]
        .iter()
        .zip(&predicted[1])
        .filter(|(a, b)| a != b)
        .count() as f64
        / n;
    let se = (disagree / n).sqrt();
    eprintln!(
        "batch 1: {:.2}%, batch 64: {:.2}%; they disagree on {:.2}% of {n} rows: \
         standard error of the difference {:.3} points",
        100.0 * one,
        100.0 * default,
        100.0 * disagree,
        100.0 * se
    );
    assert!(one > 0.85 && default > 0.85, "{one} {default}");
    assert!(
        2.0 * se <= 0.003,
        "the validation split is too small: se {se}"
    );
    assert!(
        (one - default).abs() <= 0.003,
        "--batch 1 reached {:.2}%, --batch 64 {:.2}%",
        100.0 * one,
        100.0 * default
    );
}

#[test]
fn balanced_class_weights_raise_the_recall_of_a_rare_class() {
    let t = tmp();
    // About 5% of the messages are about accessibility.
    let text = synth_bytes(
        SynthConfig {
            seed: 51,
            class_weights: [0.3, 0.2, 0.2, 0.1, 0.05, 0.15],
            ..SynthConfig::default()
        },
        10_000,
    );
    let input = t.path().join("inbox.tsv");
    std::fs::write(&input, &text).unwrap();
    let dir = t.path().join("d");
    ingest(
        &[&input],
        &dir,
        &["--log2-buckets", "18", "--positive", "accessibility", "-q"],
    )
    .ok();
    let counts = train_counts(&dir);
    let share = counts["accessibility"] as f64 / counts.values().sum::<u64>() as f64;
    assert!((0.035..0.065).contains(&share), "share {share}");
    let recall = |extra: &[&str]| -> (f64, serde_json::Value) {
        let model = t.path().join("m.tmm");
        let mut a = vec!["--epochs", "5", "-q"];
        a.extend_from_slice(extra);
        train(&dir, &model, &a).ok();
        let m = eval_json(&model, &[s(&dir)], &[]);
        let pc = m["per_class"].as_array().unwrap();
        let pos = pc
            .iter()
            .find(|c| c["label"] == "accessibility")
            .expect("positive class in per_class");
        (pos["recall"].as_f64().unwrap(), m)
    };
    let (plain, m1) = recall(&[]);
    let (balanced, m2) = recall(&["--class-weight", "balanced"]);
    assert!(
        balanced > plain,
        "recall of the rare class: {plain} without weights, {balanced} balanced\n{m1}\n{m2}"
    );
}

#[test]
fn squared_hinge_trains_with_the_default_settings() {
    let t = tmp();
    let dir = t.path().join("d");
    fixture_dataset(&dir, &[]);
    // Every loss learns the fixture with its default settings (the squared
    // hinge, whose gradient grows with the violation, has a smaller default
    // first step).
    let mut acc = BTreeMap::new();
    for loss in ["hinge", "logistic", "squared-hinge"] {
        let model = t.path().join(format!("{loss}.tmm"));
        let o = train(&dir, &model, &["--epochs", "5", "--loss", loss]);
        o.ok();
        let table = epoch_table(&o.stderr);
        assert_eq!(table.len(), 5);
        let w = f32_section(&std::fs::read(&model).unwrap(), MODEL_WEIGHTS);
        assert!(w.iter().all(|x| x.is_finite()));
        acc.insert(loss, accuracy(&model, &dir));
        // The objective estimate does not blow up.
        assert!(
            table
                .iter()
                .all(|r| r.objective.is_finite() && r.objective < 1e3),
            "{loss}:\n{}",
            o.stderr
        );
    }
    for (loss, a) in &acc {
        assert!(*a > 0.8, "{loss}: validation accuracy {a} ({acc:?})");
    }
}

#[test]
fn a_diverging_run_is_not_written_silently() {
    let t = tmp();
    let dir = t.path().join("d");
    fixture_dataset(&dir, &[]);
    // Zero weights have a squared-hinge loss of 1 per model, 6 in all; a run
    // whose validation loss ends far above that has diverged. It must either
    // say so and write nothing, or end with a usable model.
    for eta0 in ["1", "0.3", "0.1"] {
        let model = t.path().join(format!("m{eta0}.tmm"));
        let o = train(
            &dir,
            &model,
            &["--loss", "squared-hinge", "--eta0", eta0, "--epochs", "5"],
        );
        if o.code == Some(1) {
            o.fails().stderr_has("diverged");
            assert!(!model.exists());
            continue;
        }
        o.ok();
        let meta = model_meta(&model);
        let last = meta["epochs"].as_array().unwrap().last().unwrap().clone();
        let loss = last["validation_loss"].as_f64().unwrap();
        assert!(
            loss < 60.0,
            "--eta0 {eta0}: exit 0 and a model written whose validation loss is {loss:e}\n{}",
            o.stderr
        );
    }
}

// ------------------------------------------------------------------ demo

#[test]
fn demo_trains_evaluates_and_scores() {
    let t = tmp();
    let dir = t.path().join("demo");
    let o = tamis(["demo", "--rows", "1500", "--dir", s(&dir), "-j", "2"]);
    o.ok();
    let model = dir.join("inbox.tmm");
    o.stdout_has("4. training a one-vs-rest hinge model")
        .stdout_has(&model.display().to_string())
        .stdout_has("5. choosing the operating point")
        .stdout_has("6. evaluating on the validation split")
        .stdout_has("7. scoring a few new messages");
    // The training table: header and five epochs (the demo's setting).
    let table = epoch_table(&o.stdout);
    assert_eq!(
        table.iter().map(|r| r.epoch).collect::<Vec<_>>(),
        [1, 2, 3, 4, 5],
        "{}",
        o.stdout
    );
    // The model file.
    let bytes = std::fs::read(&model).unwrap();
    let h = file_header(&bytes);
    assert_eq!((h.kind, h.params[0]), (3, 6));
    // The evaluation printed is `tamis eval` on the validation split.
    let m = eval_json(&model, &[s(&dir.join("dataset"))], &[]);
    o.stdout_has(&format!(
        "accuracy   {:>11.2}%",
        100.0 * m["accuracy"].as_f64().unwrap()
    ));
    o.stdout_has(&format!(
        "macro-F1   {:>12.4}",
        m["macro_f1"].as_f64().unwrap()
    ));
    // Six scored examples: label, score and the message, as `tamis score` has them.
    let lines: Vec<&str> = o.stdout.lines().collect();
    let at = lines
        .iter()
        .position(|l| l.starts_with("7. scoring"))
        .unwrap();
    let examples: Vec<&str> = lines[at + 1..at + 7].to_vec();
    assert!(lines[at + 7].trim().is_empty(), "{}", o.stdout);
    let sc = parse_scores(&score(&model, &[s(&dir.join("examples.txt"))]).stdout);
    assert_eq!(sc.len(), 6);
    let texts = std::fs::read_to_string(dir.join("examples.txt")).unwrap();
    for ((line, scored), text) in examples.iter().zip(&sc).zip(texts.lines()) {
        let Scored::Row { label, score, .. } = scored else {
            panic!("{scored:?}")
        };
        let t: Vec<&str> = line.split_whitespace().collect();
        assert_eq!(t[0], label, "{line}");
        // The demo chooses spam's threshold only; the other classes have none
        // and compete by score, so every message gets a class.
        assert!(LABELS.contains(&t[0]), "{line}");
        let printed: f64 = t[1].parse().unwrap();
        assert!(
            (printed - score).abs() <= 0.0005 + 1e-6,
            "{line} vs {score}"
        );
        assert!(line.ends_with(text), "{line:?} lacks {text:?}");
    }
    // The spam example is recognised as spam.
    assert!(
        examples[1].trim_start().starts_with("spam "),
        "{}",
        examples[1]
    );
}

#[test]
fn help_explains_every_option() {
    assert_help_explains_everything(&["train"]);
}

/// A build without MPI refuses --distributed and says how to get it.
#[cfg(not(feature = "mpi"))]
#[test]
fn distributed_needs_a_build_with_mpi() {
    let t = tmp();
    let dir = synth_dataset(t.path(), "d", 500, 3, &[]);
    let model = t.path().join("m.tmm");
    train(&dir, &model, &["--distributed"]).fails().stderr_has(
        "--distributed needs a tamis built with MPI: cargo build --release --features mpi",
    );
    assert!(!model.exists());
}

/// A shard as narrow as another dataset's buckets (copied in, the manifest
/// resealed to list it) is refused by verify, train and eval alike, naming it:
/// its indices would otherwise be read as other features.
#[test]
fn a_shard_of_another_width_is_refused_everywhere() {
    let t = tmp();
    let dir = t.path().join("d");
    fixture_dataset(&dir, &[]);
    let narrow = t.path().join("n");
    ingest(
        &[&fixture("inbox.tsv")],
        &narrow,
        &["--log2-buckets", "12", "-q"],
    )
    .ok();
    let model = t.path().join("m.tmm");
    train(&dir, &model, &["--epochs", "1", "-q"]).ok();
    let theirs = manifest(&narrow);
    let mut m = manifest(&dir);
    let i = m
        .shards
        .iter()
        .position(|e| e.split == Split::Validation)
        .unwrap();
    let j = theirs
        .shards
        .iter()
        .position(|e| e.split == Split::Validation)
        .unwrap();
    let file = m.shards[i].file.clone();
    std::fs::copy(narrow.join(&theirs.shards[j].file), dir.join(&file)).unwrap();
    let e = &theirs.shards[j];
    (m.shards[i].rows, m.shards[i].nnz, m.shards[i].checksum) = (e.rows, e.nnz, e.checksum.clone());
    m.store(&dir).unwrap();
    let named = dir.join(&file).display().to_string();
    tamis(["verify", s(&dir)])
        .fails()
        .stderr_has(&named)
        .stderr_has("columns");
    train(&dir, &t.path().join("m2.tmm"), &["--epochs", "1", "-q"])
        .fails()
        .stderr_has(&named)
        .stderr_has("columns");
    tamis(["eval", s(&model), s(&dir)])
        .fails()
        .stderr_has(&named)
        .stderr_has("columns");
}
