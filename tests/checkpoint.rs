//! Checkpoints and resume, end to end through the binary: kills at random
//! moments, interruptions, damaged checkpoints, full disks, read-only folders
//! and locks. Reliability is measured here, not assumed: every resumed run is
//! compared byte for byte with a run that was never interrupted.

mod common;

use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use common::*;
use rand::{Rng, SeedableRng};

/// Checkpoint section ids (from the table in `src/checkpoint/mod.rs`).
const CK_SECTIONS: [(u32, &str); 5] = [(1, "meta"), (2, "v"), (3, "u"), (4, "scalars"), (5, "idf")];

/// A small dataset with several groups of shards (more than the 8 shards a group
/// interleaves), so positions inside groups and across groups are exercised.
fn dataset(dir: &Path, name: &str, rows: u64, extra: &[&str]) -> PathBuf {
    let tsv = dir.join(format!("{name}.tsv"));
    synth_tsv(&tsv, rows, 11);
    let out = dir.join(name);
    let mut args = vec!["--log2-buckets", "12", "--scatter", "11", "--quiet"];
    args.extend_from_slice(extra);
    ingest(&[&tsv], &out, &args).ok();
    out
}

fn spawn(args: &[&str]) -> Child {
    Command::new(bin())
        .args(args)
        .env_remove("RUST_BACKTRACE")
        .stdin(Stdio::null())
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .expect("run tamis")
}

/// Start `tamis train DS --model MODEL --checkpoint CK --checkpoint-every 0
/// EXTRA...` (a checkpoint after every step, which slows the run down so that a
/// signal arrives while it trains) and return once its first checkpoint exists.
fn spawn_checkpointing(ds: &Path, model: &Path, ck: &Path, extra: &[&str]) -> Child {
    let mut args = vec![
        "train",
        s(ds),
        "--model",
        s(model),
        "--checkpoint",
        s(ck),
        "--checkpoint-every",
        "0",
    ];
    args.extend_from_slice(extra);
    let child = spawn(&args);
    while !ck.exists() {
        std::thread::sleep(Duration::from_millis(1));
    }
    child
}

/// Steps of one epoch (seed 1, batches of 64) over the training shards `list`:
/// batches do not cross groups of shards, so Σ over its groups of ⌈rows/64⌉
/// (the groups of `solver::order`).
fn epoch_steps(list: &[&tamis::dataset::ShardEntry], epoch: u32) -> u64 {
    tamis::solver::order::groups(list.len(), 1, epoch)
        .iter()
        .map(|g| g.iter().map(|&i| list[i].rows).sum::<u64>().div_ceil(64))
        .sum()
}

/// Identity of the file at `p` as it is now: a rename into place gives a new inode.
fn identity(p: &Path) -> Option<(u64, std::time::SystemTime)> {
    use std::os::unix::fs::MetadataExt;
    let m = std::fs::metadata(p).ok()?;
    Some((m.ino(), m.modified().ok()?))
}

/// The `position` object of a checkpoint's metadata.
fn position(ck: &Path) -> serde_json::Value {
    let bytes = std::fs::read(ck).unwrap();
    let (off, len) = section(&bytes, 1);
    let meta: serde_json::Value = serde_json::from_slice(&bytes[off..off + len]).unwrap();
    meta["position"].clone()
}

fn temp_files(dir: &Path) -> Vec<String> {
    names_in(dir)
        .into_iter()
        .filter(|n| n.contains(".tmp-"))
        .collect()
}

fn signal(child: &Child, sig: &str) {
    let st = Command::new("kill")
        .args([sig, &child.id().to_string()])
        .status()
        .expect("kill");
    assert!(st.success());
}

/// What a run killed at random moments went through.
struct Kills {
    kills: u32,
    /// Kills that left a checkpoint's temporary file behind.
    during_write: u32,
    epochs_hit: std::collections::BTreeSet<u64>,
    steps_hit: std::collections::BTreeSet<u64>,
    /// Kills after which the checkpoint stood between two mixes of replicas.
    between_mixes: u32,
}

