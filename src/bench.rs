//! `tamis bench`: how fast is this machine for the whole job, and how close is
//! each stage to what the hardware allows?
//!
//! One run generates an invented message stream (see [`crate::synth`]: Zipf
//! vocabulary, class-dependent words, label noise, time-ordered drift of the
//! spam words) of a requested size, then measures, each stage in a child
//! process of the `tamis` executable itself:
//!
//! * **ingest** (6 classes) with 1 and with N threads, and the binary task
//!   (`--positive spam`) with N threads: MB/s of input and rows/s;
//! * **training**, binary hinge with 1 and N threads and 6-class one-vs-rest
//!   with N threads, 2 epochs: nonzeros/s and rows/s per epoch (the solver's
//!   own epoch timing, without validation);
//! * **scoring** the raw input with the 6-class model, 1 and N threads, output
//!   thrown away: MB/s;
//! * **cores** kept busy by every child: its user and system CPU time, which
//!   `wait4` returns when it is reaped, over its wall-clock time; every child
//!   run with 1 thread is confined to one CPU (Linux), so that the scaling is
//!   from one core to N even for stages that run helper threads beside their
//!   workers;
//! * **peak anonymous memory** (`RssAnon`) of every child, sampled from
//!   `/proc/PID/status` every [`SAMPLE_MS`] ms. `RssAnon` has no peak counter of
//!   its own (`VmHWM` counts mapped file pages too, which are the page cache's,
//!   not ours), so a peak shorter than one sampling period can be missed.
//!
//! As a reference from outside tamis, coreutils `wc -w` counts the words of the
//! same input (stage [`WC_STAGE`], where `wc` can be run), and the report gives
//! ingest's speed with N threads over its speed.
//!
//! The limits are plain sequential reads of the same bytes, in this process:
//! the input file (for ingest and scoring) and the shard files (for training,
//! as time per epoch against the time to read the training shards once).
//! Ratios are "how many times the limit's time the stage takes", so 1 would
//! be a stage as fast as reading its data.
//!
//! Ingest runs with `--no-sync` so that the figure is the pipeline's, not the
//! disk's write-back; inputs and shards are read from the page cache (each is
//! read once before it is timed).
//!
//! **Checkpoints**: the 6-class training stage writes a checkpoint at each
//! epoch end; the cost of the last one (written, synced and renamed) and of
//! loading it back (every checksum verified) is set against a plain write +
//! fsync and a plain read of the same number of bytes.

use std::io::{Read, Write};
use std::path::{Path, PathBuf};
use std::process::{Command, ExitStatus, Stdio};
use std::time::{Duration, Instant};

use serde::{Deserialize, Serialize};

use crate::dataset::Manifest;
use crate::error::{Error, IoContext, Result};
use crate::synth::{Synth, SynthConfig};

/// Sampling period of the children's `RssAnon`, in milliseconds.
pub const SAMPLE_MS: u64 = 5;
/// Epochs of each training stage.
pub const EPOCHS: u32 = 2;

/// What to measure.
#[derive(Debug, Clone)]
pub struct BenchOptions {
    /// Bytes of generated input.
    pub size: u64,
    /// Threads of the parallel runs (the scaling is from 1 to this).
    pub threads: usize,
    /// Keep the generated input, datasets and models in this folder (created if
    /// missing); otherwise a temporary folder is used and removed.
    pub keep: Option<PathBuf>,
    /// The `tamis` executable that runs the stages.
    pub exe: PathBuf,
    /// Seed of the generated stream.
    pub seed: u64,
}

/// One measured stage.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct StageResult {
    /// Stage name, e.g. `ingest`, `train-binary`, `score`.
    pub stage: String,
    /// Threads used.
    pub threads: usize,
    /// Wall-clock seconds of the stage (for training: the epoch).
    pub seconds: f64,
    /// Bytes processed per second (input bytes for ingest and scoring; bytes
    /// read for the limits).
    pub bytes_per_second: Option<f64>,
    /// Rows per second.
    pub rows_per_second: Option<f64>,
    /// Nonzeros per second (training).
    pub nnz_per_second: Option<f64>,
    /// Epoch number, from 1 (training).
    pub epoch: Option<u32>,
    /// Peak anonymous resident memory of the child process, bytes (sampled).
    pub peak_rss_anon: Option<u64>,
    /// Stage time over the time of its limit (plain read of the same bytes).
    pub ratio_to_limit: Option<f64>,
    /// Cores the child process kept busy: its user and system CPU time over
    /// its wall-clock time (for training, over the whole child, not the
    /// epoch). Thread counts name worker threads; this says what they cost.
    #[serde(default)]
    pub cores: Option<f64>,
    /// CPUs the child process was confined to: `Some(1)` for the runs with one
    /// thread on a machine with more than one CPU, so that their figure is one
    /// core's and the scaling is from one core to N (ingest with one worker
    /// thread also runs a reader and a writer thread, which would otherwise take
    /// a second core); `None` when it could use every CPU, or for stages run
    /// inside the bench process (the limits).
    #[serde(default)]
    pub cpus: Option<usize>,
}

impl StageResult {
    /// A stage that reads the whole input (ingest, scoring, the `wc -w`
    /// reference): the child `run` took its seconds for `bytes` bytes and
    /// `rows` rows (when the stage knows them), against `limit_secs` to read them.
    fn over_input(
        stage: &str,
        threads: usize,
        run: &ChildRun,
        bytes: u64,
        rows: Option<u64>,
        limit_secs: f64,
    ) -> StageResult {
        let secs = run.seconds;
        StageResult {
            stage: stage.into(),
            threads,
            seconds: secs,
            bytes_per_second: Some(bytes as f64 / secs),
            rows_per_second: rows.map(|r| r as f64 / secs),
            nnz_per_second: None,
            epoch: None,
            peak_rss_anon: run.peak_rss_anon,
            ratio_to_limit: Some(secs / limit_secs.max(1e-9)),
            cores: run.cores(),
            cpus: run.cpus,
        }
    }

