//! Operating points and calibrated probabilities, chosen on a validation split
//! and stored in the model.
//!
//! * [`choose`] picks a score threshold that meets a [`Target`] (a ceiling on
//!   the false-positive rate, a floor on precision or on recall) with the best
//!   other side, or reports the closest reachable point.
//! * [`Platt::fit`] fits Platt scaling, `P(y = 1 | f) = 1/(1 + e^(A·f + B))`
//!   (Platt 1999), with the regularised targets and the Newton method with
//!   backtracking line search of Lin, Lin and Weng (2007), "A note on Platt's
//!   probabilistic outputs for support vector machines", Machine Learning
//!   68:267–276, Algorithm 1.
//! * [`Calibration`] is what the model file stores (an optional field of the
//!   model metadata).

use std::path::Path;

use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};
use crate::eval::rank::{self, Counts, Ranking};
use crate::eval::ScoredRows;
use crate::model::Model;
use crate::solver::Loss;

/// What a threshold must achieve on the validation split.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Target {
    /// False-positive rate at most this; recall as high as possible.
    MaxFalsePositiveRate(f64),
    /// Precision at least this; recall as high as possible.
    MinPrecision(f64),
    /// Recall at least this; false-positive rate as low as possible.
    MinRecall(f64),
}

impl std::fmt::Display for Target {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Target::MaxFalsePositiveRate(r) => write!(f, "false-positive rate ≤ {r}"),
            Target::MinPrecision(p) => write!(f, "precision ≥ {p}"),
            Target::MinRecall(q) => write!(f, "recall ≥ {q}"),
        }
    }
}

/// A chosen (or closest) operating point.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Choice {
    /// Rows scoring `≥ threshold` are labelled positive.
    pub threshold: f64,
    /// Validation counts at the threshold.
    pub counts: Counts,
    /// Whether the target is met.
    pub met: bool,
}

/// Pick the threshold meeting `target` with the best other side.
///
/// Candidates are the distinct validation scores (a row is positive when its
/// score is `≥` the threshold), and only points labelling at least one positive
/// row correctly count: a threshold above every score would trivially keep the
/// false-positive rate at zero. Among candidates meeting the target: for a
/// false-positive-rate ceiling or a precision floor the highest recall wins,
/// then the lower false-positive rate; for a recall floor the lowest
/// false-positive rate wins, then the higher recall. Remaining ties go to the
/// higher threshold.
///
/// When no candidate meets the target, the result has `met = false` and is the
/// closest reachable point: the lowest false-positive rate, the highest
/// precision, or the highest recall, ties broken as above. `None` when the
/// ranking has no positive row.
pub fn choose(r: &Ranking, target: Target) -> Option<Choice> {
    if r.positives == 0 {
        return None;
    }
    let pts: Vec<(usize, Counts)> = (0..r.len())
        .map(|i| (i, r.counts(i)))
        .filter(|(_, c)| c.tp > 0)
        .collect();
    let recall = |c: &Counts| c.recall().unwrap_or(0.0);
    let fpr = |c: &Counts| c.false_positive_rate().unwrap_or(0.0);
    let prec = |c: &Counts| c.precision().unwrap_or(0.0);
    let meets = |c: &Counts| match target {
        Target::MaxFalsePositiveRate(x) => fpr(c) <= x,
        Target::MinPrecision(x) => prec(c) >= x,
        Target::MinRecall(x) => recall(c) >= x,
    };
    // Larger key is better; the first of equal keys (higher threshold) wins.
    let better = |c: &Counts| -> (f64, f64) {
        match target {
            Target::MaxFalsePositiveRate(_) | Target::MinPrecision(_) => (recall(c), -fpr(c)),
            Target::MinRecall(_) => (-fpr(c), recall(c)),
        }
    };
    let closeness = |c: &Counts| -> (f64, f64) {
        match target {
            Target::MaxFalsePositiveRate(_) => (-fpr(c), recall(c)),
            Target::MinPrecision(_) => (prec(c), recall(c)),
            Target::MinRecall(_) => (recall(c), -fpr(c)),
        }
    };
    let best_by = |cands: &mut dyn Iterator<Item = &(usize, Counts)>,
                   key: &dyn Fn(&Counts) -> (f64, f64)| {
        let mut best: Option<&(usize, Counts)> = None;
        for p in cands {
            if best.is_none_or(|b| key(&p.1) > key(&b.1)) {
                best = Some(p);
            }
        }
        best.copied()
    };
    let met = best_by(&mut pts.iter().filter(|p| meets(&p.1)), &better);
    let (i, counts, met) = match met {
        Some((i, c)) => (i, c, true),
        None => {
            let (i, c) = best_by(&mut pts.iter(), &closeness)?;
            (i, c, false)
        }
    };
    Some(Choice {
        threshold: r.thresholds[i],
        counts,
        met,
    })
}

