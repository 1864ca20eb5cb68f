//! The ingest pipeline: raw inputs → parsed records → hashed rows → shards.
//!
//! Three stages run at once ([`crate::input::pipeline`]). A reader thread
//! decompresses the inputs in order and cuts them into chunks; worker threads
//! parse and hash chunks as they come; the calling thread takes the hashed rows
//! in input order and appends them to shard writers. The dataset written
//! therefore does not depend on the number of threads.
//!
//! Rows are spread over several open training shard writers: row `i` (counting
//! training rows over the whole dataset, appends included) goes to writer
//! `xxh3_64(le_bytes(i), scatter_seed) mod W`; a writer's shard is closed after
//! `shard_rows` rows and a new one opened in its place. Validation rows go to
//! their own shards.
//!
//! Crash safety: new shards are written under new names and only become part of
//! the dataset when the manifest that lists them is renamed into place. A failed
//! run removes what it wrote; files left by a killed run are removed by the next
//! run in the same folder.

use std::collections::{BTreeMap, HashMap};
use std::io::IsTerminal;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;
use std::time::Instant;

use xxhash_rust::xxh3::xxh3_64_with_seed;

use super::docfreq::{self, DocCounter};
use super::manifest::{
    Batch, DocFreqEntry, InputEntry, LabelEntry, Manifest, ScatterRule, ShardEntry,
    SketchFileEntry, Split, SplitRule, FORMAT_NAME, MANIFEST_FILE, VERSION,
};
use super::sketch::{self, ChunkCounter, ChunkField, MergeScratch, TokenSketch};
use crate::error::{Error, IoContext, Result};
use crate::features::{CharNgrams, FeatureConfig, Featurizer, HASH_SCHEME};
use crate::input::pipeline::{Pipeline, Step};
use crate::input::{
    self, parse_chunk, BadLine, BadReason, Chunk, Fingerprint, InputSpec, LabelMode, ParseScratch,
};
use crate::shard::{ShardWriter, DEFAULT_NNZ_CAPACITY};
use crate::util::{self, Lock};

/// Default seed of hashing, split and scatter.
pub const DEFAULT_SEED: u64 = 1;
/// Default log2 of the bucket count.
pub const DEFAULT_LOG2_BUCKETS: u32 = 20;
/// Default word n-gram order.
pub const DEFAULT_NGRAMS: u32 = 2;
/// Default validation fraction.
pub const DEFAULT_VALIDATION: f64 = 0.1;
/// Default rows per shard.
pub const DEFAULT_SHARD_ROWS: u64 = 1 << 20;
/// Default number of open training shard writers.
pub const DEFAULT_SCATTER: u32 = 8;
/// Reported examples per bad-line reason.
pub const EXAMPLES_PER_REASON: u32 = 10;
/// After this many records, a run in which none was usable stops at once.
const EARLY_ABORT_RECORDS: u64 = 1000;

/// Settings chosen on the command line; `None` means "not given": the default
/// for a new dataset, the stored value when appending.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Choices {
    /// Seed of hashing, split and scatter.
    pub seed: Option<u64>,
    /// log2 of the bucket count.
    pub log2_buckets: Option<u32>,
    /// Word n-gram order.
    pub ngrams: Option<u32>,
    /// Character n-grams.
    pub char_ngrams: Option<CharNgrams>,
    /// Raw counts instead of damped, normalised values.
    pub raw_counts: Option<bool>,
    /// Validation fraction.
    pub validation: Option<f64>,
    /// Positive label of a binary task.
    pub positive: Option<String>,
    /// Rows per shard.
    pub shard_rows: Option<u64>,
    /// Open training shard writers.
    pub scatter: Option<u32>,
    /// Parts the dataset is split into, one per node of a cluster.
    pub parts: Option<u32>,
    /// Replace digit runs by a placeholder before hashing.
    pub mask_digits: Option<bool>,
    /// Replace e-mail-like spans by a placeholder before hashing.
    pub mask_emails: Option<bool>,
    /// Keep no token sketch for this batch.
    pub no_sketch: bool,
    /// Token-sketch entries per text field [`sketch::DEFAULT_CAPACITY`].
    pub sketch_size: Option<usize>,
    /// Least guaranteed rows of a token written to the sketch
    /// [`sketch::DEFAULT_MIN_COUNT`].
    pub sketch_min_count: Option<u64>,
}

/// Everything `ingest` needs.
#[derive(Debug, Clone)]
pub struct IngestOptions {
    /// Input paths (`-` for standard input), read in order.
    pub inputs: Vec<String>,
    /// Dataset folder.
    pub out: PathBuf,
    /// How records are read.
    pub spec: InputSpec,
    /// Settings given by the user.
    pub choices: Choices,
    /// Add to the dataset at `out` instead of creating one.
    pub append: bool,
    /// Replace an existing dataset, or use a non-empty folder.
    pub force: bool,
    /// Worker threads for parsing and hashing.
    pub threads: usize,
    /// Fail when more than this fraction of records is unusable.
    pub max_bad_fraction: f64,
    /// Draw a progress bar when standard error is a terminal.
    pub progress: bool,
    /// Sync every shard to disk before the manifest refers to it (on by default;
    /// off trades safety against power loss for speed on slow disks).
    pub sync: bool,
}