    /// A stage with its name, threads and seconds and nothing else measured;
    /// callers fill in the rest (`..StageResult::bare(…)`).
    fn bare(stage: &str, threads: usize, secs: f64) -> StageResult {
        StageResult {
            stage: stage.into(),
            threads,
            seconds: secs,
            bytes_per_second: None,
            rows_per_second: None,
            nnz_per_second: None,
            epoch: None,
            peak_rss_anon: None,
            ratio_to_limit: None,
            cores: None,
            cpus: None,
        }
    }
}

/// Speed-up from 1 to N threads of one stage.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct Scaling {
    /// Stage name.
    pub stage: String,
    /// N.
    pub threads: usize,
    /// Throughput with N threads over throughput with 1.
    pub speedup: f64,
    /// Cores kept busy with 1 and with N threads (see [`StageResult::cores`]).
    #[serde(default)]
    pub cores: (Option<f64>, Option<f64>),
}

/// Everything a bench run measured.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct BenchReport {
    /// Input bytes generated.
    pub input_bytes: u64,
    /// Rows in the input.
    pub rows: u64,
    /// Nonzeros in the (6-class) dataset.
    pub nnz: u64,
    /// Bytes of all shards of the 6-class dataset.
    pub shard_bytes: u64,
    /// Bytes of its training shards.
    pub train_shard_bytes: u64,
    /// Threads of the parallel runs.
    pub threads: usize,
    /// Cores the machine reports.
    pub cores: usize,
    /// 1-minute load average when the run started (other work on the machine).
    pub load_average: Option<f64>,
    /// Where the files were (kept only with `--keep`).
    pub dir: PathBuf,
    /// The stages, in the order run.
    pub stages: Vec<StageResult>,
    /// Speed-ups from 1 to N threads.
    pub scaling: Vec<Scaling>,
    /// Ingest's speed with N threads over the speed of coreutils `wc -w`
    /// counting the words of the same input (`None` where `wc` could not run).
    #[serde(default)]
    pub ingest_over_wc: Option<f64>,
}

/// What a child training stage prints (one JSON object on standard output).
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct TrainStageOutput {
    /// Per epoch: seconds, rows/s, nonzeros/s of the training sweep.
    pub epochs: Vec<(f64, f64, f64)>,
    /// The last epoch-end checkpoint: bytes, seconds to write it (synced and
    /// renamed), seconds to load and fully check it.
    #[serde(default)]
    pub checkpoint: Option<(u64, f64, f64)>,
}

/// Parse a size such as `1GB`, `250MB`, `64KiB`, `1.5GiB` or `123456` (bytes).
pub fn parse_size(s: &str) -> std::result::Result<u64, String> {
    let t = s.trim();
    let split = t
        .find(|c: char| !(c.is_ascii_digit() || c == '.'))
        .unwrap_or(t.len());
    let (num, unit) = t.split_at(split);
    let x: f64 = num
        .parse()
        .map_err(|_| format!("expected a size such as 1GB or 250MB, got {s:?}"))?;
    let mult: f64 = match unit.trim().to_ascii_lowercase().as_str() {
        "" | "b" => 1.0,
        "kb" | "k" => 1e3,
        "mb" | "m" => 1e6,
        "gb" | "g" => 1e9,
        "tb" | "t" => 1e12,
        "kib" => 1024.0,
        "mib" => 1024.0 * 1024.0,
        "gib" => 1024.0 * 1024.0 * 1024.0,
        u => {
            return Err(format!(
                "unknown size unit {u:?} in {s:?} (use B, KB, MB, GB, KiB, MiB, GiB)"
            ))
        }
    };
    let bytes = x * mult;
    if !(1.0..1e15).contains(&bytes) {
        return Err(format!("size {s:?} is out of range"));
    }
    Ok(bytes as u64)
}

/// fsync a file, or every file of a folder and the folder: the bench's pause
/// between stages (untimed), after which no earlier output waits for write-back.
fn settle(path: &Path) -> Result<()> {
    if path.is_dir() {
        for e in std::fs::read_dir(path).at(path)? {
            let p = e.at(path)?.path();
            if p.is_file() {
                crate::container::sync_file(&p)?;
            }
        }
        crate::container::sync_dir(path)
    } else {
        crate::container::sync_file(path)
    }
}

/// Read files sequentially in 1 MiB blocks; returns bytes read and seconds.
/// Every byte is summed, so the read cannot be skipped.
pub fn scan(paths: &[PathBuf]) -> Result<(u64, f64, u64)> {
    let mut buf = vec![0u8; 1 << 20];
    let start = Instant::now();
    let (mut total, mut sum) = (0u64, 0u64);
    for p in paths {
        let mut f = std::fs::File::open(p).at(p)?;
        loop {
            let n = f.read(&mut buf).at(p)?;
            if n == 0 {
                break;
            }
            total += n as u64;
            // Eight bytes at a time: about as fast as the read itself.
            for c in buf[..n].chunks(8) {
                let mut w = [0u8; 8];
                w[..c.len()].copy_from_slice(c);
                sum = sum.wrapping_add(u64::from_le_bytes(w));
            }
        }
    }
    Ok((total, start.elapsed().as_secs_f64(), sum))
}

/// What [`run_child`] measured of one child process.
#[derive(Debug, Clone)]
struct ChildRun {
    /// Wall-clock seconds from start to exit.
    seconds: f64,
    /// CPUs it was confined to, if any.
    cpus: Option<usize>,
    /// User plus system CPU seconds of all its threads (from `wait4`).
    cpu_seconds: Option<f64>,
    /// Peak sampled `RssAnon`, bytes.
    peak_rss_anon: Option<u64>,
    /// Standard output, when captured.
    stdout: Vec<u8>,
}

