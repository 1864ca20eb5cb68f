//! Threshold-free and threshold metrics of one binary scorer: ROC and
//! precision–recall curves, ROC AUC, average precision, operating points,
//! probability metrics (log loss, Brier score, expected calibration error,
//! reliability bins) and the Wilson score interval.
//!
//! Everything here works on the scores of a whole split held in memory: one
//! `f64` per row and model plus its truth. That is the price of ranking
//! metrics (they need every score to sort); the feature rows themselves are
//! never held.
//!
//! Conventions: a row is labelled positive at threshold `t` when its score is
//! `≥ t`. Rows with equal scores are one step of a curve, so ties count as
//! half in the AUC.

/// Counts of a binary decision against the truth.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub struct Counts {
    /// Positives labelled positive.
    pub tp: u64,
    /// Negatives labelled positive.
    pub fp: u64,
    /// Negatives labelled negative.
    pub tn: u64,
    /// Positives labelled negative.
    #[serde(rename = "fn")]
    pub fn_: u64,
}

impl Counts {
    /// `tp / (tp + fp)`, `None` when nothing is labelled positive.
    pub fn precision(&self) -> Option<f64> {
        ratio(self.tp, self.tp + self.fp)
    }

    /// `tp / (tp + fn)` (the true-positive rate), `None` without positives.
    pub fn recall(&self) -> Option<f64> {
        ratio(self.tp, self.tp + self.fn_)
    }

    /// `fp / (fp + tn)`, `None` without negatives.
    pub fn false_positive_rate(&self) -> Option<f64> {
        ratio(self.fp, self.fp + self.tn)
    }

    /// Add another set of counts.
    pub fn add(&mut self, o: &Counts) {
        self.tp += o.tp;
        self.fp += o.fp;
        self.tn += o.tn;
        self.fn_ += o.fn_;
    }
}

fn ratio(a: u64, b: u64) -> Option<f64> {
    (b > 0).then(|| a as f64 / b as f64)
}

/// Counts of labelling positive the rows scoring `≥ threshold`.
pub fn counts_at(scores: &[f64], positive: &[bool], threshold: f64) -> Counts {
    counts_of(scores.iter().map(|&s| s >= threshold), positive)
}

/// Counts of the decisions `decided` (true: labelled positive) against the truth.
pub fn counts_of(decided: impl Iterator<Item = bool>, positive: &[bool]) -> Counts {
    let mut c = Counts::default();
    for (d, &y) in decided.zip(positive) {
        match (y, d) {
            (true, true) => c.tp += 1,
            (true, false) => c.fn_ += 1,
            (false, true) => c.fp += 1,
            (false, false) => c.tn += 1,
        }
    }
    c
}

/// The operating points of a scorer: one per distinct score, highest first,
/// with the cumulative counts of rows scoring at least that much.
#[derive(Debug, Clone, PartialEq)]
pub struct Ranking {
    /// Distinct scores, decreasing.
    pub thresholds: Vec<f64>,
    /// True positives among rows scoring `≥ thresholds[i]`.
    pub tp: Vec<u64>,
    /// False positives among rows scoring `≥ thresholds[i]`.
    pub fp: Vec<u64>,
    /// All positive rows.
    pub positives: u64,
    /// All negative rows.
    pub negatives: u64,
}

impl Ranking {
    /// Rank `scores` (finite) against `positive`.
    pub fn new(scores: &[f64], positive: &[bool]) -> Ranking {
        let mut v: Vec<(f64, bool)> = scores
            .iter()
            .copied()
            .zip(positive.iter().copied())
            .collect();
        v.sort_unstable_by(|a, b| b.0.total_cmp(&a.0));
        let mut r = Ranking {
            thresholds: Vec::new(),
            tp: Vec::new(),
            fp: Vec::new(),
            positives: 0,
            negatives: 0,
        };
        let (mut tp, mut fp) = (0u64, 0u64);
        let mut i = 0;
        while i < v.len() {
            let s = v[i].0;
            // `total_cmp`, not `==`: a NaN score (which callers should refuse)
            // must still end the group, or this loop would never advance.
            while i < v.len() && v[i].0.total_cmp(&s).is_eq() {
                if v[i].1 {
                    tp += 1;
                } else {
                    fp += 1;
                }
                i += 1;
            }
            r.thresholds.push(s);
            r.tp.push(tp);
            r.fp.push(fp);
        }
        r.positives = tp;
        r.negatives = fp;
        r
    }

