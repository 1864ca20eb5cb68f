//! The training driver: dataset → solver → model.
//!
//! Opens the dataset's shards through memory maps (checking each shard's
//! checksums and structure once, before its first use), runs the solver for the
//! requested epochs in the order of [`crate::solver::order`], evaluates the
//! averaged iterate on the validation split after each epoch, and writes the
//! model atomically.
//!
//! Checkpoints ([`crate::checkpoint`]) are written every `checkpoint_every`
//! seconds, at every epoch end and when a stop is requested; [`resume`]
//! continues from one and reaches the same model, byte for byte, as a run that
//! was never interrupted. [`TrainOptions::init_from`] starts from an earlier
//! model (warm start): its weights become the starting iterate and the step
//! counter continues from the steps recorded in it, so the step sizes stay as
//! small as they had become; the average restarts with this run.

use std::io::IsTerminal;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

use rayon::prelude::*;

use crate::checkpoint::{
    Checkpoint, CheckpointMeta, EarlyStop, EpochSums, Position, RankPosition, ShardRef, WriteCost,
};
use crate::container;
use crate::dataset::sketch::TokenSketch;
use crate::dataset::{self, Log, Manifest, ShardEntry, Split};
use crate::distributed::{self, Collective, Control, Solo};
use crate::error::{Error, Result};
use crate::eval::{evaluate_sums, per_class, Evaluation, Weights};
use crate::model::{EpochLog, Model, ModelMeta, TrainSettings, WarmStart};
use crate::shard::Shard;
use crate::solver::order::{self, Group, Interleave};
use crate::solver::{prefetch_row, Linear, Loss, Rows, SolverConfig, Target, Trainer};
use crate::util;

/// How example weights cᵢ are chosen.
#[derive(Debug, Clone, PartialEq)]
pub enum ClassWeight {
    /// Every row weighs 1.
    None,
    /// `n / (K·n_k)` for a row of class k (K classes; a binary task has two,
    /// positive and negative) — common practice for imbalanced data.
    Balanced,
    /// Given weights per label; labels not named weigh 1.
    Given(Vec<(String, f64)>),
}

impl ClassWeight {
    /// The rule as written on the command line (`none`, `balanced` or
    /// `LABEL=W,...`); it parses back to the same value.
    pub fn rule(&self) -> String {
        match self {
            ClassWeight::None => "none".into(),
            ClassWeight::Balanced => "balanced".into(),
            ClassWeight::Given(list) => list
                .iter()
                .map(|(l, x)| format!("{l}={x}"))
                .collect::<Vec<_>>()
                .join(","),
        }
    }
}

impl std::str::FromStr for ClassWeight {
    type Err = String;
    fn from_str(s: &str) -> std::result::Result<Self, String> {
        if s == "balanced" {
            return Ok(ClassWeight::Balanced);
        }
        if s == "none" {
            return Ok(ClassWeight::None);
        }
        let mut out = Vec::new();
        for part in s.split(',') {
            let (l, w) = part
                .rsplit_once('=')
                .ok_or_else(|| format!("expected balanced or LABEL=W,..., got {part:?}"))?;
            let w: f64 = w.parse().map_err(|_| format!("bad weight in {part:?}"))?;
            if !(w > 0.0 && w.is_finite()) {
                return Err(format!("weight must be positive in {part:?}"));
            }
            out.push((l.to_string(), w));
        }
        Ok(ClassWeight::Given(out))
    }
}

/// Settings of a training run.
#[derive(Debug, Clone)]
pub struct TrainOptions {
    /// Dataset folder.
    pub dir: PathBuf,
    /// Where the model goes.
    pub model: PathBuf,
    /// Solver settings.
    pub solver: SolverConfig,
    /// Epochs.
    pub epochs: u32,
    /// Seed of the epoch order.
    pub seed: u64,
    /// Example weights.
    pub class_weight: ClassWeight,
    /// Multiply features by idf factors from the dataset.
    pub idf: bool,
    /// Stop when validation loss has not improved for this many epochs.
    pub patience: Option<u32>,
    /// Replicas of the models trained side by side on alternate batches and
    /// mixed (averaged) every `sync_every` rows; the model depends on it, not
    /// on `threads`. `None` picks [`auto_replicas`].
    pub replicas: Option<usize>,
    /// Rows (all replicas together) between two mixes; `None` picks
    /// [`default_sync_every`].
    pub sync_every: Option<u64>,
    /// Threads.
    pub threads: usize,
    /// Draw a progress bar on a terminal.
    pub progress: bool,
    /// Where checkpoints go (every `checkpoint_every` seconds and at every epoch
    /// end). Without it, only an interruption writes one, to
    /// [`default_checkpoint`] of the model.
    pub checkpoint: Option<PathBuf>,
    /// Seconds between checkpoints; 0 writes one after every stretch of the
    /// epoch (at most 16,384 rows).
    pub checkpoint_every: f64,
    /// Start from the weights of this model (warm start).
    pub init_from: Option<PathBuf>,
    /// When set (by a signal handler), the run finishes its stretch, writes a
    /// checkpoint and returns [`Outcome::Stopped`].
    pub stop: Option<Arc<AtomicBool>>,
}

impl TrainOptions {
    /// The defaults of `tamis train` for the dataset `dir` and the model file
    /// `model`: hinge loss, λ = 1e-5, 5 epochs, batches of 64, η₀ = 1, averaging
    /// from the second epoch, seed 1, no class weights, no idf, every core, no
    /// checkpoints, no progress bar.
    pub fn defaults(dir: &Path, model: &Path) -> TrainOptions {
        TrainOptions {
            dir: dir.to_path_buf(),
            model: model.to_path_buf(),
            solver: SolverConfig {
                lambda: 1e-5,
                loss: Loss::Hinge,
                batch: 64,
                eta0: 1.0,
                project: false,
                average_from: 1,
            },
            epochs: 5,
            seed: 1,
            class_weight: ClassWeight::None,
            idf: false,
            patience: None,
            replicas: None,
            sync_every: None,
            threads: std::thread::available_parallelism().map_or(1, |n| n.get()),
            progress: false,
            checkpoint: None,
            checkpoint_every: DEFAULT_CHECKPOINT_SECONDS,
            init_from: None,
            stop: None,
        }
    }

    /// The options that continue the run saved in a checkpoint: its settings,
    /// dataset and model; one progress bar, all cores, checkpoints every 60 s to
    /// the same file (the caller adjusts what it needs).
    pub fn from_checkpoint(meta: &CheckpointMeta, path: &Path) -> TrainOptions {
        let s = &meta.settings;
        TrainOptions {
            dir: meta.dataset.clone(),
            model: meta.model.clone(),
            solver: s.solver.clone(),
            epochs: s.epochs,
            seed: s.seed,
            class_weight: s.class_weight_rule.parse().unwrap_or(ClassWeight::None),
            idf: s.idf,
            patience: s.patience,
            replicas: Some(s.replicas.max(1) as usize),
            sync_every: (s.sync_every > 0).then_some(s.sync_every),
            threads: 1,
            progress: true,
            checkpoint: Some(path.to_path_buf()),
            checkpoint_every: DEFAULT_CHECKPOINT_SECONDS,
            init_from: s.init_from.as_ref().map(|w| PathBuf::from(&w.model)),
            stop: None,
        }
    }
}

/// Default seconds between checkpoints.
pub const DEFAULT_CHECKPOINT_SECONDS: f64 = 60.0;

/// Replicas of a binary task with at least [`AUTO_REPLICA_ROWS`] training
/// rows when `--replicas` is not given.
pub const AUTO_REPLICAS: usize = 2;

/// Training rows from which a binary task gets [`AUTO_REPLICAS`] replicas by
/// default.
pub const AUTO_REPLICA_ROWS: u64 = 1 << 20;

/// Replicas when `--replicas` is not given: [`AUTO_REPLICAS`] for a binary
/// task of at least [`AUTO_REPLICA_ROWS`] training rows, else 1. It depends
/// on the dataset only, never on the machine, so the same data and settings
/// give the same model everywhere.
///
/// Mixed replicas trade statistical efficiency for speed, like a larger batch
/// does: at 5 epochs of the invented message stream, validation log loss was
/// 1% above a single copy's from 400 k rows of a binary task, but 8% at 100 k
/// rows and 7–17% for 6 classes at 100–400 k rows (where one-vs-rest already
/// spreads the classes over the cores). Below a million rows an epoch takes
/// under a second anyway.
pub fn auto_replicas(binary: bool, train_rows: u64) -> usize {
    if binary && train_rows >= AUTO_REPLICA_ROWS {
        AUTO_REPLICAS
    } else {
        1
    }
}

