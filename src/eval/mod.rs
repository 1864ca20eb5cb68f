//! Evaluation: metrics of fixed weights on shards or on scored raw text.
//!
//! [`evaluate`] streams over shards (the per-epoch validation of training);
//! [`score_shards`] keeps every row's scores ([`ScoredRows`]) for the ranking
//! metrics of [`rank`], calibration and the report; [`metrics`] computes what
//! `tamis eval` prints from them.

pub mod rank;

use std::path::Path;

use rayon::prelude::*;

use crate::dataset::{self, Manifest, Split};
use crate::error::{Error, Result};
use crate::model::{Decision, Model};
use crate::shard::Shard;
use crate::solver::Loss;

/// Validation figures of fixed weights.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Evaluation {
    /// Rows.
    pub rows: u64,
    /// Mean loss (summed over models for one-vs-rest).
    pub loss: f64,
    /// Mean hinge loss of the margins (summed over models for one-vs-rest).
    pub hinge: f64,
    /// Accuracy.
    pub accuracy: f64,
    /// Confusion counts `[true][predicted]` over class ids (binary: 0 negative, 1 positive).
    pub confusion: Vec<Vec<u64>>,
}

/// Fixed weights of all models, for evaluation.
#[derive(Debug, Clone, Copy)]
pub struct Weights<'a> {
    /// `models × dim` weights.
    pub weights: &'a [f32],
    /// One bias per model.
    pub biases: &'a [f32],
    /// Feature dimension.
    pub dim: usize,
    /// idf factors, if used.
    pub idf: Option<&'a [f32]>,
}

/// A shard cut into pieces of 4096 rows `(shard, first row, end)`, the unit of
/// parallel work of evaluation.
fn pieces(s: &Shard) -> impl Iterator<Item = (&Shard, usize, usize)> {
    let n = s.rows();
    let step = 4096;
    (0..n.div_ceil(step)).map(move |c| (s, c * step, ((c + 1) * step).min(n)))
}

/// Evaluate weights on shards: binary if `positive` is set.
pub fn evaluate(
    shards: &[Shard],
    w: Weights<'_>,
    positive: Option<u32>,
    classes: usize,
    loss: crate::solver::Loss,
) -> Evaluation {
    evaluate_sums(shards, w, positive, classes, loss).finish()
}

/// What [`evaluate`] adds up over rows, before the means: parts of a split
/// evaluated apart (by the ranks of a distributed run) add up to the whole.
#[derive(Debug, Clone, PartialEq)]
pub struct EvalSums {
    /// Sum of the loss (over models for one-vs-rest).
    pub loss: f64,
    /// Sum of the hinge loss of the margins.
    pub hinge: f64,
    /// Confusion counts `[true][predicted]`.
    pub confusion: Vec<Vec<u64>>,
}

impl EvalSums {
    /// The means and the accuracy.
    pub fn finish(self) -> Evaluation {
        let conf = self.confusion;
        let k = conf.len();
        let rows: u64 = conf.iter().flatten().sum();
        let correct: u64 = (0..k).map(|i| conf[i][i]).sum();
        Evaluation {
            rows,
            loss: self.loss / rows.max(1) as f64,
            hinge: self.hinge / rows.max(1) as f64,
            accuracy: correct as f64 / rows.max(1) as f64,
            confusion: conf,
        }
    }
}