    /// Number of operating points (distinct scores).
    pub fn len(&self) -> usize {
        self.thresholds.len()
    }

    /// Whether there are no rows.
    pub fn is_empty(&self) -> bool {
        self.thresholds.is_empty()
    }

    /// The counts at operating point `i` (rows scoring `≥ thresholds[i]`).
    pub fn counts(&self, i: usize) -> Counts {
        Counts {
            tp: self.tp[i],
            fp: self.fp[i],
            tn: self.negatives - self.fp[i],
            fn_: self.positives - self.tp[i],
        }
    }

    /// Area under the ROC curve, the probability that a random positive
    /// scores above a random negative, ties counting half (trapezoids between
    /// operating points). `None` without both classes.
    pub fn roc_auc(&self) -> Option<f64> {
        if self.positives == 0 || self.negatives == 0 {
            return None;
        }
        // Σ Δfp · (tp_i + tp_{i−1}) / 2, exactly in integers.
        let mut twice: u128 = 0;
        let (mut ptp, mut pfp) = (0u64, 0u64);
        for i in 0..self.len() {
            twice += (self.fp[i] - pfp) as u128 * (self.tp[i] + ptp) as u128;
            ptp = self.tp[i];
            pfp = self.fp[i];
        }
        Some(twice as f64 / (2.0 * self.positives as f64 * self.negatives as f64))
    }

    /// Average precision: `Σ (Rₙ − Rₙ₋₁)·Pₙ` over the distinct thresholds `n`
    /// (highest first, `R₀ = 0`), the area under the precision–recall step
    /// curve. `None` without positives.
    pub fn average_precision(&self) -> Option<f64> {
        if self.positives == 0 {
            return None;
        }
        // Σ Δtp·P, divided by the positives once; rounding may not lift a
        // perfect ranking above 1.
        let mut sum = 0.0;
        let mut ptp = 0u64;
        for i in 0..self.len() {
            let d = self.tp[i] - ptp;
            if d > 0 {
                sum += d as f64 * self.tp[i] as f64 / (self.tp[i] + self.fp[i]) as f64;
            }
            ptp = self.tp[i];
        }
        Some((sum / self.positives as f64).min(1.0))
    }

    /// ROC curve points `(false-positive rate, true-positive rate)` from
    /// `(0, 0)` to `(1, 1)`, at most about `max_points` of them (evenly spread
    /// over the operating points; the ends are always kept).
    pub fn roc_points(&self, max_points: usize) -> Vec<(f64, f64)> {
        let mut pts = vec![(0.0, 0.0)];
        if self.positives == 0 || self.negatives == 0 {
            return pts;
        }
        for i in thin(self.len(), max_points) {
            pts.push((
                self.fp[i] as f64 / self.negatives as f64,
                self.tp[i] as f64 / self.positives as f64,
            ));
        }
        pts
    }

    /// Precision–recall points `(recall, precision)`, one per operating point
    /// (thinned to about `max_points`, the ends kept).
    pub fn pr_points(&self, max_points: usize) -> Vec<(f64, f64)> {
        if self.positives == 0 {
            return Vec::new();
        }
        thin(self.len(), max_points)
            .map(|i| {
                (
                    self.tp[i] as f64 / self.positives as f64,
                    self.tp[i] as f64 / (self.tp[i] + self.fp[i]) as f64,
                )
            })
            .collect()
    }
}

/// Indices `0..n` thinned to about `max` evenly spread ones, the last kept.
fn thin(n: usize, max: usize) -> impl Iterator<Item = usize> {
    let step = n.div_ceil(max.max(1)).max(1);
    (0..n).filter(move |i| i % step == 0 || *i + 1 == n)
}

