//! Distributed training (`train --distributed` under `mpirun`), end to end:
//! built with the cargo feature `mpi` and run on this machine's OpenMPI, two
//! ranks oversubscribing its cores (`.ci/run` installs OpenMPI and runs
//! `cargo test --release --features mpi --test distributed`).
#![cfg(feature = "mpi")]

mod common;

use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use common::*;
use tamis::dataset::Split;

/// `mpirun` with `n` ranks of `tamis ARGS...` (OpenMPI: `--oversubscribe` lets
/// two ranks share fewer cores; running as root needs its consent).
fn mpirun_cmd(n: usize, args: &[&str]) -> Command {
    let mut c = Command::new("mpirun");
    c.args(["--oversubscribe", "-n", &n.to_string(), bin()])
        .args(args)
        .env("OMPI_ALLOW_RUN_AS_ROOT", "1")
        .env("OMPI_ALLOW_RUN_AS_ROOT_CONFIRM", "1")
        .env_remove("RUST_BACKTRACE");
    c
}

/// Run `mpirun -n N tamis ARGS...` to the end.
fn mpirun(n: usize, args: &[&str]) -> Out {
    let o = mpirun_cmd(n, args)
        .output()
        .expect("mpirun (install OpenMPI: openmpi-bin)");
    Out {
        args: std::iter::once(format!("(mpirun -n {n})"))
            .chain(args.iter().map(|a| a.to_string()))
            .collect(),
        code: o.status.code(),
        stdout: String::from_utf8_lossy(&o.stdout).into_owned(),
        stderr: String::from_utf8_lossy(&o.stderr).into_owned(),
    }
}

/// `rows` invented messages ingested as a binary task (spam or not), 2^18
/// buckets, in shards of 20,000 rows (so that two ranks share several).
fn spam_dataset(dir: &Path, name: &str, rows: u64) -> PathBuf {
    let tsv = dir.join(format!("{name}.tsv"));
    synth_tsv(&tsv, rows, 31);
    let out = dir.join(name);
    ingest(
        &[&tsv],
        &out,
        &[
            "--positive",
            "spam",
            "--log2-buckets",
            "18",
            "--shard-rows",
            "20000",
            "-q",
        ],
    )
    .ok();
    out
}

/// One rank is the run on one process, byte for byte: with replicas that mix
/// inside the epoch, and with a one-vs-rest task.
#[test]
fn one_rank_is_the_single_process_run_byte_for_byte() {
    let t = tmp();
    let ds = spam_dataset(t.path(), "ds", 12_000);
    let multi = t.path().join("multi");
    let tsv = t.path().join("multi.tsv");
    synth_tsv(&tsv, 6_000, 5);
    ingest(&[&tsv], &multi, &["--log2-buckets", "14", "-q"]).ok();
    for (data, extra) in [
        (
            &ds,
            &["--replicas", "2", "--sync-every", "1024", "--epochs", "3"][..],
        ),
        (&multi, &["--epochs", "2"][..]),
    ] {
        let plain = t.path().join("plain.tmm");
        let one = t.path().join("one.tmm");
        let mut a = vec!["train", s(data), "--model", s(&plain), "-q"];
        a.extend_from_slice(extra);
        tamis(&a).ok();
        let mut a = vec!["train", s(data), "--model", s(&one), "-q", "--distributed"];
        a.extend_from_slice(extra);
        mpirun(1, &a).ok();
        assert!(
            std::fs::read(&plain).unwrap() == std::fs::read(&one).unwrap(),
            "{extra:?}: one rank differs from the plain run"
        );
    }
}