/// What an ingest run did.
#[derive(Debug, Clone, PartialEq)]
pub struct IngestSummary {
    /// Batch number written.
    pub batch: u32,
    /// Training rows added.
    pub train_rows: u64,
    /// Validation rows added.
    pub validation_rows: u64,
    /// Nonzeros added.
    pub nnz: u64,
    /// Shards added.
    pub shards: usize,
    /// Skipped records by reason.
    pub bad: BTreeMap<String, u64>,
    /// Rows kept with replaced invalid UTF-8.
    pub lossy_utf8_rows: u64,
    /// Blank lines passed over.
    pub blank_lines: u64,
    /// Raw input bytes read.
    pub input_bytes: u64,
    /// Wall-clock seconds.
    pub seconds: f64,
}

impl IngestSummary {
    /// Skipped records in all.
    pub fn bad_total(&self) -> u64 {
        self.bad.values().sum()
    }

    /// The one-line summary printed at the end of `tamis ingest`.
    pub fn line(&self) -> String {
        let rows = self.train_rows + self.validation_rows;
        let secs = self.seconds.max(1e-9);
        format!(
            "ingested {} rows ({} train, {} validation), {} skipped, {} nonzeros, {} shards, in {:.2} s ({:.1} MB/s, {} rows/s)",
            util::thousands(rows),
            util::thousands(self.train_rows),
            util::thousands(self.validation_rows),
            util::thousands(self.bad_total()),
            util::thousands(self.nnz),
            self.shards,
            self.seconds,
            self.input_bytes as f64 / 1e6 / secs,
            util::thousands((rows as f64 / secs) as u64),
        )
    }
}

/// Sink for messages (bad-line reports, notices) printed while ingesting.
pub type Log = Arc<dyn Fn(&str) + Send + Sync>;

fn seed_for(seed: u64, what: &str) -> u64 {
    xxh3_64_with_seed(what.as_bytes(), seed)
}

/// Check a given choice against a stored value when appending.
fn agree<T: PartialEq + std::fmt::Debug>(
    path: &Path,
    name: &str,
    given: Option<&T>,
    stored: &T,
) -> Result<()> {
    match given {
        Some(g) if g != stored => Err(Error::Mismatch {
            path: path.to_path_buf(),
            what: format!(
                "{name} {g:?} contradicts the dataset's {stored:?}; leave it out to use the stored value"
            ),
        }),
        _ => Ok(()),
    }
}

/// Build the manifest a new dataset starts from.
fn new_manifest(opts: &IngestOptions) -> Result<Manifest> {
    let c = &opts.choices;
    let seed = c.seed.unwrap_or(DEFAULT_SEED);
    let features = FeatureConfig {
        scheme: HASH_SCHEME.into(),
        hash_seed: seed,
        log2_buckets: c.log2_buckets.unwrap_or(DEFAULT_LOG2_BUCKETS),
        ngrams: c.ngrams.unwrap_or(DEFAULT_NGRAMS),
        char_ngrams: c.char_ngrams,
        raw_counts: c.raw_counts.unwrap_or(false),
        text_fields: opts.spec.text.clone(),
        numeric_fields: opts.spec.numeric.clone(),
        mask_digits: c.mask_digits.unwrap_or(false),
        mask_emails: c.mask_emails.unwrap_or(false),
    };
    features.validate()?;
    let validation = c.validation.unwrap_or(DEFAULT_VALIDATION);
    if !(0.0..1.0).contains(&validation) {
        return Err(Error::Invalid(format!(
            "--validation must be in [0, 1), got {validation}"
        )));
    }
    let shard_rows = c.shard_rows.unwrap_or(DEFAULT_SHARD_ROWS);
    let parts = c.parts.unwrap_or(1);
    if !(1..=1024).contains(&parts) {
        return Err(Error::Invalid(format!(
            "--parts must be in 1..=1024, got {parts}"
        )));
    }
    let scatter = c.scatter.unwrap_or(DEFAULT_SCATTER);
    if shard_rows == 0 || !(1..=1024).contains(&scatter) {
        return Err(Error::Invalid(
            "--shard-rows must be positive and --scatter in 1..=1024".into(),
        ));
    }
    // At most 1024 × 1024.
    let writers = writers_for(scatter, parts) as u32;
    Ok(Manifest {
        checksum: String::new(),
        format: FORMAT_NAME.into(),
        format_version: VERSION,
        written_by: format!("tamis {}", env!("CARGO_PKG_VERSION")),
        features,
        positive: c.positive.clone(),
        split: SplitRule {
            rule: "xxh3-content".into(),
            seed: seed_for(seed, "split"),
            validation_fraction: validation,
        },
        scatter: ScatterRule {
            seed: seed_for(seed, "scatter"),
            writers,
            shard_rows,
            parts,
        },
        labels: vec![],
        shards: vec![],
        doc_freq: vec![],
        sketches: vec![],
        batches: vec![],
        next_shard: 0,
    })
}

/// Training writers for `--scatter W` over `parts` parts: W rounded up to a
/// multiple of the parts (at least one), so that every part gets as many.
fn writers_for(scatter: u32, parts: u32) -> u64 {
    let parts = u64::from(parts);
    u64::from(scatter).div_ceil(parts) * parts
}