/// Platt scaling parameters: `P(y = 1 | f) = 1/(1 + e^(A·f + B))`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Platt {
    /// Slope (negative when higher scores mean more likely positive).
    pub a: f64,
    /// Offset.
    pub b: f64,
}

impl Platt {
    /// The probability of the positive class at score `f`, computed without
    /// overflow.
    pub fn probability(&self, f: f64) -> f64 {
        crate::eval::rank::sigmoid(-(self.a * f + self.b))
    }

    /// Fit on scores `f` and truths `y` (both classes needed), following Lin,
    /// Lin and Weng (2007), Algorithm 1: targets `(N₊+1)/(N₊+2)` for positives
    /// and `1/(N₋+2)` for negatives (Platt's regularisation against
    /// overfitting), start `A = 0`, `B = ln((N₋+1)/(N₊+1))`, Newton steps on the
    /// Hessian plus `σ = 10⁻¹²` on its diagonal, backtracking line search with
    /// the sufficient-decrease constant 10⁻⁴, at most 100 iterations, stop when
    /// both gradient components are below 10⁻⁵ or the step falls below 10⁻¹⁰.
    /// Every exponential is taken of a non-positive number.
    pub fn fit(f: &[f64], y: &[bool]) -> Option<Platt> {
        let prior1 = y.iter().filter(|&&b| b).count() as f64;
        let prior0 = y.len() as f64 - prior1;
        if prior1 == 0.0 || prior0 == 0.0 {
            return None;
        }
        let hi = (prior1 + 1.0) / (prior1 + 2.0);
        let lo = 1.0 / (prior0 + 2.0);
        let t = |i: usize| if y[i] { hi } else { lo };
        let objective = |a: f64, b: f64| -> f64 {
            let mut s = 0.0;
            for (i, &fi) in f.iter().enumerate() {
                let z = fi * a + b;
                s += if z >= 0.0 {
                    t(i) * z + (-z).exp().ln_1p()
                } else {
                    (t(i) - 1.0) * z + z.exp().ln_1p()
                };
            }
            s
        };
        let (max_iter, min_step, sigma, eps) = (100, 1e-10, 1e-12, 1e-5);
        let mut a = 0.0;
        let mut b = ((prior0 + 1.0) / (prior1 + 1.0)).ln();
        let mut fval = objective(a, b);
        for _ in 0..max_iter {
            let (mut h11, mut h22, mut h21, mut g1, mut g2) = (sigma, sigma, 0.0, 0.0, 0.0);
            for (i, &fi) in f.iter().enumerate() {
                let z = fi * a + b;
                let (p, q) = if z >= 0.0 {
                    let e = (-z).exp();
                    (e / (1.0 + e), 1.0 / (1.0 + e))
                } else {
                    let e = z.exp();
                    (1.0 / (1.0 + e), e / (1.0 + e))
                };
                let d2 = p * q;
                h11 += fi * fi * d2;
                h22 += d2;
                h21 += fi * d2;
                let d1 = t(i) - p;
                g1 += fi * d1;
                g2 += d1;
            }
            if g1.abs() < eps && g2.abs() < eps {
                break;
            }
            let det = h11 * h22 - h21 * h21;
            let da = -(h22 * g1 - h21 * g2) / det;
            let db = -(-h21 * g1 + h11 * g2) / det;
            let gd = g1 * da + g2 * db;
            let mut step = 1.0;
            while step >= min_step {
                let (na, nb) = (a + step * da, b + step * db);
                let nf = objective(na, nb);
                if nf < fval + 1e-4 * step * gd {
                    a = na;
                    b = nb;
                    fval = nf;
                    break;
                }
                step /= 2.0;
            }
            if step < min_step {
                break;
            }
        }
        (a.is_finite() && b.is_finite()).then_some(Platt { a, b })
    }
}

