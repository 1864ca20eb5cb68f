//! Helpers shared by the end-to-end tests: temporary folders, running the built
//! `tamis` binary, reading datasets back with the library.
//!
//! Every test file uses a different subset of these helpers.
#![allow(dead_code)]

use std::collections::{BTreeMap, BTreeSet};
use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};

use tamis::dataset::{Manifest, Split};
use tamis::shard::Shard;

/// Path of a file in `fixtures/`.
pub fn fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("fixtures")
        .join(name)
}

/// The bytes of a fixture.
pub fn fixture_bytes(name: &str) -> Vec<u8> {
    std::fs::read(fixture(name)).unwrap_or_else(|e| panic!("fixture {name}: {e}"))
}

/// A fresh temporary folder, removed when dropped.
pub fn tmp() -> tempfile::TempDir {
    tempfile::Builder::new()
        .prefix("tamis-e2e-")
        .tempdir()
        .expect("temporary folder")
}

/// The built binary.
pub fn bin() -> &'static str {
    env!("CARGO_BIN_EXE_tamis")
}

/// Outcome of one run of the binary.
#[derive(Debug)]
pub struct Out {
    /// The command line, for messages.
    pub args: Vec<String>,
    /// Exit code (`None` when killed by a signal).
    pub code: Option<i32>,
    /// Standard output.
    pub stdout: String,
    /// Standard error.
    pub stderr: String,
}

impl Out {
    /// What a finished run of `args` gave.
    fn of(args: Vec<String>, o: std::process::Output) -> Out {
        Out {
            args,
            code: o.status.code(),
            stdout: String::from_utf8_lossy(&o.stdout).into_owned(),
            stderr: String::from_utf8_lossy(&o.stderr).into_owned(),
        }
    }

    fn describe(&self) -> String {
        format!(
            "tamis {}\nexit {:?}\n--- stdout\n{}\n--- stderr\n{}",
            self.args.join(" "),
            self.code,
            self.stdout,
            self.stderr
        )
    }

    /// Assert exit status 0.
    #[track_caller]
    pub fn ok(&self) -> &Self {
        assert_eq!(self.code, Some(0), "expected success:\n{}", self.describe());
        self
    }

    /// Assert a clean failure: exit status 1 (an error reported with `error:`),
    /// not a panic (101), a signal or a usage error (2).
    #[track_caller]
    pub fn fails(&self) -> &Self {
        assert_eq!(self.code, Some(1), "expected exit 1:\n{}", self.describe());
        assert!(
            self.stderr.contains("error:"),
            "no `error:` line:\n{}",
            self.describe()
        );
        assert!(
            !self.stderr.contains("panicked"),
            "panicked:\n{}",
            self.describe()
        );
        self
    }

    /// Assert that standard error contains `needle`.
    #[track_caller]
    pub fn stderr_has(&self, needle: &str) -> &Self {
        assert!(
            self.stderr.contains(needle),
            "stderr lacks {needle:?}:\n{}",
            self.describe()
        );
        self
    }

    /// Assert that standard output contains `needle`.
    #[track_caller]
    pub fn stdout_has(&self, needle: &str) -> &Self {
        assert!(
            self.stdout.contains(needle),
            "stdout lacks {needle:?}:\n{}",
            self.describe()
        );
        self
    }
}

fn to_strings<I, S>(args: I) -> Vec<String>
where
    I: IntoIterator<Item = S>,
    S: AsRef<std::ffi::OsStr>,
{
    args.into_iter()
        .map(|a| a.as_ref().to_string_lossy().into_owned())
        .collect()
}

/// Run `tamis ARGS...` with no standard input.
pub fn tamis<I, S>(args: I) -> Out
where
    I: IntoIterator<Item = S>,
    S: AsRef<std::ffi::OsStr>,
{
    tamis_with_stdin(args, None)
}

/// Run `tamis ARGS...`, feeding `stdin` (or nothing) to it.
pub fn tamis_with_stdin<I, S>(args: I, stdin: Option<&[u8]>) -> Out
where
    I: IntoIterator<Item = S>,
    S: AsRef<std::ffi::OsStr>,
{
    let args = to_strings(args);
    let mut cmd = Command::new(bin());
    cmd.args(&args)
        .env_remove("RUST_BACKTRACE")
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .stdin(if stdin.is_some() {
            Stdio::piped()
        } else {
            Stdio::null()
        });
    let mut child = cmd.spawn().expect("run tamis");
    if let Some(bytes) = stdin {
        let mut w = child.stdin.take().expect("stdin");
        let bytes = bytes.to_vec();
        // Write from a thread so a child that stops reading cannot block us.
        std::thread::spawn(move || {
            let _ = w.write_all(&bytes);
        });
    }
    let o = child.wait_with_output().expect("wait for tamis");
    Out::of(args, o)
}