impl ChildRun {
    /// Cores kept busy on average: CPU time over wall-clock time.
    fn cores(&self) -> Option<f64> {
        self.cpu_seconds.map(|c| c / self.seconds.max(1e-9))
    }
}

/// Wait for `child` without blocking: its exit status and CPU time (user plus
/// system, every thread) once it has exited, `None` while it runs.
#[cfg(unix)]
fn try_reap(child: &mut std::process::Child) -> std::io::Result<Option<(ExitStatus, Option<f64>)>> {
    use std::os::unix::process::ExitStatusExt;
    let pid = child.id() as libc::pid_t;
    let mut status: libc::c_int = 0;
    // SAFETY: `rusage` is plain data that `wait4` fills in; `status` and
    // `usage` outlive the call. The child is ours and not yet reaped (std's
    // `Child` is not waited on anywhere else), so the pid names it.
    let mut usage: libc::rusage = unsafe { std::mem::zeroed() };
    let r = unsafe { libc::wait4(pid, &mut status, libc::WNOHANG, &mut usage) };
    match r {
        0 => Ok(None),
        r if r == pid => {
            let secs = |t: libc::timeval| t.tv_sec as f64 + t.tv_usec as f64 * 1e-6;
            let cpu = secs(usage.ru_utime) + secs(usage.ru_stime);
            Ok(Some((ExitStatus::from_raw(status), Some(cpu))))
        }
        _ => {
            let e = std::io::Error::last_os_error();
            if e.kind() == std::io::ErrorKind::Interrupted {
                Ok(None)
            } else {
                Err(e)
            }
        }
    }
}

/// Elsewhere the CPU time is not measured.
#[cfg(not(unix))]
fn try_reap(child: &mut std::process::Child) -> std::io::Result<Option<(ExitStatus, Option<f64>)>> {
    Ok(child.try_wait()?.map(|s| (s, None)))
}

/// The first CPU this process may run on, as a set of one, when it may run on
/// more than one (Linux); `None` elsewhere or when there is nothing to confine.
#[cfg(target_os = "linux")]
fn one_cpu_set() -> Option<libc::cpu_set_t> {
    // SAFETY: `cpu_set_t` is plain data; `sched_getaffinity` writes at most
    // `size_of::<cpu_set_t>()` bytes into `mine`, which outlives the call, and
    // the CPU_* helpers index inside the set (CPU numbers below CPU_SETSIZE).
    unsafe {
        let mut mine: libc::cpu_set_t = std::mem::zeroed();
        if libc::sched_getaffinity(0, std::mem::size_of::<libc::cpu_set_t>(), &mut mine) != 0
            || libc::CPU_COUNT(&mine) < 2
        {
            return None;
        }
        let first = (0..libc::CPU_SETSIZE as usize).find(|&c| libc::CPU_ISSET(c, &mine))?;
        let mut one: libc::cpu_set_t = std::mem::zeroed();
        libc::CPU_SET(first, &mut one);
        Some(one)
    }
}

/// Confine the child `cmd` starts to one CPU, if the machine has more; returns
/// whether it did.
#[cfg(target_os = "linux")]
fn confine_to_one_cpu(cmd: &mut Command) -> bool {
    use std::os::unix::process::CommandExt;
    let Some(set) = one_cpu_set() else {
        return false;
    };
    // SAFETY: the closure runs in the child between fork and exec, where only
    // async-signal-safe calls are allowed: it makes one system call on a set
    // copied into it beforehand, and allocates nothing.
    unsafe {
        cmd.pre_exec(move || {
            if libc::sched_setaffinity(0, std::mem::size_of::<libc::cpu_set_t>(), &set) == 0 {
                Ok(())
            } else {
                Err(std::io::Error::last_os_error())
            }
        });
    }
    true
}

/// Elsewhere children are not confined.
#[cfg(not(target_os = "linux"))]
fn confine_to_one_cpu(_cmd: &mut Command) -> bool {
    false
}

/// Run `exe args` with standard output captured (or thrown away), sampling its
/// `RssAnon` and taking its CPU time when it exits. With `one_cpu` the child
/// may run on one CPU only (see [`StageResult::cpus`]).
fn run_child(exe: &Path, args: &[String], capture: bool, one_cpu: bool) -> Result<ChildRun> {
    let mut cmd = Command::new(exe);
    cmd.args(args)
        .stdin(Stdio::null())
        .stdout(if capture {
            Stdio::piped()
        } else {
            Stdio::null()
        })
        .stderr(Stdio::piped());
    let cpus = (one_cpu && confine_to_one_cpu(&mut cmd)).then_some(1);
    let start = Instant::now();
    let mut child = cmd.spawn().at(exe)?;
    let status_path = PathBuf::from(format!("/proc/{}/status", child.id()));
    // Drain the pipes on threads of their own, so a child never blocks on them.
    let mut out_pipe = child.stdout.take();
    let mut err_pipe = child.stderr.take();
    let out_reader = std::thread::spawn(move || {
        let mut v = Vec::new();
        if let Some(p) = out_pipe.as_mut() {
            let _ = p.read_to_end(&mut v);
        }
        v
    });
    let err_reader = std::thread::spawn(move || {
        let mut v = Vec::new();
        if let Some(p) = err_pipe.as_mut() {
            let _ = p.read_to_end(&mut v);
        }
        v
    });
    let mut peak: Option<u64> = None;
    let (status, cpu_seconds) = loop {
        if let Some(kb) = read_rss_anon_kb(&status_path) {
            peak = Some(peak.map_or(kb, |p| p.max(kb)));
        }
        match try_reap(&mut child).at(exe)? {
            Some(done) => break done,
            None => std::thread::sleep(Duration::from_millis(SAMPLE_MS)),
        }
    };
    let secs = start.elapsed().as_secs_f64();
    let out = out_reader.join().unwrap_or_default();
    let err = err_reader.join().unwrap_or_default();
    if !status.success() {
        return Err(Error::Invalid(format!(
            "bench stage `tamis {}` failed ({status}): {}",
            args.join(" "),
            String::from_utf8_lossy(&err).trim()
        )));
    }
    Ok(ChildRun {
        seconds: secs,
        cpus,
        cpu_seconds,
        peak_rss_anon: peak.map(|kb| kb * 1024),
        stdout: out,
    })
}