/// Check that an append's choices and input fields agree with the dataset.
fn check_append(m: &Manifest, opts: &IngestOptions, path: &Path) -> Result<()> {
    let c = &opts.choices;
    let f = &m.features;
    agree(path, "--seed", c.seed.as_ref(), &f.hash_seed)?;
    agree(
        path,
        "--log2-buckets",
        c.log2_buckets.as_ref(),
        &f.log2_buckets,
    )?;
    agree(path, "--ngrams", c.ngrams.as_ref(), &f.ngrams)?;
    agree(
        path,
        "--char-ngrams",
        c.char_ngrams.map(Some).as_ref(),
        &f.char_ngrams,
    )?;
    agree(path, "--raw-counts", c.raw_counts.as_ref(), &f.raw_counts)?;
    agree(
        path,
        "--mask-digits",
        c.mask_digits.as_ref(),
        &f.mask_digits,
    )?;
    agree(
        path,
        "--mask-emails",
        c.mask_emails.as_ref(),
        &f.mask_emails,
    )?;
    agree(
        path,
        "--validation",
        c.validation.as_ref(),
        &m.split.validation_fraction,
    )?;
    agree(
        path,
        "--positive",
        c.positive.clone().map(Some).as_ref(),
        &m.positive,
    )?;
    agree(
        path,
        "--shard-rows",
        c.shard_rows.as_ref(),
        &m.scatter.shard_rows,
    )?;
    agree(path, "--parts", c.parts.as_ref(), &m.scatter.parts)?;
    if let Some(w) = c.scatter {
        // The stored count was rounded up to a multiple of the parts.
        agree(
            path,
            "--scatter",
            Some(&writers_for(w, m.scatter.parts)),
            &u64::from(m.scatter.writers),
        )?;
    }
    agree(path, "text fields", Some(&opts.spec.text), &f.text_fields)?;
    agree(
        path,
        "numeric fields",
        Some(&opts.spec.numeric),
        &f.numeric_fields,
    )?;
    Ok(())
}

/// Whether a file name is one tamis writes into a dataset folder.
fn is_ours(name: &str) -> bool {
    name == MANIFEST_FILE
        || name.contains(".tmp-")
        || ((name.starts_with("train-") || name.starts_with("valid-")) && name.ends_with(".tms"))
        || (name.starts_with("docfreq-") && name.ends_with(".tmd"))
        || (name.starts_with("sketch-") && name.ends_with(".tmk"))
}

/// Prepare the folder: create it, take the lock, load or refuse an existing
/// dataset, and remove files left by an interrupted run.
fn prepare(opts: &IngestOptions, log: &Log) -> Result<(Lock, Manifest, Option<Manifest>)> {
    let dir = &opts.out;
    std::fs::create_dir_all(dir).at(dir)?;
    let lock = Lock::acquire(&dir.join(".lock"))?;
    let mpath = Manifest::path_in(dir);
    let existing = if mpath.exists() {
        Some(Manifest::load(dir)?)
    } else {
        None
    };
    let (manifest, replaced) = match (&existing, opts.append) {
        (Some(m), true) => {
            check_append(m, opts, &mpath)?;
            (m.clone(), None)
        }
        (None, true) => {
            return Err(Error::Invalid(format!(
                "{}: --append needs an existing dataset, and there is none here",
                dir.display()
            )))
        }
        (Some(_), false) if !opts.force => {
            return Err(Error::Invalid(format!(
                "{} already holds a dataset: pass --append to add to it or --force to replace it",
                dir.display()
            )))
        }
        (Some(old), false) => {
            let mut m = new_manifest(opts)?;
            // Fresh names, so the old dataset stays whole until the new one is in place.
            m.next_shard = old.next_shard;
            (m, Some(old.clone()))
        }
        (None, false) => (new_manifest(opts)?, None),
    };
    let referenced: std::collections::HashSet<&str> = existing
        .iter()
        .flat_map(|m| {
            m.shards
                .iter()
                .map(|s| s.file.as_str())
                .chain(m.doc_freq.iter().map(|d| d.file.as_str()))
                .chain(m.sketches.iter().map(|d| d.file.as_str()))
        })
        .collect();
    let mut leftovers = Vec::new();
    let mut foreign = Vec::new();
    for e in std::fs::read_dir(dir).at(dir)? {
        let e = e.at(dir)?;
        let name = e.file_name().to_string_lossy().into_owned();
        if name == ".lock" || name == MANIFEST_FILE {
            continue;
        }
        if is_ours(&name) {
            if !referenced.contains(name.as_str()) {
                leftovers.push(e.path());
            }
        } else {
            foreign.push(name);
        }
    }
    if existing.is_none() && !foreign.is_empty() && !opts.force {
        foreign.sort();
        return Err(Error::Invalid(format!(
            "{} is not empty and holds no dataset (found {}); choose an empty folder or pass --force",
            dir.display(),
            foreign.iter().take(3).cloned().collect::<Vec<_>>().join(", ")
        )));
    }
    if !leftovers.is_empty() {
        for p in &leftovers {
            std::fs::remove_file(p).at(p)?;
        }
        log(&format!(
            "removed {} file(s) left in {} by an interrupted ingest",
            leftovers.len(),
            dir.display()
        ));
    }
    Ok((lock, manifest, replaced))
}