/// Run `tamis ARGS...` with its address space limited to `kib` KiB and its
/// time to 60 seconds (`ulimit -v`, coreutils `timeout`), so that a run that
/// allocates or loops without bound fails at once instead of taking the
/// machine's memory or hanging the tests.
pub fn tamis_limited(args: &[&str], kib: u64) -> Out {
    let o = Command::new("sh")
        .arg("-c")
        .arg(format!("ulimit -v {kib} && exec timeout 60 \"$0\" \"$@\""))
        .arg(bin())
        .args(args)
        .env_remove("RUST_BACKTRACE")
        .stdin(Stdio::null())
        .output()
        .expect("run tamis under sh");
    Out::of(to_strings(args), o)
}

/// Run `tamis ARGS...` with its standard output a pipe that nobody reads any
/// more, as when the output is piped into a command that has exited early
/// (`tamis stats DIR | head -0`). Returns exit code and standard error.
///
/// The pipe is the standard input of a short-lived process (`tamis --version`):
/// once that process has exited, the pipe has no reader left, so the first write
/// of the process under test fails with EPIPE, whatever the timing.
pub fn tamis_closed_stdout(args: &[&str]) -> (Option<i32>, String) {
    let mut reader = Command::new(bin())
        .arg("--version")
        .stdin(Stdio::piped())
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .expect("run tamis --version");
    let write_end = reader.stdin.take().expect("piped stdin");
    assert!(reader.wait().expect("wait").success());
    let o = Command::new(bin())
        .args(args)
        .env_remove("RUST_BACKTRACE")
        .stdin(Stdio::null())
        .stdout(Stdio::from(write_end))
        .stderr(Stdio::piped())
        .output()
        .expect("run tamis");
    (
        o.status.code(),
        String::from_utf8_lossy(&o.stderr).into_owned(),
    )
}

/// `ingest` options for `fixtures/inbox.jsonl`: label `tag`, text fields
/// `subject` and `body`, numeric field `attachments`.
pub const JSONL_FIELDS: [&str; 10] = [
    "--format",
    "jsonl",
    "--label-field",
    "tag",
    "--text-field",
    "subject",
    "--text-field",
    "body",
    "--numeric-field",
    "attachments",
];

/// `tamis ingest INPUTS... --out OUT EXTRA...`
pub fn ingest(inputs: &[&Path], out: &Path, extra: &[&str]) -> Out {
    let mut args: Vec<std::ffi::OsString> = vec!["ingest".into()];
    args.extend(inputs.iter().map(|p| p.as_os_str().to_owned()));
    args.push("--out".into());
    args.push(out.as_os_str().to_owned());
    args.extend(extra.iter().map(Into::into));
    tamis(args)
}

/// Path as a `&str` (temporary folders are ASCII here).
pub fn s(p: &Path) -> &str {
    p.to_str().expect("UTF-8 path")
}

/// `tamis stats DIR --json`, parsed.
pub fn stats_json(dir: &Path) -> serde_json::Value {
    let o = tamis(["stats", s(dir), "--json"]);
    o.ok();
    serde_json::from_str(&o.stdout).unwrap_or_else(|e| panic!("stats JSON: {e}\n{}", o.stdout))
}

/// The raw manifest of a dataset, parsed as plain JSON.
pub fn manifest_json(dir: &Path) -> serde_json::Value {
    let bytes = std::fs::read(dir.join("manifest.json")).expect("manifest.json");
    serde_json::from_slice(&bytes).expect("manifest is JSON")
}

/// The manifest through the library.
pub fn manifest(dir: &Path) -> Manifest {
    Manifest::load(dir).expect("manifest loads")
}

/// Names of the entries of a folder.
pub fn names_in(dir: &Path) -> BTreeSet<String> {
    match std::fs::read_dir(dir) {
        Ok(rd) => rd
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect(),
        Err(_) => BTreeSet::new(),
    }
}