/// Train `ds` with `settings` into `dir/model.tmm`, killing the run with SIGKILL
/// at random moments and resuming it after each kill (alternating 1 and 2
/// threads, a checkpoint after every stretch), until it finishes; return what
/// the kills hit and the final model's bytes.
fn kill_and_resume(dir: &Path, ds: &Path, settings: &[&str], seed: u64) -> (Kills, Vec<u8>) {
    let model = dir.join("model.tmm");
    let ck = dir.join("run.tmc");
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let mut k = Kills {
        kills: 0,
        during_write: 0,
        epochs_hit: Default::default(),
        steps_hit: Default::default(),
        between_mixes: 0,
    };
    let mut finished = false;
    for run in 0..600 {
        // Alternate thread counts: the state must not depend on them.
        let threads = if run % 2 == 0 { "1" } else { "2" };
        let mut args: Vec<String> = if ck.exists() {
            vec!["train".into(), "--resume".into(), s(&ck).into()]
        } else {
            let mut a: Vec<String> = vec![
                "train".into(),
                s(ds).into(),
                "--model".into(),
                s(&model).into(),
                "--checkpoint".into(),
                s(&ck).into(),
            ];
            a.extend(settings.iter().map(|x| x.to_string()));
            a
        };
        // A checkpoint after every stretch: most of the time goes into writing
        // them, so kills land inside writes as well as between them.
        args.extend([
            "--checkpoint-every".into(),
            "0".into(),
            "-j".into(),
            threads.into(),
        ]);
        let before = identity(&ck);
        let args: Vec<&str> = args.iter().map(|a| a.as_str()).collect();
        let mut child = spawn(&args);
        // Wait for progress (a new checkpoint) or the end of the run.
        let deadline = Instant::now() + Duration::from_secs(60);
        let mut exited = None;
        while identity(&ck) == before && Instant::now() < deadline {
            if let Some(st) = child.try_wait().unwrap() {
                exited = Some(st);
                break;
            }
            std::thread::sleep(Duration::from_micros(200));
        }
        if exited.is_none() {
            std::thread::sleep(Duration::from_micros(rng.random_range(0..6000)));
            exited = child.try_wait().unwrap();
        }
        match exited {
            Some(st) => {
                let mut err = String::new();
                use std::io::Read;
                child
                    .stderr
                    .take()
                    .unwrap()
                    .read_to_string(&mut err)
                    .unwrap();
                assert!(st.success(), "run {run} failed: {st:?}\n{err}");
                finished = true;
                break;
            }
            None => {
                child.kill().unwrap();
                child.wait().unwrap();
                k.kills += 1;
                if !temp_files(dir).is_empty() {
                    k.during_write += 1;
                }
                if ck.exists() {
                    let p = position(&ck);
                    k.epochs_hit.insert(p["epoch"].as_u64().unwrap());
                    k.steps_hit.insert(p["step"].as_u64().unwrap());
                    if p["since_mix"].as_u64().unwrap_or(0) > 0 {
                        k.between_mixes += 1;
                    }
                }
            }
        }
    }
    assert!(finished, "the run never finished after {} kills", k.kills);
    // Temporary files of killed writers are cleaned up by the next run.
    assert_eq!(temp_files(dir), Vec::<String>::new());
    eprintln!(
        "{} kills ({} inside checkpoint writes, {} between mixes) at {} positions in epochs {:?}",
        k.kills,
        k.during_write,
        k.between_mixes,
        k.steps_hit.len(),
        k.epochs_hit
    );
    (k, std::fs::read(&model).unwrap())
}

/// Kill the training with SIGKILL at random moments, resume after each kill,
/// and compare the final model byte for byte with an uninterrupted run.
#[test]
fn sigkill_at_random_moments_then_resume_gives_the_same_model() {
    let t = tmp();
    let ds = dataset(t.path(), "ds", 3000, &[]);
    let settings = ["--epochs", "3", "--batch", "64", "--seed", "5", "--quiet"];
    let reference = t.path().join("reference.tmm");
    train(&ds, &reference, &settings).ok();
    let (k, model) = kill_and_resume(t.path(), &ds, &settings, 20261202);
    assert!(k.kills >= 20, "only {} kills", k.kills);
    assert!(
        k.steps_hit.len() >= 20,
        "kills at only {} positions",
        k.steps_hit.len()
    );
    assert!(
        k.epochs_hit.len() >= 3,
        "kills in epochs {:?} only",
        k.epochs_hit
    );
    assert!(
        k.during_write >= 1,
        "no kill landed inside a checkpoint write"
    );
    assert_eq!(
        model,
        std::fs::read(&reference).unwrap(),
        "resumed model differs from the uninterrupted one after {} kills ({} inside writes)",
        k.kills,
        k.during_write
    );
}