/// The sums of [`evaluate`], for [`EvalSums::finish`].
pub fn evaluate_sums(
    shards: &[Shard],
    w: Weights<'_>,
    positive: Option<u32>,
    classes: usize,
    loss: crate::solver::Loss,
) -> EvalSums {
    let Weights {
        weights,
        biases,
        dim,
        idf,
    } = w;
    let k = if positive.is_some() { 2 } else { classes };
    let parts: Vec<(f64, f64, Vec<Vec<u64>>)> = shards
        .par_iter()
        .flat_map_iter(pieces)
        .map(|(s, a, b)| {
            let mut conf = vec![vec![0u64; k]; k];
            let mut l = 0.0;
            let mut h = 0.0;
            let mut out = Vec::new();
            for i in a..b {
                let x = s.row(i);
                crate::solver::scores(weights, biases, dim, &x, idf, &mut out);
                match positive {
                    Some(p) => {
                        let y = if x.label == p { 1.0 } else { -1.0 };
                        l += loss.value(y * out[0]);
                        h += Loss::Hinge.value(y * out[0]);
                        let t = (x.label == p) as usize;
                        let pred = (out[0] > 0.0) as usize;
                        conf[t][pred] += 1;
                    }
                    None => {
                        let mut best = 0;
                        for (c, &sc) in out.iter().enumerate() {
                            let y = if x.label as usize == c { 1.0 } else { -1.0 };
                            l += loss.value(y * sc);
                            h += Loss::Hinge.value(y * sc);
                            if sc > out[best] {
                                best = c;
                            }
                        }
                        let t = (x.label as usize).min(k - 1);
                        conf[t][best] += 1;
                    }
                }
            }
            (l, h, conf)
        })
        .collect();
    let mut conf = vec![vec![0u64; k]; k];
    let mut l = 0.0;
    let mut hinge = 0.0;
    for (pl, ph, pc) in parts {
        l += pl;
        hinge += ph;
        for (a, b) in conf.iter_mut().zip(pc) {
            for (x, y) in a.iter_mut().zip(b) {
                *x += y;
            }
        }
    }
    EvalSums {
        loss: l,
        hinge,
        confusion: conf,
    }
}

/// Per-class precision, recall and F1 from a confusion matrix.
pub fn per_class(conf: &[Vec<u64>]) -> Vec<(f64, f64, f64)> {
    per_class_with_undecided(conf, &vec![0; conf.len()])
}

/// Precision, recall and F1 of one class.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct ClassMetrics {
    /// Label.
    pub label: String,
    /// Precision.
    pub precision: f64,
    /// Recall.
    pub recall: f64,
    /// F1.
    pub f1: f64,
    /// Rows whose true class this is.
    pub support: u64,
}

/// The metrics `tamis eval` reports.
///
/// Decisions (confusion, accuracy, precision, recall, false-positive rate)
/// follow [`Model::decide`]: the stored thresholds when the model was
/// calibrated with a target, else margin 0 (binary) or the highest score.
/// For one-vs-rest models the threshold-free figures (ROC AUC, average
/// precision, log loss, Brier score, calibration error) are the means over the
/// classes of each class's model against the rest (classes without both
/// positive and negative rows left out), and precision, recall and
/// false-positive rate are the means of the per-class figures.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Metrics {
    /// Rows evaluated.
    pub rows: u64,
    /// Records that could not be evaluated (bad lines, unknown labels).
    pub skipped: u64,
    /// Share of rows predicted right.
    pub accuracy: f64,
    /// Mean F1 over classes.
    pub macro_f1: f64,
    /// Per class.
    pub per_class: Vec<ClassMetrics>,
    /// Class names of the confusion matrix rows (truth) and columns (prediction).
    pub confusion_labels: Vec<String>,
    /// Confusion counts `[truth][prediction]` of the decided rows.
    pub confusion: Vec<Vec<u64>>,
    /// Rows of each true class that no class claimed (one-vs-rest with
    /// thresholds; zeros otherwise).
    pub undecided: Vec<u64>,
    /// Mean hinge loss of the margins (summed over models for one-vs-rest).
    pub hinge_loss: f64,
    /// Mean log loss in nats of the model's probabilities; `null` for a model
    /// without probabilities (hinge losses, not calibrated).
    pub log_loss: Option<f64>,
    /// Mean squared error of the probabilities; `null` without probabilities.
    pub brier: Option<f64>,
    /// Expected calibration error (10 equal-width bins); `null` without probabilities.
    pub expected_calibration_error: Option<f64>,
    /// Area under the ROC curve; `null` when a class is missing.
    pub roc_auc: Option<f64>,
    /// Average precision (area under the precision–recall step curve).
    pub average_precision: Option<f64>,
    /// Precision of the positive class at the model's decisions.
    pub precision: f64,
    /// Recall of the positive class at the model's decisions.
    pub recall: f64,
    /// False-positive rate of the positive class at the model's decisions.
    pub false_positive_rate: f64,
    /// The stored thresholds, one per model; `null` when none is stored, and
    /// `null` in place of a class's threshold when a partial calibration left
    /// that class without one (it then competes by its score alone).
    pub thresholds: Option<Vec<Option<f64>>>,
}