/// Two ranks, each on half the shards and mixed at every epoch end, reach the
/// single-process run's validation accuracy within 0.5 points and its primal
/// objective within 2% over the same 5 epochs (λ = 1e-4; measured when the
/// test was written: 0.7% apart on 300,000 rows). Two runs give the same file
/// whatever the threads per rank, and the model records the ranks.
#[test]
fn two_ranks_reach_the_single_process_accuracy_and_objective() {
    let t = tmp();
    let ds = spam_dataset(t.path(), "ds", 200_000);
    let lambda = "1e-4";
    let single = t.path().join("single.tmm");
    train(&ds, &single, &["--lambda", lambda, "--replicas", "1", "-q"]).ok();
    let mut two = Vec::new();
    for j in ["1", "2"] {
        let m = t.path().join(format!("two-j{j}.tmm"));
        let o = mpirun(
            2,
            &[
                "train",
                s(&ds),
                "--model",
                s(&m),
                "--lambda",
                lambda,
                "--replicas",
                "1",
                "-j",
                j,
                "--distributed",
            ],
        );
        o.ok();
        // Rank 0 alone prints: one header, five epoch rows.
        assert_eq!(
            o.stderr.matches("epoch   objective").count(),
            1,
            "{}",
            o.stderr
        );
        assert!(o.stderr.contains("on 2 rank(s)"), "{}", o.stderr);
        two.push(m);
    }
    assert!(
        std::fs::read(&two[0]).unwrap() == std::fs::read(&two[1]).unwrap(),
        "two runs on 2 ranks differ"
    );
    let st = &model_meta(&two[0])["training"];
    assert_eq!(st["ranks"], 2);
    assert_eq!(st["sync_every"], 0);
    assert!(model_meta(&single)["training"].get("ranks").is_none());
    let lam: f64 = lambda.parse().unwrap();
    let (obj1, acc1) = binary_objective_and_accuracy(&single, &ds, lam);
    let (obj2, acc2) = binary_objective_and_accuracy(&two[0], &ds, lam);
    eprintln!(
        "one process: objective {obj1:.5}, accuracy {acc1:.4}; two ranks: {obj2:.5}, {acc2:.4}"
    );
    assert!(
        (acc1 - acc2).abs() <= 0.005,
        "accuracy {acc1} on one process, {acc2} on two ranks"
    );
    assert!(
        obj2 <= obj1 * 1.02,
        "objective {obj2} on two ranks, {obj1} on one process"
    );
}

/// Ranks started on different datasets, or with different settings, all
/// stop before any work, with one message and no model written.
#[test]
fn ranks_that_differ_stop_with_one_message() {
    let t = tmp();
    let a = spam_dataset(t.path(), "a", 3_000);
    let b = spam_dataset(t.path(), "b", 3_500);
    let m = t.path().join("m.tmm");
    let run = |second: &[&str]| {
        let mut c = Command::new("mpirun");
        c.args([
            "--oversubscribe",
            "-n",
            "1",
            bin(),
            "train",
            s(&a),
            "--model",
            s(&m),
        ])
        .args(["--distributed", ":", "-n", "1", bin(), "train"])
        .args(second)
        .args(["--model", s(&m), "--distributed"])
        .env("OMPI_ALLOW_RUN_AS_ROOT", "1")
        .env("OMPI_ALLOW_RUN_AS_ROOT_CONFIRM", "1");
        c.output().expect("mpirun")
    };
    for (second, says) in [
        (vec![s(&b)], "the ranks do not see the same dataset"),
        (
            vec![s(&a), "--lambda", "1e-3"],
            "the ranks were started with different training settings",
        ),
    ] {
        let o = run(&second);
        let err = String::from_utf8_lossy(&o.stderr);
        assert!(!o.status.success());
        assert_eq!(err.matches(says).count(), 1, "{err}");
        assert_eq!(err.matches("error: ").count(), 1, "{err}");
        assert!(!m.exists());
    }
}