/// The same with replicas that mix every few stretches: a checkpoint taken
/// between two mixes holds replicas that differ, and the run resumed from it
/// (with either thread count) still ends on the uninterrupted run's model.
#[test]
fn sigkill_between_mixes_of_replicas_then_resume_gives_the_same_model() {
    let t = tmp();
    let ds = dataset(t.path(), "ds", 3000, &[]);
    // Odd replicas, so that rounds end with a replica holding; batches of 16
    // and a mix every 300 rows (rounded up to whole stretches) give several
    // stretches between mixes.
    let settings = [
        "--epochs",
        "3",
        "--batch",
        "16",
        "--seed",
        "5",
        "--replicas",
        "3",
        "--sync-every",
        "300",
        "--quiet",
    ];
    let reference = t.path().join("reference.tmm");
    train(&ds, &reference, &settings).ok();
    let (k, model) = kill_and_resume(t.path(), &ds, &settings, 7);
    assert!(k.kills >= 20, "only {} kills", k.kills);
    assert!(
        k.epochs_hit.len() >= 3,
        "kills in epochs {:?} only",
        k.epochs_hit
    );
    assert!(
        k.between_mixes >= 3,
        "only {} kills found the replicas between two mixes",
        k.between_mixes
    );
    assert_eq!(
        model,
        std::fs::read(&reference).unwrap(),
        "resumed model differs from the uninterrupted one after {} kills",
        k.kills
    );
}

/// Read standard error of `child` line by line until a line contains `needle`.
fn wait_for_line(
    child: &mut Child,
    needle: &str,
) -> (BufReader<std::process::ChildStderr>, String) {
    let mut r = BufReader::new(child.stderr.take().unwrap());
    let mut seen = String::new();
    loop {
        let mut line = String::new();
        let n = r.read_line(&mut line).unwrap();
        assert!(n > 0, "no line with {needle:?}; stderr:\n{seen}");
        seen.push_str(&line);
        if line.contains(needle) {
            return (r, seen);
        }
    }
}

fn rest(mut r: BufReader<std::process::ChildStderr>, mut seen: String) -> String {
    use std::io::Read;
    r.read_to_string(&mut seen).unwrap();
    seen
}

/// SIGINT and SIGTERM: the run finishes its step, saves a checkpoint next to the
/// model, prints the command that resumes and exits with 130; that command
/// finishes the run with the model an uninterrupted run writes.
#[test]
fn sigint_and_sigterm_save_a_checkpoint_and_print_the_resume_command() {
    let t = tmp();
    let ds = dataset(t.path(), "ds", 4000, &["--positive", "spam"]);
    let settings = ["--epochs", "4", "--batch", "16", "--seed", "3"];
    let reference = t.path().join("reference.tmm");
    train(&ds, &reference, &settings).ok();
    for sig in ["-INT", "-TERM"] {
        let model = t.path().join(format!("model{sig}.tmm"));
        let ck = t.path().join(format!("periodic{sig}.tmc"));
        let mut child = spawn_checkpointing(&ds, &model, &ck, &settings);
        let (r, seen) = wait_for_line(&mut child, "epoch   objective");
        signal(&child, sig);
        let st = child.wait().unwrap();
        let err = rest(r, seen);
        assert_eq!(st.code(), Some(130), "{sig}: {st:?}\n{err}");
        assert!(
            err.contains("interrupted: saved the training state"),
            "{err}"
        );
        assert!(!model.exists(), "no model before the run ends");
        tamis(["verify", s(&ck)]).ok().stdout_has("ok: checkpoint");
        // The printed command, run as printed.
        let cmd = err
            .lines()
            .skip_while(|l| !l.starts_with("resume with:"))
            .nth(1)
            .unwrap_or_else(|| panic!("no resume command:\n{err}"))
            .trim()
            .to_string();
        let words: Vec<&str> = cmd.split_whitespace().collect();
        assert_eq!(&words[1..3], &["train", "--resume"], "{cmd}");
        assert_eq!(Path::new(words[3]), std::path::absolute(&ck).unwrap());
        let o = Command::new(words[0]).args(&words[1..]).output().unwrap();
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        assert_eq!(
            std::fs::read(&model).unwrap(),
            std::fs::read(&reference).unwrap(),
            "{sig}: resumed model differs"
        );
    }
}

