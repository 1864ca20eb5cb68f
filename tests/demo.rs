//! End-to-end tests of `tamis demo`: it generates the invented inbox, ingests it,
//! prints the dataset's summary, trains, chooses the spam operating point,
//! evaluates with a report and scores; the same seed gives the same dataset.

mod common;

use common::*;
use tamis::synth::LABELS;

#[test]
fn demo_writes_the_inbox_and_prints_the_summary() {
    let t = tmp();
    let dir = t.path().join("demo");
    let o = tamis(["demo", "--rows", "1500", "--dir", s(&dir), "--threads", "2"]);
    o.ok()
        .stdout_has(
            "1. generating 1500 invented messages to the Quillmere Ferry Cooperative's inbox",
        )
        .stdout_has("2. ingesting into")
        .stdout_has("3. the dataset:")
        .stdout_has("ingested 1,500 rows")
        .stdout_has(&format!("tamis stats {}", dir.join("dataset").display()))
        .stdout_has("5. choosing the operating point")
        .stdout_has("target: false-positive rate ≤ 0.01")
        .stdout_has("7. scoring a few new messages");
    // The spam threshold is stored in the model, and the report is written.
    let meta = model_meta(&dir.join("inbox.tmm"));
    let thresholds = meta["calibration"]["thresholds"].as_array().unwrap();
    assert_eq!(thresholds.len(), 6);
    let report = std::fs::read_to_string(dir.join("report.html")).unwrap();
    assert!(report.contains("<svg"), "the report has no figure");
    // The generated inbox: 1500 lines of label<TAB>text with the six labels.
    let inbox = std::fs::read(dir.join("inbox.tsv")).unwrap();
    let counts = tsv_label_counts(&inbox);
    assert_eq!(counts.values().sum::<u64>(), 1500);
    assert_eq!(counts.len(), 6, "{counts:?}");
    assert!(counts.keys().all(|k| LABELS.contains(&k.as_str())));
    // The dataset holds every message, and the summary printed is `tamis stats`.
    let data = dir.join("dataset");
    let st = stats_json(&data);
    assert_eq!(st["rows"], 1500);
    for l in st["labels"].as_array().unwrap() {
        assert_eq!(l["rows"], counts[l["name"].as_str().unwrap()]);
    }
    let summary = tamis(["stats", s(&data)]);
    summary.ok();
    assert!(
        o.stdout.contains(&summary.stdout),
        "demo output lacks the stats summary:\n{}\n---\n{}",
        o.stdout,
        summary.stdout
    );
    let rows_line = o.stdout.lines().find(|l| l.starts_with("rows")).unwrap();
    assert!(rows_line.contains("1,500"), "{rows_line}");
    tamis(["verify", s(&data)]).ok();
}

#[test]
fn the_same_seed_gives_the_same_dataset() {
    let t = tmp();
    let dir = t.path().join("demo");
    let run = |seed: &str| {
        tamis([
            "demo",
            "--rows",
            "800",
            "--dir",
            s(&dir),
            "--seed",
            seed,
            "--threads",
            "1",
        ])
        .ok();
        // Shards in manifest order with their bytes: a replaced dataset takes
        // fresh file names, so that the old one stays whole until the new one
        // is in place.
        let data = dir.join("dataset");
        let m = manifest(&data);
        let shards: Vec<(String, u64, String, Vec<u8>)> = m
            .shards
            .iter()
            .map(|e| {
                (
                    format!("{:?}", e.split),
                    e.rows,
                    e.checksum.clone(),
                    std::fs::read(data.join(&e.file)).unwrap(),
                )
            })
            .collect();
        (std::fs::read(dir.join("inbox.tsv")).unwrap(), shards)
    };
    let (inbox1, data1) = run("3");
    // Again into the same folder: the earlier demo is replaced, nothing is left over.
    let (inbox2, data2) = run("3");
    assert!(inbox1 == inbox2);
    assert!(data1 == data2, "the same seed gave other shards");
    let m = manifest(&dir.join("dataset"));
    assert_eq!(
        data_files(&dir.join("dataset")).len(),
        m.shards.len() + m.doc_freq.len() + m.sketches.len(),
        "files of the first demo left over"
    );
    assert_eq!(m.batches.len(), 1);
    // Another seed, other messages.
    let (inbox3, _) = run("4");
    assert!(inbox3 != inbox1);
    assert_eq!(tsv_label_counts(&inbox3).values().sum::<u64>(), 800);
}

#[test]
fn output_into_a_closed_pipe_is_a_quiet_success() {
    // src/main.rs: "Output piped into `head` and closed early: quiet success."
    let t = tmp();
    let dir = t.path().join("demo");
    let (code, stderr) =
        tamis_closed_stdout(&["demo", "--rows", "300", "--dir", s(&dir), "--threads", "1"]);
    assert!(!stderr.contains("panicked"), "{stderr}");
    assert_eq!(code, Some(0), "{stderr}");
}

#[test]
fn help_explains_every_option() {
    assert_help_explains_everything(&["demo"]);
}

/// A demo too small for every class to reach the validation split still runs to
/// the end; the operating-point step says why it was skipped.
#[test]
fn a_tiny_demo_skips_the_operating_point_and_finishes() {
    let t = tmp();
    let dir = t.path().join("demo");
    tamis(["demo", "--rows", "50", "--dir", s(&dir), "--threads", "1"])
        .ok()
        .stdout_has("5. choosing the operating point")
        .stdout_has("   skipped: ")
        .stdout_has("7. scoring a few new messages");
}