fn read_rss_anon_kb(status: &Path) -> Option<u64> {
    let s = std::fs::read_to_string(status).ok()?;
    s.lines()
        .find_map(|l| l.strip_prefix("RssAnon:"))
        .and_then(|v| v.trim().trim_end_matches("kB").trim().parse().ok())
}

fn load_average() -> Option<f64> {
    std::fs::read_to_string("/proc/loadavg")
        .ok()?
        .split_whitespace()
        .next()?
        .parse()
        .ok()
}

/// Removes the working folder unless it is kept.
struct Workdir {
    path: PathBuf,
    keep: bool,
}

impl Drop for Workdir {
    fn drop(&mut self) {
        if !self.keep {
            let _ = std::fs::remove_dir_all(&self.path);
        }
    }
}

/// Free disk the bench needs per byte of `--size` at its peak: the input and
/// two datasets of the same messages (6 classes with 1 and with N threads),
/// each about 2.2 times the input at the default settings, plus room for the
/// models and checkpoints.
pub const ROOM_PER_INPUT_BYTE: f64 = 5.5;

/// Bytes an unprivileged process may still write on the file system holding
/// `path` (or its nearest existing ancestor); `None` where that is unknown.
#[cfg(unix)]
pub fn free_bytes(path: &Path) -> Option<u64> {
    use std::os::unix::ffi::OsStrExt;
    let existing = path.ancestors().find(|p| p.exists())?;
    let name = std::ffi::CString::new(existing.as_os_str().as_bytes()).ok()?;
    // SAFETY: `statvfs` is plain data the call fills in; `name` is a
    // NUL-terminated path that outlives the call.
    let mut st: libc::statvfs = unsafe { std::mem::zeroed() };
    if unsafe { libc::statvfs(name.as_ptr(), &mut st) } != 0 {
        return None;
    }
    Some(st.f_bavail as u64 * st.f_frsize as u64)
}

/// Elsewhere free space is not known.
#[cfg(not(unix))]
pub fn free_bytes(_path: &Path) -> Option<u64> {
    None
}

/// Refuse to start a bench of `size` bytes in `dir` when `free` bytes cannot
/// hold it (see [`ROOM_PER_INPUT_BYTE`]), rather than fill the disk part-way.
fn check_room(dir: &Path, size: u64, free: Option<u64>) -> Result<()> {
    let need = (size as f64 * ROOM_PER_INPUT_BYTE) as u64;
    match free {
        Some(free) if free < need => Err(Error::Insufficient {
            path: dir.to_path_buf(),
            what: format!(
                "a bench of --size {} needs about {} of free disk at its peak (the input and two \
                 datasets of it), and only {} is free there: choose a smaller --size, or --keep \
                 a folder on a larger disk",
                crate::util::bytes(size),
                crate::util::bytes(need),
                crate::util::bytes(free)
            ),
        }),
        _ => Ok(()),
    }
}

fn shard_files(dir: &Path, m: &Manifest, train_only: bool) -> Vec<PathBuf> {
    m.shards
        .iter()
        .filter(|s| !train_only || s.split == crate::dataset::manifest::Split::Train)
        .map(|s| dir.join(&s.file))
        .collect()
}

fn s(x: impl ToString) -> String {
    x.to_string()
}