/// The Wilson score interval for `k` successes in `n` trials at normal quantile
/// `z` (1.959964 for 95%): `(p̂ + z²/2n ± z·√(p̂(1−p̂)/n + z²/4n²)) / (1 + z²/n)`
/// (Wilson 1927). `None` when `n = 0`.
pub fn wilson(k: u64, n: u64, z: f64) -> Option<(f64, f64)> {
    if n == 0 {
        return None;
    }
    let n = n as f64;
    let p = k as f64 / n;
    let z2 = z * z;
    let denom = 1.0 + z2 / n;
    let centre = (p + z2 / (2.0 * n)) / denom;
    let half = z / denom * (p * (1.0 - p) / n + z2 / (4.0 * n * n)).sqrt();
    Some(((centre - half).max(0.0), (centre + half).min(1.0)))
}

/// The normal quantile of a two-sided 95% interval.
pub const Z95: f64 = 1.959_963_984_540_054;

/// Probabilities are kept inside `[EPS, 1 − EPS]` for the log loss (common
/// practice), so one confident mistake costs about 34.5 nats, not infinity.
pub const PROB_EPS: f64 = 1e-15;

/// Mean log loss (nats) of probabilities `p` of the positive class.
pub fn log_loss(p: &[f64], positive: &[bool]) -> Option<f64> {
    mean(p.iter().zip(positive).map(|(&p, &y)| {
        let p = p.clamp(PROB_EPS, 1.0 - PROB_EPS);
        if y {
            -p.ln()
        } else {
            -(1.0 - p).ln()
        }
    }))
}

/// Mean log loss (nats) of logits `z` (probability `σ(z)` of the positive
/// class): `ln(1 + e^(−y·z))` with `y = ±1`, exact for any `z`.
pub fn mean_log_loss_of_logits(z: &[f64], positive: &[bool]) -> Option<f64> {
    mean(z.iter().zip(positive).map(|(&z, &y)| {
        let m = if y { z } else { -z };
        crate::solver::Loss::Logistic.value(m)
    }))
}

/// Brier score: mean of `(p − y)²` (Brier 1950).
pub fn brier(p: &[f64], positive: &[bool]) -> Option<f64> {
    mean(p.iter().zip(positive).map(|(&p, &y)| {
        let d = p - y as u8 as f64;
        d * d
    }))
}

fn mean(it: impl Iterator<Item = f64>) -> Option<f64> {
    let (mut s, mut n) = (0.0, 0u64);
    for x in it {
        s += x;
        n += 1;
    }
    (n > 0).then(|| s / n as f64)
}

/// Number of equal-width probability bins of the reliability diagram and the
/// expected calibration error.
pub const CALIBRATION_BINS: usize = 10;

/// One bin of a reliability diagram.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct Bin {
    /// Lower edge.
    pub lo: f64,
    /// Upper edge (the last bin includes 1).
    pub hi: f64,
    /// Rows whose probability falls in the bin.
    pub rows: u64,
    /// Their mean predicted probability.
    pub mean_probability: f64,
    /// The share of them that are positive.
    pub positive_share: f64,
}

/// Reliability bins: `bins` equal-width bins of `[0, 1]`, empty ones included.
pub fn reliability(p: &[f64], positive: &[bool], bins: usize) -> Vec<Bin> {
    let mut sum = vec![0.0; bins];
    let mut pos = vec![0u64; bins];
    let mut n = vec![0u64; bins];
    for (&p, &y) in p.iter().zip(positive) {
        let b = ((p * bins as f64) as usize).min(bins - 1);
        sum[b] += p;
        pos[b] += y as u64;
        n[b] += 1;
    }
    (0..bins)
        .map(|b| Bin {
            lo: b as f64 / bins as f64,
            hi: (b + 1) as f64 / bins as f64,
            rows: n[b],
            mean_probability: if n[b] > 0 { sum[b] / n[b] as f64 } else { 0.0 },
            positive_share: if n[b] > 0 {
                pos[b] as f64 / n[b] as f64
            } else {
                0.0
            },
        })
        .collect()
}

/// Expected calibration error over [`CALIBRATION_BINS`] equal-width bins:
/// `Σ_b (n_b/n)·|mean probability_b − positive share_b|` (Naeini, Cooper and
/// Hauskrecht 2015).
pub fn expected_calibration_error(p: &[f64], positive: &[bool]) -> Option<f64> {
    let bins = reliability(p, positive, CALIBRATION_BINS);
    let n: u64 = bins.iter().map(|b| b.rows).sum();
    (n > 0).then(|| {
        bins.iter()
            .map(|b| b.rows as f64 / n as f64 * (b.mean_probability - b.positive_share).abs())
            .sum()
    })
}