/// Without --checkpoint, an interruption still saves the state, next to the
/// model as MODEL.tmc.
#[test]
fn an_interruption_without_checkpoint_option_saves_next_to_the_model() {
    let t = tmp();
    let ds = dataset(t.path(), "ds", 30000, &["--positive", "spam"]);
    let model = t.path().join("filter.tmm");
    let mut child = spawn(&[
        "train",
        s(&ds),
        "--model",
        s(&model),
        "--epochs",
        "200",
        "--batch",
        "1",
    ]);
    let (r, seen) = wait_for_line(&mut child, "epoch   objective");
    signal(&child, "-INT");
    let st = child.wait().unwrap();
    let err = rest(r, seen);
    assert_eq!(st.code(), Some(130), "{err}");
    let ck = t.path().join("filter.tmc");
    assert!(ck.exists(), "{err}");
    assert!(
        err.contains(&format!(
            "--resume {}",
            s(&std::path::absolute(&ck).unwrap())
        )),
        "{err}"
    );
    tamis(["verify", s(&ck)]).ok();
}

/// A second Ctrl-C exits at once; the last checkpoint is intact and resuming
/// from it still reaches the uninterrupted model.
#[test]
fn a_second_interrupt_exits_at_once_and_leaves_the_last_checkpoint_intact() {
    let t = tmp();
    let ds = dataset(t.path(), "ds", 3000, &[]);
    let settings = ["--epochs", "2", "--seed", "9"];
    let reference = t.path().join("reference.tmm");
    train(&ds, &reference, &settings).ok();
    let model = t.path().join("m.tmm");
    let ck = t.path().join("m.tmc");
    let mut child = spawn_checkpointing(&ds, &model, &ck, &settings);
    signal(&child, "-INT");
    signal(&child, "-INT");
    let st = child.wait().unwrap();
    assert_eq!(st.code(), Some(130));
    tamis(["verify", s(&ck)]).ok();
    tamis(["train", "--resume", s(&ck)]).ok();
    assert_eq!(
        std::fs::read(&model).unwrap(),
        std::fs::read(&reference).unwrap()
    );
    assert_eq!(temp_files(t.path()), Vec::<String>::new());
}

/// A checkpoint written at an epoch end by a run that was not interrupted.
fn finished_run_with_checkpoint(t: &Path, ds: &Path, extra: &[&str]) -> (PathBuf, PathBuf) {
    let model = t.join("m.tmm");
    let ck = t.join("m.tmc");
    let mut args = vec!["--checkpoint", s(&ck), "--epochs", "2"];
    args.extend_from_slice(extra);
    train(ds, &model, &args).ok();
    (model, ck)
}

/// Damaged checkpoints are refused with a message naming the problem, and
/// nothing already written is touched.
#[test]
fn damaged_checkpoints_are_refused_and_nothing_is_touched() {
    let t = tmp();
    let ds = dataset(t.path(), "ds", 2000, &[]);
    let (model, ck) = finished_run_with_checkpoint(t.path(), &ds, &["--idf"]);
    let good = std::fs::read(&ck).unwrap();
    let model_bytes = std::fs::read(&model).unwrap();
    assert_eq!(file_header(&good).kind, 4);
    assert_eq!(file_header(&good).ids, vec![1, 2, 3, 4, 5]);
    let bad = t.path().join("bad.tmc");
    let check = |bytes: &[u8], want: &str| {
        std::fs::write(&bad, bytes).unwrap();
        let o = tamis(["train", "--resume", s(&bad)]);
        o.fails().stderr_has(want).stderr_has("bad.tmc");
        tamis(["verify", s(&bad)]).fails().stderr_has(want);
        assert_eq!(std::fs::read(&model).unwrap(), model_bytes, "model touched");
        assert_eq!(std::fs::read(&ck).unwrap(), good, "checkpoint touched");
    };
    for (id, name) in CK_SECTIONS {
        let mut bytes = good.clone();
        let (off, len) = section(&bytes, id);
        bytes[off + len / 2] ^= 0x10;
        check(&bytes, &format!("checksum mismatch in {name}"));
    }
    check(&good[..good.len() - 64], "truncated");
    check(&good[..40], "truncated");
    // A version from the future, with the header checksum made to fit: the
    // header is 64 bytes plus 32 per section, followed by its xxh3-64.
    let mut bytes = good.clone();
    bytes[12..16].copy_from_slice(&7u32.to_le_bytes());
    let end = 64 + 32 * file_header(&good).sections as usize;
    let sum = xxhash_rust::xxh3::xxh3_64(&bytes[..end]);
    bytes[end..end + 8].copy_from_slice(&sum.to_le_bytes());
    check(&bytes, "format version 7 is not supported");
    // Intact checksums over idf factors that are not finite (resealed).
    let mut bytes = good.clone();
    let (off, _) = section(&bytes, 5);
    bytes[off..off + 4].copy_from_slice(&f32::NAN.to_le_bytes());
    reseal(&mut bytes);
    check(&bytes, "not finite");
    // A model is not a checkpoint.
    std::fs::write(&bad, &model_bytes).unwrap();
    tamis(["train", "--resume", s(&bad)])
        .fails()
        .stderr_has("checkpoint");
}

