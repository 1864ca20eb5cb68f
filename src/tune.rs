//! λ and loss selection in one pass over the data.
//!
//! Every combination of the λ values and losses asked for is trained at once:
//! each mini-batch is drawn once, in the same seeded order as `train` uses, and
//! every candidate's models (one per class for one-vs-rest) take their step on
//! it as lanes of one [`Lanes`] solver, whose weights are interleaved so that a
//! row's nonzero fetches the weights of every candidate in one memory access.
//! The shards are swept once per epoch for all candidates. Each candidate
//! follows the trajectory `tamis train` takes with the same settings, up to the
//! order of floating-point sums. After the last epoch every candidate is
//! measured on the validation split and the best by the chosen [`Metric`] is
//! written.

use std::path::PathBuf;
use std::time::Instant;

use serde::Serialize;

use crate::calibrate::Platt;
use crate::checkpoint::EpochSums;
use crate::dataset::{Log, Manifest, ShardEntry, Split};
use crate::error::{Error, Result};
use crate::eval::{per_class, rank, score_shards, Evaluation};
use crate::model::{EpochLog, Model, TrainSettings};
use crate::shard::Shard;
use crate::solver::lanes::Lanes;
use crate::solver::{Loss, SolverConfig, Target};
use crate::train::{self, ClassWeight, Iterate, Rate, Sweep, Validation};

/// How candidates are compared on the validation split.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, clap::ValueEnum)]
#[serde(rename_all = "kebab-case")]
pub enum Metric {
    /// Mean log loss after Platt scaling fitted on the validation split (lower
    /// is better; one-vs-rest: the mean over classes of each class's model
    /// against the rest). Platt scaling puts hinge and logistic candidates on
    /// the same footing: both are judged as calibrated probabilities.
    LogLoss,
    /// Share of validation rows predicted right (higher is better).
    Accuracy,
    /// Mean F1 over classes (higher is better; binary: over both classes).
    MacroF1,
    /// Mean hinge loss of the margins (lower is better); comparable across
    /// losses, since every model's margin is on the same scale.
    HingeLoss,
}

impl Metric {
    /// Name used in tables and JSON.
    pub fn name(self) -> &'static str {
        match self {
            Metric::LogLoss => "log-loss",
            Metric::Accuracy => "accuracy",
            Metric::MacroF1 => "macro-F1",
            Metric::HingeLoss => "hinge-loss",
        }
    }

    /// Whether larger values are better.
    pub fn higher_is_better(self) -> bool {
        !matches!(self, Metric::HingeLoss | Metric::LogLoss)
    }
}

/// Settings of a tuning run.
#[derive(Debug, Clone)]
pub struct TuneOptions {
    /// Dataset folder.
    pub dir: PathBuf,
    /// Where the best model goes.
    pub model: PathBuf,
    /// λ values to try.
    pub lambdas: Vec<f64>,
    /// Losses to try.
    pub losses: Vec<Loss>,
    /// Epochs for every candidate.
    pub epochs: u32,
    /// Rows per step.
    pub batch: usize,
    /// First step size; `None` takes each loss's default (1, and 0.01 for
    /// squared hinge).
    pub eta0: Option<f64>,
    /// Project onto the ball of radius 1/√λ.
    pub project: bool,
    /// Epoch from which iterates are averaged.
    pub average_from: u32,
    /// Seed of the epoch order.
    pub seed: u64,
    /// Example weights.
    pub class_weight: ClassWeight,
    /// Multiply features by idf factors.
    pub idf: bool,
    /// How the best is chosen.
    pub metric: Metric,
    /// Write every candidate's model into this folder too.
    pub keep: Option<PathBuf>,
    /// Threads.
    pub threads: usize,
}

/// One candidate's settings and results.
#[derive(Debug, Clone, Serialize)]
pub struct Candidate {
    /// λ.
    pub lambda: f64,
    /// Loss.
    pub loss: Loss,
    /// Validation log loss after Platt scaling (see [`Metric::LogLoss`]).
    pub log_loss: Option<f64>,
    /// Validation accuracy after the last epoch.
    pub accuracy: Option<f64>,
    /// Validation macro-F1 after the last epoch.
    pub macro_f1: Option<f64>,
    /// Validation hinge loss after the last epoch.
    pub hinge_loss: Option<f64>,
    /// The chosen metric's value.
    pub score: Option<f64>,
    /// Why the candidate dropped out (it diverged), if it did.
    pub failed: Option<String>,
    /// Where its model was written (with `keep`).
    pub model: Option<PathBuf>,
    /// The per-epoch log.
    #[serde(skip)]
    pub epochs: Vec<EpochLog>,
}