/// Every file of a folder with its bytes.
pub fn contents(dir: &Path) -> BTreeMap<String, Vec<u8>> {
    names_in(dir)
        .into_iter()
        .map(|n| {
            let b = std::fs::read(dir.join(&n)).unwrap();
            (n, b)
        })
        .collect()
}

/// The binary files of a dataset (shards, document frequencies, token
/// sketches) with their bytes.
pub fn data_files(dir: &Path) -> BTreeMap<String, Vec<u8>> {
    contents(dir)
        .into_iter()
        .filter(|(n, _)| n.ends_with(".tms") || n.ends_with(".tmd") || n.ends_with(".tmk"))
        .collect()
}

/// Assert that two datasets hold byte-identical shards, document-frequency
/// files and token sketches under the same names.
#[track_caller]
pub fn assert_same_data(a: &Path, b: &Path) {
    let (fa, fb) = (data_files(a), data_files(b));
    assert!(!fa.is_empty(), "no data files in {}", a.display());
    assert_eq!(
        fa.keys().collect::<Vec<_>>(),
        fb.keys().collect::<Vec<_>>(),
        "file names differ"
    );
    for (name, bytes) in &fa {
        assert!(bytes == &fb[name], "{name} differs");
    }
    let (ma, mb) = (manifest(a), manifest(b));
    let sums = |m: &Manifest| {
        m.shards
            .iter()
            .map(|s| (s.file.clone(), s.checksum.clone()))
            .collect::<Vec<_>>()
    };
    assert_eq!(sums(&ma), sums(&mb));
    assert_eq!(ma.labels, mb.labels);
}

/// One row read back from a shard.
#[derive(Debug, Clone, PartialEq)]
pub struct Row {
    /// Label name (through the manifest's dictionary).
    pub label: String,
    /// Bucket indices.
    pub indices: Vec<u32>,
    /// Values.
    pub values: Vec<f32>,
}

impl Row {
    /// A total-order key (values by their bits), for comparing multisets of rows.
    pub fn key(&self) -> (String, Vec<u32>, Vec<u32>) {
        (
            self.label.clone(),
            self.indices.clone(),
            self.values.iter().map(|v| v.to_bits()).collect(),
        )
    }
}

/// All rows of the given split (or of both), shard by shard in manifest order.
pub fn rows(dir: &Path, split: Option<Split>) -> Vec<Row> {
    let m = manifest(dir);
    let mut out = Vec::new();
    for e in m
        .shards
        .iter()
        .filter(|e| split.is_none_or(|s| s == e.split))
    {
        let sh = Shard::open(&dir.join(&e.file)).expect("shard opens");
        assert_eq!(sh.rows() as u64, e.rows, "{}", e.file);
        for i in 0..sh.rows() {
            let r = sh.row(i);
            out.push(Row {
                label: m.labels[r.label as usize].name.clone(),
                indices: r.indices.to_vec(),
                values: r.values.to_vec(),
            });
        }
    }
    out
}

/// Sorted multiset keys of rows.
pub fn row_keys(rows: &[Row]) -> Vec<(String, Vec<u32>, Vec<u32>)> {
    let mut k: Vec<_> = rows.iter().map(Row::key).collect();
    k.sort();
    k
}

/// Count rows per label.
pub fn per_label(rows: &[Row]) -> BTreeMap<String, u64> {
    let mut m = BTreeMap::new();
    for r in rows {
        *m.entry(r.label.clone()).or_insert(0) += 1;
    }
    m
}

/// Labels of a TSV text counted independently of tamis: the label is what comes
/// before the first tab, with surrounding ASCII spaces removed; blank lines are
/// skipped.
pub fn tsv_label_counts(text: &[u8]) -> BTreeMap<String, u64> {
    let mut m = BTreeMap::new();
    for line in text.split(|&b| b == b'\n') {
        let line = line.strip_suffix(b"\r").unwrap_or(line);
        if line.iter().all(|b| b.is_ascii_whitespace()) {
            continue;
        }
        let tab = line.iter().position(|&b| b == b'\t').expect("tab");
        let label = String::from_utf8(line[..tab].trim_ascii().to_vec()).unwrap();
        *m.entry(label).or_insert(0) += 1;
    }
    m
}