/// Rows of one chunk after parsing and hashing, ready to be written.
#[derive(Default)]
struct ChunkOut {
    input: usize,
    /// Distinct labels of the chunk, in order of first appearance.
    label_names: Vec<String>,
    /// Per row: index into `label_names`.
    labels: Vec<u32>,
    validation: Vec<bool>,
    row_ends: Vec<u32>,
    indices: Vec<u32>,
    values: Vec<f32>,
    bad: Vec<BadLine>,
    blank: u64,
    lossy: u64,
    /// The chunk's token summaries, one per text field, when a sketch is kept
    /// (their buffers are reused from chunk to chunk).
    sketch: Vec<ChunkField>,
}

impl ChunkOut {
    /// Empty every buffer, keeping its memory, for the chunk `input`.
    fn reset(&mut self, input: usize) {
        self.input = input;
        self.label_names.clear();
        self.labels.clear();
        self.validation.clear();
        self.row_ends.clear();
        self.indices.clear();
        self.values.clear();
        self.bad.clear();
        self.blank = 0;
        self.lossy = 0;
    }
}

/// What a worker thread keeps from chunk to chunk.
struct Worker {
    feat: Featurizer,
    scratch: ParseScratch,
    local_labels: HashMap<String, u32>,
    /// Token counts of the chunk, when a sketch is kept.
    tokens: Option<ChunkCounter>,
    /// Document frequencies of the training rows this worker saw.
    df: DocCounter,
}

/// Parse and hash one chunk into `out`; count document frequencies of its
/// training rows.
fn process(
    chunk: &Chunk,
    spec: &InputSpec,
    w: &mut Worker,
    out: &mut ChunkOut,
    split_seed: u64,
    fraction: f64,
    sketch_size: usize,
) {
    out.reset(chunk.input);
    let df = &mut w.df;
    let feat = &mut w.feat;
    let local = &mut w.local_labels;
    local.clear();
    let mut tokens = w.tokens.as_mut();
    let mut empty = Vec::new();
    let counts = parse_chunk(
        chunk,
        spec,
        LabelMode::Required,
        &mut w.scratch,
        |f| {
            feat.begin_row();
            let mut invalid = 0;
            if let Some(tc) = tokens.as_deref_mut() {
                tc.next_row();
                for (i, t) in f.texts.iter().enumerate() {
                    let mut words = tc.field(i);
                    invalid += feat
                        .add_text_with(i, t, |tok, h| words.see(tok, h))
                        .invalid_utf8;
                }
            } else {
                for (i, t) in f.texts.iter().enumerate() {
                    invalid += feat.add_text(i, t).invalid_utf8;
                }
            }
            for (i, v) in f.numbers.iter().enumerate() {
                if let Some(v) = v {
                    feat.add_numeric(i, *v);
                }
            }
            if feat.is_empty() {
                empty.push(BadLine {
                    reason: BadReason::EmptyText,
                    line: f.line,
                    detail: "no word in the text".into(),
                });
                return;
            }
            let row_start = out.indices.len();
            feat.finish_row(&mut out.indices, &mut out.values);
            out.row_ends.push(out.indices.len() as u32);
            let name = f.label.as_deref().unwrap_or("");
            // A few labels are found faster by a look along the list than by
            // hashing the name.
            let known = if out.label_names.len() <= 16 {
                out.label_names
                    .iter()
                    .position(|n| n == name)
                    .map(|i| i as u32)
            } else {
                local.get(name).copied()
            };
            let id = match known {
                Some(id) => id,
                None => {
                    let id = out.label_names.len() as u32;
                    out.label_names.push(name.to_string());
                    local.insert(name.to_string(), id);
                    id
                }
            };
            out.labels.push(id);
            let h = xxh3_64_with_seed(f.raw, split_seed);
            let validation = ((h >> 11) as f64) * (1.0 / (1u64 << 53) as f64) < fraction;
            out.validation.push(validation);
            if !validation {
                for &i in &out.indices[row_start..] {
                    df.add(i as usize);
                }
            }
            if f.lossy || invalid > 0 {
                out.lossy += 1;
            }
        },
        |b| out.bad.push(b),
    );
    if !empty.is_empty() {
        out.bad.extend(empty);
        out.bad.sort_by_key(|b| b.line);
    }
    out.blank = counts.blank;
    if let Some(tc) = w.tokens.as_mut() {
        tc.finish_into(sketch_size, &mut out.sketch);
    }
}

fn join_sync(h: std::thread::JoinHandle<Result<()>>) -> Result<()> {
    h.join()
        .unwrap_or_else(|_| Err(Error::Invalid("internal: sync thread panicked".into())))
}

/// Files written by this run, removed unless the run commits.
struct Written {
    paths: Vec<PathBuf>,
    committed: bool,
}

impl Drop for Written {
    fn drop(&mut self) {
        if !self.committed {
            for p in &self.paths {
                let _ = std::fs::remove_file(p);
            }
        }
    }
}

/// Salt of the validation rows' part choice (the training rows' writer choice
/// uses the scatter seed itself).
const VALID_PART: u64 = 0x7661_6c69_6470_6172;