/// What `tune` produced.
#[derive(Debug, Clone)]
pub struct TuneReport {
    /// Every candidate, losses outer, λ inner, in the order given.
    pub candidates: Vec<Candidate>,
    /// Index of the best.
    pub best: usize,
    /// The best model (written to the output path).
    pub model: Model,
    /// Seconds in all.
    pub seconds: f64,
    /// Rows and nonzeros of one epoch.
    pub rows_per_epoch: u64,
}

fn eta0_of(loss: Loss, given: Option<f64>) -> f64 {
    given.unwrap_or(match loss {
        Loss::SquaredHinge => 0.01,
        _ => 1.0,
    })
}

/// Train every combination of `opts.lambdas` and `opts.losses` in one pass per
/// epoch and write the best model.
pub fn tune(opts: &TuneOptions, log: Log) -> Result<TuneReport> {
    let start = Instant::now();
    if opts.lambdas.is_empty() || opts.losses.is_empty() {
        return Err(Error::Invalid(
            "give at least one value to --lambdas and to --losses".into(),
        ));
    }
    if opts.epochs == 0 {
        return Err(Error::Invalid("--epochs must be at least 1".into()));
    }
    let mut settings = Vec::new();
    for &loss in &opts.losses {
        for &lambda in &opts.lambdas {
            let solver = SolverConfig {
                lambda,
                loss,
                batch: opts.batch,
                eta0: eta0_of(loss, opts.eta0),
                project: opts.project,
                average_from: opts.average_from,
            };
            solver.validate()?;
            if settings.contains(&solver) {
                return Err(Error::Invalid(format!(
                    "λ = {lambda} with {} loss is asked for twice",
                    loss.name()
                )));
            }
            settings.push(solver);
        }
    }
    let _lock = train::lock_next_to(&opts.model, "model")?;
    let m = Manifest::load(&opts.dir)?;
    crate::dataset::refuse_own_file(&opts.dir, &m, &opts.model, "model")?;
    let positive = train::trainable_task(&m, &opts.dir)?;
    if m.validation_rows() == 0 {
        return Err(Error::Invalid(format!(
            "{}: tune compares candidates on the validation split, and the dataset has none; ingest with --validation above 0",
            opts.dir.display()
        )));
    }
    let (class_weights, rule) = train::class_weights_of(&m, positive, &opts.class_weight)?;
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(opts.threads.max(1))
        .thread_name(|i| format!("tamis-tune-{i}"))
        .build()
        .map_err(|e| Error::Invalid(format!("cannot start threads: {e}")))?;
    pool.install(|| {
        run(
            opts,
            &m,
            positive,
            settings,
            class_weights,
            rule,
            log,
            start,
        )
    })
}