/// Scores of every model for every row of a split, with the truth: all that
/// the ranking metrics, calibration and the report need, 8 bytes per row and
/// model plus 4 per row. Feature rows are not kept.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct ScoredRows {
    /// Models (1 binary, else one per class).
    pub models: usize,
    /// Row-major, `rows × models`.
    pub scores: Vec<f64>,
    /// The true class of each row: binary 1 positive, 0 negative; one-vs-rest
    /// the class's model.
    pub truth: Vec<u32>,
}

impl ScoredRows {
    /// Empty, for `models` models.
    pub fn new(models: usize) -> Self {
        ScoredRows {
            models,
            scores: Vec::new(),
            truth: Vec::new(),
        }
    }

    /// Rows.
    pub fn rows(&self) -> usize {
        self.truth.len()
    }

    /// Add a row.
    pub fn push(&mut self, scores: &[f64], truth: u32) {
        debug_assert_eq!(scores.len(), self.models);
        self.scores.extend_from_slice(scores);
        self.truth.push(truth);
    }

    /// The scores of row `i`.
    pub fn row(&self, i: usize) -> &[f64] {
        &self.scores[i * self.models..(i + 1) * self.models]
    }

    /// The first row with a score that is not finite (a value so large that
    /// `w·x` overflowed), if any: such rows have no rank and no probability.
    pub fn first_non_finite(&self) -> Option<usize> {
        self.scores
            .iter()
            .position(|x| !x.is_finite())
            .map(|i| i / self.models.max(1))
    }

    /// Model `m`'s scores and whether each row is its class (binary: the
    /// positive class), one-vs-rest.
    pub fn one_vs_rest(&self, m: usize) -> (Vec<f64>, Vec<bool>) {
        let binary = self.models == 1;
        let s = self
            .scores
            .iter()
            .skip(m)
            .step_by(self.models)
            .copied()
            .collect();
        let y = self
            .truth
            .iter()
            .map(|&t| if binary { t == 1 } else { t as usize == m })
            .collect();
        (s, y)
    }
}

/// Score every row of `shards` with `model`: binary if `positive` (the
/// positive class id) is set. Order: shards in the order given, rows in order.
pub fn score_shards(shards: &[Shard], model: &Model, positive: Option<u32>) -> ScoredRows {
    let scorer = model.scorer();
    let parts: Vec<ScoredRows> = shards
        .par_iter()
        .flat_map_iter(pieces)
        .map(|(s, a, b)| {
            let mut part = ScoredRows::new(model.models());
            let mut out = Vec::new();
            for i in a..b {
                let x = s.row(i);
                scorer.scores(&x, &mut out);
                let t = match positive {
                    Some(p) => (x.label == p) as u32,
                    None => x.label,
                };
                part.push(&out, t);
            }
            part
        })
        .collect();
    let mut all = ScoredRows::new(model.models());
    all.scores
        .reserve(parts.iter().map(|p| p.scores.len()).sum());
    all.truth.reserve(parts.iter().map(|p| p.truth.len()).sum());
    for p in parts {
        all.scores.extend_from_slice(&p.scores);
        all.truth.extend_from_slice(&p.truth);
    }
    all
}

/// Open the shards of `splits` of the dataset in `dir` for evaluating `model`,
/// checking that the dataset was hashed with the model's settings and that its
/// labels start with the model's. Returns the shards (fully verified) and the
/// positive class id of a binary model.
pub fn open_for(model: &Model, dir: &Path, splits: &[Split]) -> Result<(Vec<Shard>, Option<u32>)> {
    let m = Manifest::load(dir)?;
    let mismatch = |what: String| Error::Mismatch {
        path: dir.to_path_buf(),
        what,
    };
    if m.features != model.meta.features {
        return Err(mismatch(
            "the dataset's tokenizing and hashing settings differ from the model's; score raw text instead, or ingest with the model's settings".into(),
        ));
    }
    let names: Vec<String> = m.labels.iter().map(|l| l.name.clone()).collect();
    if names.len() < model.meta.labels.len()
        || names[..model.meta.labels.len()] != model.meta.labels[..]
    {
        return Err(mismatch(format!(
            "the dataset's labels do not start with the model's labels {:?}",
            model.meta.labels
        )));
    }
    let positive = match &model.meta.positive {
        Some(p) => names.iter().position(|n| n == p).map(|i| i as u32),
        None => {
            if names.len() > model.meta.labels.len() {
                return Err(mismatch(format!(
                    "the dataset has labels the model does not know: {:?}",
                    &names[model.meta.labels.len()..]
                )));
            }
            None
        }
    };
    let mut shards = Vec::new();
    for s in splits {
        for e in m.shards_of(*s) {
            let sh = dataset::open_shard(dir, &m, e)?;
            sh.verify(Some(names.len() as u32))?;
            shards.push(sh);
        }
    }
    Ok((shards, positive))
}

