//! The training driver: dataset → solver → model.
//!
//! Opens the dataset's shards through memory maps (checking each shard's
//! checksums and structure once, before its first use), runs the solver for the
//! requested epochs in the order of [`crate::solver::order`], evaluates the
//! averaged iterate on the validation split after each epoch, and writes the
//! model atomically.

use std::io::IsTerminal;
use std::path::{Path, PathBuf};
use std::time::Instant;

use crate::dataset::{self, docfreq::DocFreq, Log, Manifest, Split};
use crate::error::{Error, Result};
use crate::eval::{evaluate, per_class, Weights};
use crate::model::{EpochLog, Model, ModelMeta, TrainSettings};
use crate::shard::Shard;
use crate::solver::order::{self, Group, Interleave};
use crate::solver::{Linear, Rows, SolverConfig, Target, Trainer};
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
    /// Threads.
    pub threads: usize,
    /// Draw a progress bar on a terminal.
    pub progress: bool,
}

/// What `train` produced.
#[derive(Debug, Clone)]
pub struct TrainReport {
    /// The model written.
    pub model: Model,
    /// Seconds in all.
    pub seconds: f64,
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

/// idf factor per bucket from the dataset's document frequencies:
/// `ln((1 + N)/(1 + df)) + 1` (the smoothed form, common practice).
pub fn idf_of(dir: &Path, m: &Manifest) -> Result<Vec<f32>> {
    let d = m.features.buckets() as usize;
    let mut df = vec![0u64; d];
    let mut n = 0u64;
    for e in &m.doc_freq {
        let f = DocFreq::open(&dataset::file_in(dir, &e.file), true)?;
        n += f.rows();
        for (a, &b) in df.iter_mut().zip(f.counts()?) {
            *a += b as u64;
        }
    }
    Ok(df
        .iter()
        .map(|&c| (((1 + n) as f64 / (1 + c) as f64).ln() + 1.0) as f32)
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

fn open_split(dir: &Path, m: &Manifest, split: Split, n_labels: u32) -> Result<Vec<Shard>> {
    m.shards_of(split)
        .map(|e| {
            let s = dataset::open_shard(dir, e)?;
            if s.cols() != m.features.buckets() {
                return Err(Error::Mismatch {
                    path: s.path().to_path_buf(),
                    what: "shard width differs from the dataset's buckets".into(),
                });
            }
            s.verify(Some(n_labels))?;
            Ok(s)
        })
        .collect()
}

/// Train a model on the dataset in `opts.dir` and write it to `opts.model`.
pub fn train(opts: &TrainOptions, log: Log) -> Result<TrainReport> {
    let start = Instant::now();
    if opts.epochs == 0 {
        return Err(Error::Invalid("--epochs must be at least 1".into()));
    }
    opts.solver.validate()?;
    let m = Manifest::load(&opts.dir)?;
    let positive = task_of(&m)?;
    let n_train = m.train_rows();
    if n_train == 0 {
        return Err(Error::Invalid(format!(
            "{}: the dataset has no training rows",
            opts.dir.display()
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
    // Example weights per class id.
    let (class_weights, rule) = match &opts.class_weight {
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
            let rule = list
                .iter()
                .map(|(l, x)| format!("{l}={x}"))
                .collect::<Vec<_>>()
                .join(",");
            (w, rule)
        }
    };
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(opts.threads.max(1))
        .thread_name(|i| format!("tamis-train-{i}"))
        .build()
        .map_err(|e| Error::Invalid(format!("cannot start threads: {e}")))?;
    pool.install(|| run(opts, &m, positive, class_weights, rule, log, start))
}

#[allow(clippy::too_many_arguments)]
fn run(
    opts: &TrainOptions,
    m: &Manifest,
    positive: Option<u32>,
    class_weights: Vec<f64>,
    rule: String,
    log: Log,
    start: Instant,
) -> Result<TrainReport> {
    let n_labels = m.labels.len() as u32;
    let dim = m.features.buckets() as usize;
    let idf = if opts.idf {
        Some(idf_of(&opts.dir, m)?)
    } else {
        None
    };
    let train = open_split(&opts.dir, m, Split::Train, n_labels)?;
    let valid = open_split(&opts.dir, m, Split::Validation, n_labels)?;
    let targets: Vec<Target> = match positive {
        Some(p) => vec![Target::Class(p)],
        None => (0..n_labels).map(Target::Class).collect(),
    };
    let model_labels: Vec<String> = match positive {
        Some(p) => vec![m.labels[p as usize].name.clone()],
        None => m.labels.iter().map(|l| l.name.clone()).collect(),
    };
    let mut trainer = Trainer::new(
        dim,
        targets,
        class_weights.clone(),
        opts.solver.clone(),
        idf.clone(),
    )?;
    let lens: Vec<usize> = train.iter().map(|s| s.rows()).collect();
    let mut epochs: Vec<EpochLog> = Vec::new();
    let mut best_loss = f64::INFINITY;
    let mut since_best = 0u32;
    log(EPOCH_HEADER);
    let mut batch = Vec::with_capacity(opts.solver.batch);
    for epoch in 0..opts.epochs {
        let t0 = Instant::now();
        let average = epoch >= opts.solver.average_from;
        let bar = progress(opts.progress, m.train_rows(), epoch + 1, opts.epochs);
        let mut loss_sum = 0.0;
        let (mut rows, mut nnz) = (0u64, 0u64);
        for (gi, group) in order::groups(train.len(), opts.seed, epoch)
            .iter()
            .enumerate()
        {
            let view = Group::new(group.iter().map(|&i| &train[i]).collect());
            let glens: Vec<usize> = group.iter().map(|&i| lens[i]).collect();
            let mut inter = Interleave::new(&glens, opts.seed, epoch, gi);
            while inter.remaining() > 0 {
                inter.next_batch(opts.solver.batch, &mut batch);
                let t = trainer.step(&view, &batch, average);
                loss_sum += t.loss;
                rows += t.rows;
                nnz += t.nnz;
                if let Some(b) = &bar {
                    b.inc(t.rows);
                }
            }
            debug_assert!(view.len() as u64 >= inter.taken());
        }
        if let Some(b) = bar {
            b.finish_and_clear();
        }
        let train_secs = t0.elapsed().as_secs_f64();
        let (w, b) = weights_of(&trainer.models);
        // The optimum has λ/2·‖w‖² ≤ F(0) = mean cᵢ·loss(0) per model; an iterate
        // a thousand times beyond that has left the optimum's region for good.
        let max_c = class_weights.iter().copied().fold(1.0, f64::max);
        let bound = 1e3 * trainer.models.len() as f64 * max_c * opts.solver.loss.value(0.0);
        let reg = trainer.regularizer();
        if !(reg.is_finite() && reg <= bound) || w.iter().chain(&b).any(|x| !x.is_finite()) {
            return Err(Error::Invalid(format!(
                "training diverged in epoch {}: the weights grew without bound; lower --eta0 or raise --lambda",
                epoch + 1
            )));
        }
        let eval = (!valid.is_empty()).then(|| {
            evaluate(
                &valid,
                Weights {
                    weights: &w,
                    biases: &b,
                    dim,
                    idf: idf.as_deref(),
                },
                positive,
                n_labels as usize,
                opts.solver.loss,
            )
        });
        let macro_f1 = eval.as_ref().filter(|_| positive.is_none()).map(|e| {
            let pc = per_class(&e.confusion);
            pc.iter().map(|x| x.2).sum::<f64>() / pc.len() as f64
        });
        let row = EpochLog {
            epoch: epoch + 1,
            objective: trainer.regularizer() + loss_sum / rows.max(1) as f64,
            validation_loss: eval.as_ref().map(|e| e.loss),
            validation_accuracy: eval.as_ref().map(|e| e.accuracy),
            validation_macro_f1: macro_f1,
            rows_per_second: rows as f64 / train_secs.max(1e-9),
            nnz_per_second: nnz as f64 / train_secs.max(1e-9),
            seconds: t0.elapsed().as_secs_f64(),
        };
        log(&epoch_line(&row));
        epochs.push(row);
        if let (Some(p), Some(e)) = (opts.patience, &eval) {
            if e.loss < best_loss - 1e-12 {
                best_loss = e.loss;
                since_best = 0;
            } else {
                since_best += 1;
                if since_best >= p {
                    log(&format!(
                        "stopping early: validation loss has not improved for {p} epoch(s)"
                    ));
                    break;
                }
            }
        }
    }
    let (weights, biases) = weights_of(&trainer.models);
    let last_input = m
        .batches
        .last()
        .map(|b| b.input.clone())
        .unwrap_or_else(|| crate::input::InputSpec::tsv(1 << 20));
    let model = Model {
        meta: ModelMeta {
            format: "tamis-model".into(),
            written_by: format!("tamis {}", env!("CARGO_PKG_VERSION")),
            features: m.features.clone(),
            input: last_input,
            labels: m.labels.iter().map(|l| l.name.clone()).collect(),
            positive: positive.map(|p| m.labels[p as usize].name.clone()),
            model_labels,
            loss: opts.solver.loss,
            training: TrainSettings {
                solver: opts.solver.clone(),
                epochs: opts.epochs,
                seed: opts.seed,
                class_weights,
                class_weight_rule: rule,
                idf: opts.idf,
                patience: opts.patience,
            },
            epochs,
            dataset_fingerprint: format!("{:016x}", m.fingerprint()),
            calibration: None,
        },
        weights,
        biases,
        idf,
    };
    model.save(&opts.model)?;
    Ok(TrainReport {
        model,
        seconds: start.elapsed().as_secs_f64(),
    })
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