/// Without MPI in the build, --distributed says how to get it (this check is
/// in `tests/train.rs`); with it, a rank that cannot open a shard names
/// itself once, and the others stop quietly.
#[test]
fn a_failure_of_one_rank_is_told_once_by_that_rank() {
    let t = tmp();
    let ds = spam_dataset(t.path(), "ds", 60_000);
    let m = t.path().join("m.tmm");
    // Truncate the second training shard: rank 1 checks it (every rank checks
    // the shards whose position is its rank modulo the ranks).
    let man = manifest(&ds);
    let second = man
        .shards_of(Split::Train)
        .nth(1)
        .expect("two training shards")
        .file
        .clone();
    let path = ds.join(&second);
    let bytes = std::fs::read(&path).unwrap();
    let mut flipped = bytes.clone();
    let at = bytes.len() - 100;
    flipped[at] ^= 0x40;
    std::fs::write(&path, &flipped).unwrap();
    let o = mpirun(
        2,
        &["train", s(&ds), "--model", s(&m), "--distributed", "-q"],
    );
    assert_ne!(o.code, Some(0));
    assert_eq!(o.stderr.matches("error: ").count(), 1, "{}", o.stderr);
    assert!(o.stderr.contains("rank 1: "), "{}", o.stderr);
    assert!(o.stderr.contains(&second), "{}", o.stderr);
    assert!(!m.exists());
}

/// The rank processes that `mpirun` started (its children, found in /proc),
/// with their ranks.
fn ranks_of(mpirun: &Child) -> Vec<(u32, usize)> {
    let parent = mpirun.id();
    let Ok(procs) = std::fs::read_dir("/proc") else {
        return Vec::new();
    };
    procs
        .filter_map(|e| e.ok()?.file_name().to_str()?.parse::<u32>().ok())
        .filter(|pid| {
            // /proc/PID/stat: "pid (name) state ppid ..."; the name may hold spaces.
            std::fs::read_to_string(format!("/proc/{pid}/stat"))
                .ok()
                .and_then(|st| {
                    let rest = &st[st.rfind(')')? + 1..];
                    rest.split_whitespace().nth(1)?.parse::<u32>().ok()
                })
                == Some(parent)
        })
        .filter_map(|pid| {
            let env = std::fs::read(format!("/proc/{pid}/environ")).ok()?;
            let rank = env
                .split(|&b| b == 0)
                .find_map(|v| v.strip_prefix(b"OMPI_COMM_WORLD_RANK="))?;
            Some((pid, std::str::from_utf8(rank).ok()?.parse().ok()?))
        })
        .collect()
}

fn checkpoint_meta(ck: &Path) -> serde_json::Value {
    let bytes = std::fs::read(ck).unwrap();
    let (off, len) = section(&bytes, 1);
    serde_json::from_slice(&bytes[off..off + len]).unwrap()
}

/// Wait until `pids` have all ended (`mpirun` may return before the last of
/// its ranks is gone, and a rank's lock on the model is held until then).
fn wait_gone(pids: &[u32]) {
    let start = Instant::now();
    while pids
        .iter()
        .any(|p| Path::new(&format!("/proc/{p}")).exists())
    {
        assert!(
            start.elapsed() < Duration::from_secs(60),
            "ranks {pids:?} linger"
        );
        std::thread::sleep(Duration::from_millis(20));
    }
}

/// A training run of 2 ranks that checkpoints at every mix (every 4,000 rows).
fn spawn_two_ranks(ds: &Path, model: &Path, ck: &Path, epochs: &str) -> Child {
    mpirun_cmd(
        2,
        &[
            "train",
            s(ds),
            "--model",
            s(model),
            "--checkpoint",
            s(ck),
            "--checkpoint-every",
            "0",
            "--sync-every",
            "4000",
            "--epochs",
            epochs,
            "-j",
            "1",
            "-q",
            "--distributed",
        ],
    )
    .stdout(Stdio::null())
    .stderr(Stdio::piped())
    .spawn()
    .expect("mpirun")
}

/// Wait until both ranks of `job` run and its checkpoint `ck` stands where
/// `at` accepts (given its `position`); the ranks' processes.
fn wait_for_checkpoint(
    job: &mut Child,
    ck: &Path,
    at: impl Fn(&serde_json::Value) -> bool,
) -> Vec<(u32, usize)> {
    let start = Instant::now();
    loop {
        assert!(
            start.elapsed() < Duration::from_secs(120),
            "no such checkpoint came"
        );
        let ranks = ranks_of(job);
        if ck.exists() && ranks.len() == 2 && at(&checkpoint_meta(ck)["position"]) {
            return ranks;
        }
        assert!(job.try_wait().unwrap().is_none(), "the job ended first");
        std::thread::sleep(Duration::from_millis(5));
    }
}