#[allow(clippy::too_many_arguments)]
fn run(
    opts: &TuneOptions,
    m: &Manifest,
    positive: Option<u32>,
    settings: Vec<SolverConfig>,
    class_weights: Vec<f64>,
    rule: String,
    log: Log,
    start: Instant,
) -> Result<TuneReport> {
    let n_labels = m.labels.len() as u32;
    let dim = m.features.buckets() as usize;
    let idf = if opts.idf {
        Some(train::idf_of(&opts.dir, m)?)
    } else {
        None
    };
    let sketch = crate::dataset::sketch::load(&opts.dir, m)?;
    let train_entries: Vec<&ShardEntry> = m.shards_of(Split::Train).collect();
    let valid_entries: Vec<&ShardEntry> = m.shards_of(Split::Validation).collect();
    let shards = train::open_shards(&opts.dir, m, &train_entries, n_labels)?;
    let valid = train::open_shards(&opts.dir, m, &valid_entries, n_labels)?;
    let lens: Vec<usize> = shards.iter().map(|s| s.rows()).collect();
    let list: Vec<usize> = (0..shards.len()).collect();
    let targets: Vec<Target> = match positive {
        Some(p) => vec![Target::Class(p)],
        None => (0..n_labels).map(Target::Class).collect(),
    };
    // Lane c·T + t is candidate c's model of target t.
    let lanes: Vec<(Target, SolverConfig)> = settings
        .iter()
        .flat_map(|cfg| targets.iter().map(move |t| (t.clone(), cfg.clone())))
        .collect();
    let mut lanes = Lanes::new(dim, lanes, class_weights.clone(), idf.clone())?;
    let per = targets.len();
    let k = settings.len();
    let mut logs: Vec<Vec<EpochLog>> = vec![Vec::new(); k];
    let mut failed: Vec<Option<String>> = vec![None; k];
    let mut last_eval: Vec<Option<Evaluation>> = vec![None; k];
    let valid_set = Validation {
        shards: &valid,
        all_shards: valid.len(),
        comm: &crate::distributed::Solo,
        positive,
        classes: n_labels as usize,
        idf: idf.as_deref(),
    };
    log(&format!(
        "{} candidate(s) ({} λ × {} loss(es)) trained together, {} epoch(s)",
        k,
        opts.lambdas.len(),
        opts.losses.len(),
        opts.epochs
    ));
    for epoch in 0..opts.epochs {
        let t0 = Instant::now();
        let average = epoch >= opts.average_from;
        let mut sums = vec![EpochSums::default(); k];
        let sweep = Sweep {
            shards: &shards,
            lens: &lens,
            list: &list,
            seed: opts.seed,
            epoch,
            batch: opts.batch,
        };
        let per_stretch = train::stretch_batches(opts.batch, 1, None, usize::MAX);
        sweep.run((0, 0), per_stretch, |views, stretch| {
            train::each_batch(views, stretch, 0, 1, |view, batch| {
                let tallies = lanes.step(view, batch, average);
                for (c, s) in sums.iter_mut().enumerate() {
                    for t in &tallies[c * per..(c + 1) * per] {
                        s.loss += t.loss;
                    }
                    s.rows += tallies[c * per].rows;
                    s.nnz += tallies[c * per].nnz;
                }
            });
            Ok(true)
        })?;
        let seconds = t0.elapsed().as_secs_f64();
        let mut line = format!("epoch {:>3}", epoch + 1);
        let all = weights_of(&lanes, per);
        for c in 0..k {
            if failed[c].is_some() {
                continue;
            }
            let rate = Rate {
                rows: sums[c].rows,
                nnz: sums[c].nnz,
                seconds,
            };
            let (w, b) = &all[c];
            let it = Iterate {
                weights: w,
                biases: b,
                regularizer: (c * per..(c + 1) * per).map(|l| lanes.regularizer(l)).sum(),
                loss: settings[c].loss,
                class_weights: &class_weights,
            };
            match train::end_epoch(&it, &valid_set, epoch, &sums[c], rate, t0) {
                Ok((row, eval)) => {
                    logs[c].push(row);
                    last_eval[c] = eval;
                }
                Err(e) => {
                    log(&format!(
                        "λ = {} {}: {e}; dropped",
                        settings[c].lambda,
                        settings[c].loss.name()
                    ));
                    failed[c] = Some(e.to_string());
                }
            }
        }
        let rows = sums.iter().map(|s| s.rows).max().unwrap_or(0);
        line.push_str(&format!(
            "  {} rows × {} candidate(s) in {:.2} s",
            crate::util::thousands(rows),
            failed.iter().filter(|f| f.is_none()).count(),
            seconds
        ));
        log(&line);
    }
    // Every surviving candidate's model, then its validation figures.
    let mut all = weights_of(&lanes, per);
    let models: Vec<Option<Model>> = (0..k)
        .map(|c| {
            failed[c].is_none().then(|| {
                let training = TrainSettings {
                    solver: settings[c].clone(),
                    epochs: opts.epochs,
                    seed: opts.seed,
                    class_weights: class_weights.clone(),
                    class_weight_rule: rule.clone(),
                    idf: opts.idf,
                    patience: None,
                    init_from: None,
                    replicas: 1,
                    sync_every: 0,
                    ranks: 1,
                };
                train::build_model(
                    m,
                    positive,
                    training,
                    logs[c].clone(),
                    std::mem::take(&mut all[c]),
                    lanes.t,
                    idf.clone(),
                    sketch.clone(),
                )
            })
        })
        .collect();
    let mut candidates: Vec<Candidate> = settings
        .iter()
        .enumerate()
        .map(|(c, cfg)| {
            let e = last_eval[c].as_ref().filter(|_| failed[c].is_none());
            let macro_f1 = e.map(|e| {
                let pc = per_class(&e.confusion);
                pc.iter().map(|x| x.2).sum::<f64>() / pc.len() as f64
            });
            let accuracy = e.map(|e| e.accuracy);
            let hinge_loss = e.map(|e| e.hinge);
            let log_loss = models[c]
                .as_ref()
                .and_then(|model| platt_log_loss(&valid, model, positive));
            let score = match opts.metric {
                Metric::LogLoss => log_loss,
                Metric::Accuracy => accuracy,
                Metric::MacroF1 => macro_f1,
                Metric::HingeLoss => hinge_loss,
            };
            Candidate {
                lambda: cfg.lambda,
                loss: cfg.loss,
                log_loss,
                accuracy,
                macro_f1,
                hinge_loss,
                score: score.filter(|x| x.is_finite()),
                failed: failed[c].clone(),
                model: None,
                epochs: logs[c].clone(),
            }
        })
        .collect();
    let best = best_of(&candidates, opts.metric).ok_or_else(|| {
        Error::Invalid(
            "no candidate could be measured (all diverged, or the validation split lacks a class); try larger λ values or a smaller --eta0".into(),
        )
    })?;
    let mut models = models;
    let model = models[best].take().expect("the best candidate has a model");
    model.save(&opts.model)?;
    if let Some(dir) = &opts.keep {
        std::fs::create_dir_all(dir).map_err(|cause| Error::Io {
            path: dir.clone(),
            cause,
        })?;
        for (c, cand) in candidates.iter_mut().enumerate() {
            let path = dir.join(candidate_file(cand));
            if c == best {
                model.save(&path)?;
            } else if let Some(mc) = &models[c] {
                mc.save(&path)?;
            } else {
                continue;
            }
            cand.model = Some(path);
        }
    }
    Ok(TuneReport {
        candidates,
        best,
        model,
        seconds: start.elapsed().as_secs_f64(),
        rows_per_epoch: m.train_rows(),
    })
}