/// A checkpoint of another dataset, or of a dataset that changed, is refused
/// with a message saying what changed.
#[test]
fn resuming_against_another_or_changed_dataset_says_what_changed() {
    let t = tmp();
    let ds = dataset(t.path(), "ds", 2000, &[]);
    let other = dataset(t.path(), "other", 2000, &["--seed", "2"]);
    let (_, ck) = finished_run_with_checkpoint(t.path(), &ds, &[]);
    tamis(["train", "--resume", s(&ck), s(&other)])
        .fails()
        .stderr_has("no longer matches")
        .stderr_has("hash_seed");
    // Same settings and labels (the first rows of the same stream), fewer rows:
    // the shards differ.
    let third = dataset(t.path(), "third", 1500, &[]);
    tamis(["train", "--resume", s(&ck), s(&third)])
        .fails()
        .stderr_has("no longer matches")
        .stderr_has("shard");
    // Data appended to the same dataset: refused without --allow-appended (with
    // it, see `appended_shards_join_from_the_next_epoch`).
    let day2 = t.path().join("day2.tsv");
    synth_tsv(&day2, 800, 12);
    ingest(&[&day2], &ds, &["--append", "-q"]).ok();
    tamis(["train", "--resume", s(&ck)])
        .fails()
        .stderr_has("were added since")
        .stderr_has("--allow-appended");
}

/// --allow-appended: the shards added after the checkpoint join from the next
/// epoch; the epoch in progress finishes over the shards it started with.
#[test]
fn appended_shards_join_from_the_next_epoch() {
    let t = tmp();
    let ds = dataset(t.path(), "ds", 3000, &[]);
    let model = t.path().join("m.tmm");
    let ck = t.path().join("m.tmc");
    let mut child = spawn_checkpointing(&ds, &model, &ck, &["--epochs", "3"]);
    signal(&child, "-INT");
    assert_eq!(child.wait().unwrap().code(), Some(130));
    let before = position(&ck);
    assert_eq!(before["epoch"], 0, "interrupted in the first epoch");
    let day2 = t.path().join("day2.tsv");
    synth_tsv(&day2, 1500, 12);
    ingest(&[&day2], &ds, &["--append", "-q"]).ok();
    let o = tamis(["train", "--resume", s(&ck), "--allow-appended"]);
    o.ok().stderr_has("join from the next epoch");
    // The step count tells which shards each epoch read.
    let m = manifest(&ds);
    let train: Vec<_> = m.shards_of(tamis::dataset::Split::Train).collect();
    let old: Vec<_> = train.iter().copied().filter(|e| e.batch == 0).collect();
    assert!(old.len() < train.len());
    let want = epoch_steps(&old, 0) + epoch_steps(&train, 1) + epoch_steps(&train, 2);
    let meta = model_meta(&model);
    assert_eq!(meta["epochs"].as_array().unwrap().len(), 3);
    assert_eq!(meta["steps"].as_u64().unwrap(), want);
    tamis(["verify", s(&model)]).ok();
}

/// Options given again on resume must agree with the checkpoint.
#[test]
fn contradicting_options_on_resume_are_refused() {
    let t = tmp();
    let ds = dataset(t.path(), "ds", 2000, &[]);
    let (model, ck) = finished_run_with_checkpoint(t.path(), &ds, &["--lambda", "0.0001"]);
    let before = std::fs::read(&model).unwrap();
    tamis([
        "train",
        "--resume",
        s(&ck),
        "--lambda",
        "0.001",
        "--seed",
        "4",
    ])
    .fails()
    .stderr_has("--lambda 0.001 (the checkpoint has 0.0001)")
    .stderr_has("--seed 4 (the checkpoint has 1)");
    assert_eq!(std::fs::read(&model).unwrap(), before);
    // Agreeing options are fine; a finished run's checkpoint just writes the
    // same model again.
    tamis([
        "train",
        "--resume",
        s(&ck),
        "--lambda",
        "0.0001",
        "--epochs",
        "2",
        "-q",
    ])
    .ok();
    assert_eq!(std::fs::read(&model).unwrap(), before);
}

/// Run a shell script (for `ulimit` and mount namespaces).
fn sh(script: &str) -> std::process::Output {
    Command::new("sh")
        .arg("-c")
        .arg(script)
        .output()
        .expect("sh")
}