/// Which writer a row goes to.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Slot {
    /// Training writer `i` (of part `i mod parts`).
    Train(usize),
    /// The validation writer of part `p`.
    Validation(usize),
}

impl Slot {
    fn split(self) -> Split {
        match self {
            Slot::Train(_) => Split::Train,
            Slot::Validation(_) => Split::Validation,
        }
    }
}

/// The writer stage.
struct Sink {
    dir: PathBuf,
    m: Manifest,
    batch: u32,
    cols: u64,
    label_ids: HashMap<String, u32>,
    train: Vec<Option<ShardWriter>>,
    /// One validation writer per part.
    val: Vec<Option<ShardWriter>>,
    new_shards: Vec<ShardEntry>,
    written: Written,
    train_index: u64,
    /// Validation rows of the dataset before this one (chooses its part).
    val_index: u64,
    train_rows: u64,
    val_rows: u64,
    nnz: u64,
    bad: [u64; BadReason::ALL.len()],
    shown: [u32; BadReason::ALL.len()],
    lossy: u64,
    blank: u64,
    inputs: Vec<InputEntry>,
    per_input: Vec<(u64, u64)>,
    names: Vec<String>,
    log: Log,
    rows_done: Arc<AtomicU64>,
    /// Sync shards before the manifest refers to them.
    durable: bool,
    /// The batch's token sketch, merged chunk by chunk in input order.
    sketch: Option<TokenSketch>,
    /// Least guaranteed rows of a written token.
    sketch_min_count: u64,
    /// Buffers of the sketch merges.
    sketch_scratch: MergeScratch,
    syncs: Vec<std::thread::JoinHandle<Result<()>>>,
}

impl Sink {
    fn new(
        dir: &Path,
        m: Manifest,
        names: Vec<String>,
        log: Log,
        rows_done: Arc<AtomicU64>,
    ) -> Self {
        let label_ids = m
            .labels
            .iter()
            .enumerate()
            .map(|(i, l)| (l.name.clone(), i as u32))
            .collect();
        let batch = m.batches.len() as u32;
        let writers = m.scatter.writers as usize;
        let parts = m.scatter.parts;
        Sink {
            dir: dir.to_path_buf(),
            cols: m.features.buckets(),
            train_index: m.train_rows(),
            val_index: m.validation_rows(),
            per_input: vec![(0, 0); names.len()],
            m,
            batch,
            label_ids,
            train: (0..writers).map(|_| None).collect(),
            val: (0..parts).map(|_| None).collect(),
            new_shards: vec![],
            written: Written {
                paths: vec![],
                committed: false,
            },
            train_rows: 0,
            val_rows: 0,
            nnz: 0,
            bad: [0; BadReason::ALL.len()],
            shown: [0; BadReason::ALL.len()],
            lossy: 0,
            blank: 0,
            inputs: vec![],
            names,
            log,
            rows_done,
            durable: true,
            syncs: Vec::new(),
            sketch: None,
            sketch_min_count: sketch::DEFAULT_MIN_COUNT,
            sketch_scratch: MergeScratch::default(),
        }
    }

    fn open_writer(&mut self, split: Split, row_nnz: usize) -> Result<ShardWriter> {
        let prefix = match split {
            Split::Train => "train",
            Split::Validation => "valid",
        };
        let name = format!("{prefix}-{:06}.tms", self.m.next_shard);
        self.m.next_shard += 1;
        let path = self.dir.join(&name);
        self.written.paths.push(path.clone());
        ShardWriter::with_capacity(&path, self.cols, DEFAULT_NNZ_CAPACITY.max(row_nnz as u64))
    }

    /// Push a row to the writer of `slot`, opening, closing and reopening it
    /// as needed (a shard closes after `shard_rows` rows or when full).
    fn push_to(&mut self, slot: Slot, label: u32, idx: &[u32], val: &[f32]) -> Result<()> {
        let full = match self.writer(slot) {
            Some(w) => !w.fits(idx.len()),
            None => false,
        };
        if full {
            let w = self.writer(slot).take().expect("open");
            self.close_writer(w, slot)?;
        }
        if self.writer(slot).is_none() {
            let w = self.open_writer(slot.split(), idx.len())?;
            *self.writer(slot) = Some(w);
        }
        let w = self.writer(slot).as_mut().expect("opened");
        w.push(label, idx, val)?;
        if w.rows() >= self.m.scatter.shard_rows {
            let w = self.writer(slot).take().expect("open");
            self.close_writer(w, slot)?;
        }
        Ok(())
    }

    fn writer(&mut self, slot: Slot) -> &mut Option<ShardWriter> {
        match slot {
            Slot::Train(i) => &mut self.train[i],
            Slot::Validation(p) => &mut self.val[p],
        }
    }

    /// The part a writer's shards belong to.
    fn part_of(&self, slot: Slot) -> u32 {
        match slot {
            Slot::Train(i) => (i as u32) % self.m.scatter.parts,
            Slot::Validation(p) => p as u32,
        }
    }

    fn close_writer(&mut self, w: ShardWriter, slot: Slot) -> Result<()> {
        let info = w.finish_with(false)?;
        self.sync_later(info.path.clone())?;
        let part = self.part_of(slot);
        self.record(info, slot.split(), part);
        Ok(())
    }