/// Most replicas a run may ask for.
pub const MAX_REPLICAS: usize = 64;

/// Nonzeros each replica reads between two mixes, per feature of the models: a
/// mix reads and writes every weight of every replica, so this keeps its cost
/// to a few percent of the training work.
pub const MIX_WORK: u64 = 16;

/// Rows between two mixes when `--sync-every` is not given: enough that each
/// replica reads about [`MIX_WORK`] nonzeros per feature of its models
/// (`dim` features, `nnz_per_row` on average) in between, in whole rounds of
/// `replicas × batch` rows; 0 with one replica, which never mixes.
pub fn default_sync_every(dim: u64, nnz_per_row: f64, replicas: usize, batch: usize) -> u64 {
    if replicas <= 1 {
        return 0;
    }
    let round = (replicas * batch) as u64;
    let per_replica = (MIX_WORK as f64 * dim as f64 / nnz_per_row.max(1.0)).ceil() as u64;
    (per_replica * replicas as u64).div_ceil(round).max(1) * round
}

/// Rounds of steps (one batch per replica, on every rank) between two mixes;
/// `u64::MAX` when `sync_every` is 0 (mixes at epoch ends only).
pub(crate) fn sync_rounds_of(s: &TrainSettings) -> u64 {
    if s.sync_every == 0 {
        return u64::MAX;
    }
    let round = s.solver.batch as u64 * u64::from(s.replicas.max(1)) * u64::from(s.ranks.max(1));
    s.sync_every.div_ceil(round.max(1)).max(1)
}

/// Where an interrupted run without `--checkpoint` saves its state: the model's
/// path with the extension `.tmc`.
pub fn default_checkpoint(model: &Path) -> PathBuf {
    if model.extension().is_some_and(|e| e == "tmc") {
        let mut s = model.as_os_str().to_owned();
        s.push(".tmc");
        PathBuf::from(s)
    } else {
        model.with_extension("tmc")
    }
}

/// What `train` produced.
#[derive(Debug, Clone)]
pub struct TrainReport {
    /// The model written.
    pub model: Model,
    /// Seconds in all.
    pub seconds: f64,
    /// The cost of the last checkpoint written, if any.
    pub last_checkpoint: Option<WriteCost>,
}

/// How a run ended.
#[derive(Debug, Clone)]
pub enum Outcome {
    /// All epochs (or early stopping) done; the model is written.
    Finished(Box<TrainReport>),
    /// Stopped on request; the state is in a checkpoint.
    Stopped {
        /// The checkpoint written.
        checkpoint: PathBuf,
        /// Where the run stood.
        position: Position,
    },
}

impl Outcome {
    /// The report of a finished run; an error for a run that stopped on request.
    pub fn finished(self) -> Result<TrainReport> {
        match self {
            Outcome::Finished(r) => Ok(*r),
            Outcome::Stopped { checkpoint, .. } => Err(Error::Invalid(format!(
                "training stopped before its end; its state is in {}",
                checkpoint.display()
            ))),
        }
    }
}

/// A checkpoint to continue from.
#[derive(Debug, Clone)]
pub struct Resume {
    /// The loaded checkpoint.
    pub checkpoint: Checkpoint,
    /// The file it came from (for messages).
    pub path: PathBuf,
    /// Accept shards added to the dataset since the checkpoint; they join from
    /// the next epoch.
    pub allow_appended: bool,
}

/// The task of a dataset: binary with a positive class id, or one-vs-rest.
pub fn task_of(m: &Manifest) -> Result<Option<u32>> {
    let names: Vec<&str> = m.labels.iter().map(|l| l.name.as_str()).collect();
    match &m.positive {
        Some(p) => names
            .iter()
            .position(|n| n == p)
            .map(|i| Some(i as u32))
            .ok_or_else(|| Error::Invalid(format!("positive label {p:?} is not in the dataset"))),
        None if names.len() == 2 => {
            // Two labels: the alphabetically later one is positive
            // (spam over ham, 1 over 0, true over false, yes over no).
            let later = if names[1] > names[0] { 1 } else { 0 };
            Ok(Some(later))
        }
        None => Ok(None),
    }
}

/// The task of a dataset, after checking that it can be trained: training rows
/// of every class of a one-vs-rest task, of both sides of a binary one.
pub fn trainable_task(m: &Manifest, dir: &Path) -> Result<Option<u32>> {
    let positive = task_of(m)?;
    let n_train = m.train_rows();
    if n_train == 0 {
        return Err(Error::Invalid(format!(
            "{}: the dataset has no training rows",
            dir.display()
        )));
    }
    let counts: Vec<u64> = m.labels.iter().map(|l| l.train_rows).collect();
    match positive {
        Some(p) => {
            let pos = counts[p as usize];
            if pos == 0 || pos == n_train {
                return Err(Error::Invalid(format!(
                    "a binary task needs training rows of both classes; {:?} has {pos} of {n_train}",
                    m.labels[p as usize].name
                )));
            }
        }
        None => {
            if m.labels.len() < 2 {
                return Err(Error::Invalid(
                    "the dataset has a single label: there is nothing to tell apart".into(),
                ));
            }
            if let Some(l) = m.labels.iter().find(|l| l.train_rows == 0) {
                return Err(Error::Invalid(format!(
                    "class {:?} has no training rows; drop it or add data",
                    l.name
                )));
            }
        }
    }
    Ok(positive)
}

/// idf factor per bucket from the dataset's document frequencies:
/// `ln((1 + N)/(1 + df)) + 1` (the smoothed form, common practice).
pub fn idf_of(dir: &Path, m: &Manifest) -> Result<Vec<f32>> {
    let d = m.features.buckets() as usize;
    let mut df = vec![0u64; d];
    let mut n = 0u64;
    for e in &m.doc_freq {
        let f = dataset::open_doc_freq(dir, m, e)?;
        n = n.saturating_add(f.rows());
        for (a, &b) in df.iter_mut().zip(f.counts()?) {
            *a += b as u64;
        }
    }
    Ok(df
        .iter()
        .map(|&c| ((n.saturating_add(1) as f64 / (1 + c) as f64).ln() + 1.0) as f32)
        .collect())
}

/// The header of the per-epoch table.
pub const EPOCH_HEADER: &str =
    "epoch   objective    val-loss   val-acc  macro-F1      rows/s       nnz/s    secs";

/// One line of the per-epoch table.
pub fn epoch_line(e: &EpochLog) -> String {
    let opt = |v: Option<f64>, pct: bool| match v {
        Some(x) if pct => format!("{:>8.2}%", 100.0 * x),
        Some(x) => format!("{x:>9.4}"),
        None => format!("{:>9}", "-"),
    };
    format!(
        "{:>5} {:>11.5} {:>11} {} {} {:>11} {:>11} {:>7.2}",
        e.epoch,
        e.objective,
        opt(e.validation_loss, false).trim_start(),
        opt(e.validation_accuracy, true),
        opt(e.validation_macro_f1, false),
        util::si(e.rows_per_second),
        util::si(e.nnz_per_second),
        e.seconds
    )
}

pub(crate) fn open_shards(
    dir: &Path,
    m: &Manifest,
    entries: &[&ShardEntry],
    n_labels: u32,
) -> Result<Vec<Shard>> {
    open_shards_checking(dir, m, entries, n_labels, |_| true)
}

/// [`open_shards`], checking every section of only the shards `i` for which
/// `check(i)` holds (the ranks of a distributed run share that work); every
/// shard's header and size are checked on opening.
fn open_shards_checking(
    dir: &Path,
    m: &Manifest,
    entries: &[&ShardEntry],
    n_labels: u32,
    check: impl Fn(usize) -> bool + Sync,
) -> Result<Vec<Shard>> {
    // Checked on the pool's threads (the checksums are most of the start-up
    // time); the first failure in list order is the one reported.
    let opened: Vec<Result<Shard>> = entries
        .par_iter()
        .enumerate()
        .map(|(i, e)| {
            let s = dataset::open_shard(dir, m, e)?;
            if check(i) {
                s.verify(Some(n_labels))?;
            }
            Ok(s)
        })
        .collect();
    opened.into_iter().collect()
}

