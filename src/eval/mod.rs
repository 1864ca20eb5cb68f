//! Evaluation: metrics of fixed weights on shards or on scored raw text.

use rayon::prelude::*;

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

/// Evaluate weights on shards: binary if `positive` is set.
pub fn evaluate(
    shards: &[Shard],
    w: Weights<'_>,
    positive: Option<u32>,
    classes: usize,
    loss: crate::solver::Loss,
) -> Evaluation {
    let Weights {
        weights,
        biases,
        dim,
        idf,
    } = w;
    let k = if positive.is_some() { 2 } else { classes };
    let parts: Vec<(f64, f64, Vec<Vec<u64>>)> = shards
        .par_iter()
        .flat_map_iter(|s| {
            let n = s.rows();
            let step = 4096;
            (0..n.div_ceil(step)).map(move |c| (s, c * step, ((c + 1) * step).min(n)))
        })
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
    let rows: u64 = conf.iter().flatten().sum();
    let correct: u64 = (0..k).map(|i| conf[i][i]).sum();
    Evaluation {
        rows,
        loss: l / rows.max(1) as f64,
        hinge: hinge / rows.max(1) as f64,
        accuracy: correct as f64 / rows.max(1) as f64,
        confusion: conf,
    }
}

/// Per-class precision, recall and F1 from a confusion matrix.
pub fn per_class(conf: &[Vec<u64>]) -> Vec<(f64, f64, f64)> {
    let k = conf.len();
    (0..k)
        .map(|c| {
            let tp = conf[c][c] as f64;
            let predicted: f64 = (0..k).map(|t| conf[t][c] as f64).sum();
            let actual: f64 = conf[c].iter().map(|&x| x as f64).sum();
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
    /// Confusion counts `[truth][prediction]`.
    pub confusion: Vec<Vec<u64>>,
    /// Mean hinge loss of the margins (summed over models for one-vs-rest).
    pub hinge_loss: f64,
    /// Mean log loss in nats, for a binary logistic model; `null` otherwise.
    pub log_loss: Option<f64>,
}

/// Metrics from an [`Evaluation`]; `labels` name the confusion matrix's classes.
pub fn metrics(
    ev: &Evaluation,
    labels: &[String],
    loss: Loss,
    binary: bool,
    skipped: u64,
) -> Metrics {
    let pc = per_class(&ev.confusion);
    let per_class: Vec<ClassMetrics> = pc
        .iter()
        .enumerate()
        .map(|(c, &(p, r, f))| ClassMetrics {
            label: labels.get(c).cloned().unwrap_or_default(),
            precision: p,
            recall: r,
            f1: f,
            support: ev.confusion[c].iter().sum(),
        })
        .collect();
    Metrics {
        rows: ev.rows,
        skipped,
        accuracy: ev.accuracy,
        macro_f1: per_class.iter().map(|c| c.f1).sum::<f64>() / per_class.len().max(1) as f64,
        per_class,
        confusion_labels: labels.to_vec(),
        confusion: ev.confusion.clone(),
        hinge_loss: ev.hinge,
        log_loss: (binary && loss == Loss::Logistic).then_some(ev.loss),
    }
}

/// Gathers an [`Evaluation`] from scores one row at a time (raw-text evaluation).
#[derive(Debug, Clone)]
pub struct Accumulator {
    conf: Vec<Vec<u64>>,
    loss_sum: f64,
    hinge_sum: f64,
    loss: Loss,
}

impl Accumulator {
    /// For `k` classes (2 for binary) and the model's loss.
    pub fn new(k: usize, loss: Loss) -> Self {
        Accumulator {
            conf: vec![vec![0; k]; k],
            loss_sum: 0.0,
            hinge_sum: 0.0,
            loss,
        }
    }

    /// Add a row: `scores` of every model, `truth` the true class (binary: 1
    /// positive, 0 negative).
    pub fn add(&mut self, scores: &[f64], truth: usize) {
        if scores.len() == 1 {
            let y = if truth == 1 { 1.0 } else { -1.0 };
            self.loss_sum += self.loss.value(y * scores[0]);
            self.hinge_sum += Loss::Hinge.value(y * scores[0]);
            self.conf[truth][(scores[0] > 0.0) as usize] += 1;
        } else {
            let mut best = 0;
            for (c, &s) in scores.iter().enumerate() {
                let y = if c == truth { 1.0 } else { -1.0 };
                self.loss_sum += self.loss.value(y * s);
                self.hinge_sum += Loss::Hinge.value(y * s);
                if s > scores[best] {
                    best = c;
                }
            }
            self.conf[truth][best] += 1;
        }
    }

    /// The evaluation so far.
    pub fn finish(&self) -> Evaluation {
        let rows: u64 = self.conf.iter().flatten().sum();
        let k = self.conf.len();
        let correct: u64 = (0..k).map(|i| self.conf[i][i]).sum();
        Evaluation {
            rows,
            loss: self.loss_sum / rows.max(1) as f64,
            hinge: self.hinge_sum / rows.max(1) as f64,
            accuracy: correct as f64 / rows.max(1) as f64,
            confusion: self.conf.clone(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // A hand-checkable example: 3 classes, truth rows, predicted columns.
    // Class 0: tp 5, predicted 5+1=6, actual 5+2=7 → P 5/6, R 5/7.
    #[test]
    fn per_class_and_macro_f1_by_hand() {
        let conf = vec![vec![5, 2, 0], vec![1, 3, 1], vec![0, 0, 4]];
        let ev = Evaluation {
            rows: 16,
            loss: 0.0,
            hinge: 0.0,
            accuracy: 12.0 / 16.0,
            confusion: conf,
        };
        let m = metrics(
            &ev,
            &["a".into(), "b".into(), "c".into()],
            Loss::Hinge,
            false,
            0,
        );
        let f = |p: f64, r: f64| 2.0 * p * r / (p + r);
        let want = [
            (5.0 / 6.0, 5.0 / 7.0),
            (3.0 / 5.0, 3.0 / 5.0),
            (4.0 / 5.0, 1.0),
        ];
        for (c, (p, r)) in want.iter().enumerate() {
            assert!((m.per_class[c].precision - p).abs() < 1e-12);
            assert!((m.per_class[c].recall - r).abs() < 1e-12);
            assert!((m.per_class[c].f1 - f(*p, *r)).abs() < 1e-12);
        }
        let macro_f1 = want.iter().map(|(p, r)| f(*p, *r)).sum::<f64>() / 3.0;
        assert!((m.macro_f1 - macro_f1).abs() < 1e-12);
        assert_eq!(m.per_class[1].support, 5);
        assert!(m.log_loss.is_none());
    }

    #[test]
    fn accumulator_binary_and_multiclass() {
        let mut a = Accumulator::new(2, Loss::Logistic);
        a.add(&[2.0], 1);
        a.add(&[-1.0], 1);
        a.add(&[-3.0], 0);
        let e = a.finish();
        assert_eq!(e.confusion, vec![vec![1, 0], vec![1, 1]]);
        let want =
            (Loss::Logistic.value(2.0) + Loss::Logistic.value(-1.0) + Loss::Logistic.value(3.0))
                / 3.0;
        assert!((e.loss - want).abs() < 1e-12);
        assert!((e.hinge - (0.0 + 2.0 + 0.0) / 3.0).abs() < 1e-12);
        let mut a = Accumulator::new(3, Loss::Hinge);
        a.add(&[0.5, 2.0, -1.0], 1);
        a.add(&[0.5, 2.0, -1.0], 0);
        let e = a.finish();
        assert_eq!(e.confusion[1][1], 1);
        assert_eq!(e.confusion[0][1], 1);
        assert_eq!(e.accuracy, 0.5);
    }
}