/// Run the whole benchmark. `progress` receives a line as each stage starts.
pub fn run(opts: &BenchOptions, progress: &dyn Fn(&str)) -> Result<BenchReport> {
    if opts.threads == 0 {
        return Err(Error::Invalid("--threads must be at least 1".into()));
    }
    let load = load_average();
    let (path, keep) = match &opts.keep {
        Some(p) => (p.clone(), true),
        None => (
            std::env::temp_dir().join(format!("tamis-bench-{}", std::process::id())),
            false,
        ),
    };
    if keep && path.exists() && std::fs::read_dir(&path).at(&path)?.next().is_some() {
        return Err(Error::Invalid(format!(
            "{}: --keep needs a new or empty folder",
            path.display()
        )));
    }
    check_room(&path, opts.size, free_bytes(&path))?;
    std::fs::create_dir_all(&path).at(&path)?;
    let work = Workdir { path, keep };
    let dir = &work.path;
    let input = dir.join("inbox.tsv");
    let n = opts.threads;
    let exe = &opts.exe;

    progress(&format!(
        "generating {} of invented messages in {}",
        crate::util::bytes(opts.size),
        input.display()
    ));
    {
        let f = std::fs::File::create(&input).at(&input)?;
        let mut w = std::io::BufWriter::with_capacity(1 << 20, f);
        Synth::new(SynthConfig {
            seed: opts.seed,
            ..SynthConfig::default()
        })
        .write_bytes(opts.size, &mut w)
        .at(&input)?;
        w.flush().at(&input)?;
    }
    // Written data is flushed to disk before each timed stage, so that the
    // kernel's write-back of one stage's output is not timed in the next.
    settle(&input)?;
    let mut stages = Vec::new();

    // Limit 1: a plain read of the input (read once first, so both this and
    // the stages find it in the page cache).
    progress("reading the input (limit)");
    scan(std::slice::from_ref(&input))?;
    let (in_bytes, in_secs, _) = scan(std::slice::from_ref(&input))?;
    let in_bps = in_bytes as f64 / in_secs.max(1e-9);
    stages.push(StageResult {
        bytes_per_second: Some(in_bps),
        ratio_to_limit: Some(1.0),
        ..StageResult::bare("read-input", 1, in_secs)
    });
    // A reference from outside tamis: coreutils `wc -w` counting the words of
    // the same input (left out where `wc` cannot be run).
    progress("counting the words with wc -w (reference)");
    if let Some(run) = words_counted(&input) {
        stages.push(StageResult::over_input(
            WC_STAGE, 1, &run, in_bytes, None, in_secs,
        ));
    }

    // Ingest: 6 classes with 1 and N threads, binary with N.
    let ds = |name: &str| dir.join(name);
    let ingest_args = |out: &Path, threads: usize, binary: bool| -> Vec<String> {
        let mut a = vec![
            s("ingest"),
            input.display().to_string(),
            s("--out"),
            out.display().to_string(),
            s("--threads"),
            threads.to_string(),
            s("--quiet"),
            s("--no-sync"),
        ];
        if binary {
            a.extend([s("--positive"), s("spam")]);
        }
        a
    };
    let mut ingest_runs = vec![(1usize, false, "ds-1")];
    if n > 1 {
        ingest_runs.push((n, false, "ds-n"));
    }
    ingest_runs.push((n, true, "ds-binary"));
    let mut rows = 0u64;
    let mut nnz = 0u64;
    for (threads, binary, name) in ingest_runs {
        let stage = if binary { "ingest-binary" } else { "ingest" };
        progress(&format!("{stage}, {threads} thread(s)"));
        let out = ds(name);
        let run = run_child(
            exe,
            &ingest_args(&out, threads, binary),
            false,
            threads == 1,
        )?;
        settle(&out)?;
        let m = Manifest::load(&out)?;
        rows = m.train_rows() + m.labels.iter().map(|l| l.validation_rows).sum::<u64>();
        nnz = m.shards.iter().map(|s| s.nnz).sum();
        stages.push(StageResult::over_input(
            stage,
            threads,
            &run,
            in_bytes,
            Some(rows),
            in_secs,
        ));
        if name == "ds-n" {
            // The single-thread copy must be the same dataset (same shard
            // checksums); it is then removed to save disk.
            let (one, many) = (Manifest::load(&ds("ds-1"))?, m);
            let same = one.shards.len() == many.shards.len()
                && one
                    .shards
                    .iter()
                    .zip(&many.shards)
                    .all(|(a, b)| a.file == b.file && a.checksum == b.checksum);
            if !same {
                return Err(Error::Invalid(
                    "the datasets ingested with 1 and with N threads differ: please report this"
                        .into(),
                ));
            }
            std::fs::remove_dir_all(ds("ds-1")).at(ds("ds-1"))?;
        }
    }
    // The 6-class dataset used from here on.
    let multi = if n > 1 { ds("ds-n") } else { ds("ds-1") };
    let manifest = Manifest::load(&multi)?;

    // Limit 2: a plain read of the shards.
    progress("reading the shards (limit)");
    let all = shard_files(&multi, &manifest, false);
    scan(&all)?;
    let (sh_bytes, sh_secs, _) = scan(&all)?;
    let sh_bps = sh_bytes as f64 / sh_secs.max(1e-9);
    let train_bytes: u64 = manifest
        .shards
        .iter()
        .filter(|s| s.split == crate::dataset::manifest::Split::Train)
        .map(|s| s.bytes)
        .sum();
    stages.push(StageResult {
        bytes_per_second: Some(sh_bps),
        ratio_to_limit: Some(1.0),
        ..StageResult::bare("read-shards", 1, sh_secs)
    });
    // Limit 3: random reads of a weight-sized table, 1 and n threads, each on
    // its own part: how far memory-latency-bound work (a training step) can
    // scale on this machine at best.
    progress("random reads of a weight-sized table (limit)");
    for t in [1, n] {
        if t == n && n == 1 {
            break;
        }
        let (secs, reads) = random_reads(t, n);
        stages.push(StageResult {
            nnz_per_second: Some(reads as f64 / secs.max(1e-9)),
            ..StageResult::bare("random-reads", t, secs)
        });
    }
    let train_scan_secs = train_bytes as f64 / sh_bps;
    // The binary dataset's shards are read once too (page cache).
    let bin_manifest = Manifest::load(&ds("ds-binary"))?;
    scan(&shard_files(&ds("ds-binary"), &bin_manifest, false))?;

    // Training.
    let mut train_runs = vec![(1usize, "train-binary", ds("ds-binary"))];
    if n > 1 {
        train_runs.push((n, "train-binary", ds("ds-binary")));
    }
    train_runs.push((n, "train-6class", multi.clone()));
    for (threads, stage, data) in train_runs {
        progress(&format!("{stage}, {threads} thread(s), {EPOCHS} epochs"));
        let model = dir.join(format!("{stage}-{threads}.tmm"));
        let args = vec![
            s("bench"),
            s("--stage-train"),
            data.display().to_string(),
            s("--model"),
            model.display().to_string(),
            s("--threads"),
            threads.to_string(),
        ];
        let run = run_child(exe, &args, true, threads == 1)?;
        let out = &run.stdout;
        let parsed: TrainStageOutput = serde_json::from_slice(out).map_err(|e| {
            Error::Invalid(format!(
                "bench: the training stage printed no result ({e}): {}",
                String::from_utf8_lossy(out)
            ))
        })?;
        if let (Some((bytes, write, load)), true) = (parsed.checkpoint, stage == "train-6class") {
            let (w_limit, r_limit) = plain_write_read(&dir.join("plain-write.bin"), bytes)?;
            for (name, secs, limit) in [
                ("checkpoint-write", write, w_limit),
                ("checkpoint-load", load, r_limit),
            ] {
                stages.push(StageResult {
                    bytes_per_second: Some(bytes as f64 / secs.max(1e-9)),
                    ratio_to_limit: Some(secs / limit.max(1e-9)),
                    cpus: run.cpus,
                    ..StageResult::bare(name, threads, secs)
                });
            }
        }
        for (i, &(secs, rps, nps)) in parsed.epochs.iter().enumerate() {
            stages.push(StageResult {
                rows_per_second: Some(rps),
                nnz_per_second: Some(nps),
                epoch: Some(i as u32 + 1),
                peak_rss_anon: run.peak_rss_anon,
                ratio_to_limit: Some(secs / train_scan_secs.max(1e-9)),
                cores: run.cores(),
                cpus: run.cpus,
                ..StageResult::bare(stage, threads, secs)
            });
        }
    }
    // Scoring the raw input with the 6-class model.
    let model = dir.join(format!("train-6class-{n}.tmm"));
    let mut score_threads = vec![1usize];
    if n > 1 {
        score_threads.push(n);
    }
    for threads in score_threads {
        progress(&format!("score, {threads} thread(s)"));
        let args = vec![
            s("score"),
            model.display().to_string(),
            input.display().to_string(),
            s("--threads"),
            threads.to_string(),
            s("--quiet"),
        ];
        let run = run_child(exe, &args, false, threads == 1)?;
        stages.push(StageResult::over_input(
            "score",
            threads,
            &run,
            in_bytes,
            Some(rows),
            in_secs,
        ));
    }

    let scaling = scaling_of(&stages, n);
    let ingest_over_wc = ingest_over_wc(&stages, n);
    Ok(BenchReport {
        input_bytes: in_bytes,
        rows,
        nnz,
        shard_bytes: sh_bytes,
        train_shard_bytes: train_bytes,
        threads: n,
        cores: std::thread::available_parallelism().map_or(1, |c| c.get()),
        load_average: load,
        dir: work.path.clone(),
        stages,
        scaling,
        ingest_over_wc,
    })
}