/// Probability figures of one model against the rest: log loss, Brier score,
/// expected calibration error.
fn probability_metrics(model: &Model, m: usize, s: &[f64], y: &[bool]) -> Option<(f64, f64, f64)> {
    let logits: Vec<f64> = s
        .iter()
        .map(|&x| model.logit(m, x))
        .collect::<Option<_>>()?;
    let p: Vec<f64> = logits.iter().map(|&z| rank::sigmoid(z)).collect();
    let ll = rank::mean_log_loss_of_logits(&logits, y)?;
    Some((
        ll,
        rank::brier(&p, y)?,
        rank::expected_calibration_error(&p, y)?,
    ))
}

fn mean_of(v: impl Iterator<Item = Option<f64>>) -> Option<f64> {
    let xs: Vec<f64> = v.flatten().collect();
    (!xs.is_empty()).then(|| xs.iter().sum::<f64>() / xs.len() as f64)
}

/// The metrics of `model` on scored rows; `labels` name the decided classes
/// ([`crate::score::decision_labels`]).
pub fn metrics(model: &Model, rows: &ScoredRows, labels: &[String], skipped: u64) -> Metrics {
    let k = labels.len();
    let mut conf = vec![vec![0u64; k]; k];
    let mut undecided = vec![0u64; k];
    let mut hinge = 0.0;
    for i in 0..rows.rows() {
        let sc = rows.row(i);
        let t = (rows.truth[i] as usize).min(k - 1);
        match model.decide(sc) {
            Decision::Class(c) => conf[t][c] += 1,
            Decision::Undecided => undecided[t] += 1,
        }
        for (m, &x) in sc.iter().enumerate() {
            let y = if rows.models == 1 {
                if t == 1 {
                    1.0
                } else {
                    -1.0
                }
            } else if t == m {
                1.0
            } else {
                -1.0
            };
            hinge += Loss::Hinge.value(y * x);
        }
    }
    let n = rows.rows() as u64;
    let pc = per_class_with_undecided(&conf, &undecided);
    let per_class: Vec<ClassMetrics> = pc
        .iter()
        .enumerate()
        .map(|(c, &(p, r, f))| ClassMetrics {
            label: labels.get(c).cloned().unwrap_or_default(),
            precision: p,
            recall: r,
            f1: f,
            support: conf[c].iter().sum::<u64>() + undecided[c],
        })
        .collect();
    // One-vs-rest figures per model.
    let mut auc = Vec::new();
    let mut ap = Vec::new();
    let mut prob = Vec::new();
    for m in 0..rows.models {
        let (s, y) = rows.one_vs_rest(m);
        let r = rank::Ranking::new(&s, &y);
        let both = r.positives > 0 && r.negatives > 0;
        auc.push(r.roc_auc());
        ap.push(if both { r.average_precision() } else { None });
        prob.push(if both || rows.models == 1 {
            probability_metrics(model, m, &s, &y)
        } else {
            None
        });
    }
    // Decision figures: binary the positive class; one-vs-rest the means.
    let fpr_of = |c: usize| -> f64 {
        let fp: u64 = (0..k).filter(|&t| t != c).map(|t| conf[t][c]).sum();
        let neg: u64 = (0..k)
            .filter(|&t| t != c)
            .map(|t| conf[t].iter().sum::<u64>() + undecided[t])
            .sum();
        if neg > 0 {
            fp as f64 / neg as f64
        } else {
            0.0
        }
    };
    let (precision, recall, fpr) = if model.is_binary() {
        (pc[1].0, pc[1].1, fpr_of(1))
    } else {
        let kf = k.max(1) as f64;
        (
            pc.iter().map(|x| x.0).sum::<f64>() / kf,
            pc.iter().map(|x| x.1).sum::<f64>() / kf,
            (0..k).map(fpr_of).sum::<f64>() / kf,
        )
    };
    let correct: u64 = (0..k).map(|i| conf[i][i]).sum();
    Metrics {
        rows: n,
        skipped,
        accuracy: correct as f64 / n.max(1) as f64,
        macro_f1: per_class.iter().map(|c| c.f1).sum::<f64>() / per_class.len().max(1) as f64,
        per_class,
        confusion_labels: labels.to_vec(),
        confusion: conf,
        undecided,
        hinge_loss: hinge / n.max(1) as f64,
        log_loss: mean_of(prob.iter().map(|p| p.map(|x| x.0))),
        brier: mean_of(prob.iter().map(|p| p.map(|x| x.1))),
        expected_calibration_error: mean_of(prob.iter().map(|p| p.map(|x| x.2))),
        roc_auc: mean_of(auc.into_iter()),
        average_precision: mean_of(ap.into_iter()),
        precision,
        recall,
        false_positive_rate: fpr,
        thresholds: model
            .thresholds()
            .map(|t| (0..t.len()).map(|m| model.threshold_of(m)).collect()),
    }
}