/// `(offset, length)` of section `id` of a tamis container file, read from its
/// header as documented in `src/container.rs`: the section count is the `u32` at
/// byte 16, the table starts at byte 64 with 32-byte entries `id u32, reserved
/// u32, offset u64, length u64, xxh3 u64`.
pub fn section(bytes: &[u8], id: u32) -> (usize, usize) {
    let u32_at = |at: usize| u32::from_le_bytes(bytes[at..at + 4].try_into().unwrap());
    let u64_at = |at: usize| u64::from_le_bytes(bytes[at..at + 8].try_into().unwrap());
    assert_eq!(&bytes[..8], b"\x89TAMIS\r\n", "magic");
    let count = u32_at(16) as usize;
    for i in 0..count {
        let e = 64 + 32 * i;
        if u32_at(e) == id {
            return (u64_at(e + 8) as usize, u64_at(e + 16) as usize);
        }
    }
    panic!("no section {id}");
}

/// Recompute every section checksum of a container, then its header
/// checksum (xxh3-64, seed 0, of the header bytes before it; layout above), so
/// that only what a test changed on purpose is wrong.
pub fn reseal(bytes: &mut [u8]) {
    let u64_at = |b: &[u8], at: usize| u64::from_le_bytes(b[at..at + 8].try_into().unwrap());
    let count = u32::from_le_bytes(bytes[16..20].try_into().unwrap()) as usize;
    for i in 0..count {
        let e = 64 + 32 * i;
        let (off, len) = (
            u64_at(bytes, e + 8) as usize,
            u64_at(bytes, e + 16) as usize,
        );
        let sum = xxhash_rust::xxh3::xxh3_64(&bytes[off..off + len]);
        bytes[e + 24..e + 32].copy_from_slice(&sum.to_le_bytes());
    }
    let end = 64 + 32 * count;
    let sum = xxhash_rust::xxh3::xxh3_64(&bytes[..end]);
    bytes[end..end + 8].copy_from_slice(&sum.to_le_bytes());
}

/// Shard section ids (from the table in `src/shard/mod.rs`).
pub const SEC_INDICES: u32 = 1;
/// Values section id.
pub const SEC_VALUES: u32 = 2;
/// Row offsets section id.
pub const SEC_INDPTR: u32 = 3;
/// Labels section id.
pub const SEC_LABELS: u32 = 4;

/// Write `rows` invented messages as TSV to `path` with the library's generator.
pub fn synth_tsv(path: &Path, rows: u64, seed: u64) {
    let mut buf = Vec::new();
    tamis::synth::Synth::new(tamis::synth::SynthConfig {
        seed,
        ..Default::default()
    })
    .write_rows(rows, &mut buf)
    .unwrap();
    std::fs::write(path, buf).unwrap();
}

/// Check that `tamis ARGS... --help` exits 0 and that every argument and option
/// it lists has an explanation, on the same line or on the lines below it.
#[track_caller]
pub fn assert_help_explains_everything(args: &[&str]) {
    for flag in ["--help", "-h"] {
        let mut a: Vec<&str> = args.to_vec();
        a.push(flag);
        let o = tamis(&a);
        o.ok();
        let lines: Vec<&str> = o.stdout.lines().collect();
        assert!(
            lines.iter().any(|l| l.starts_with("Usage: tamis")),
            "{flag}: no usage line"
        );
        let mut entries = 0;
        let mut in_list = false;
        for (i, line) in lines.iter().enumerate() {
            if matches!(*line, "Arguments:" | "Options:" | "Commands:") {
                in_list = true;
                continue;
            }
            if line.trim().is_empty() || !line.starts_with(' ') {
                if !line.starts_with(' ') && !line.trim().is_empty() {
                    in_list = false;
                }
                continue;
            }
            let indent = line.len() - line.trim_start().len();
            let t = line.trim_start();
            // Entries start at a small indent; explanations, wrapped text and
            // lists of possible values are indented further.
            if !in_list || indent > 6 {
                continue;
            }
            let is_entry = t.starts_with('-') || t.starts_with('<') || args.is_empty();
            if !is_entry {
                continue;
            }
            entries += 1;
            // "  -o, --out <DIR>  Dataset folder..." or the explanation below.
            let sig_end = t.find("  ").map(|p| &t[p..]);
            let same_line = sig_end.is_some_and(|rest| rest.trim().len() > 3);
            let next_line = lines.get(i + 1).is_some_and(|n| {
                let ni = n.len() - n.trim_start().len();
                ni > indent && n.trim().len() > 3
            });
            assert!(
                same_line || next_line,
                "{} {flag}: no explanation for {t:?}\n{}",
                args.join(" "),
                o.stdout
            );
        }
        assert!(entries >= 1, "{flag}: no options found in\n{}", o.stdout);
    }
}