/// Train a model on the dataset in `opts.dir` and write it to `opts.model`.
pub fn train(opts: &TrainOptions, log: Log) -> Result<Outcome> {
    begin(opts, None, log, &Solo)
}

/// [`train`] as one process of a distributed run: every process of `comm`
/// calls it with the same options (see [`crate::distributed`]). Only rank 0
/// writes the model and checkpoints; give the others a `log` that prints
/// nothing. With one process it is [`train`], bit for bit.
pub fn train_in(opts: &TrainOptions, log: Log, comm: &dyn Collective) -> Result<Outcome> {
    begin(opts, None, log, comm)
}

/// Continue the run saved in `resume.checkpoint`. The solver settings, epochs,
/// seed, class weights, idf and patience are the checkpoint's (the caller
/// refuses contradicting options; see [`TrainOptions::from_checkpoint`]); the
/// dataset must be the one it was trained on, or that dataset with shards added
/// when `allow_appended`. The final model is byte-identical to the model of an
/// uninterrupted run.
pub fn resume(opts: &TrainOptions, resume: Resume, log: Log) -> Result<Outcome> {
    begin(opts, Some(resume), log, &Solo)
}

/// [`resume`] as one process of a distributed run (every process passes the
/// same checkpoint, which rank 0 read: see [`Checkpoint::from_bytes`]). With as
/// many processes as the checkpoint's run had, the final model is the same as
/// an uninterrupted run's, unless the checkpoint was saved on a stop request
/// (the ranks then mixed once more than an uninterrupted run does); with
/// another number, the epoch in progress starts over on the new shares (the
/// model and step counter continue).
pub fn resume_in(
    opts: &TrainOptions,
    resume: Resume,
    log: Log,
    comm: &dyn Collective,
) -> Result<Outcome> {
    begin(opts, Some(resume), log, comm)
}

/// Take a lock next to `dest`, explaining an unwritable folder.
pub(crate) fn lock_next_to(dest: &Path, what: &str) -> Result<util::Lock> {
    let mut name = dest.as_os_str().to_owned();
    name.push(".lock");
    util::Lock::acquire(Path::new(&name)).map_err(|e| match e {
        Error::Io { cause, .. } => Error::Invalid(format!(
            "cannot write the {what} {}: {cause} (checked before training starts)",
            dest.display()
        )),
        other => other,
    })
}

fn begin(
    opts: &TrainOptions,
    resume: Option<Resume>,
    log: Log,
    comm: &dyn Collective,
) -> Result<Outcome> {
    let start = Instant::now();
    let settings_epochs = resume
        .as_ref()
        .map_or(opts.epochs, |r| r.checkpoint.meta.settings.epochs);
    if settings_epochs == 0 {
        return Err(Error::Invalid("--epochs must be at least 1".into()));
    }
    opts.solver.validate()?;
    if let Some(r) = opts.replicas.filter(|&r| r == 0 || r > MAX_REPLICAS) {
        return Err(Error::Invalid(format!(
            "--replicas must be in 1..={MAX_REPLICAS}, got {r}"
        )));
    }
    if opts.sync_every == Some(0) {
        return Err(Error::Invalid("--sync-every must be at least 1 row".into()));
    }
    if !(opts.checkpoint_every >= 0.0 && opts.checkpoint_every.is_finite()) {
        return Err(Error::Invalid(format!(
            "--checkpoint-every must be a number of seconds >= 0, got {}",
            opts.checkpoint_every
        )));
    }
    // Locks first: a second run writing the same files, or a folder that cannot
    // be written, is refused before any work is done.
    let ckpt_path = opts
        .checkpoint
        .clone()
        .unwrap_or_else(|| default_checkpoint(&opts.model));
    if same_file(&ckpt_path, &opts.model) {
        return Err(Error::Invalid(format!(
            "the checkpoint and the model cannot be the same file ({})",
            opts.model.display()
        )));
    }
    // Only rank 0 writes files.
    let locks = distributed::agree(
        comm,
        if comm.rank() == 0 {
            lock_next_to(&opts.model, "model").and_then(|a| {
                let b = lock_next_to(&ckpt_path, "checkpoint")?;
                container::remove_stale_temps(&opts.model);
                container::remove_stale_temps(&ckpt_path);
                Ok(Some((a, b)))
            })
        } else {
            Ok(None)
        },
    )?;
    let _locks = locks;

    let m = distributed::agree(
        comm,
        Manifest::load(&opts.dir).and_then(|m| {
            dataset::refuse_own_file(&opts.dir, &m, &opts.model, "model")?;
            dataset::refuse_own_file(&opts.dir, &m, &ckpt_path, "checkpoint")?;
            Ok(m)
        }),
    )?;
    // Every rank must see the same dataset before it checks anything in it.
    distributed::check_same_dataset(comm, m.fingerprint())?;
    let positive = distributed::agree(comm, trainable_task(&m, &opts.dir))?;
    let ranks = comm.size() as u64;
    let settings = distributed::agree(
        comm,
        match &resume {
            Some(r) => check_dataset(
                &r.checkpoint.meta,
                &r.path,
                &m,
                &opts.dir,
                positive,
                r.allow_appended,
            )
            .map(|()| {
                let mut s = r.checkpoint.meta.settings.clone();
                s.ranks = ranks as u32;
                s
            }),
            None => class_weights_of(&m, positive, &opts.class_weight).map(
                |(class_weights, class_weight_rule)| {
                    // Each rank's replicas, by its share of the rows.
                    let replicas = opts.replicas.unwrap_or_else(|| {
                        auto_replicas(positive.is_some(), m.train_rows() / ranks)
                    });
                    TrainSettings {
                        solver: opts.solver.clone(),
                        epochs: opts.epochs,
                        seed: opts.seed,
                        class_weights,
                        class_weight_rule,
                        idf: opts.idf,
                        patience: opts.patience,
                        init_from: None,
                        replicas: replicas as u32,
                        sync_every: match opts.sync_every {
                            _ if replicas <= 1 && ranks == 1 => 0,
                            Some(rows) => rows,
                            // Ranks mix at epoch ends unless told otherwise.
                            None if ranks > 1 => 0,
                            None => default_sync_every(
                                m.features.buckets(),
                                m.nnz() as f64
                                    / (m.train_rows() + m.validation_rows()).max(1) as f64,
                                replicas,
                                opts.solver.batch,
                            ),
                        },
                        ranks: ranks as u32,
                    }
                },
            ),
        },
    )?;
    // The settings, and the options that decide which collective operations a
    // rank makes (a warm start, periodic checkpoints), must agree too.
    let mut what = serde_json::to_vec(&settings).expect("settings serialise");
    what.push(opts.init_from.is_some() as u8);
    what.push(opts.checkpoint.is_some() as u8);
    distributed::check_same_settings(comm, xxhash_rust::xxh3::xxh3_64(&what))?;
    let pool = distributed::agree(
        comm,
        rayon::ThreadPoolBuilder::new()
            .num_threads(opts.threads.max(1))
            .thread_name(|i| format!("tamis-train-{i}"))
            .build()
            .map_err(|e| Error::Invalid(format!("cannot start threads: {e}"))),
    )?;
    let run = Run {
        opts,
        m: &m,
        positive,
        settings,
        ckpt_path,
        log,
        start,
        comm,
    };
    pool.install(|| run.run(resume))
}

/// Whether two paths name the same file (by name, after resolving the folder).
fn same_file(a: &Path, b: &Path) -> bool {
    let abs = |p: &Path| {
        let dir = container::parent_dir(p);
        std::fs::canonicalize(&dir)
            .unwrap_or(dir)
            .join(p.file_name().unwrap_or_default())
    };
    abs(a) == abs(b)
}