/// A file-size limit (`ulimit -f`, with SIGXFSZ ignored so writes fail with
/// EFBIG instead of killing the process) stops the checkpoint write: a clear
/// error, and the earlier checkpoint and model are intact.
#[test]
fn a_checkpoint_that_cannot_be_written_leaves_the_earlier_files_intact() {
    let t = tmp();
    let ds = dataset(t.path(), "ds", 2000, &[]);
    let (model, ck) = finished_run_with_checkpoint(t.path(), &ds, &[]);
    let (ck_bytes, model_bytes) = (std::fs::read(&ck).unwrap(), std::fs::read(&model).unwrap());
    // 2^12 buckets × 6 classes × 16 bytes ≈ 390 KB per checkpoint; allow 100 KB.
    let o = sh(&format!(
        "trap '' XFSZ; ulimit -f 200; exec {} train {} --model {} --checkpoint {} --epochs 3 --seed 8",
        bin(),
        s(&ds),
        s(&model),
        s(&ck)
    ));
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(1), "{err}");
    assert!(
        err.contains("error:") && err.contains("could not write the checkpoint"),
        "{err}"
    );
    assert!(err.contains("intact"), "{err}");
    assert_eq!(std::fs::read(&ck).unwrap(), ck_bytes);
    assert_eq!(std::fs::read(&model).unwrap(), model_bytes);
    assert_eq!(temp_files(t.path()), Vec::<String>::new());
    tamis(["verify", s(&ck)]).ok();
}

/// Whether this process may make a mount namespace and mount a tmpfs in it
/// (root with CAP_SYS_ADMIN, as on the project's machines and CI).
fn can_mount() -> bool {
    sh("unshare -m sh -c 'd=$(mktemp -d) && mount -t tmpfs -o size=1m tmpfs $d && umount $d'")
        .status
        .success()
}

/// A full disk: a tmpfs too small for a second copy of the model. The write
/// fails cleanly and the earlier model stays as it was.
#[test]
fn a_full_disk_leaves_the_earlier_model_intact() {
    if !can_mount() {
        eprintln!("skipped: cannot mount a tmpfs in a private mount namespace here (needs root); the ulimit test covers write failures");
        return;
    }
    let t = tmp();
    let ds = dataset(t.path(), "ds", 2000, &["--positive", "spam"]);
    let old = t.path().join("old.tmm");
    train(&ds, &old, &["--epochs", "1", "-q"]).ok();
    let size = std::fs::metadata(&old).unwrap().len();
    let disk = t.path().join("disk");
    std::fs::create_dir(&disk).unwrap();
    let o = sh(&format!(
        "unshare -m sh -c 'mount -t tmpfs -o size={}k tmpfs {d} && cp {old} {d}/m.tmm && \
         {bin} train {ds} --model {d}/m.tmm --epochs 2 --seed 4 -q; echo rc=$?; \
         cmp {old} {d}/m.tmm && echo same; ls -a {d}'",
        size * 3 / 2 / 1024,
        d = s(&disk),
        old = s(&old),
        bin = bin(),
        ds = s(&ds),
    ));
    let out = String::from_utf8_lossy(&o.stdout);
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(out.contains("rc=1"), "{out}\n{err}");
    assert!(
        err.contains("error:") && err.contains("No space left on device"),
        "{err}"
    );
    assert!(out.contains("same"), "the old model changed:\n{out}");
    assert!(!out.contains(".tmp-"), "temporary file left:\n{out}");
}

/// A folder that cannot be written is reported before training starts.
#[test]
fn a_read_only_output_folder_is_refused_before_training() {
    let t = tmp();
    let ds = dataset(t.path(), "ds", 2000, &[]);
    let ro = t.path().join("ro");
    std::fs::create_dir(&ro).unwrap();
    let check = |err: &str| {
        assert!(
            err.contains("error:") && err.contains("cannot write the model"),
            "{err}"
        );
        assert!(
            !err.contains("epoch   objective"),
            "training started:\n{err}"
        );
    };
    // As an ordinary user, permissions are enough.
    use std::os::unix::fs::PermissionsExt;
    std::fs::set_permissions(&ro, std::fs::Permissions::from_mode(0o555)).unwrap();
    let probe = ro.join("probe");
    if std::fs::write(&probe, b"").is_err() {
        let o = train(&ds, &ro.join("m.tmm"), &["-q"]);
        o.fails();
        check(&o.stderr);
    } else {
        // Root ignores permissions: use a read-only mount instead.
        let _ = std::fs::remove_file(&probe);
        if !can_mount() {
            eprintln!("skipped: root ignores permissions and no mount namespace here");
            return;
        }
        let o = sh(&format!(
            "unshare -m sh -c 'mount -t tmpfs -o ro,size=1m tmpfs {d} && exec {bin} train {ds} --model {d}/m.tmm'",
            d = s(&ro),
            bin = bin(),
            ds = s(&ds),
        ));
        assert_eq!(o.status.code(), Some(1));
        check(&String::from_utf8_lossy(&o.stderr));
    }
    std::fs::set_permissions(&ro, std::fs::Permissions::from_mode(0o755)).unwrap();
}