/// `1234567` → `"1,234,567"`, written here independently of `tamis::util`.
pub fn thousands(n: u64) -> String {
    let digits = n.to_string();
    let mut groups: Vec<&str> = Vec::new();
    let mut end = digits.len();
    while end > 3 {
        groups.push(&digits[end - 3..end]);
        end -= 3;
    }
    groups.push(&digits[..end]);
    groups.reverse();
    groups.join(",")
}

// ------------------------------------------------------------------ models
// Helpers for the tests of `train`, `score` and `eval`.

/// `tamis train DIR --model MODEL EXTRA...`
pub fn train(dir: &Path, model: &Path, extra: &[&str]) -> Out {
    let mut args: Vec<std::ffi::OsString> = vec![
        "train".into(),
        dir.as_os_str().to_owned(),
        "--model".into(),
        model.as_os_str().to_owned(),
    ];
    args.extend(extra.iter().map(Into::into));
    tamis(args)
}

/// `rows` invented messages (generator seed `seed`) written to `work/NAME.tsv`,
/// ingested into `work/NAME` with `ingest_extra` and trained for 3 epochs with
/// `train_extra` into `work/NAME.tmm`; returns (dataset, model).
pub fn synth_model(
    work: &Path,
    name: &str,
    rows: u64,
    seed: u64,
    ingest_extra: &[&str],
    train_extra: &[&str],
) -> (PathBuf, PathBuf) {
    let input = work.join(format!("{name}.tsv"));
    synth_tsv(&input, rows, seed);
    let dir = work.join(name);
    let mut a = vec!["-q"];
    a.extend_from_slice(ingest_extra);
    ingest(&[&input], &dir, &a).ok();
    let m = work.join(format!("{name}.tmm"));
    let mut t = vec!["--epochs", "3", "-q"];
    t.extend_from_slice(train_extra);
    train(&dir, &m, &t).ok();
    (dir, m)
}

/// `tamis eval MODEL DATA... EXTRA... --json`, parsed (the run must succeed).
pub fn eval_json(model: &Path, data: &[&str], extra: &[&str]) -> serde_json::Value {
    let mut args: Vec<String> = vec!["eval".into(), s(model).into()];
    args.extend(data.iter().map(|d| d.to_string()));
    args.extend(extra.iter().map(|d| d.to_string()));
    args.push("--json".into());
    let o = tamis(&args);
    o.ok();
    serde_json::from_str(&o.stdout).unwrap_or_else(|e| panic!("eval JSON: {e}\n{}", o.stdout))
}

/// The container header fields of a tamis file, read as documented in
/// `src/container.rs`: kind (byte 8), version (12), section count (16), file
/// length (24) and the four kind-specific parameters (32..64).
#[derive(Debug, Clone, PartialEq)]
pub struct FileHeader {
    /// File kind (3 for a model).
    pub kind: u32,
    /// Format version of that kind.
    pub version: u32,
    /// Sections.
    pub sections: u32,
    /// File length recorded in the header.
    pub file_len: u64,
    /// Kind-specific parameters (a model: models, dimension, idf flag, 0).
    pub params: [u64; 4],
    /// Section ids in table order.
    pub ids: Vec<u32>,
}

/// Parse the header of a tamis file (asserting the magic bytes).
pub fn file_header(bytes: &[u8]) -> FileHeader {
    assert!(bytes.len() >= 64, "only {} bytes", bytes.len());
    assert_eq!(&bytes[..8], b"\x89TAMIS\r\n", "magic");
    let u32_at = |at: usize| u32::from_le_bytes(bytes[at..at + 4].try_into().unwrap());
    let u64_at = |at: usize| u64::from_le_bytes(bytes[at..at + 8].try_into().unwrap());
    let sections = u32_at(16);
    FileHeader {
        kind: u32_at(8),
        version: u32_at(12),
        sections,
        file_len: u64_at(24),
        params: [u64_at(32), u64_at(40), u64_at(48), u64_at(56)],
        ids: (0..sections as usize)
            .map(|i| u32_at(64 + 32 * i))
            .collect(),
    }
}