/// Example weights per class id and the rule's name.
pub(crate) fn class_weights_of(
    m: &Manifest,
    positive: Option<u32>,
    rule: &ClassWeight,
) -> Result<(Vec<f64>, String)> {
    let n_train = m.train_rows();
    let counts: Vec<u64> = m.labels.iter().map(|l| l.train_rows).collect();
    Ok(match rule {
        ClassWeight::None => (vec![1.0; m.labels.len()], "none".to_string()),
        ClassWeight::Balanced => {
            let w = match positive {
                Some(p) => {
                    let pos = counts[p as usize] as f64;
                    let neg = n_train as f64 - pos;
                    (0..m.labels.len())
                        .map(|c| {
                            if c as u32 == p {
                                n_train as f64 / (2.0 * pos)
                            } else {
                                n_train as f64 / (2.0 * neg)
                            }
                        })
                        .collect()
                }
                None => counts
                    .iter()
                    .map(|&c| n_train as f64 / (m.labels.len() as f64 * c.max(1) as f64))
                    .collect(),
            };
            (w, "balanced".to_string())
        }
        ClassWeight::Given(list) => {
            let mut w = vec![1.0; m.labels.len()];
            for (name, x) in list {
                let i = m
                    .labels
                    .iter()
                    .position(|l| &l.name == name)
                    .ok_or_else(|| {
                        Error::Invalid(format!("--class-weight names unknown label {name:?}"))
                    })?;
                w[i] = *x;
            }
            (w, ClassWeight::Given(list.clone()).rule())
        }
    })
}

/// Refuse to resume against a dataset that no longer matches the checkpoint,
/// saying what changed.
fn check_dataset(
    ck: &CheckpointMeta,
    ck_path: &Path,
    m: &Manifest,
    dir: &Path,
    positive: Option<u32>,
    allow_appended: bool,
) -> Result<()> {
    let refuse = |what: String| {
        Err(Error::Mismatch {
            path: ck_path.to_path_buf(),
            what: format!(
                "the dataset {} no longer matches this checkpoint: {what}",
                dir.display()
            ),
        })
    };
    let diff = ck.features.differences(&m.features);
    if !diff.is_empty() {
        return refuse(format!(
            "its tokenizing and hashing settings changed ({})",
            diff.join("; ")
        ));
    }
    let names: Vec<&str> = m.labels.iter().map(|l| l.name.as_str()).collect();
    let known: Vec<&str> = ck.labels.iter().map(|s| s.as_str()).collect();
    if names.len() < known.len() || names[..known.len()] != known[..] {
        return refuse(format!(
            "its labels are {names:?}, the checkpoint's {known:?}"
        ));
    }
    if names.len() > known.len() {
        let new = &names[known.len()..];
        if positive.is_none() {
            return refuse(format!(
                "new label(s) {new:?}: a one-vs-rest run cannot grow classes; train anew, or warm-start with --init-from"
            ));
        }
        if !allow_appended {
            return refuse(format!(
                "new label(s) {new:?} came with appended data; pass --allow-appended to resume with them"
            ));
        }
    }
    if positive != ck.positive {
        return refuse("its positive label changed".into());
    }
    for s in &ck.shards {
        match m.shards.iter().find(|e| e.file == s.file) {
            None => return refuse(format!("shard {} is gone", s.file)),
            Some(e) if e.checksum != s.checksum || e.split != s.split => {
                return refuse(format!(
                    "shard {} changed (checksum {} now, {} then)",
                    s.file, e.checksum, s.checksum
                ))
            }
            Some(_) => {}
        }
    }
    let added: Vec<&str> = m
        .shards
        .iter()
        .filter(|e| {
            // Validation shards are all listed; training shards of the epoch in
            // progress are listed, so any other training shard is new.
            !ck.shards.iter().any(|s| s.file == e.file)
        })
        .map(|e| e.file.as_str())
        .collect();
    if !added.is_empty() && !allow_appended {
        return refuse(format!(
            "{} shard(s) were added since ({}{}); pass --allow-appended to resume with them joining from the next epoch",
            added.len(),
            added[..added.len().min(3)].join(", "),
            if added.len() > 3 { ", ..." } else { "" }
        ));
    }
    Ok(())
}

/// Everything a run needs besides its mutable state.
struct Run<'a> {
    opts: &'a TrainOptions,
    m: &'a Manifest,
    positive: Option<u32>,
    settings: TrainSettings,
    ckpt_path: PathBuf,
    log: Log,
    start: Instant,
    /// The processes of the run ([`Solo`] on one machine).
    comm: &'a dyn Collective,
}

/// What a checkpoint needs from the loop.
struct Snapshot<'a> {
    /// Every replica (their models go into the checkpoint one after the other).
    replicas: &'a [Trainer],
    position: Position,
    sums: EpochSums,
    early: EarlyStop,
    epochs: &'a [EpochLog],
    shards: Vec<ShardRef>,
    /// Every rank's position (distributed runs only).
    ranks: Vec<RankPosition>,
}