/// Killing one rank mid-epoch ends the whole job with a message naming it;
/// the last checkpoint (taken right after a mix) is intact. Resumed on as many
/// ranks, the run ends on the model of a run never interrupted, byte for
/// byte; resumed on one rank, the interrupted epoch starts over on the new
/// share and the run ends with a model as good.
#[test]
fn a_rank_killed_mid_epoch_ends_the_job_and_the_run_resumes() {
    let t = tmp();
    let ds = spam_dataset(t.path(), "ds", 60_000);
    let epochs = "6";
    let reference = t.path().join("reference.tmm");
    let ck_ref = t.path().join("reference.tmc");
    let mut r = spawn_two_ranks(&ds, &reference, &ck_ref, epochs);
    assert!(r.wait().unwrap().success());

    let model = t.path().join("m.tmm");
    let ck = t.path().join("m.tmc");
    let mut job = spawn_two_ranks(&ds, &model, &ck, epochs);
    // Let it save a few checkpoints inside the second epoch or later (at every
    // mix, so about every 4,000 rows).
    let ranks = wait_for_checkpoint(&mut job, &ck, |p| {
        // Past the first epoch, and part-way through one.
        p["epoch"].as_u64().unwrap() >= 1 && p["taken"].as_u64().unwrap() > 0
    });
    let (victim, _) = *ranks.iter().find(|(_, r)| *r == 1).unwrap();
    Command::new("kill")
        .args(["-KILL", &victim.to_string()])
        .status()
        .unwrap();
    let out = job.wait_with_output().unwrap();
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(!out.status.success());
    assert!(err.contains("rank 1"), "{err}");
    wait_gone(&ranks.iter().map(|r| r.0).collect::<Vec<_>>());
    assert!(!model.exists());
    tamis(["verify", s(&ck)]).ok();
    let meta = checkpoint_meta(&ck);
    assert_eq!(meta["position"]["since_mix"], 0);
    assert_eq!(meta["rank_positions"].as_array().unwrap().len(), 2);
    let part_way = meta["rank_positions"]
        .as_array()
        .unwrap()
        .iter()
        .any(|p| p["taken"] != 0 || p["group"] != 0);
    eprintln!(
        "killed rank 1; the last checkpoint stood at {} (ranks at {}), part-way: {part_way}",
        meta["position"], meta["rank_positions"]
    );
    let on_one = t.path().join("one.tmc");
    std::fs::copy(&ck, &on_one).unwrap();

    mpirun(2, &["train", "--resume", s(&ck), "--distributed", "-q"]).ok();
    assert!(
        std::fs::read(&model).unwrap() == std::fs::read(&reference).unwrap(),
        "resumed on 2 ranks, the model differs from the uninterrupted run's"
    );

    let one = t.path().join("one.tmm");
    let o = mpirun(
        1,
        &[
            "train",
            "--resume",
            s(&on_one),
            "--model",
            s(&one),
            "--distributed",
        ],
    );
    o.ok();
    assert!(part_way, "the kill came at an epoch's end");
    assert!(o.stderr.contains("which starts over on 1"), "{}", o.stderr);
    assert_eq!(model_meta(&one)["training"]["ranks"].as_u64(), None);
    let (_, acc_ref) = binary_objective_and_accuracy(&reference, &ds, 1e-5);
    let (_, acc_one) = binary_objective_and_accuracy(&one, &ds, 1e-5);
    assert!(
        (acc_ref - acc_one).abs() <= 0.01,
        "resumed on one rank: accuracy {acc_one}, uninterrupted {acc_ref}"
    );
}