/// The logistic function `1/(1 + e^(−x))`, computed without overflow.
pub fn sigmoid(x: f64) -> f64 {
    if x >= 0.0 {
        1.0 / (1.0 + (-x).exp())
    } else {
        let e = x.exp();
        e / (1.0 + e)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Worked by counting pairs: scores (truth) 0.9(+) 0.8(−) 0.7(+) 0.7(−) 0.2(+) 0.1(−).
    // Positives 3, negatives 3, 9 pairs. 0.9+ beats all 3 negatives: 3.
    // 0.7+ beats 0.1−, ties 0.7− (½), loses to 0.8−: 1.5. 0.2+ beats 0.1−: 1.
    // AUC = 5.5 / 9.
    #[test]
    fn auc_by_counting_pairs() {
        let s = [0.9, 0.8, 0.7, 0.7, 0.2, 0.1];
        let y = [true, false, true, false, true, false];
        let r = Ranking::new(&s, &y);
        assert_eq!(r.len(), 5);
        assert!((r.roc_auc().unwrap() - 5.5 / 9.0).abs() < 1e-15);
    }

    // Average precision from its definition, by hand: scores (truth)
    // 0.9(+) 0.8(−) 0.7(+) 0.6(−) 0.5(+); P = 3.
    // Thresholds: 0.9 → R 1/3, P 1; 0.8 → R 1/3 (no step); 0.7 → R 2/3, P 2/3;
    // 0.6 → no step; 0.5 → R 1, P 3/5. AP = 1/3·1 + 1/3·2/3 + 1/3·3/5.
    // Tied scores form one threshold: 0.9(+) 0.5(+) 0.5(−) → 1/2·1 + 1/2·2/3.
    #[test]
    fn average_precision_by_hand() {
        let r = Ranking::new(
            &[0.9, 0.8, 0.7, 0.6, 0.5],
            &[true, false, true, false, true],
        );
        let want = (1.0 + 2.0 / 3.0 + 3.0 / 5.0) / 3.0;
        assert!((r.average_precision().unwrap() - want).abs() < 1e-15);
        let r = Ranking::new(&[0.9, 0.5, 0.5], &[true, true, false]);
        let want = 0.5 + 0.5 * 2.0 / 3.0;
        assert!((r.average_precision().unwrap() - want).abs() < 1e-15);
    }

    #[test]
    fn one_class_has_no_auc() {
        let r = Ranking::new(&[1.0, 2.0], &[true, true]);
        assert_eq!(r.roc_auc(), None);
        assert_eq!(r.average_precision(), Some(1.0));
        let r = Ranking::new(&[1.0, 2.0], &[false, false]);
        assert_eq!(r.average_precision(), None);
    }

    #[test]
    fn counts_and_rates() {
        let s = [3.0, 2.0, 1.0, 0.0];
        let y = [true, false, true, false];
        let c = counts_at(&s, &y, 1.0);
        assert_eq!(
            c,
            Counts {
                tp: 2,
                fp: 1,
                tn: 1,
                fn_: 0
            }
        );
        assert_eq!(c.precision(), Some(2.0 / 3.0));
        assert_eq!(c.recall(), Some(1.0));
        assert_eq!(c.false_positive_rate(), Some(0.5));
        let r = Ranking::new(&s, &y);
        assert_eq!(r.counts(2), c);
        assert_eq!(r.roc_points(100).last(), Some(&(1.0, 1.0)));
        assert_eq!(r.pr_points(100).first(), Some(&(0.5, 1.0)));
        // Thinned to every second point, the last kept: (0,0), i = 0, 2, 3.
        assert_eq!(r.roc_points(2).len(), 4);
    }

    // Newcombe (1998), Statistics in Medicine 17:857–872, Table I, method 3
    // (Wilson score interval without continuity correction), values from
    // memory: 81/263 → 0.2553–0.3662, 15/148 → 0.0624–0.1605,
    // 0/20 → 0.0000–0.1611, 1/29 → 0.0061–0.1718.
    #[test]
    fn wilson_matches_newcombe_table_one() {
        for (k, n, lo, hi) in [
            (81, 263, 0.2553, 0.3662),
            (15, 148, 0.0624, 0.1605),
            (0, 20, 0.0, 0.1611),
            (1, 29, 0.0061, 0.1718),
        ] {
            let (a, b) = wilson(k, n, Z95).unwrap();
            assert!((a - lo).abs() < 5e-5, "{k}/{n}: {a} vs {lo}");
            assert!((b - hi).abs() < 5e-5, "{k}/{n}: {b} vs {hi}");
        }
        assert_eq!(wilson(0, 0, Z95), None);
    }

    #[test]
    fn probability_metrics_by_hand() {
        let p = [0.9, 0.2, 0.6, 0.05];
        let y = [true, false, false, true];
        let ll = -(0.9f64.ln() + 0.8f64.ln() + 0.4f64.ln() + 0.05f64.ln()) / 4.0;
        assert!((log_loss(&p, &y).unwrap() - ll).abs() < 1e-15);
        let b = (0.01 + 0.04 + 0.36 + 0.9025) / 4.0;
        assert!((brier(&p, &y).unwrap() - b).abs() < 1e-15);
        // Bins: 0.05 → bin 0 (|0.05 − 1|), 0.2 → bin 2 (|0.2 − 0|),
        // 0.6 → bin 6 (|0.6 − 0|), 0.9 → bin 9 (|0.9 − 1|).
        let e = (0.95 + 0.2 + 0.6 + 0.1) / 4.0;
        assert!((expected_calibration_error(&p, &y).unwrap() - e).abs() < 1e-15);
        let bins = reliability(&[1.0, 0.0], &[true, false], 10);
        assert_eq!(bins[9].rows, 1);
        assert_eq!(bins[0].rows, 1);
        assert!(log_loss(&[0.0], &[true]).unwrap().is_finite());
        assert_eq!(brier(&[], &[]), None);
        assert!((sigmoid(-800.0)).abs() < 1e-300 && sigmoid(800.0) == 1.0);
    }
}

#[cfg(test)]
mod mann_whitney {
    use super::*;
    use rand::{Rng, SeedableRng};

    /// The Mann–Whitney U statistic of the positives by mid-ranks (Mann and
    /// Whitney 1947; tied values share the mean of their ranks), normalised by
    /// `P·N`: `(R₊ − P(P+1)/2) / (P·N)`, where `R₊` is the positives' rank sum.
    /// An independent route to the ROC AUC (Hanley and McNeil 1982).
    fn normalised_u(s: &[f64], y: &[bool]) -> f64 {
        let mut idx: Vec<usize> = (0..s.len()).collect();
        idx.sort_by(|&a, &b| s[a].total_cmp(&s[b]));
        let mut rank = vec![0.0; s.len()];
        let mut i = 0;
        while i < idx.len() {
            let mut j = i;
            while j + 1 < idx.len() && s[idx[j + 1]] == s[idx[i]] {
                j += 1;
            }
            let mid = (i + j) as f64 / 2.0 + 1.0;
            for &k in &idx[i..=j] {
                rank[k] = mid;
            }
            i = j + 1;
        }
        let p = y.iter().filter(|&&b| b).count() as f64;
        let n = y.len() as f64 - p;
        let r: f64 = (0..s.len()).filter(|&k| y[k]).map(|k| rank[k]).sum();
        (r - p * (p + 1.0) / 2.0) / (p * n)
    }

    #[test]
    fn auc_is_the_normalised_mann_whitney_u_with_ties() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(7);
        for trial in 0..50 {
            let n = rng.random_range(2..400);
            // Scores on a coarse grid so that many tie, positives shifted up.
            let levels = if trial % 2 == 0 { 5 } else { 1000 };
            let mut y: Vec<bool> = (0..n).map(|_| rng.random_bool(0.3)).collect();
            y[0] = true;
            y[1] = false;
            let s: Vec<f64> = y
                .iter()
                .map(|&p| (rng.random_range(0..levels) + if p { levels / 3 } else { 0 }) as f64)
                .collect();
            let auc = Ranking::new(&s, &y).roc_auc().unwrap();
            let u = normalised_u(&s, &y);
            assert!((auc - u).abs() < 1e-12, "trial {trial}: {auc} vs {u}");
        }
    }
}