/// Model section ids (from the table in `src/model/mod.rs`).
pub const MODEL_META: u32 = 1;
/// Weights section id (`f32`, models × dimension, model-major).
pub const MODEL_WEIGHTS: u32 = 2;
/// Biases section id (`f32`, one per model).
pub const MODEL_BIASES: u32 = 3;
/// idf section id (`f32`, dimension).
pub const MODEL_IDF: u32 = 4;
/// Model section id of the token sketch (src/model/mod.rs).
pub const MODEL_SKETCH: u32 = 5;

/// The metadata section of a model file, parsed as plain JSON.
pub fn model_meta(path: &Path) -> serde_json::Value {
    let bytes = std::fs::read(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    let (off, len) = section(&bytes, MODEL_META);
    serde_json::from_slice(&bytes[off..off + len]).expect("model metadata is JSON")
}

/// A section of little-endian `f32` values of a tamis file.
pub fn f32_section(bytes: &[u8], id: u32) -> Vec<f32> {
    let (off, len) = section(bytes, id);
    assert_eq!(len % 4, 0, "section {id} length {len}");
    bytes[off..off + len]
        .chunks_exact(4)
        .map(|c| f32::from_le_bytes(c.try_into().unwrap()))
        .collect()
}

/// Invented messages from the library's generator with the given settings.
pub fn synth_bytes(cfg: tamis::synth::SynthConfig, rows: u64) -> Vec<u8> {
    let mut buf = Vec::new();
    tamis::synth::Synth::new(cfg)
        .write_rows(rows, &mut buf)
        .unwrap();
    buf
}

/// One line of `tamis score` TSV output.
#[derive(Debug, Clone, PartialEq)]
pub enum Scored {
    /// `WHERE<TAB>LABEL<TAB>SCORE[<TAB>PROBABILITY]`.
    Row {
        /// Line number, or `FILE:LINE`.
        place: String,
        /// Predicted label.
        label: String,
        /// Score as printed.
        score: f64,
        /// Probability as printed, for logistic models.
        probability: Option<f64>,
    },
    /// `WHERE<TAB>!skipped<TAB>REASON: DETAIL`.
    Skipped {
        /// Line number, or `FILE:LINE`.
        place: String,
        /// Reason key.
        reason: String,
        /// Details.
        detail: String,
    },
}

impl Scored {
    /// Where the record was.
    pub fn place(&self) -> &str {
        match self {
            Scored::Row { place, .. } | Scored::Skipped { place, .. } => place,
        }
    }
}

/// Parse `tamis score` TSV output, asserting its shape line by line.
pub fn parse_scores(stdout: &str) -> Vec<Scored> {
    stdout
        .lines()
        .map(|line| {
            let f: Vec<&str> = line.split('\t').collect();
            assert!(f.len() >= 3, "short line {line:?}");
            if f[1] == "!skipped" {
                assert_eq!(f.len(), 3, "{line:?}");
                let (reason, detail) = f[2].split_once(": ").expect("REASON: DETAIL");
                return Scored::Skipped {
                    place: f[0].into(),
                    reason: reason.into(),
                    detail: detail.into(),
                };
            }
            assert!(f.len() <= 4, "{line:?}");
            let num = |x: &str| -> f64 {
                let v: f64 = x
                    .parse()
                    .unwrap_or_else(|_| panic!("number {x:?} in {line:?}"));
                assert!(v.is_finite(), "{line:?}");
                v
            };
            Scored::Row {
                place: f[0].into(),
                label: f[1].into(),
                score: num(f[2]),
                probability: f.get(3).map(|p| num(p)),
            }
        })
        .collect()
}

/// `tamis score MODEL ARGS...` with no standard input; must succeed.
pub fn score(model: &Path, args: &[&str]) -> Out {
    let mut a: Vec<String> = vec!["score".into(), s(model).into()];
    a.extend(args.iter().map(|x| x.to_string()));
    let o = tamis(&a);
    o.ok();
    o
}

/// Labels of TSV records as `tamis` reads them (label before the first tab,
/// ASCII spaces trimmed), one per non-blank line, in order.
pub fn tsv_labels(text: &[u8]) -> Vec<String> {
    text.split(|&b| b == b'\n')
        .map(|l| l.strip_suffix(b"\r").unwrap_or(l))
        .filter(|l| !l.iter().all(|b| b.is_ascii_whitespace()))
        .map(|l| {
            let tab = l.iter().position(|&b| b == b'\t').expect("tab");
            String::from_utf8(l[..tab].trim_ascii().to_vec()).unwrap()
        })
        .collect()
}

/// Flip one bit in the middle of section `id` of the file at `path`.
pub fn flip_in_section(path: &Path, id: u32) {
    let mut bytes = std::fs::read(path).unwrap();
    let (off, len) = section(&bytes, id);
    assert!(len > 0, "section {id} is empty");
    bytes[off + len / 2] ^= 0x10;
    std::fs::write(path, bytes).unwrap();
}

// ------------------------------------------------------------- calibration
// Helpers for the tests of `calibrate`, `score` and `eval` on calibrated models.

/// `tamis calibrate MODEL DIR EXTRA... --json`: the outcome and the parsed report.
pub fn calibrate_json(model: &Path, dir: &Path, extra: &[&str]) -> (Out, serde_json::Value) {
    let mut args: Vec<String> = vec!["calibrate".into(), s(model).into(), s(dir).into()];
    args.extend(extra.iter().map(|d| d.to_string()));
    args.push("--json".into());
    let o = tamis(&args);
    let v = serde_json::from_str(&o.stdout).unwrap_or(serde_json::Value::Null);
    (o, v)
}

/// The scores of every model for each row of `split` of the dataset in `dir`,
/// with the row's label, computed with the library's model.
pub fn split_scores(model: &Path, dir: &Path, split: Split) -> Vec<(Vec<f64>, String)> {
    let m = tamis::model::Model::load(model).expect("model loads");
    let mut out = Vec::new();
    for r in rows(dir, Some(split)) {
        let mut sc = Vec::new();
        m.scores(
            &tamis::shard::Row {
                label: 0,
                indices: &r.indices,
                values: &r.values,
            },
            &mut sc,
        );
        out.push((sc, r.label));
    }
    out
}

/// Invented messages ingested as a binary spam task (2^18 buckets, 30%
/// validation) into `work/NAME`, and a model trained on it.
pub fn spam_model(work: &Path, name: &str, loss: &str) -> (PathBuf, PathBuf) {
    // The TSV stays at `work/NAME.tsv` for scoring.
    let tsv = work.join(format!("{name}.tsv"));
    synth_tsv(&tsv, 3000, 5);
    let dir = work.join(name);
    ingest(
        &[&tsv],
        &dir,
        &[
            "--positive",
            "spam",
            "--log2-buckets",
            "18",
            "--validation",
            "0.3",
            "-q",
        ],
    )
    .ok();
    let model = work.join(format!("{name}.tmm"));
    train(&dir, &model, &["--epochs", "3", "--loss", loss, "-q"]).ok();
    (dir, model)
}

/// λ/2·‖w‖² + mean hinge loss of a binary model (file `model`) on the training
/// rows of `ds`, and its accuracy on the validation rows.
pub fn binary_objective_and_accuracy(model: &Path, ds: &Path, lambda: f64) -> (f64, f64) {
    let bytes = std::fs::read(model).unwrap();
    let w = f32_section(&bytes, MODEL_WEIGHTS);
    let b = f32_section(&bytes, MODEL_BIASES)[0] as f64;
    let positive = model_meta(model)["positive"].as_str().unwrap().to_string();
    let margin = |r: &Row| {
        r.indices
            .iter()
            .zip(&r.values)
            .map(|(&i, &v)| w[i as usize] as f64 * v as f64)
            .sum::<f64>()
            + b
    };
    let train = rows(ds, Some(tamis::dataset::Split::Train));
    let loss: f64 = train
        .iter()
        .map(|r| {
            let y = if r.label == positive { 1.0 } else { -1.0 };
            (1.0 - y * margin(r)).max(0.0)
        })
        .sum();
    let reg = w.iter().map(|&x| x as f64 * x as f64).sum::<f64>() * lambda / 2.0;
    let valid = rows(ds, Some(tamis::dataset::Split::Validation));
    let right = valid
        .iter()
        .filter(|r| (margin(r) > 0.0) == (r.label == positive))
        .count();
    (
        reg + loss / train.len() as f64,
        right as f64 / valid.len().max(1) as f64,
    )
}