/// The validation log loss of `model` after Platt scaling fitted on the same
/// scores (Platt 1999, in the form of Lin, Lin and Weng 2007), averaged over its
/// models; `None` when a model's rows lack a class.
fn platt_log_loss(valid: &[Shard], model: &Model, positive: Option<u32>) -> Option<f64> {
    let scored = score_shards(valid, model, positive);
    let mut sum = 0.0;
    for k in 0..scored.models {
        let (f, y) = scored.one_vs_rest(k);
        let platt = Platt::fit(&f, &y)?;
        let p: Vec<f64> = f.iter().map(|&x| platt.probability(x)).collect();
        sum += rank::log_loss(&p, &y)?;
    }
    Some(sum / scored.models as f64)
}

/// Every candidate's averaged weights and biases (each `per` lanes, in order).
fn weights_of(lanes: &Lanes, per: usize) -> Vec<(Vec<f32>, Vec<f32>)> {
    let mut out = Vec::new();
    let mut all = lanes.averaged().into_iter();
    while all.len() > 0 {
        let mut w = Vec::new();
        let mut b = Vec::with_capacity(per);
        for (lw, lb) in all.by_ref().take(per) {
            w.extend(lw);
            b.push(lb);
        }
        out.push((w, b));
    }
    out
}

/// File name of a kept candidate model: `LOSS-lambda-VALUE.tmm`.
pub fn candidate_file(c: &Candidate) -> String {
    format!("{}-lambda-{:e}.tmm", c.loss.name(), c.lambda)
}

/// The index of the best candidate: the best score; ties go to the larger λ
/// (the simpler model), then to the earlier candidate.
pub fn best_of(candidates: &[Candidate], metric: Metric) -> Option<usize> {
    let mut best: Option<usize> = None;
    for (i, c) in candidates.iter().enumerate() {
        let Some(x) = c.score else { continue };
        best = match best {
            None => Some(i),
            Some(b) => {
                let y = candidates[b].score.expect("best has a score");
                let better = if metric.higher_is_better() {
                    x > y
                } else {
                    x < y
                };
                if better || (x == y && c.lambda > candidates[b].lambda) {
                    Some(i)
                } else {
                    Some(b)
                }
            }
        };
    }
    best
}

#[cfg(test)]
mod tests {
    use super::*;

    fn cand(lambda: f64, score: Option<f64>) -> Candidate {
        Candidate {
            lambda,
            loss: Loss::Hinge,
            log_loss: score,
            accuracy: score,
            macro_f1: score,
            hinge_loss: score,
            score,
            failed: None,
            model: None,
            epochs: vec![],
        }
    }

    #[test]
    fn best_by_direction_and_ties_to_larger_lambda() {
        let c = vec![
            cand(1e-4, Some(0.9)),
            cand(1e-5, Some(0.95)),
            cand(1e-6, None),
            cand(1e-3, Some(0.95)),
        ];
        assert_eq!(best_of(&c, Metric::Accuracy), Some(3));
        assert_eq!(best_of(&c, Metric::HingeLoss), Some(0));
        assert_eq!(best_of(&c, Metric::LogLoss), Some(0));
        assert_eq!(best_of(&[cand(1.0, None)], Metric::Accuracy), None);
    }
}