/// Two trainings told to write the same model or checkpoint: the second is
/// refused by the lock of the first.
#[test]
fn two_trainings_on_one_model_or_checkpoint_are_kept_apart() {
    let t = tmp();
    let ds = dataset(t.path(), "ds", 3000, &[]);
    let model = t.path().join("m.tmm");
    let ck = t.path().join("m.tmc");
    let mut first = spawn_checkpointing(&ds, &model, &ck, &["--epochs", "500"]);
    train(&ds, &model, &["-q"])
        .fails()
        .stderr_has("locked by running process");
    train(
        &ds,
        &t.path().join("other.tmm"),
        &["--checkpoint", s(&ck), "-q"],
    )
    .fails()
    .stderr_has("locked by running process");
    first.kill().unwrap();
    first.wait().unwrap();
    // The lock of a killed run is stale and taken over.
    train(&ds, &model, &["-q", "--epochs", "1"]).ok();
}

/// `tamis verify` reports where a checkpoint stands.
#[test]
fn verify_describes_a_checkpoint() {
    let t = tmp();
    let ds = dataset(t.path(), "ds", 2000, &[]);
    let (_, ck) = finished_run_with_checkpoint(t.path(), &ds, &[]);
    tamis(["verify", s(&ck)])
        .ok()
        .stdout_has("ok: checkpoint")
        .stdout_has("all 2 epochs done");
}

/// An interrupted ingest leaves the previous dataset as it was; running it
/// again needs no clean-up and gives the dataset an uninterrupted run gives.
#[test]
fn a_killed_ingest_leaves_the_previous_dataset_and_reruns_cleanly() {
    let t = tmp();
    let day1 = t.path().join("day1.tsv");
    synth_tsv(&day1, 2000, 1);
    let day2 = t.path().join("day2.tsv");
    synth_tsv(&day2, 400_000, 2);
    let ds = t.path().join("ds");
    ingest(&[&day1], &ds, &["-q"]).ok();
    let before = contents(&ds);
    let mut killed = 0;
    for delay_ms in [5u64, 40, 120, 250] {
        let mut child = Command::new(bin())
            .args([
                "ingest",
                s(&day2),
                "--out",
                s(&ds),
                "--append",
                "-q",
                "--no-sync",
            ])
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .unwrap();
        std::thread::sleep(Duration::from_millis(delay_ms));
        if child.try_wait().unwrap().is_none() {
            child.kill().unwrap();
            killed += 1;
        }
        child.wait().unwrap();
        // Whatever the moment, the manifest is the old one or a complete new one.
        let m = manifest(&ds);
        if m.batches.len() == 1 {
            assert_eq!(
                std::fs::read(ds.join("manifest.json")).unwrap(),
                before["manifest.json"]
            );
        } else {
            break;
        }
        tamis(["verify", s(&ds)]).ok();
    }
    assert!(killed >= 1, "ingest finished before any kill");
    // A first ingest killed part-way leaves no manifest (or a complete dataset);
    // running it again into the same folder works without clean-up.
    let fresh = t.path().join("fresh");
    for delay_ms in [20u64, 80, 200] {
        let _ = std::fs::remove_dir_all(&fresh);
        let mut child = Command::new(bin())
            .args(["ingest", s(&day2), "--out", s(&fresh), "-q", "--no-sync"])
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .unwrap();
        std::thread::sleep(Duration::from_millis(delay_ms));
        let finished = child.try_wait().unwrap().is_some();
        child.kill().ok();
        child.wait().unwrap();
        if finished {
            continue;
        }
        if fresh.join("manifest.json").exists() {
            tamis(["verify", s(&fresh)]).ok();
            continue;
        }
        ingest(&[&day2], &fresh, &["-q"]).ok();
        tamis(["verify", s(&fresh)]).ok();
        assert!(
            names_in(&fresh).iter().all(|n| !n.contains(".tmp-")),
            "{:?}",
            names_in(&fresh)
        );
    }
    ingest(&[&day2], &ds, &["--append", "-q"]).ok();
    tamis(["verify", s(&ds)]).ok();
    // The same as an append that was never interrupted.
    let clean = t.path().join("clean");
    ingest(&[&day1], &clean, &["-q"]).ok();
    ingest(&[&day2], &clean, &["--append", "-q"]).ok();
    assert_same_data(&ds, &clean);
}