impl Run<'_> {
    fn run(mut self, resume: Option<Resume>) -> Result<Outcome> {
        let opts = self.opts;
        let m = self.m;
        let comm = self.comm;
        let (rank, ranks) = (comm.rank(), comm.size());
        let positive = self.positive;
        let n_labels = m.labels.len() as u32;
        let dim = m.features.buckets() as usize;
        let (mut resume_ck, allow_appended) = match resume {
            Some(r) => (Some(r.checkpoint), r.allow_appended),
            None => (None, false),
        };
        let idf = match &mut resume_ck {
            Some(ck) => ck.idf.take(),
            None if self.settings.idf => Some(distributed::agree(comm, idf_of(&opts.dir, m))?),
            None => None,
        };
        // The token sketch goes into the model; read (and checked) before training.
        let sketch = distributed::agree(comm, dataset::sketch::load(&opts.dir, m))?;
        // Every training shard of the dataset, in the manifest's order.
        let manifest_train: Vec<&ShardEntry> = m.shards_of(Split::Train).collect();
        let valid_entries: Vec<&ShardEntry> = m.shards_of(Split::Validation).collect();
        // A dataset split into as many parts as there are ranks: each rank
        // trains and validates on its own part only, and may hold no other.
        let by_part = ranks > 1 && m.scatter.parts as usize == ranks;
        let own_part = |e: &&ShardEntry| e.part as usize == rank;
        // Otherwise every rank maps every training shard (its share changes
        // each epoch) but checks the sections of a share of them only; it
        // evaluates its share of the validation shards.
        let mine = |i: usize| by_part || i % ranks == rank;
        let train_entries: Vec<&ShardEntry> = if by_part {
            manifest_train.iter().copied().filter(own_part).collect()
        } else {
            manifest_train.clone()
        };
        let train = distributed::agree(
            comm,
            open_shards_checking(&opts.dir, m, &train_entries, n_labels, mine),
        )?;
        let my_valid: Vec<&ShardEntry> = if by_part {
            valid_entries.iter().copied().filter(own_part).collect()
        } else {
            valid_entries
                .iter()
                .enumerate()
                .filter(|&(i, _)| mine(i))
                .map(|(_, e)| *e)
                .collect()
        };
        let valid = distributed::agree(comm, open_shards(&opts.dir, m, &my_valid, n_labels))?;
        let all: Vec<usize> = (0..train.len()).collect();
        let targets: Vec<Target> = match positive {
            Some(p) => vec![Target::Class(p)],
            None => (0..n_labels).map(Target::Class).collect(),
        };
        let model_labels: Vec<String> = match positive {
            Some(p) => vec![m.labels[p as usize].name.clone()],
            None => m.labels.iter().map(|l| l.name.clone()).collect(),
        };
        let s = self.settings.clone();
        let mut trainer = Trainer::new(
            dim,
            targets,
            s.class_weights.clone(),
            s.solver.clone(),
            idf.clone(),
        )?;
        let n_rep = s.replicas.max(1) as usize;
        let per_model = trainer.models.len();
        // Models saved by a checkpoint: those of every replica, one after the other.
        let mut saved_models = None;
        // Whether the run resumes an epoch part-way (on any rank): that epoch
        // keeps the shards it started with.
        let mut resumed_part_way = false;
        // The training shards (of every part) that the checkpoint's epoch uses.
        let mut first_files: Vec<&ShardEntry> = manifest_train.clone();
        // Where to begin, and the list of training shards of the first epoch.
        let (mut first, mut first_sums, mut early, mut epochs, first_list) = match resume_ck {
            Some(ck) => {
                let meta = ck.meta;
                trainer.t = meta.position.step;
                saved_models = Some(ck.models);
                let listed = |e: &&ShardEntry| {
                    meta.shards
                        .iter()
                        .any(|r| r.split == Split::Train && r.file == e.file)
                };
                first_files = manifest_train.iter().copied().filter(listed).collect();
                let list: Vec<usize> = (0..train_entries.len())
                    .filter(|&i| listed(&train_entries[i]))
                    .collect();
                let mut position = meta.position;
                let mut sums = meta.epoch_sums;
                let was = meta.settings.ranks.max(1) as usize;
                let part_way = (position.group, position.taken) != (0, 0)
                    || meta
                        .rank_positions
                        .iter()
                        .any(|p| (p.group, p.taken) != (0, 0));
                resumed_part_way = part_way;
                // A part-way position means nothing under another order's
                // rules or for another number of ranks' shares: the epoch in
                // progress then starts over.
                let restart = if meta.epoch_order != order::ORDER_VERSION && part_way {
                    Some(
                        "; the checkpoint was written by a tamis that drew epochs in \
                         another order, so the epoch in progress starts over"
                            .to_string(),
                    )
                } else if was != ranks && part_way {
                    Some(format!(
                        "; the checkpoint was taken by {was} rank(s) part-way through the epoch, \
                         which starts over on {ranks}"
                    ))
                } else {
                    None
                };
                if restart.is_some() {
                    position.group = 0;
                    position.taken = 0;
                    sums = EpochSums::default();
                    resumed_part_way = false;
                } else if was == ranks && ranks > 1 {
                    // Each rank continues its own share, and its own sums.
                    match meta.rank_positions.get(rank) {
                        Some(p) if meta.rank_positions.len() == ranks => {
                            position.group = p.group;
                            position.taken = p.taken;
                            sums = p.sums;
                        }
                        _ => {
                            return Err(Error::Invalid(format!(
                                "the checkpoint of a run on {was} ranks holds {} rank position(s)",
                                meta.rank_positions.len()
                            )))
                        }
                    }
                }
                (self.log)(&format!(
                    "resuming at epoch {} of {}, step {}{}{}",
                    position.epoch.min(s.epochs - 1) + 1,
                    s.epochs,
                    position.step,
                    if allow_appended && list.len() < train.len() {
                        format!(
                            "; {} added shard(s) join from the next epoch",
                            train.len() - list.len()
                        )
                    } else {
                        String::new()
                    },
                    restart.as_deref().unwrap_or("")
                ));
                (Some(position), sums, meta.early_stop, meta.epochs, list)
            }
            None => {
                if let Some(path) = &opts.init_from {
                    let (models, t, warm) = distributed::agree(
                        comm,
                        warm_start(path, m, positive, &model_labels, opts.idf, &self.log),
                    )?;
                    trainer.set_models(models)?;
                    trainer.t = t;
                    self.settings.init_from = Some(warm);
                }
                (
                    None,
                    EpochSums::default(),
                    EarlyStop::default(),
                    Vec::new(),
                    all.clone(),
                )
            }
        };
        trainer.set_solo(n_rep > 1);
        // Each round takes one batch per replica on every rank.
        trainer.set_stride(n_rep * ranks);
        let mut replicas: Vec<Trainer> = match saved_models {
            Some(models) => {
                if models.len() != n_rep * per_model {
                    return Err(Error::Invalid(format!(
                        "the checkpoint holds {} model(s); {n_rep} replica(s) of {per_model} need {}",
                        models.len(),
                        n_rep * per_model
                    )));
                }
                let mut reps = Vec::with_capacity(n_rep);
                for part in models.chunks(per_model) {
                    let mut t = trainer.clone();
                    t.set_models(part.to_vec())?;
                    reps.push(t);
                }
                reps
            }
            None => vec![trainer; n_rep],
        };
        let mut since_mix = first.map_or(0, |p| p.since_mix);
        let s = &self.settings;
        let sync_rounds = sync_rounds_of(s);
        let lens: Vec<usize> = train.iter().map(|s| s.rows()).collect();
        let every = Duration::from_secs_f64(opts.checkpoint_every);
        let periodic = opts.checkpoint.is_some();
        let stop_requested = || opts.stop.as_ref().is_some_and(|f| f.load(Ordering::SeqCst));
        let mut last_ck = Instant::now();
        let mut last_cost = None;
        if ranks > 1 && !by_part && manifest_train.len() < 2 * ranks {
            (self.log)(&format!(
                "note: {} training shard(s) for {ranks} ranks: the shares are uneven and a rank \
                 without rows only holds; ingest with a smaller --shard-rows for several shards \
                 per rank",
                manifest_train.len()
            ));
        }
        (self.log)(EPOCH_HEADER);
        let start_epoch = first.map_or(0, |p| p.epoch);
        let mut done_early = s.patience.is_some_and(|p| early.since_best >= p);
        let valid_set = Validation {
            shards: &valid,
            all_shards: valid_entries.len(),
            comm,
            positive,
            classes: n_labels as usize,
            idf: idf.as_deref(),
        };
        for epoch in start_epoch..s.epochs {
            if done_early {
                break;
            }
            let resumed = first.take().filter(|p| p.epoch == epoch);
            let from = resumed.map_or((0, 0), |p| (p.group as usize, p.taken));
            // An epoch resumed part-way keeps the shards it started with; shards
            // appended since join when an epoch starts.
            let part_way = epoch == start_epoch && resumed.is_some() && resumed_part_way;
            let (epoch_shards, epoch_files) = if part_way {
                (&first_list, &first_files)
            } else {
                (&all, &manifest_train)
            };
            // This rank's share of them (its part's, when split by part).
            let list: Vec<usize> = if by_part {
                epoch_shards.clone()
            } else {
                let shard_lens: Vec<usize> = epoch_shards.iter().map(|&i| lens[i]).collect();
                distributed::share(&shard_lens, s.seed, epoch, rank, ranks)
                    .into_iter()
                    .map(|k| epoch_shards[k])
                    .collect()
            };
            let mut sums = std::mem::take(&mut first_sums);
            // What every rank had seen of a resumed epoch (for its rates).
            let before = global_sums(comm, sums);
            let (rows_before, nnz_before) = (before.rows, before.nnz);
            let t0 = Instant::now();
            let average = epoch >= s.solver.average_from;
            let bar = progress(
                opts.progress,
                m.train_rows().div_ceil(ranks as u64),
                epoch + 1,
                s.epochs,
            );
            if let Some(b) = &bar {
                b.set_position(sums.rows);
            }
            let shard_refs = |files: &[&ShardEntry]| self.shard_refs(files, &valid_entries);
            let mut stopped = None;
            // The same stretches on every rank: cut by the epoch's rows per rank.
            let epoch_rows: usize = epoch_files.iter().map(|e| e.rows as usize).sum();
            let per_stretch = stretch_batches(
                s.solver.batch,
                n_rep,
                (n_rep > 1 || ranks > 1).then_some(sync_rounds),
                epoch_rows.div_ceil(ranks),
            );
            let sweep = Sweep {
                shards: &train,
                lens: &lens,
                list: &list,
                seed: s.seed,
                epoch,
                batch: s.solver.batch,
            };
            let groups = order::groups(list.len(), s.seed, epoch).len();
            // Where this rank stands in its share (after the last stretch).
            let mut here = if from.0 >= groups {
                (groups as u32, 0)
            } else {
                (from.0 as u32, from.1)
            };
            // One stretch of this rank (`None` once its share is used up): the
            // ranks agree on the rounds it takes (a rank with fewer batches
            // holds for the rest), then mix and save as due. Returns whether
            // the epoch goes on.
            let mut stretch_step = |work: Option<(&[Group<'_, Shard>], &Stretch)>| -> Result<bool> {
                let (mine_rounds, rows) = match work {
                    Some((_, st)) => (st.len().div_ceil(n_rep) as u64, st.rows()),
                    None => {
                        here = (groups as u32, 0);
                        (0, 0)
                    }
                };
                let ctl = distributed::exchange(
                    comm,
                    Control {
                        rounds: mine_rounds,
                        stop: stop_requested(),
                        checkpoint_due: rank == 0 && periodic && last_ck.elapsed() >= every,
                    },
                );
                if ctl.rounds == 0 {
                    return Ok(false);
                }
                let rounds = ctl.rounds as usize;
                if n_rep == 1 {
                    let tr = &mut replicas[0];
                    let mut took = 0;
                    if let Some((views, st)) = work {
                        each_batch(views, st, 0, 1, |view, batch| {
                            sums.add(&tr.step(view, batch, average));
                            took += 1;
                        });
                    }
                    for _ in took..rounds {
                        tr.hold(average);
                    }
                } else {
                    // Replica r takes batches r, r + R, …; one left without a
                    // batch in the last rounds holds, so the step counts agree.
                    let parts: Vec<EpochSums> = replicas
                        .par_iter_mut()
                        .enumerate()
                        .map(|(r, tr)| {
                            let mut own = EpochSums::default();
                            let mut took = 0;
                            if let Some((views, st)) = work {
                                each_batch(views, st, r, n_rep, |view, batch| {
                                    own.add(&tr.step(view, batch, average));
                                    took += 1;
                                });
                            }
                            for _ in took..rounds {
                                tr.hold(average);
                            }
                            own
                        })
                        .collect();
                    for p in &parts {
                        sums.loss += p.loss;
                        sums.rows += p.rows;
                        sums.nnz += p.nnz;
                    }
                }
                if n_rep > 1 || ranks > 1 {
                    since_mix += rounds as u64;
                    if since_mix >= sync_rounds {
                        distributed::mix_across(&mut replicas, comm);
                        since_mix = 0;
                    }
                }
                if let Some((_, st)) = work {
                    here = (st.end.0 as u32, st.end.1);
                }
                if let Some(b) = &bar {
                    b.inc(rows);
                }
                // One process saves where it likes; ranks save only right
                // after a mix, when every rank holds the same models, or mix
                // early to stop (the stop is agreed through `ctl`).
                let stop = ctl.stop || (ranks == 1 && stop_requested());
                let due = if ranks == 1 {
                    periodic && last_ck.elapsed() >= every
                } else {
                    ctl.checkpoint_due && since_mix == 0
                };
                if stop || due {
                    if stop && since_mix > 0 && ranks > 1 {
                        distributed::mix_across(&mut replicas, comm);
                        since_mix = 0;
                    }
                    let positions = rank_positions(comm, here, sums);
                    let snap = Snapshot {
                        replicas: &replicas,
                        position: Position {
                            epoch,
                            group: here.0,
                            taken: here.1,
                            step: replicas[0].t,
                            since_mix,
                        },
                        sums: global_sums(comm, sums),
                        early,
                        epochs: &epochs,
                        shards: shard_refs(epoch_files),
                        ranks: positions,
                    };
                    last_cost = Some(self.write_checkpoint(&snap)?);
                    last_ck = Instant::now();
                    if stop {
                        stopped = Some(snap.position);
                        return Ok(false);
                    }
                }
                Ok(true)
            };
            let mut go_on = true;
            sweep.run(from, per_stretch, |views, stretch| {
                go_on = stretch_step(Some((views, stretch)))?;
                Ok(go_on)
            })?;
            // This rank's share is used up: hold while the others finish.
            if go_on {
                while stretch_step(None)? {}
            }
            // The epoch ends on one model: the replicas' mean.
            if stopped.is_none() && since_mix > 0 {
                distributed::mix_across(&mut replicas, comm);
                since_mix = 0;
            }
            if let Some(b) = bar {
                b.finish_and_clear();
            }
            if let Some(position) = stopped {
                return Ok(Outcome::Stopped {
                    checkpoint: self.ckpt_path.clone(),
                    position,
                });
            }
            let sums = global_sums(comm, sums);
            let rate = Rate {
                rows: sums.rows - rows_before,
                nnz: sums.nnz - nnz_before,
                seconds: t0.elapsed().as_secs_f64(),
            };
            let (w, b) = weights_of(&replicas[0].models);
            let it = Iterate {
                weights: &w,
                biases: &b,
                regularizer: replicas[0].regularizer(),
                loss: s.solver.loss,
                class_weights: &s.class_weights,
            };
            let (row, eval) = end_epoch(&it, &valid_set, epoch, &sums, rate, t0)?;
            (self.log)(&epoch_line(&row));
            epochs.push(row);
            if let (Some(p), Some(e)) = (s.patience, &eval) {
                if early.best_loss.is_none_or(|best| e.loss < best - 1e-12) {
                    early.best_loss = Some(e.loss);
                    early.since_best = 0;
                } else {
                    early.since_best += 1;
                    if early.since_best >= p {
                        (self.log)(&format!(
                            "stopping early: validation loss has not improved for {p} epoch(s)"
                        ));
                        done_early = true;
                    }
                }
            }
            let stop = distributed::exchange(
                comm,
                Control {
                    rounds: 0,
                    stop: stop_requested(),
                    checkpoint_due: false,
                },
            )
            .stop;
            if periodic || stop {
                let snap = Snapshot {
                    replicas: &replicas,
                    position: Position {
                        epoch: epoch + 1,
                        group: 0,
                        taken: 0,
                        step: replicas[0].t,
                        since_mix: 0,
                    },
                    sums: EpochSums::default(),
                    early,
                    epochs: &epochs,
                    shards: shard_refs(&manifest_train),
                    ranks: rank_positions(comm, (0, 0), EpochSums::default()),
                };
                last_cost = Some(self.write_checkpoint(&snap)?);
                last_ck = Instant::now();
                if stop && epoch + 1 < s.epochs && !done_early {
                    return Ok(Outcome::Stopped {
                        checkpoint: self.ckpt_path.clone(),
                        position: snap.position,
                    });
                }
            }
        }
        let model = build_model(
            m,
            positive,
            self.settings.clone(),
            epochs,
            weights_of(&replicas[0].models),
            replicas[0].t,
            idf,
            sketch,
        );
        let saved = if rank == 0 {
            model.save(&opts.model).map_err(|e| match e {
                Error::Io { path, cause } => Error::Invalid(format!(
                    "could not write the model {} ({}: {cause}); the previous model, if any, is intact",
                    opts.model.display(),
                    path.display()
                )),
                other => other,
            })
        } else {
            Ok(())
        };
        distributed::agree(comm, saved)?;
        Ok(Outcome::Finished(Box::new(TrainReport {
            model,
            seconds: self.start.elapsed().as_secs_f64(),
            last_checkpoint: last_cost,
        })))
    }

    /// The shards a checkpoint lists: the training shards of the epoch in
    /// progress (of every rank and part, in the manifest's order) and every
    /// validation shard.
    fn shard_refs(&self, train: &[&ShardEntry], valid: &[&ShardEntry]) -> Vec<ShardRef> {
        train
            .iter()
            .copied()
            .chain(valid.iter().copied())
            .map(|e| ShardRef {
                file: e.file.clone(),
                split: e.split,
                checksum: e.checksum.clone(),
            })
            .collect()
    }

    fn write_checkpoint(&self, snap: &Snapshot<'_>) -> Result<WriteCost> {
        let abs = |p: &Path| std::path::absolute(p).unwrap_or_else(|_| p.to_path_buf());
        let meta = CheckpointMeta {
            format: "tamis-checkpoint".into(),
            written_by: format!("tamis {}", env!("CARGO_PKG_VERSION")),
            dataset: abs(&self.opts.dir),
            model: abs(&self.opts.model),
            dataset_fingerprint: format!("{:016x}", self.m.fingerprint()),
            features: self.m.features.clone(),
            labels: self.m.labels.iter().map(|l| l.name.clone()).collect(),
            positive: self.positive,
            shards: snap.shards.clone(),
            settings: self.settings.clone(),
            position: snap.position,
            epoch_sums: snap.sums,
            early_stop: snap.early,
            epochs: snap.epochs.to_vec(),
            rank_positions: snap.ranks.clone(),
            epoch_order: order::ORDER_VERSION,
        };
        // Rank 0 writes for all: at a checkpoint every rank holds the same models.
        if self.comm.rank() != 0 {
            return distributed::agree(
                self.comm,
                Ok(WriteCost {
                    bytes: 0,
                    seconds: 0.0,
                }),
            );
        }
        let models: Vec<&Linear> = snap.replicas.iter().flat_map(|t| &t.models).collect();
        let written = Checkpoint::write(&self.ckpt_path, &meta, &models, snap.replicas[0].idf())
        .map_err(|e| match e {
            Error::Io { path, cause } => Error::Invalid(format!(
                "could not write the checkpoint {} ({}: {cause}); the previous checkpoint, if any, is intact",
                self.ckpt_path.display(),
                path.display()
            )),
            other => other,
        });
        distributed::agree(self.comm, written)
    }
}