    /// Sync a finished shard on a thread of its own, so the disk works while
    /// rows are hashed; at most two syncs are outstanding (the writer waits for
    /// the oldest beyond that, which keeps it at the disk's pace).
    fn sync_later(&mut self, path: PathBuf) -> Result<()> {
        if !self.durable {
            return Ok(());
        }
        while self.syncs.len() >= 2 {
            let h = self.syncs.remove(0);
            join_sync(h)?;
        }
        let h = std::thread::Builder::new()
            .name("tamis-sync".into())
            .spawn(move || crate::container::sync_file(&path))
            .map_err(|e| Error::Invalid(format!("cannot start a thread: {e}")))?;
        self.syncs.push(h);
        Ok(())
    }

    fn record(&mut self, info: crate::shard::ShardInfo, split: Split, part: u32) {
        self.new_shards.push(ShardEntry {
            file: info
                .path
                .file_name()
                .map(|n| n.to_string_lossy().into_owned())
                .unwrap_or_default(),
            split,
            rows: info.rows,
            nnz: info.nnz,
            bytes: info.bytes,
            checksum: format!("{:016x}", info.checksum),
            batch: self.batch,
            part,
        });
    }

    /// The class id of a label, adding it to the dictionary when new.
    fn intern(&mut self, name: &str) -> u32 {
        match self.label_ids.get(name) {
            Some(&id) => id,
            None => {
                let id = self.m.labels.len() as u32;
                self.m.labels.push(LabelEntry {
                    name: name.to_string(),
                    train_rows: 0,
                    validation_rows: 0,
                });
                self.label_ids.insert(name.to_string(), id);
                id
            }
        }
    }

    fn push(&mut self, c: &mut ChunkOut) -> Result<()> {
        if let Some(g) = &mut self.sketch {
            g.merge_chunk_with(&c.sketch, &mut self.sketch_scratch);
        }
        let writers = self.m.scatter.writers as u64;
        let scatter_seed = self.m.scatter.seed;
        // Chunk-local label numbers → class ids, once per chunk.
        let ids: Vec<u32> = c.label_names.iter().map(|n| self.intern(n)).collect();
        let mut rstart = 0usize;
        for r in 0..c.row_ends.len() {
            let rend = c.row_ends[r] as usize;
            let validation = c.validation[r];
            let label = ids[c.labels[r] as usize];
            let e = &mut self.m.labels[label as usize];
            if validation {
                e.validation_rows += 1;
            } else {
                e.train_rows += 1;
            }
            let (idx, val) = (&c.indices[rstart..rend], &c.values[rstart..rend]);
            if validation {
                // A validation row's part, by the hash of its number (one part:
                // no hash, as before parts existed).
                let parts = u64::from(self.m.scatter.parts);
                let part = if parts == 1 {
                    0
                } else {
                    (xxh3_64_with_seed(&self.val_index.to_le_bytes(), scatter_seed ^ VALID_PART)
                        % parts) as usize
                };
                self.val_index += 1;
                self.push_to(Slot::Validation(part), label, idx, val)?;
                self.val_rows += 1;
            } else {
                let slot = (xxh3_64_with_seed(&self.train_index.to_le_bytes(), scatter_seed)
                    % writers) as usize;
                self.train_index += 1;
                self.push_to(Slot::Train(slot), label, idx, val)?;
                self.train_rows += 1;
            }
            self.nnz += idx.len() as u64;
            rstart = rend;
        }
        let name = &self.names[c.input];
        for b in &c.bad {
            let k = b.reason.index();
            self.bad[k] += 1;
            if self.shown[k] < EXAMPLES_PER_REASON {
                self.shown[k] += 1;
                let more = if self.shown[k] == EXAMPLES_PER_REASON {
                    " (further lines with this problem are counted, not shown)"
                } else {
                    ""
                };
                (self.log)(&format!(
                    "{name}:{}: skipped ({}): {}{more}",
                    b.line, b.reason, b.detail
                ));
            }
        }
        self.per_input[c.input].0 += c.row_ends.len() as u64;
        self.per_input[c.input].1 += c.bad.len() as u64;
        self.lossy += c.lossy;
        self.blank += c.blank;
        let good = self.train_rows + self.val_rows;
        self.rows_done.store(good, Ordering::Relaxed);
        let bad: u64 = self.bad.iter().sum();
        if good == 0 && bad >= EARLY_ABORT_RECORDS {
            return Err(Error::Invalid(format!(
                "the first {} records were all unusable: is --format right? nothing was written to the dataset",
                util::thousands(bad)
            )));
        }
        Ok(())
    }

    fn input_done(&mut self, input: usize, fp: Fingerprint) {
        let (rows, bad) = self.per_input[input];
        self.inputs.push(InputEntry {
            fingerprint: fp,
            rows,
            bad,
        });
    }