#[test]
fn help_explains_every_option() {
    assert_help_explains_everything(&["train"]);
}

/// A checkpoint written part-way through an epoch by a tamis whose epoch order
/// had other rules (no `epoch_order` in its metadata): its position means
/// nothing now, so the epoch starts over, says so, and the run finishes with
/// the steps of a whole epoch for the one restarted.
#[test]
fn a_checkpoint_of_another_epoch_order_restarts_its_epoch() {
    let t = tmp();
    let ds = dataset(t.path(), "ds", 3000, &[]);
    let model = t.path().join("m.tmm");
    let ck = t.path().join("m.tmc");
    let mut child = spawn_checkpointing(&ds, &model, &ck, &["--epochs", "2"]);
    signal(&child, "-INT");
    assert_eq!(child.wait().unwrap().code(), Some(130));
    let p = position(&ck);
    assert!(p["epoch"] == 0 && p["taken"] != 0, "not part-way: {p}");
    // Rewrite it as an older build would have: the same state, no order version.
    let mut old = tamis::checkpoint::Checkpoint::load(&ck).unwrap();
    old.meta.epoch_order = 0;
    let models: Vec<&tamis::solver::Linear> = old.models.iter().collect();
    tamis::checkpoint::Checkpoint::write(&ck, &old.meta, &models, old.idf.as_deref()).unwrap();
    assert_eq!(
        tamis::checkpoint::Checkpoint::load(&ck)
            .unwrap()
            .meta
            .epoch_order,
        0
    );
    let o = tamis(["train", "--resume", s(&ck)]);
    o.ok()
        .stderr_has("drew epochs in another order, so the epoch in progress starts over");
    // Steps: those taken before the stop, then two whole epochs.
    let m = manifest(&ds);
    let train: Vec<_> = m.shards_of(tamis::dataset::Split::Train).collect();
    let want = p["step"].as_u64().unwrap() + epoch_steps(&train, 0) + epoch_steps(&train, 1);
    assert_eq!(model_meta(&model)["steps"].as_u64().unwrap(), want);
}

/// Metadata that passes its checksum but holds what `train` never writes
/// (class weights that are not positive numbers, a step count no run reaches)
/// is refused on loading, naming the checkpoint, by verify and by resume.
#[test]
fn a_checkpoint_with_impossible_settings_is_refused() {
    let t = tmp();
    let ds = dataset(t.path(), "ds", 2000, &[]);
    let (_, ck) = finished_run_with_checkpoint(t.path(), &ds, &[]);
    let good = tamis::checkpoint::Checkpoint::load(&ck).unwrap();
    let models: Vec<&tamis::solver::Linear> = good.models.iter().collect();
    let bad = t.path().join("bad.tmc");
    type Edit<'a> = &'a dyn Fn(&mut tamis::checkpoint::CheckpointMeta);
    let edits: [(Edit<'_>, &str); 4] = [
        (&|m| m.settings.class_weights[0] = -1.0, "class weights"),
        (&|m| m.settings.class_weights[0] = 0.0, "class weights"),
        // JSON has no infinity: it is written as null, which does not parse.
        (
            &|m| m.settings.class_weights[0] = f64::INFINITY,
            "damaged file",
        ),
        (&|m| m.position.step = u64::MAX, "beyond any run"),
    ];
    for (edit, want) in edits {
        let mut meta = good.meta.clone();
        edit(&mut meta);
        tamis::checkpoint::Checkpoint::write(&bad, &meta, &models, good.idf.as_deref()).unwrap();
        tamis(["verify", s(&bad)])
            .fails()
            .stderr_has(s(&bad))
            .stderr_has(want);
        tamis(["train", "--resume", s(&bad)])
            .fails()
            .stderr_has(want);
    }
    // The same checkpoint unedited loads.
    tamis::checkpoint::Checkpoint::write(&bad, &good.meta, &models, good.idf.as_deref()).unwrap();
    tamis(["verify", s(&bad)]).ok();
}