/// Every rank's position in its share of the epoch and its sums so far, in
/// rank order (empty for one process, whose position is the checkpoint's own).
fn rank_positions(comm: &dyn Collective, here: (u32, u64), sums: EpochSums) -> Vec<RankPosition> {
    if comm.size() == 1 {
        return Vec::new();
    }
    let mine = [
        u64::from(here.0),
        here.1,
        sums.loss.to_bits(),
        sums.rows,
        sums.nnz,
    ];
    comm.gather_u64(&mine)
        .chunks_exact(mine.len())
        .map(|c| RankPosition {
            group: c[0] as u32,
            taken: c[1],
            sums: EpochSums {
                loss: f64::from_bits(c[2]),
                rows: c[3],
                nnz: c[4],
            },
        })
        .collect()
}

/// The epoch's sums over all ranks (counts below 2^53 travel exactly as f64).
fn global_sums(comm: &dyn Collective, s: EpochSums) -> EpochSums {
    if comm.size() == 1 {
        return s;
    }
    let mut buf = [s.loss, s.rows as f64, s.nnz as f64];
    comm.sum_f64(&mut buf);
    EpochSums {
        loss: buf[0],
        rows: buf[1] as u64,
        nnz: buf[2] as u64,
    }
}

/// Models to start from, the step count behind them and the record of where
/// they came from.
fn warm_start(
    path: &Path,
    m: &Manifest,
    positive: Option<u32>,
    model_labels: &[String],
    idf: bool,
    log: &Log,
) -> Result<(Vec<Linear>, u64, WarmStart)> {
    let model = Model::load(path)?;
    let refuse = |what: String| {
        Err(Error::Mismatch {
            path: path.to_path_buf(),
            what,
        })
    };
    let diff = model.meta.features.differences(&m.features);
    if !diff.is_empty() {
        return refuse(format!(
            "cannot warm-start: the model's tokenizing and hashing settings differ from the dataset's ({})",
            diff.join("; ")
        ));
    }
    match (positive, &model.meta.positive) {
        (Some(p), Some(mp)) if &m.labels[p as usize].name != mp => {
            return refuse(format!(
                "cannot warm-start: the model's positive label is {mp:?}, the dataset's {:?}",
                m.labels[p as usize].name
            ))
        }
        (Some(_), None) => {
            return refuse("cannot warm-start a binary task from a one-vs-rest model".into())
        }
        (None, Some(_)) => {
            return refuse("cannot warm-start a one-vs-rest task from a binary model".into())
        }
        _ => {}
    }
    if model.idf.is_some() != idf {
        return refuse(format!(
            "cannot warm-start: the model was trained {} --idf; train with the same choice",
            if model.idf.is_some() {
                "with"
            } else {
                "without"
            }
        ));
    }
    let models: Vec<Linear> = model_labels
        .iter()
        .map(
            |name| match model.meta.model_labels.iter().position(|l| l == name) {
                Some(k) => Linear::from_weights(model.weights_of(k), model.biases[k]),
                None => {
                    log(&format!(
                        "class {name:?} is new: its model starts from zero"
                    ));
                    Linear::new(model.dim())
                }
            },
        )
        .collect();
    for l in &model.meta.model_labels {
        if !model_labels.contains(l) {
            log(&format!(
                "class {l:?} of {} is not in the dataset: dropped",
                path.display()
            ));
        }
    }
    if model.meta.steps == 0 {
        log(&format!(
            "{} does not record its step count: step sizes restart from the first step",
            path.display()
        ));
    }
    let warm = WarmStart {
        model: path.display().to_string(),
        steps: model.meta.steps,
    };
    Ok((models, model.meta.steps, warm))
}