    fn finish(
        mut self,
        spec: &InputSpec,
        max_bad: f64,
        replaced: Option<Manifest>,
        df: &[u32],
    ) -> Result<(Manifest, IngestSummary)> {
        let good = self.train_rows + self.val_rows;
        let bad: u64 = self.bad.iter().sum();
        let seen = good + bad;
        if seen > 0 && bad as f64 > max_bad * seen as f64 {
            return Err(Error::TooManyBad {
                bad,
                seen,
                fraction: 100.0 * bad as f64 / seen as f64,
                limit: 100.0 * max_bad,
            });
        }
        if good == 0 {
            return Err(Error::Invalid(
                "the input holds no usable record; nothing was written to the dataset".into(),
            ));
        }
        if let Some(p) = &self.m.positive {
            if !self.label_ids.contains_key(p) {
                let mut names: Vec<&str> = self.m.labels.iter().map(|l| l.name.as_str()).collect();
                names.truncate(10);
                return Err(Error::Invalid(format!(
                    "--positive {p:?} is not among the labels found ({})",
                    names.join(", ")
                )));
            }
        }
        // The last open shards are finished together, each on a thread of its own
        // (finishing means moving values down, copying side files and syncing).
        let durable = self.durable;
        for h in std::mem::take(&mut self.syncs) {
            join_sync(h)?;
        }
        let mut open: Vec<(ShardWriter, Slot)> = self
            .train
            .iter_mut()
            .enumerate()
            .filter_map(|(i, w)| Some((w.take()?, Slot::Train(i))))
            .collect();
        open.extend(
            self.val
                .iter_mut()
                .enumerate()
                .filter_map(|(p, w)| Some((w.take()?, Slot::Validation(p)))),
        );
        let finished: Vec<Result<(crate::shard::ShardInfo, Slot)>> = std::thread::scope(|s| {
            let handles: Vec<_> = open
                .into_iter()
                .map(|(w, slot)| s.spawn(move || w.finish_with(durable).map(|i| (i, slot))))
                .collect();
            handles
                .into_iter()
                .map(|h| {
                    h.join().unwrap_or_else(|_| {
                        Err(Error::Invalid("internal: shard writer panicked".into()))
                    })
                })
                .collect()
        });
        for f in finished {
            let (info, slot) = f?;
            let part = self.part_of(slot);
            self.record(info, slot.split(), part);
        }
        let df_name = format!("docfreq-{:06}.tmd", self.m.next_shard);
        self.m.next_shard += 1;
        let df_path = self.dir.join(&df_name);
        self.written.paths.push(df_path.clone());
        let sum = docfreq::write(
            &df_path,
            self.m.features.log2_buckets,
            self.train_rows,
            self.batch,
            df,
        )?;
        self.m.doc_freq.push(DocFreqEntry {
            file: df_name,
            batch: self.batch,
            train_rows: self.train_rows,
            checksum: format!("{sum:016x}"),
        });
        if let Some(mut sk) = self.sketch.take() {
            sk.prune(self.sketch_min_count);
            let name = format!("sketch-{:06}.tmk", self.m.next_shard);
            self.m.next_shard += 1;
            let path = self.dir.join(&name);
            self.written.paths.push(path.clone());
            let sum = sketch::write(&path, &sk, self.batch)?;
            self.m.sketches.push(SketchFileEntry {
                file: name,
                batch: self.batch,
                tokens: sk.len() as u64,
                checksum: format!("{sum:016x}"),
            });
        }
        let bad_map: BTreeMap<String, u64> = BadReason::ALL
            .iter()
            .map(|r| (r.key().to_string(), self.bad[r.index()]))
            .collect();
        let new_count = self.new_shards.len();
        self.m.shards.append(&mut self.new_shards);
        self.m.written_by = format!("tamis {}", env!("CARGO_PKG_VERSION"));
        self.m.batches.push(Batch {
            id: self.batch,
            created_unix: std::time::SystemTime::now()
                .duration_since(std::time::UNIX_EPOCH)
                .map(|d| d.as_secs())
                .unwrap_or(0),
            input: spec.clone(),
            inputs: std::mem::take(&mut self.inputs),
            train_rows: self.train_rows,
            validation_rows: self.val_rows,
            nnz: self.nnz,
            bad: bad_map.clone(),
            lossy_utf8_rows: self.lossy,
            blank_lines: self.blank,
        });
        if self.durable {
            // The renames of the shards synced in the background.
            crate::container::sync_dir(&self.dir)?;
        }
        self.m.store(&self.dir)?;
        self.written.committed = true;
        if let Some(old) = replaced {
            for f in old
                .shards
                .iter()
                .map(|s| &s.file)
                .chain(old.doc_freq.iter().map(|d| &d.file))
                .chain(old.sketches.iter().map(|d| &d.file))
            {
                let _ = std::fs::remove_file(self.dir.join(f));
            }
        }
        let summary = IngestSummary {
            batch: self.batch,
            train_rows: self.train_rows,
            validation_rows: self.val_rows,
            nnz: self.nnz,
            shards: new_count,
            bad: bad_map,
            lossy_utf8_rows: self.lossy,
            blank_lines: self.blank,
            input_bytes: 0,
            seconds: 0.0,
        };
        Ok((self.m, summary))
    }
}

fn progress_bar(enabled: bool, total: Option<u64>) -> Option<indicatif::ProgressBar> {
    if !enabled || !std::io::stderr().is_terminal() {
        return None;
    }
    let bar = match total {
        Some(t) => indicatif::ProgressBar::new(t),
        None => indicatif::ProgressBar::new_spinner(),
    };
    bar.set_draw_target(indicatif::ProgressDrawTarget::stderr());
    let style = match total {
        Some(_) => "{bar:30} {bytes}/{total_bytes} {binary_bytes_per_sec} {msg} eta {eta}",
        None => "{spinner} {bytes} {binary_bytes_per_sec} {msg}",
    };
    if let Ok(s) = indicatif::ProgressStyle::with_template(style) {
        bar.set_style(s);
    }
    Some(bar)
}