/// What `tamis calibrate` stores in a model.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Calibration {
    /// The target the thresholds were chosen for, if any.
    pub target: Option<Target>,
    /// One threshold per model (`None`: the plain rule, margin 0 for a binary
    /// model, the highest score for one-vs-rest). A model whose class had no
    /// threshold chosen holds 0 here and is marked in [`Calibration::chosen`].
    pub thresholds: Option<Vec<f64>>,
    /// Per model, whether its threshold was chosen for a target: a one-vs-rest
    /// class without one competes by its score alone, as if uncalibrated.
    /// Absent when every threshold was chosen (and in files written before
    /// this field; older builds that ignore it apply the stored 0).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub chosen: Option<Vec<bool>>,
    /// Platt scaling per model (hinge and squared-hinge models).
    pub platt: Option<Vec<Platt>>,
    /// Validation rows the calibration was fitted on.
    pub rows: u64,
    /// Fingerprint of the dataset they came from.
    pub dataset_fingerprint: String,
}

/// Probability quality of one model's scores: Brier score and expected
/// calibration error.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Quality {
    /// Brier score.
    pub brier: f64,
    /// Expected calibration error (10 equal-width bins).
    pub ece: f64,
}

impl Quality {
    fn of(p: &[f64], y: &[bool]) -> Option<Quality> {
        Some(Quality {
            brier: rank::brier(p, y)?,
            ece: rank::expected_calibration_error(p, y)?,
        })
    }
}

/// A rate with its Wilson 95% interval.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Rate {
    /// The rate.
    pub value: f64,
    /// Lower end of the interval.
    pub low: f64,
    /// Upper end of the interval.
    pub high: f64,
}

impl Rate {
    /// `k` of `n`, `None` when `n = 0`.
    pub fn of(k: u64, n: u64) -> Option<Rate> {
        let (low, high) = rank::wilson(k, n, rank::Z95)?;
        Some(Rate {
            value: k as f64 / n as f64,
            low,
            high,
        })
    }
}

/// The operating point chosen for one model, as reported.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Point {
    /// Rows scoring at least this are labelled positive.
    pub threshold: f64,
    /// Whether the target is met (else this is the closest reachable point).
    pub met: bool,
    /// Validation counts.
    pub counts: Counts,
    /// Precision, `None` when nothing is labelled positive.
    pub precision: Option<Rate>,
    /// Recall.
    pub recall: Option<Rate>,
    /// False-positive rate.
    pub false_positive_rate: Option<Rate>,
}

/// What calibration found for one model.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ModelReport {
    /// The class the model scores.
    pub label: String,
    /// Validation rows of the class.
    pub positives: u64,
    /// Validation rows of other classes.
    pub negatives: u64,
    /// The operating point, when a target applies to this model.
    pub point: Option<Point>,
    /// Platt scaling, for hinge and squared-hinge models.
    pub platt: Option<Platt>,
    /// Probabilities before: `σ(score)`, the margin read as log-odds.
    pub before: Option<Quality>,
    /// Probabilities after: Platt scaling (`None` for logistic models, which are
    /// not rescaled).
    pub after: Option<Quality>,
}

/// The outcome of [`calibrate`].
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Report {
    /// The target, if any.
    pub target: Option<Target>,
    /// Validation rows used.
    pub rows: u64,
    /// Per model.
    pub models: Vec<ModelReport>,
    /// Whether every target was met (a model is changed only then).
    pub met: bool,
    /// What to store in the model.
    #[serde(skip)]
    pub calibration: Calibration,
}