/// The mini-batches of one epoch over some of a dataset's training shards, in
/// the seeded order of [`order`].
pub(crate) struct Sweep<'a> {
    /// All training shards.
    pub shards: &'a [Shard],
    /// Their row counts.
    pub lens: &'a [usize],
    /// The shards of this epoch (indices into `shards`).
    pub list: &'a [usize],
    /// Seed of the order.
    pub seed: u64,
    /// The epoch (0-based).
    pub epoch: u32,
    /// Rows per batch.
    pub batch: usize,
}

/// Consecutive batches of an epoch, drawn together: the unit between two
/// looks at the clock (checkpoints, stop requests) and the work that replicas
/// share out between them.
#[derive(Debug, Default)]
pub(crate) struct Stretch {
    /// Row ids of every batch, back to back.
    rows: Vec<usize>,
    /// Per batch: its group and where its rows end in `rows`.
    ends: Vec<(usize, usize)>,
    /// Where the epoch stands after the last batch: group and rows of it taken.
    pub end: (usize, u64),
}

impl Stretch {
    /// Batches in the stretch.
    pub fn len(&self) -> usize {
        self.ends.len()
    }

    /// Batch `i`: its group and its row ids in that group's view.
    pub fn batch(&self, i: usize) -> (usize, &[usize]) {
        let start = if i == 0 { 0 } else { self.ends[i - 1].1 };
        let (group, end) = self.ends[i];
        (group, &self.rows[start..end])
    }

    /// Rows in the stretch.
    pub fn rows(&self) -> u64 {
        self.rows.len() as u64
    }
}