/// Per-class precision, recall and F1 when some rows of each true class were
/// left undecided (they count as misses for recall).
fn per_class_with_undecided(conf: &[Vec<u64>], undecided: &[u64]) -> Vec<(f64, f64, f64)> {
    let k = conf.len();
    (0..k)
        .map(|c| {
            let tp = conf[c][c] as f64;
            let predicted: f64 = (0..k).map(|t| conf[t][c] as f64).sum();
            let actual: f64 = conf[c].iter().map(|&x| x as f64).sum::<f64>() + undecided[c] as f64;
            let p = if predicted > 0.0 { tp / predicted } else { 0.0 };
            let r = if actual > 0.0 { tp / actual } else { 0.0 };
            let f = if p + r > 0.0 {
                2.0 * p * r / (p + r)
            } else {
                0.0
            };
            (p, r, f)
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    // A hand-checkable example: 3 classes, truth rows, predicted columns.
    // Class 0: tp 5, predicted 5+1=6, actual 5+2=7 → P 5/6, R 5/7.
    #[test]
    fn per_class_by_hand() {
        let conf = vec![vec![5, 2, 0], vec![1, 3, 1], vec![0, 0, 4]];
        let f = |p: f64, r: f64| 2.0 * p * r / (p + r);
        let want = [
            (5.0 / 6.0, 5.0 / 7.0),
            (3.0 / 5.0, 3.0 / 5.0),
            (4.0 / 5.0, 1.0),
        ];
        let got = per_class(&conf);
        for (c, (p, r)) in want.iter().enumerate() {
            assert!((got[c].0 - p).abs() < 1e-12);
            assert!((got[c].1 - r).abs() < 1e-12);
            assert!((got[c].2 - f(*p, *r)).abs() < 1e-12);
        }
        // Two undecided rows of class 2: its recall drops to 4/6.
        let got = per_class_with_undecided(&conf, &[0, 0, 2]);
        assert!((got[2].1 - 4.0 / 6.0).abs() < 1e-12);
        assert!((got[2].0 - 4.0 / 5.0).abs() < 1e-12);
    }

    #[test]
    fn scored_rows_one_vs_rest() {
        let mut r = ScoredRows::new(3);
        r.push(&[0.5, 2.0, -1.0], 1);
        r.push(&[0.1, 0.2, 0.3], 0);
        assert_eq!(r.rows(), 2);
        assert_eq!(r.row(1), &[0.1, 0.2, 0.3]);
        assert_eq!(r.one_vs_rest(1), (vec![2.0, 0.2], vec![true, false]));
        let mut b = ScoredRows::new(1);
        b.push(&[1.0], 1);
        b.push(&[-1.0], 0);
        assert_eq!(b.one_vs_rest(0), (vec![1.0, -1.0], vec![true, false]));
    }
}