/// SIGTERM to every rank (what a scheduler sends before the time limit): the
/// ranks agree to stop, mix, and rank 0 saves a checkpoint and prints how to
/// resume; the resumed run finishes.
#[test]
fn a_stop_signal_saves_a_checkpoint_that_resumes() {
    let t = tmp();
    let ds = spam_dataset(t.path(), "ds", 60_000);
    let model = t.path().join("m.tmm");
    let ck = t.path().join("m.tmc");
    let mut job = spawn_two_ranks(&ds, &model, &ck, "8");
    let ranks = wait_for_checkpoint(&mut job, &ck, |_| true);
    for (pid, _) in &ranks {
        Command::new("kill")
            .args(["-TERM", &pid.to_string()])
            .status()
            .unwrap();
    }
    let out = job.wait_with_output().unwrap();
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(!out.status.success());
    assert!(
        err.contains("interrupted: saved the training state"),
        "{err}"
    );
    assert!(err.contains("--distributed"), "{err}");
    assert_eq!(err.matches("resume with").count(), 1, "{err}");
    wait_gone(&ranks.iter().map(|r| r.0).collect::<Vec<_>>());
    assert!(!model.exists());
    assert_eq!(checkpoint_meta(&ck)["position"]["since_mix"], 0);
    mpirun(2, &["train", "--resume", s(&ck), "--distributed", "-q"]).ok();
    let st = &model_meta(&model)["training"];
    assert_eq!(st["ranks"], 2);
    assert_eq!(st["epochs"], 8);
}

/// A dataset ingested in 2 parts, each node holding only its own (copied with
/// `stats --part-files`): 2 ranks each train on their part, and give the same
/// model, byte for byte, as 2 ranks on one shared folder holding both.
#[test]
fn ranks_on_nodes_that_hold_only_their_part() {
    let t = tmp();
    let tsv = t.path().join("in.tsv");
    synth_tsv(&tsv, 40_000, 12);
    let ds = t.path().join("ds");
    ingest(
        &[&tsv],
        &ds,
        &[
            "--positive",
            "spam",
            "--log2-buckets",
            "16",
            "--shard-rows",
            "5000",
            "--parts",
            "2",
            "-q",
        ],
    )
    .ok();
    let mut nodes = Vec::new();
    for k in 0..2 {
        let node = t.path().join(format!("node{k}"));
        std::fs::create_dir(&node).unwrap();
        let o = tamis(["stats", s(&ds), "--part-files", &k.to_string()]);
        o.ok();
        for f in o.stdout.lines() {
            std::fs::copy(ds.join(f), node.join(f)).unwrap();
        }
        nodes.push(node);
    }
    let shared = t.path().join("shared.tmm");
    mpirun(
        2,
        &[
            "train",
            s(&ds),
            "--model",
            s(&shared),
            "--distributed",
            "-q",
        ],
    )
    .ok();
    let split = t.path().join("split.tmm");
    let o = Command::new("mpirun")
        .args(["--oversubscribe", "-n", "1", bin(), "train", s(&nodes[0])])
        .args([
            "--model",
            s(&split),
            "--distributed",
            "-q",
            ":",
            "-n",
            "1",
            bin(),
        ])
        .args(["train", s(&nodes[1]), "--model"])
        .arg(t.path().join("unused.tmm"))
        .args(["--distributed", "-q"])
        .env("OMPI_ALLOW_RUN_AS_ROOT", "1")
        .env("OMPI_ALLOW_RUN_AS_ROOT_CONFIRM", "1")
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(
        std::fs::read(&split).unwrap() == std::fs::read(&shared).unwrap(),
        "per-node parts and a shared folder give different models"
    );
    assert!(
        !t.path().join("unused.tmm").exists(),
        "rank 1 wrote a model"
    );
    // One rank cannot train on a node holding one part.
    mpirun(
        1,
        &[
            "train",
            s(&nodes[0]),
            "--model",
            s(&split),
            "--distributed",
            "-q",
        ],
    )
    .fails();
}