impl Sweep<'_> {
    /// Call `f(views, stretch)` for stretches of up to `per_stretch` batches
    /// from group `from.0` after `from.1` of its rows, until the epoch ends:
    /// `views` holds every group's view of its shards (a batch never spans two
    /// groups, a stretch may). Stretches start from `from`, so a run resumed at
    /// the end of a stretch cuts the rest of the epoch where an uninterrupted
    /// run does. `f` returning `Ok(false)` ends the sweep early.
    pub fn run<F>(&self, from: (usize, u64), per_stretch: usize, mut f: F) -> Result<()>
    where
        F: FnMut(&[Group<'_, Shard>], &Stretch) -> Result<bool>,
    {
        let groups = order::groups(self.list.len(), self.seed, self.epoch);
        let views: Vec<Group<'_, Shard>> = groups
            .iter()
            .map(|g| Group::new(g.iter().map(|&i| &self.shards[self.list[i]]).collect()))
            .collect();
        let interleave = |gi: usize| {
            let glens: Vec<usize> = groups[gi]
                .iter()
                .map(|&i| self.lens[self.list[i]])
                .collect();
            Interleave::new(&glens, self.seed, self.epoch, gi)
        };
        let mut gi = from.0;
        if gi >= groups.len() {
            return Ok(());
        }
        let mut inter = interleave(gi);
        inter.skip(from.1);
        let mut stretch = Stretch::default();
        let mut batch = Vec::with_capacity(self.batch);
        loop {
            stretch.rows.clear();
            stretch.ends.clear();
            while stretch.ends.len() < per_stretch.max(1) {
                while inter.remaining() == 0 && gi + 1 < groups.len() {
                    gi += 1;
                    inter = interleave(gi);
                }
                if inter.remaining() == 0 {
                    break;
                }
                inter.next_batch(self.batch, &mut batch);
                stretch.rows.extend_from_slice(&batch);
                stretch.ends.push((gi, stretch.rows.len()));
                stretch.end = (gi, inter.taken());
            }
            if stretch.ends.is_empty() || !f(&views, &stretch)? {
                return Ok(());
            }
        }
    }
}

/// Call `f(view, rows)` for the batches `first`, `first + every`, … of
/// `stretch`. Rows are drawn at random places of the shards, so while `f`
/// works on one batch, the rows of the next are loaded into the caches and
/// where the rows of the one after are described (a hint only: it changes no
/// result).
pub(crate) fn each_batch<F>(
    views: &[Group<'_, Shard>],
    stretch: &Stretch,
    first: usize,
    every: usize,
    mut f: F,
) where
    F: FnMut(&Group<'_, Shard>, &[usize]),
{
    let every = every.max(1);
    let mut i = first;
    while i < stretch.len() {
        if let Some(later) = i.checked_add(2 * every).filter(|&j| j < stretch.len()) {
            let (g, rows) = stretch.batch(later);
            for &r in rows {
                views[g].prefetch(r);
            }
        }
        if let Some(next) = Some(i + every).filter(|&j| j < stretch.len()) {
            let (g, rows) = stretch.batch(next);
            for &r in rows {
                prefetch_row(&views[g].row(r));
            }
        }
        let (g, rows) = stretch.batch(i);
        f(&views[g], rows);
        i += every;
    }
}

/// Rows of a stretch (all replicas together): the most a run goes between two
/// looks at the clock, and the memory its order takes (8 bytes a row).
pub(crate) const STRETCH_ROWS: usize = 16_384;

/// Stretches an epoch is cut into at least (when it has enough rounds), so
/// that a checkpoint or a stop can land at many places of even a small epoch.
pub(crate) const STRETCHES_PER_EPOCH: usize = 64;

/// Batches per stretch for `replicas` replicas taking batches of `batch` rows
/// in turn over an epoch of `epoch_rows` rows, mixing every `sync_rounds`
/// rounds (`None`: never): whole rounds, at most [`STRETCH_ROWS`] rows and
/// 1/[`STRETCHES_PER_EPOCH`] of the epoch, and no more than a mixing interval.
pub(crate) fn stretch_batches(
    batch: usize,
    replicas: usize,
    sync_rounds: Option<u64>,
    epoch_rows: usize,
) -> usize {
    let round = (batch * replicas).max(1);
    let rounds = (STRETCH_ROWS / round)
        .min(epoch_rows.div_ceil(round) / STRETCHES_PER_EPOCH)
        .max(1);
    let rounds = match sync_rounds {
        Some(sync) => rounds.min(sync.clamp(1, usize::MAX as u64) as usize),
        None => rounds,
    };
    rounds * replicas
}

/// The validation split and what scoring it needs.
pub(crate) struct Validation<'a> {
    /// This process's share of the validation shards (may be empty).
    pub shards: &'a [Shard],
    /// Validation shards of all processes (none: no validation).
    pub all_shards: usize,
    /// The processes whose shares add up to the split.
    pub comm: &'a dyn Collective,
    /// Positive class id of a binary task.
    pub positive: Option<u32>,
    /// Classes of the dataset.
    pub classes: usize,
    /// idf factors in use.
    pub idf: Option<&'a [f32]>,
}

/// Rows, nonzeros and seconds of the training part of an epoch (for the table).
#[derive(Debug, Clone, Copy)]
pub(crate) struct Rate {
    /// Rows trained on in this process.
    pub rows: u64,
    /// Nonzeros trained on in this process.
    pub nnz: u64,
    /// Seconds it took.
    pub seconds: f64,
}

/// The averaged iterates of a task's models after an epoch, and what judging
/// them needs.
pub(crate) struct Iterate<'a> {
    /// `models × dim` averaged weights.
    pub weights: &'a [f32],
    /// One averaged bias per model.
    pub biases: &'a [f32],
    /// λ/2·‖w‖² of the current iterates, summed over models.
    pub regularizer: f64,
    /// The loss trained with.
    pub loss: Loss,
    /// Example weight per class id.
    pub class_weights: &'a [f64],
}

/// After an epoch: refuse a diverged iterate, evaluate the averaged iterate on
/// the validation split, and make the epoch's log row.
pub(crate) fn end_epoch(
    it: &Iterate<'_>,
    valid: &Validation<'_>,
    epoch: u32,
    sums: &EpochSums,
    rate: Rate,
    t0: Instant,
) -> Result<(EpochLog, Option<Evaluation>)> {
    let (w, b, reg) = (it.weights, it.biases, it.regularizer);
    // The optimum has λ/2·‖w‖² ≤ F(0) = mean cᵢ·loss(0) per model; an iterate a
    // thousand times beyond that has left the optimum's region for good.
    let max_c = it.class_weights.iter().copied().fold(1.0, f64::max);
    let bound = 1e3 * b.len() as f64 * max_c * it.loss.value(0.0);
    if !(reg.is_finite() && reg <= bound) || w.iter().chain(b).any(|x| !x.is_finite()) {
        return Err(Error::Invalid(format!(
            "training diverged in epoch {}: the weights grew without bound; lower --eta0 or raise --lambda",
            epoch + 1
        )));
    }
    let eval = (valid.all_shards > 0).then(|| {
        let mut sums = evaluate_sums(
            valid.shards,
            Weights {
                weights: w,
                biases: b,
                dim: w.len() / b.len(),
                idf: valid.idf,
            },
            valid.positive,
            valid.classes,
            it.loss,
        );
        if valid.comm.size() > 1 {
            // Counts below 2^53 travel exactly as f64.
            let mut buf = vec![sums.loss, sums.hinge];
            buf.extend(sums.confusion.iter().flatten().map(|&c| c as f64));
            valid.comm.sum_f64(&mut buf);
            sums.loss = buf[0];
            sums.hinge = buf[1];
            for (c, &x) in sums.confusion.iter_mut().flatten().zip(&buf[2..]) {
                *c = x as u64;
            }
        }
        sums.finish()
    });
    let macro_f1 = eval.as_ref().filter(|_| valid.positive.is_none()).map(|e| {
        let pc = per_class(&e.confusion);
        pc.iter().map(|x| x.2).sum::<f64>() / pc.len() as f64
    });
    let row = EpochLog {
        epoch: epoch + 1,
        objective: reg + sums.loss / sums.rows.max(1) as f64,
        validation_loss: eval.as_ref().map(|e| e.loss),
        validation_accuracy: eval.as_ref().map(|e| e.accuracy),
        validation_macro_f1: macro_f1,
        rows_per_second: rate.rows as f64 / rate.seconds.max(1e-9),
        nnz_per_second: rate.nnz as f64 / rate.seconds.max(1e-9),
        seconds: t0.elapsed().as_secs_f64(),
    };
    Ok((row, eval))
}

/// The model file of a trainer's averaged iterates.
#[allow(clippy::too_many_arguments)]
pub(crate) fn build_model(
    m: &Manifest,
    positive: Option<u32>,
    training: TrainSettings,
    epochs: Vec<EpochLog>,
    (weights, biases): (Vec<f32>, Vec<f32>),
    steps: u64,
    idf: Option<Vec<f32>>,
    sketch: Option<TokenSketch>,
) -> Model {
    let input = m
        .batches
        .last()
        .map(|b| b.input.clone())
        .unwrap_or_else(|| crate::input::InputSpec::tsv(1 << 20));
    let model_labels = match positive {
        Some(p) => vec![m.labels[p as usize].name.clone()],
        None => m.labels.iter().map(|l| l.name.clone()).collect(),
    };
    Model {
        meta: ModelMeta {
            format: "tamis-model".into(),
            written_by: format!("tamis {}", env!("CARGO_PKG_VERSION")),
            features: m.features.clone(),
            input,
            labels: m.labels.iter().map(|l| l.name.clone()).collect(),
            positive: positive.map(|p| m.labels[p as usize].name.clone()),
            model_labels,
            loss: training.solver.loss,
            training,
            epochs,
            dataset_fingerprint: format!("{:016x}", m.fingerprint()),
            steps,
            calibration: None,
        },
        weights,
        biases,
        idf,
        sketch,
    }
}

/// The averaged iterates of all models, flattened.
fn weights_of(models: &[Linear]) -> (Vec<f32>, Vec<f32>) {
    let mut w = Vec::with_capacity(models.len() * models[0].dim());
    let mut b = Vec::with_capacity(models.len());
    for m in models {
        let (mw, mb) = m.averaged();
        w.extend(mw);
        b.push(mb);
    }
    (w, b)
}

fn progress(enabled: bool, total: u64, epoch: u32, of: u32) -> Option<indicatif::ProgressBar> {
    if !enabled || !std::io::stderr().is_terminal() {
        return None;
    }
    let bar = indicatif::ProgressBar::new(total);
    if let Ok(s) = indicatif::ProgressStyle::with_template(&format!(
        "epoch {epoch}/{of} {{bar:30}} {{pos}}/{{len}} rows {{per_sec}} eta {{eta}}"
    )) {
        bar.set_style(s);
    }
    Some(bar)
}