/// Run an ingest. Messages (bad-line reports, notices) go to `log`.
pub fn ingest(opts: &IngestOptions, log: Log) -> Result<IngestSummary> {
    if opts.inputs.is_empty() {
        return Err(Error::Invalid("no input given".into()));
    }
    if opts.spec.text.len() > input::parse::MAX_FIELDS
        || opts.spec.numeric.len() > input::parse::MAX_FIELDS
    {
        return Err(Error::Invalid(format!(
            "at most {} text and {} numeric fields",
            input::parse::MAX_FIELDS,
            input::parse::MAX_FIELDS
        )));
    }
    if !(0.0..=1.0).contains(&opts.max_bad_fraction) {
        return Err(Error::Invalid(
            "--max-bad-fraction must be in [0, 1]".into(),
        ));
    }
    if opts.inputs.iter().filter(|p| *p == "-").count() > 1 {
        return Err(Error::Invalid(
            "standard input (-) can be read only once".into(),
        ));
    }
    for p in &opts.inputs {
        if p != "-" && !Path::new(p).exists() {
            return Err(Error::Invalid(format!("{p}: no such file")));
        }
    }
    let start = Instant::now();
    let (_lock, manifest, replaced) = prepare(opts, &log)?;
    let threads = opts.threads.max(1);
    let total: Option<u64> = opts.inputs.iter().map(|p| input::file_size(p)).sum();
    let bar = progress_bar(opts.progress, total);
    let log: Log = match &bar {
        Some(b) => {
            let b = b.clone();
            let inner = log.clone();
            Arc::new(move |s: &str| b.suspend(|| inner(s)))
        }
        None => log,
    };
    let read_bytes = Arc::new(AtomicU64::new(0));
    let rows_done = Arc::new(AtomicU64::new(0));
    let names: Vec<String> = opts
        .inputs
        .iter()
        .map(|p| {
            if p == "-" {
                "stdin".to_string()
            } else {
                p.clone()
            }
        })
        .collect();
    let split_seed = manifest.split.seed;
    let fraction = manifest.split.validation_fraction;
    let cfg = manifest.features.clone();
    Featurizer::new(&cfg)?;
    let mut sink = Sink::new(&opts.out, manifest, names, log.clone(), rows_done.clone());
    sink.durable = opts.sync;
    let sketch_size = opts.choices.sketch_size.unwrap_or(sketch::DEFAULT_CAPACITY);
    if !(1..=sketch::MAX_CAPACITY).contains(&sketch_size) {
        return Err(Error::Invalid(format!(
            "--sketch-size must be in 1..={}, got {sketch_size}",
            sketch::MAX_CAPACITY
        )));
    }
    let keep_sketch = !opts.choices.no_sketch;
    if keep_sketch {
        sink.sketch = Some(TokenSketch::new(cfg.text_fields.len(), sketch_size));
        sink.sketch_min_count = opts
            .choices
            .sketch_min_count
            .unwrap_or(sketch::DEFAULT_MIN_COUNT);
    }
    let spec = &opts.spec;
    let buckets = cfg.buckets() as usize;
    // Document frequencies: one counter per worker, summed at the end
    // (saturating sums of counts do not depend on the order).
    let workers: Vec<Worker> = (0..threads)
        .map(|_| Worker {
            feat: Featurizer::new(&cfg).expect("validated above"),
            scratch: ParseScratch::default(),
            local_labels: HashMap::new(),
            tokens: keep_sketch.then(|| ChunkCounter::new(cfg.text_fields.len())),
            df: DocCounter::new(buckets),
        })
        .collect();
    let pipeline = Pipeline {
        inputs: &opts.inputs,
        spec,
        mode: LabelMode::Required,
        progress: read_bytes.clone(),
        outputs: 2 * threads + 2,
    };
    // The rows are written on this thread, in input order, while the workers
    // hash the next chunks.
    let result = pipeline.run(
        workers,
        ChunkOut::default,
        |w, c, out| process(c, spec, w, out, split_seed, fraction, sketch_size),
        |step| {
            match step {
                Step::Chunk(out) => sink.push(out)?,
                Step::Done(i, fp) => sink.input_done(i, fp),
            }
            if let Some(b) = &bar {
                b.set_position(read_bytes.load(Ordering::Relaxed));
                b.set_message(format!(
                    "{} rows",
                    util::thousands(rows_done.load(Ordering::Relaxed))
                ));
            }
            Ok(())
        },
    );
    if let Some(b) = &bar {
        b.finish_and_clear();
    }
    let workers = result?;
    let mut df = vec![0u32; buckets];
    for w in &workers {
        w.df.add_into(&mut df);
    }
    let (_m, mut summary) = sink.finish(&opts.spec, opts.max_bad_fraction, replaced, &df)?;
    summary.input_bytes = read_bytes.load(Ordering::Relaxed);
    summary.seconds = start.elapsed().as_secs_f64();
    Ok(summary)
}
