//! End-to-end tests of `tamis bench` on a small generated input: the JSON
//! report has every stage with consistent counts, the kept folder holds what the
//! stages made, and bad options fail clearly. Speed figures are printed by the
//! command, never asserted here (a test checks correctness, not time).

mod common;

use common::*;
use serde_json::Value;

fn stages<'a>(r: &'a Value, name: &str) -> Vec<&'a Value> {
    r["stages"]
        .as_array()
        .expect("stages")
        .iter()
        .filter(|s| s["stage"] == name)
        .collect()
}

#[test]
fn json_report_has_every_stage_and_keeps_files() {
    let t = tmp();
    let keep = t.path().join("kept");
    let out = tamis([
        "bench",
        "--size",
        "300KB",
        "--threads",
        "2",
        "--json",
        "--keep",
        s(&keep),
    ]);
    out.ok();
    let r: Value = serde_json::from_str(&out.stdout).expect("one JSON object");
    assert!(r["input_bytes"].as_u64().unwrap() >= 300_000);
    let rows = r["rows"].as_u64().unwrap();
    assert!(rows > 1000, "{rows}");
    assert!(r["nnz"].as_u64().unwrap() > rows);
    assert_eq!(r["threads"], 2);
    // Limits, then each stage at 1 and 2 threads (binary ingest and 6-class
    // training at 2 only); training reports both epochs.
    for (name, want) in [
        ("read-input", 1),
        ("read-shards", 1),
        ("ingest", 2),
        ("ingest-binary", 1),
        ("train-binary", 4),
        ("train-6class", 2),
        ("checkpoint-write", 1),
        ("checkpoint-load", 1),
        ("score", 2),
    ] {
        assert_eq!(stages(&r, name).len(), want, "{name}");
    }
    // The `wc -w` reference, where coreutils' `wc` runs: one stage, and
    // ingest's speed with 2 threads over its speed.
    let wc_runs = std::process::Command::new("wc")
        .arg("-w")
        .arg("Cargo.toml")
        .output()
        .is_ok_and(|o| o.status.success());
    let wc = stages(&r, "wc-words");
    if wc_runs {
        assert_eq!(wc.len(), 1);
        let ingest2 = stages(&r, "ingest")
            .into_iter()
            .find(|s| s["threads"] == 2)
            .unwrap();
        let want = wc[0]["seconds"].as_f64().unwrap() / ingest2["seconds"].as_f64().unwrap();
        assert!((r["ingest_over_wc"].as_f64().unwrap() - want).abs() < 1e-12);
    } else {
        assert!(wc.is_empty() && r["ingest_over_wc"].is_null());
    }
    // The checkpoint of 6 models over 2^20 buckets: 16 bytes per bucket and
    // model, so its bytes per second times its seconds is at least that.
    for st in stages(&r, "checkpoint-write")
        .into_iter()
        .chain(stages(&r, "checkpoint-load"))
    {
        let bytes = st["bytes_per_second"].as_f64().unwrap() * st["seconds"].as_f64().unwrap();
        assert!(bytes >= 0.99 * ((6u64 * 16) << 20) as f64, "{st}");
        assert!(st["ratio_to_limit"].as_f64().unwrap() > 0.0);
    }
    for st in stages(&r, "train-binary")
        .into_iter()
        .chain(stages(&r, "train-6class"))
    {
        assert!(st["nnz_per_second"].as_f64().unwrap() > 0.0);
        assert!(st["epoch"].as_u64().unwrap() >= 1);
        assert!(st["ratio_to_limit"].as_f64().unwrap() > 0.0);
    }
    for st in stages(&r, "ingest").into_iter().chain(stages(&r, "score")) {
        assert!(st["bytes_per_second"].as_f64().unwrap() > 0.0);
        // Sampled from /proc while the child ran.
        if std::path::Path::new("/proc/self/status").exists() {
            assert!(st["peak_rss_anon"].as_u64().unwrap() > 0);
        }
        // The child's CPU time over its wall time: some work was done, and no
        // more cores were busy than the machine has (from wait4, on unix).
        if cfg!(unix) {
            let cores = st["cores"].as_f64().unwrap();
            let have = std::thread::available_parallelism().map_or(1, |c| c.get());
            assert!(cores > 0.0 && cores <= have as f64 + 0.05, "{st}");
        }
    }
    // Every child stage with 1 thread ran on one CPU (on Linux, when the machine
    // has more than one), those with 2 threads on every CPU.
    let many_cpus = std::thread::available_parallelism().is_ok_and(|c| c.get() > 1);
    for st in r["stages"].as_array().unwrap() {
        let child =
            !["read-input", "read-shards", "random-reads"].contains(&st["stage"].as_str().unwrap());
        let confined = st["cpus"] == 1;
        let want = child && st["threads"] == 1 && cfg!(target_os = "linux") && many_cpus;
        assert_eq!(confined, want, "{st}");
        if confined {
            assert!(st["cores"].as_f64().unwrap() <= 1.1, "{st}");
        }
    }
    let scaled: Vec<&str> = r["scaling"]
        .as_array()
        .unwrap()
        .iter()
        .map(|s| s["stage"].as_str().unwrap())
        .collect();
    assert_eq!(scaled, ["ingest", "random-reads", "train-binary", "score"]);
    // Cores used at 1 and N threads travel with each child stage's scaling; the
    // random-reads limit runs in the bench itself and has none.
    for sc in r["scaling"].as_array().unwrap() {
        let measured = sc["cores"].as_array().unwrap().iter().all(|c| c.is_f64());
        assert_eq!(
            measured,
            cfg!(unix) && sc["stage"] != "random-reads",
            "{sc}"
        );
    }
    // The random-reads limit: 1 and 2 threads, reads per second measured.
    let reads = stages(&r, "random-reads");
    assert_eq!(reads.len(), 2, "{reads:?}");
    assert!(reads
        .iter()
        .all(|st| st["nnz_per_second"].as_f64().unwrap() > 0.0));
    // The stage's checkpoint is removed once measured.
    assert!(names_in(&keep).iter().all(|n| !n.ends_with(".tmc")));
    // The kept folder: input, the 6-class and binary datasets (the 1-thread copy,
    // checked identical, removed) and the models.
    let names = names_in(&keep);
    assert!(!names.contains("plain-write.bin"));
    for want in [
        "inbox.tsv",
        "ds-n",
        "ds-binary",
        "train-binary-1.tmm",
        "train-6class-2.tmm",
    ] {
        assert!(names.contains(want), "{want} missing from {names:?}");
    }
    assert!(!names.contains("ds-1"));
    let m = manifest(&keep.join("ds-n"));
    assert_eq!(m.labels.len(), 6);
}

#[test]
fn table_output_and_bad_options() {
    let t = tmp();
    let keep = t.path().join("k");
    tamis(["bench", "--size", "100KB", "-j", "1", "--keep", s(&keep)])
        .ok()
        .stdout_has("x limit")
        .stdout_has("cores")
        .stdout_has("cpus")
        .stdout_has("train-6class");
    // A kept folder must be new or empty.
    tamis(["bench", "--size", "100KB", "-j", "1", "--keep", s(&keep)])
        .fails()
        .stderr_has("new or empty");
    // A bench larger than the free disk is refused before anything is written.
    let huge = t.path().join("huge");
    tamis(["bench", "--size", "100TB", "--keep", s(&huge)])
        .fails()
        .stderr_has("of free disk at its peak");
    assert!(!huge.exists());
    // A size that does not parse is a usage error (exit 2).
    let bad = tamis(["bench", "--size", "1XB"]);
    assert_eq!(bad.code, Some(2), "{}", bad.stderr);
    bad.stderr_has("size unit");
    tamis(["bench", "--size", "100KB", "-j", "0"])
        .fails()
        .stderr_has("at least 1");
}