/// The stage name of the `wc -w` reference.
pub const WC_STAGE: &str = "wc-words";

/// Run `wc -w` on `input`: the run, when `wc` ran and printed a word count.
fn words_counted(input: &Path) -> Option<ChildRun> {
    let run = run_child(
        Path::new("wc"),
        &[s("-w"), input.display().to_string()],
        true,
        true,
    )
    .ok()?;
    let out = String::from_utf8_lossy(&run.stdout);
    out.split_whitespace().next()?.parse::<u64>().ok()?;
    Some(run)
}

/// Ingest's speed with `n` threads over the speed of `wc -w` on the same input.
fn ingest_over_wc(stages: &[StageResult], n: usize) -> Option<f64> {
    let wc = stages.iter().find(|s| s.stage == WC_STAGE)?;
    let ingest = stages
        .iter()
        .find(|s| s.stage == "ingest" && s.threads == n)?;
    Some(wc.seconds / ingest.seconds)
}

/// Words of the table [`random_reads`] reads: 16 MiB, a binary model's `v`
/// and `U` at the default 2^20 buckets.
const TABLE_WORDS: usize = 1 << 21;
/// Reads per part of the table in [`random_reads`].
const READS_PER_PART: usize = 1 << 26;

/// The table of [`TABLE_WORDS`] words is cut into `parts` parts; `threads`
/// threads (dividing `parts`) take the parts in turn and make
/// [`READS_PER_PART`] reads at random places of each (drawn beforehand).
/// Returns the seconds and the reads made. Every run reads parts of the same
/// size, so 1 thread against `parts` threads compares the same work and shows
/// how memory-latency-bound work scales here, not a cache-size effect. The sums
/// are kept so the reads cannot be left out by the compiler.
fn random_reads(threads: usize, parts: usize) -> (f64, u64) {
    let part = TABLE_WORDS / parts;
    // On huge pages where the system gives them, like the solver's weights.
    let mut table: crate::util::HugeVec<u64> = crate::util::HugeVec::zeroed(TABLE_WORDS);
    for (i, x) in table.iter_mut().enumerate() {
        *x = i as u64;
    }
    let mut x = 0x9e37_79b9_7f4a_7c15u64;
    let places: Vec<u32> = (0..1 << 20)
        .map(|_| {
            x ^= x << 13;
            x ^= x >> 7;
            x ^= x << 17;
            (x % part as u64) as u32
        })
        .collect();
    let read = |mine: &[u64]| {
        let mut sum = 0u64;
        for _ in 0..READS_PER_PART / places.len() {
            for &p in &places {
                sum = sum.wrapping_add(mine[p as usize]);
            }
        }
        sum
    };
    let per_thread = parts / threads;
    let t = Instant::now();
    let sums: u64 = std::thread::scope(|scope| {
        let handles: Vec<_> = table
            .chunks(part * per_thread)
            .take(threads)
            .map(|mine| scope.spawn(move || mine.chunks(part).map(read).fold(0, u64::wrapping_add)))
            .collect();
        handles
            .into_iter()
            .map(|h| h.join().unwrap_or(0))
            .fold(0, u64::wrapping_add)
    });
    let secs = t.elapsed().as_secs_f64();
    std::hint::black_box(sums);
    (secs, (READS_PER_PART * per_thread * threads) as u64)
}

/// Seconds to write `bytes` bytes to `path` and sync them, then to read them
/// back (from the page cache); the file is removed.
fn plain_write_read(path: &Path, bytes: u64) -> Result<(f64, f64)> {
    let block = vec![0x5au8; 1 << 20];
    let t = Instant::now();
    {
        let mut f = std::fs::File::create(path).at(path)?;
        let mut left = bytes;
        while left > 0 {
            let n = left.min(block.len() as u64) as usize;
            f.write_all(&block[..n]).at(path)?;
            left -= n as u64;
        }
        f.sync_all().at(path)?;
    }
    let write = t.elapsed().as_secs_f64();
    let t = Instant::now();
    let mut f = std::fs::File::open(path).at(path)?;
    let mut buf = vec![0u8; 1 << 20];
    while f.read(&mut buf).at(path)? > 0 {}
    let read = t.elapsed().as_secs_f64();
    let _ = std::fs::remove_file(path);
    Ok((write, read))
}