/// Calibrate `model` on the scored validation rows of the dataset at `dir`:
/// thresholds for `target` (for every model, or only the model of class
/// `only`), Platt scaling for hinge and squared-hinge models. Fails with
/// [`Error::Insufficient`] when a model the calibration concerns lacks
/// positive or negative rows.
pub fn calibrate(
    model: &Model,
    rows: &ScoredRows,
    dir: &Path,
    dataset_fingerprint: &str,
    target: Option<Target>,
    only: Option<usize>,
) -> Result<Report> {
    let labels = model.meta.model_labels.clone();
    let platt_wanted = model.meta.loss != Loss::Logistic;
    let mut reports = Vec::new();
    let mut thresholds: Vec<f64> = match model.thresholds() {
        Some(t) => t.to_vec(),
        None => vec![0.0; model.models()],
    };
    // The thresholds chosen before stay chosen; this run adds its own.
    let mut chosen: Vec<bool> = (0..model.models())
        .map(|m| model.threshold_of(m).is_some())
        .collect();
    let mut platts = Vec::new();
    for m in 0..model.models() {
        let (s, y) = rows.one_vs_rest(m);
        let r = Ranking::new(&s, &y);
        let concerned = platt_wanted || (target.is_some() && only.is_none_or(|o| o == m));
        if concerned && (r.positives == 0 || r.negatives == 0) {
            let (missing, kind) = if r.positives == 0 {
                (&labels[m], "no rows of the class")
            } else {
                (&labels[m], "only rows of the class")
            };
            return Err(Error::Insufficient {
                path: dir.to_path_buf(),
                what: format!(
                    "the validation split ({} rows) has {kind} {missing:?}: calibration needs both positive and negative rows; ingest with a larger --validation fraction or more data",
                    rows.rows()
                ),
            });
        }
        let point = match target {
            Some(t) if only.is_none_or(|o| o == m) => {
                let c = choose(&r, t).expect("positives checked above");
                thresholds[m] = c.threshold;
                chosen[m] = true;
                let k = c.counts;
                Some(Point {
                    threshold: c.threshold,
                    met: c.met,
                    counts: k,
                    precision: Rate::of(k.tp, k.tp + k.fp),
                    recall: Rate::of(k.tp, k.tp + k.fn_),
                    false_positive_rate: Rate::of(k.fp, k.fp + k.tn),
                })
            }
            _ => None,
        };
        let raw: Vec<f64> = s.iter().map(|&x| rank::sigmoid(x)).collect();
        let before = Quality::of(&raw, &y);
        let (platt, after) = if platt_wanted {
            let p = Platt::fit(&s, &y).ok_or_else(|| Error::Insufficient {
                path: dir.to_path_buf(),
                what: format!("Platt scaling of {:?} did not converge", labels[m]),
            })?;
            let cal: Vec<f64> = s.iter().map(|&x| p.probability(x)).collect();
            platts.push(p);
            (Some(p), Quality::of(&cal, &y))
        } else {
            (None, None)
        };
        reports.push(ModelReport {
            label: labels[m].clone(),
            positives: r.positives,
            negatives: r.negatives,
            point,
            platt,
            before,
            after,
        });
    }
    let met = reports
        .iter()
        .all(|r| r.point.as_ref().is_none_or(|p| p.met));
    let keep_thresholds = target.is_some() || model.thresholds().is_some();
    Ok(Report {
        target,
        rows: rows.rows() as u64,
        met,
        calibration: Calibration {
            target: target.or(model.meta.calibration.as_ref().and_then(|c| c.target)),
            thresholds: keep_thresholds.then_some(thresholds),
            chosen: (keep_thresholds && chosen.contains(&false)).then_some(chosen),
            platt: platt_wanted.then_some(platts),
            rows: rows.rows() as u64,
            dataset_fingerprint: dataset_fingerprint.to_string(),
        },
        models: reports,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::eval::rank::{log_loss, sigmoid};
    use rand::{Rng, SeedableRng};

    fn ranking(s: &[f64], y: &[bool]) -> Ranking {
        Ranking::new(s, y)
    }

    // Scores (truth): 5(+) 4(+) 3(−) 2(+) 1(−) 0(−): P 3, N 3.
    // At 4: tp 2 fp 0 (R 2/3, FPR 0, P 1). At 3: tp 2 fp 1. At 2: tp 3 fp 1
    // (R 1, FPR 1/3, P 3/4). At 0: tp 3 fp 3.
    #[test]
    fn choices_by_hand() {
        let r = ranking(
            &[5.0, 4.0, 3.0, 2.0, 1.0, 0.0],
            &[true, true, false, true, false, false],
        );
        let c = choose(&r, Target::MaxFalsePositiveRate(0.0)).unwrap();
        assert!(c.met);
        assert_eq!(c.threshold, 4.0);
        let c = choose(&r, Target::MaxFalsePositiveRate(0.34)).unwrap();
        assert_eq!((c.threshold, c.counts.tp, c.counts.fp), (2.0, 3, 1));
        let c = choose(&r, Target::MinPrecision(0.75)).unwrap();
        assert_eq!(c.threshold, 2.0);
        let c = choose(&r, Target::MinPrecision(0.8)).unwrap();
        assert_eq!(c.threshold, 4.0);
        let c = choose(&r, Target::MinRecall(0.5)).unwrap();
        assert_eq!(c.threshold, 4.0);
        let c = choose(&r, Target::MinRecall(1.0)).unwrap();
        assert_eq!(c.threshold, 2.0);
        // Unmeetable: the top row is a negative, so any point with a true
        // positive has a false positive.
        let r = ranking(&[3.0, 2.0, 1.0], &[false, true, false]);
        let c = choose(&r, Target::MaxFalsePositiveRate(0.0)).unwrap();
        assert!(!c.met);
        assert_eq!((c.threshold, c.counts.fp), (2.0, 1));
        let c = choose(&r, Target::MinPrecision(0.9)).unwrap();
        assert!(!c.met);
        assert_eq!(c.counts.precision(), Some(0.5));
        assert!(choose(&ranking(&[1.0], &[false]), Target::MinRecall(0.5)).is_none());
    }

    /// Draws `n` scores `f ~ N(0, 2²)` (Box–Muller) and labels
    /// `y ~ Bernoulli(1/(1 + e^(A·f + B)))`.
    fn logistic_sample(n: usize, a: f64, b: f64, seed: u64) -> (Vec<f64>, Vec<bool>) {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
        let mut f = Vec::with_capacity(n);
        let mut y = Vec::with_capacity(n);
        for _ in 0..n {
            let u1: f64 = rng.random_range(f64::EPSILON..1.0);
            let u2: f64 = rng.random();
            let x = 2.0 * (-2.0 * u1.ln()).sqrt() * (2.0 * std::f64::consts::PI * u2).cos();
            f.push(x);
            y.push(rng.random_bool(sigmoid(-(a * x + b))));
        }
        (f, y)
    }

    #[test]
    fn platt_recovers_known_parameters_and_lowers_held_out_log_loss() {
        let (a, b) = (-1.7, 0.6);
        let (f, y) = logistic_sample(40_000, a, b, 11);
        let p = Platt::fit(&f, &y).unwrap();
        // Standard errors at this size are about 0.02 (A) and 0.015 (B).
        assert!((p.a - a).abs() < 0.08, "A = {}", p.a);
        assert!((p.b - b).abs() < 0.06, "B = {}", p.b);
        let (hf, hy) = logistic_sample(20_000, a, b, 12);
        let raw: Vec<f64> = hf.iter().map(|&x| sigmoid(x)).collect();
        let cal: Vec<f64> = hf.iter().map(|&x| p.probability(x)).collect();
        let (lr, lc) = (log_loss(&raw, &hy).unwrap(), log_loss(&cal, &hy).unwrap());
        assert!(lc < lr, "calibrated {lc} vs raw {lr}");
        // And close to the log loss of the true model.
        let truth: Vec<f64> = hf.iter().map(|&x| sigmoid(-(a * x + b))).collect();
        assert!(lc - log_loss(&truth, &hy).unwrap() < 0.005);
    }

    #[test]
    fn platt_needs_both_classes_and_survives_separable_data() {
        assert!(Platt::fit(&[1.0, 2.0], &[true, true]).is_none());
        let f: Vec<f64> = (0..100).map(|i| i as f64 - 49.5).collect();
        let y: Vec<bool> = f.iter().map(|&x| x > 0.0).collect();
        let p = Platt::fit(&f, &y).unwrap();
        assert!(p.a < 0.0 && p.a.is_finite());
        assert!(p.probability(40.0) > 0.9 && p.probability(-40.0) < 0.1);
    }
}