/// Speed-ups from 1 to `n` threads for every stage measured at both (training:
/// the last epoch).
fn scaling_of(stages: &[StageResult], n: usize) -> Vec<Scaling> {
    if n <= 1 {
        return Vec::new();
    }
    let speed = |st: &StageResult| {
        st.nnz_per_second
            .or(st.bytes_per_second)
            .unwrap_or(1.0 / st.seconds.max(1e-9))
    };
    let last = |name: &str, t: usize| {
        stages
            .iter()
            .rev()
            .find(|s| s.stage == name && s.threads == t)
    };
    let mut names: Vec<&str> = stages.iter().map(|s| s.stage.as_str()).collect();
    names.dedup();
    names
        .into_iter()
        .filter_map(|name| {
            let (a, b) = (last(name, 1)?, last(name, n)?);
            Some(Scaling {
                stage: name.into(),
                threads: n,
                speedup: speed(b) / speed(a),
                cores: (a.cores, b.cores),
            })
        })
        .collect()
}

/// The report as a table.
pub fn table(r: &BenchReport) -> String {
    use crate::util::{bytes, si};
    let mut out = String::new();
    out.push_str(&format!(
        "input {} ({} rows), dataset {} nonzeros in {} of shards; {} core(s), load average {} at start\n\n",
        bytes(r.input_bytes),
        crate::util::thousands(r.rows),
        crate::util::thousands(r.nnz),
        bytes(r.shard_bytes),
        r.cores,
        r.load_average
            .map_or_else(|| "unknown".to_string(), |l| format!("{l:.2}")),
    ));
    out.push_str(&format!(
        "{:<16} {:>3} {:>4} {:>5} {:>11} {:>12} {:>12} {:>9} {:>10} {:>6} {:>12}\n",
        "stage",
        "thr",
        "cpus",
        "epoch",
        "MB/s",
        "rows/s",
        "nnz/s",
        "secs",
        "x limit",
        "cores",
        "RssAnon"
    ));
    for st in &r.stages {
        let opt = |x: Option<f64>| x.map_or_else(|| "-".to_string(), si);
        out.push_str(&format!(
            "{:<16} {:>3} {:>4} {:>5} {:>11} {:>12} {:>12} {:>9.3} {:>10} {:>6} {:>12}\n",
            st.stage,
            st.threads,
            st.cpus.map_or_else(|| "-".to_string(), |c| c.to_string()),
            st.epoch.map_or_else(|| "-".to_string(), |e| e.to_string()),
            st.bytes_per_second
                .map_or_else(|| "-".to_string(), |b| format!("{:.1}", b / 1e6)),
            opt(st.rows_per_second),
            opt(st.nnz_per_second),
            st.seconds,
            st.ratio_to_limit
                .map_or_else(|| "-".to_string(), |x| format!("{x:.2}")),
            st.cores
                .map_or_else(|| "-".to_string(), |x| format!("{x:.2}")),
            st.peak_rss_anon.map_or_else(|| "-".to_string(), bytes),
        ));
    }
    if !r.scaling.is_empty() {
        let confined = r.stages.iter().any(|st| st.cpus == Some(1));
        out.push_str(&format!(
            "\nscaling from 1 to {} threads{}:",
            r.threads,
            if confined {
                " (1 thread on one CPU)"
            } else {
                ""
            }
        ));
        for sc in &r.scaling {
            out.push_str(&format!("  {} {:.2}x", sc.stage, sc.speedup));
            if let (Some(a), Some(b)) = sc.cores {
                out.push_str(&format!(" ({a:.2} -> {b:.2} cores)"));
            }
        }
        out.push('\n');
    }
    if let Some(x) = r.ingest_over_wc {
        out.push_str(&format!(
            "ingest with {} thread(s) runs at {x:.2}x the speed of `wc -w` on the same input\n",
            r.threads
        ));
    }
    out.push_str(
        "\nx limit: the stage's time over a plain sequential read of the same bytes \
(input for ingest and score, training shards for an epoch); for checkpoint-write, \
over a plain write and fsync of as many bytes, for checkpoint-load over reading them.\n\
random-reads: 8-byte reads at random places of a 16 MiB table (a binary model's weights \
and average, on huge pages like them) cut into one part per thread of the parallel run, the parts read in turn \
with 1 thread; its scaling is about the most that memory-bound training can gain from \
more threads on this machine.\n\
wc-words: coreutils `wc -w` counting the words of the input, a reference from outside tamis \
(run as it is installed, in the caller's locale).\n\
cores: the child process's user and system CPU time over its wall-clock time. `thr` counts \
worker threads; ingest and score also run a reader thread (and ingest a writer), so the \
runs with 1 thread are confined to one CPU (cpus 1) and the scaling is from one core to N.\n",
    );
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sizes_parse() {
        assert_eq!(parse_size("1GB"), Ok(1_000_000_000));
        assert_eq!(parse_size("250MB"), Ok(250_000_000));
        assert_eq!(parse_size("64KiB"), Ok(65_536));
        assert_eq!(parse_size("1.5GiB"), Ok(1_610_612_736));
        assert_eq!(parse_size("123456"), Ok(123_456));
        assert_eq!(parse_size(" 2 mb "), Ok(2_000_000));
        assert!(parse_size("GB").is_err());
        assert!(parse_size("1XB").is_err());
        assert!(parse_size("0").is_err());
    }

    #[test]
    fn scan_reads_every_byte() {
        let dir = std::env::temp_dir().join(format!("tamis-scan-test-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let p = dir.join("x");
        let data: Vec<u8> = (0..3_000_005u32).map(|i| (i % 251) as u8).collect();
        std::fs::write(&p, &data).unwrap();
        let (n, _, sum) = scan(std::slice::from_ref(&p)).unwrap();
        let want = data.chunks(8).fold(0u64, |acc, c| {
            let mut w = [0u8; 8];
            w[..c.len()].copy_from_slice(c);
            acc.wrapping_add(u64::from_le_bytes(w))
        });
        assert_eq!((n, sum), (data.len() as u64, want));
        std::fs::remove_dir_all(&dir).unwrap();
    }

    /// The CPU time `run_child` reports is the child's, from the kernel: a
    /// child that spins accrues some, one that sleeps almost none, and neither
    /// can keep more cores busy than the machine has. A failing child is an
    /// error naming its command.
    #[cfg(unix)]
    #[test]
    fn child_cpu_time_is_measured() {
        let sh = Path::new("/bin/sh");
        let spin = run_child(
            sh,
            &[
                s("-c"),
                s("i=0; while [ $i -lt 200000 ]; do i=$((i+1)); done"),
            ],
            false,
            false,
        )
        .unwrap();
        let cpu = spin.cpu_seconds.expect("measured on unix");
        let cores = std::thread::available_parallelism().map_or(1, |c| c.get()) as f64;
        assert!(cpu > 0.0, "a spinning child used no CPU time");
        assert!(spin.cores().unwrap() <= cores + 0.05, "{spin:?}");
        let nap = run_child(sh, &[s("-c"), s("sleep 0.3")], false, false).unwrap();
        assert!(nap.cpu_seconds.unwrap() < 0.15, "{nap:?}");
        let printed = run_child(sh, &[s("-c"), s("echo hi")], true, false).unwrap();
        assert_eq!(printed.stdout, b"hi\n");
        let err = run_child(sh, &[s("-c"), s("echo nope >&2; exit 3")], false, false).unwrap_err();
        let msg = err.to_string();
        assert!(
            msg.contains("exit status: 3") && msg.contains("nope"),
            "{msg}"
        );
    }

    /// A child run with `one_cpu` may use one CPU only: the kernel lists one CPU
    /// as allowed, and two busy processes under it keep at most one core busy.
    #[cfg(target_os = "linux")]
    #[test]
    fn one_cpu_children_are_confined() {
        let sh = Path::new("/bin/sh");
        let allowed = |one_cpu| {
            let r = run_child(
                sh,
                &[s("-c"), s("grep Cpus_allowed_list /proc/self/status")],
                true,
                one_cpu,
            )
            .unwrap();
            let out = String::from_utf8(r.stdout).unwrap();
            let list = out.split(':').nth(1).unwrap().trim().to_string();
            (list, r.cpus)
        };
        let (free, free_cpus) = allowed(false);
        assert_eq!(free_cpus, None);
        if one_cpu_set().is_none() {
            // One CPU only: nothing to confine.
            assert_eq!(allowed(true).1, None);
            return;
        }
        let (one, cpus) = allowed(true);
        assert_eq!(cpus, Some(1));
        assert!(
            one.parse::<usize>().is_ok(),
            "confined to {one:?}, free to {free:?}"
        );
        assert_ne!(one, free);
        let spin = "i=0; while [ $i -lt 150000 ]; do i=$((i+1)); done";
        let two = run_child(
            sh,
            &[s("-c"), format!("({spin}) & ({spin}) & wait")],
            false,
            true,
        )
        .unwrap();
        assert!(two.cores().unwrap() <= 1.1, "{two:?}");
    }

    /// Free space as the kernel reports it, checked against coreutils `df`
    /// (`--output=avail -B1`, the same `statvfs` figure) where `df` is there;
    /// a bench too large for it is refused before anything is written.
    #[cfg(unix)]
    #[test]
    fn free_space_is_checked_before_starting() {
        let dir = std::env::temp_dir();
        let free = free_bytes(&dir.join("not/yet/made")).expect("statvfs works here");
        assert!(free > 0);
        if let Ok(out) = std::process::Command::new("df")
            .args(["--output=avail", "-B1"])
            .arg(&dir)
            .output()
        {
            if out.status.success() {
                let text = String::from_utf8_lossy(&out.stdout);
                let df: u64 = text.lines().nth(1).unwrap().trim().parse().unwrap();
                // Other processes write meanwhile: equal within 1 GiB.
                assert!(free.abs_diff(df) < 1 << 30, "statvfs {free}, df {df}");
            }
        }
        let here = Path::new("/somewhere");
        check_room(here, 1 << 30, Some(6 << 30)).unwrap();
        check_room(here, 1 << 30, None).unwrap();
        let e = check_room(here, 1 << 30, Some(5 << 30))
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("/somewhere") && e.contains("5.5 GiB") && e.contains("only 5.0 GiB is free"),
            "{e}"
        );
    }

    #[test]
    fn scaling_pairs_last_epochs() {
        let st = |stage: &str, threads, nnz: Option<f64>, bps: Option<f64>| StageResult {
            stage: stage.into(),
            threads,
            seconds: 1.0,
            bytes_per_second: bps,
            rows_per_second: None,
            nnz_per_second: nnz,
            epoch: None,
            peak_rss_anon: None,
            ratio_to_limit: None,
            cores: None,
            cpus: None,
        };
        let stages = vec![
            st("ingest", 1, None, Some(100.0)),
            st("ingest", 2, None, Some(180.0)),
            st("train-binary", 1, Some(10.0), None),
            st("train-binary", 1, Some(20.0), None),
            st("train-binary", 2, Some(30.0), None),
            st("train-6class", 2, Some(5.0), None),
        ];
        let sc = scaling_of(&stages, 2);
        assert_eq!(sc.len(), 2);
        assert_eq!((sc[0].stage.as_str(), sc[0].speedup), ("ingest", 1.8));
        assert_eq!(sc[0].cores, (None, None));
        assert_eq!((sc[1].stage.as_str(), sc[1].speedup), ("train-binary", 1.5));
        assert!(scaling_of(&stages, 1).is_empty());
    }
}
