//! Many binary models trained side by side over one feature space, for `tune`.
//!
//! A *lane* is one binary linear model (a target class and solver settings of
//! its own: λ, loss, step sizes). The lanes' weights are stored interleaved,
//! bucket-major: the `L` weights of bucket `j` sit at `v[j·L .. j·L + L]`. A
//! row's nonzero then costs one memory access for every lane instead of one per
//! lane, which is what makes `L` models in one pass cheaper than `L` runs: on
//! large feature spaces the solver's time goes into fetching weights, not into
//! arithmetic.
//!
//! Each lane follows exactly the update of [`super::Linear`] (scale trick, lazy
//! average, renormalisation, optional projection) with its own settings and the
//! shared step counter; the results agree with separate runs up to the order of
//! floating-point sums.

use rayon::prelude::*;

use super::{slice_splits, Loss, Rows, SolverConfig, Tally, Target, PARALLEL_BATCH, RANGES};
use crate::error::{Error, Result};
use crate::shard::Row;

const RENORM_BELOW: f64 = 1e-9;

/// Per-lane scalars of the scale trick and the lazy average.
#[derive(Debug, Clone, Copy, PartialEq)]
struct Scalars {
    s: f64,
    b: f64,
    vnorm2: f64,
    big_b: f64,
    bias_sum: f64,
    averaged: u64,
}

/// `L` binary models with interleaved weights.
pub struct Lanes {
    lanes: usize,
    dim: usize,
    v: Vec<f64>,
    u: Vec<f64>,
    sc: Vec<Scalars>,
    cfg: Vec<SolverConfig>,
    targets: Vec<Target>,
    class_weights: Vec<f64>,
    idf: Option<Vec<f32>>,
    /// Steps taken.
    pub t: u64,
    margins: Vec<f64>,
    coefs: Vec<f64>,
    splits: Vec<[u32; RANGES + 1]>,
}

impl Lanes {
    /// Lanes for `(target, settings)` pairs over `dim` features (a power of two).
    pub fn new(
        dim: usize,
        lanes: Vec<(Target, SolverConfig)>,
        class_weights: Vec<f64>,
        idf: Option<Vec<f32>>,
    ) -> Result<Self> {
        if !dim.is_power_of_two() || dim < RANGES {
            return Err(Error::Invalid(format!(
                "dimension {dim} is not a power of two of at least {RANGES}"
            )));
        }
        if lanes.is_empty() {
            return Err(Error::Invalid("no models to train".into()));
        }
        let batch = lanes[0].1.batch;
        for (_, c) in &lanes {
            c.validate()?;
            if c.batch != batch {
                return Err(Error::Invalid(
                    "models trained together share one batch size".into(),
                ));
            }
        }
        let l = lanes.len();
        let zero = Scalars {
            s: 1.0,
            b: 0.0,
            vnorm2: 0.0,
            big_b: 0.0,
            bias_sum: 0.0,
            averaged: 0,
        };
        let (targets, cfg) = lanes.into_iter().unzip();
        Ok(Lanes {
            lanes: l,
            dim,
            v: vec![0.0; dim * l],
            u: vec![0.0; dim * l],
            sc: vec![zero; l],
            cfg,
            targets,
            class_weights,
            idf,
            t: 0,
            margins: Vec::new(),
            coefs: Vec::new(),
            splits: Vec::new(),
        })
    }

    /// Number of lanes.
    pub fn len(&self) -> usize {
        self.lanes
    }

    /// Whether there are no lanes (never, once built).
    pub fn is_empty(&self) -> bool {
        self.lanes == 0
    }

    /// The settings of lane `k`.
    pub fn config(&self, k: usize) -> &SolverConfig {
        &self.cfg[k]
    }

    /// One step of every lane over the rows `batch` of `rows`; `average` says
    /// whether each lane's average takes this step in. Returns one tally per lane.
    pub fn step<R: Rows + ?Sized>(
        &mut self,
        rows: &R,
        batch: &[usize],
        average: bool,
    ) -> Vec<Tally> {
        self.t += 1;
        let l = self.lanes;
        let dim = self.dim;
        let xs: Vec<Row<'_>> = batch.iter().map(|&r| rows.row(r)).collect();
        let n = xs.len();
        let parallel = n >= PARALLEL_BATCH;
        let nnz: u64 = xs.iter().map(|x| x.indices.len() as u64).sum();
        // 1. Margins of every row under every lane, against the current weights.
        self.margins.clear();
        self.margins.resize(n * l, 0.0);
        self.splits.clear();
        {
            let v = &self.v;
            let sc = &self.sc;
            let idf = self.idf.as_deref();
            let one = |x: &Row<'_>, out: &mut [f64]| -> [u32; RANGES + 1] {
                lane_margins(v, l, dim, x, idf, out);
                for (k, m) in out.iter_mut().enumerate() {
                    *m = sc[k].s * *m + sc[k].b;
                }
                slice_splits(x.indices, dim)
            };
            if parallel {
                xs.par_iter()
                    .zip(self.margins.par_chunks_mut(l))
                    .with_min_len(16)
                    .map(|(x, out)| one(x, out))
                    .collect_into_vec(&mut self.splits);
            } else {
                for (x, out) in xs.iter().zip(self.margins.chunks_mut(l)) {
                    let sp = one(x, out);
                    self.splits.push(sp);
                }
            }
        }
        // 2. Loss derivatives: coefs[i·L + k] = cᵢ·loss'(y·m)·y.
        self.coefs.clear();
        self.coefs.resize(n * l, 0.0);
        let mut tallies = vec![
            Tally {
                rows: n as u64,
                nnz,
                loss: 0.0,
            };
            l
        ];
        for (i, x) in xs.iter().enumerate() {
            let c = self
                .class_weights
                .get(x.label as usize)
                .copied()
                .unwrap_or(1.0);
            for (k, tally) in tallies.iter_mut().enumerate() {
                let y = self.targets[k].y(x.label);
                let loss: Loss = self.cfg[k].loss;
                let m = y * self.margins[i * l + k];
                tally.loss += c * loss.value(m);
                self.coefs[i * l + k] = c * loss.derivative(m) * y;
            }
        }
        // 3. Shrink every lane; keep the scale away from underflow.
        let etas: Vec<f64> = (0..l).map(|k| self.cfg[k].eta(self.t - 1)).collect();
        for (k, eta) in etas.iter().enumerate() {
            self.sc[k].s *= 1.0 - eta * self.cfg[k].lambda;
            if self.sc[k].s < RENORM_BELOW {
                self.renormalize(k);
            }
        }
        // 4. The sparse update, over slices of the dimension in parallel; each
        //    slice applies its entries of every row in row order.
        let factors: Vec<f64> = (0..l)
            .map(|k| -etas[k] / (n as f64 * self.sc[k].s))
            .collect();
        let big_b: Vec<f64> = (0..l)
            .map(|k| if average { self.sc[k].big_b } else { 0.0 })
            .collect();
        let width = dim / RANGES;
        let idf = self.idf.as_deref();
        let (coefs, splits) = (&self.coefs, &self.splits);
        let dn: Vec<Vec<f64>> = self
            .v
            .par_chunks_mut(width * l)
            .zip(self.u.par_chunks_mut(width * l))
            .enumerate()
            .map(|(q, (v, u))| {
                let mut dn = vec![0.0; l];
                // The lanes a row moves (hinge losses leave most lanes still).
                let mut active: Vec<(usize, f64)> = Vec::with_capacity(l);
                for (i, x) in xs.iter().enumerate() {
                    let (a, b) = (splits[i][q] as usize, splits[i][q + 1] as usize);
                    if a == b {
                        continue;
                    }
                    active.clear();
                    for k in 0..l {
                        let f = factors[k] * coefs[i * l + k];
                        if f != 0.0 {
                            active.push((k, f));
                        }
                    }
                    if active.is_empty() {
                        continue;
                    }
                    for (&j, &val) in x.indices[a..b].iter().zip(&x.values[a..b]) {
                        let g = j as usize & (dim - 1);
                        // Masked, so a damaged row cannot reach outside its slice.
                        let local = (g.wrapping_sub(q * width) & (width - 1)) * l;
                        let xv = match idf {
                            Some(idf) => (val * idf[g]) as f64,
                            None => val as f64,
                        };
                        let (vv, uu) = (&mut v[local..local + l], &mut u[local..local + l]);
                        for &(k, f) in &active {
                            let d = f * xv;
                            let old = vv[k];
                            let new = old + d;
                            dn[k] += new * new - old * old;
                            vv[k] = new;
                            uu[k] -= big_b[k] * d;
                        }
                    }
                }
                dn
            })
            .collect();
        // 5. Bias, ‖v‖², projection and the average, per lane.
        for k in 0..l {
            let bias_grad: f64 = (0..n).map(|i| self.coefs[i * l + k]).sum();
            let sc = &mut self.sc[k];
            sc.vnorm2 += dn.iter().map(|d| d[k]).sum::<f64>();
            sc.b -= etas[k] / n as f64 * bias_grad;
            let cfg = &self.cfg[k];
            if cfg.project {
                let r2 = 1.0 / cfg.lambda;
                let w2 = sc.s * sc.s * sc.vnorm2.max(0.0);
                if w2 > r2 {
                    sc.s *= (r2 / w2).sqrt();
                }
            }
            if self.sc[k].s < RENORM_BELOW {
                self.renormalize(k);
            }
            if average {
                let sc = &mut self.sc[k];
                sc.big_b += sc.s;
                sc.bias_sum += sc.b;
                sc.averaged += 1;
            }
        }
        tallies
    }

    /// Fold lane `k`'s scale into its weights (keeps its average intact).
    fn renormalize(&mut self, k: usize) {
        let l = self.lanes;
        let sc = &mut self.sc[k];
        let s = sc.s;
        if s == 0.0 {
            // The shrink zeroed w (a first step of 1/λ): fold the running sum
            // into U and restart v from zero, so the average stays finite.
            for j in 0..self.dim {
                self.u[j * l + k] += sc.big_b * self.v[j * l + k];
                self.v[j * l + k] = 0.0;
            }
            sc.big_b = 0.0;
            sc.vnorm2 = 0.0;
            sc.s = 1.0;
            return;
        }
        let mut n2 = 0.0;
        for j in 0..self.dim {
            let x = &mut self.v[j * l + k];
            *x *= s;
            n2 += *x * *x;
        }
        sc.vnorm2 = n2;
        sc.big_b /= s;
        sc.s = 1.0;
    }

    /// λ/2·‖w‖² of lane `k`'s current iterate.
    pub fn regularizer(&self, k: usize) -> f64 {
        let sc = &self.sc[k];
        0.5 * self.cfg[k].lambda * sc.s * sc.s * sc.vnorm2.max(0.0)
    }

    /// The averaged iterate of every lane (the current one before a lane's
    /// averaging started), as model weights and bias, in lane order. One
    /// sequential pass over the interleaved weights.
    pub fn averaged(&self) -> Vec<(Vec<f32>, f32)> {
        let l = self.lanes;
        let mut out: Vec<(Vec<f32>, f32)> = self
            .sc
            .iter()
            .map(|sc| {
                let b = if sc.averaged == 0 {
                    sc.b
                } else {
                    sc.bias_sum / sc.averaged as f64
                };
                (Vec::with_capacity(self.dim), b as f32)
            })
            .collect();
        // Per lane: w = a·u + c·v with (a, c) = (0, s) before averaging and
        // (1/n, B/n) after it; written as (u + B·v)/n to round like `Linear`.
        for (uj, vj) in self.u.chunks_exact(l).zip(self.v.chunks_exact(l)) {
            for (k, sc) in self.sc.iter().enumerate() {
                let w = if sc.averaged == 0 {
                    sc.s * vj[k]
                } else {
                    (uj[k] + sc.big_b * vj[k]) / sc.averaged as f64
                };
                out[k].0.push(w as f32);
            }
        }
        out
    }
}

/// `Σ v[j·L + k]·x_j` for every lane `k` of row `x`, into `out` (length `L`).
#[inline]
fn lane_margins(
    v: &[f64],
    l: usize,
    dim: usize,
    x: &Row<'_>,
    idf: Option<&[f32]>,
    out: &mut [f64],
) {
    out.fill(0.0);
    let mask = dim - 1;
    for (&i, &val) in x.indices.iter().zip(x.values) {
        let j = i as usize & mask;
        let xv = match idf {
            Some(idf) => (val * idf[j]) as f64,
            None => val as f64,
        };
        let w = &v[j * l..j * l + l];
        for (o, &wk) in out.iter_mut().zip(w) {
            *o += wk * xv;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::solver::{MemRows, Trainer};
    use rand::{Rng, SeedableRng};

    fn data(seed: u64, n: usize, dim: u32) -> MemRows {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
        let mut rows = MemRows::new();
        for _ in 0..n {
            let label = rng.random_range(0..3u32);
            let mut idx: Vec<u32> = (0..dim)
                .filter(|&j| rng.random::<f64>() < if j % 3 == label { 0.2 } else { 0.05 })
                .collect();
            idx.dedup();
            let val: Vec<f32> = idx.iter().map(|_| rng.random_range(0.1..1.0)).collect();
            rows.push(label, &idx, &val);
        }
        rows
    }

    fn cfg(lambda: f64, loss: Loss, batch: usize, project: bool) -> SolverConfig {
        SolverConfig {
            lambda,
            loss,
            batch,
            eta0: if loss == Loss::SquaredHinge {
                0.01
            } else {
                1.0
            },
            project,
            average_from: 1,
        }
    }

    /// Every lane follows the same trajectory as a separate `Trainer` with its
    /// settings, over batches below and above the parallel threshold.
    #[test]
    fn lanes_match_separate_trainers() {
        let dim = 256;
        let rows = data(3, 900, dim as u32);
        for batch in [5, 70] {
            let settings = [
                (Target::Class(0), cfg(1e-2, Loss::Hinge, batch, false)),
                (Target::Class(0), cfg(1e-3, Loss::Logistic, batch, true)),
                (
                    Target::Class(1),
                    cfg(1e-4, Loss::SquaredHinge, batch, false),
                ),
                (Target::Class(2), cfg(1e-3, Loss::Hinge, batch, true)),
            ];
            let weights = vec![1.0, 2.0, 0.5];
            let mut lanes = Lanes::new(dim, settings.to_vec(), weights.clone(), None).unwrap();
            let mut solo: Vec<Trainer> = settings
                .iter()
                .map(|(t, c)| {
                    Trainer::new(dim, vec![t.clone()], weights.clone(), c.clone(), None).unwrap()
                })
                .collect();
            let order: Vec<usize> = (0..rows.len()).collect();
            for epoch in 0..3 {
                for b in order.chunks(batch) {
                    let tl = lanes.step(&rows, b, epoch >= 1);
                    for (k, t) in solo.iter_mut().enumerate() {
                        let ts = t.step(&rows, b, epoch >= 1);
                        assert!((ts.loss - tl[k].loss).abs() <= 1e-9 * (1.0 + ts.loss.abs()));
                    }
                }
            }
            for (k, t) in solo.iter().enumerate() {
                let (w1, b1) = t.models[0].averaged();
                let (w2, b2) = lanes.averaged().swap_remove(k);
                for (a, b) in w1.iter().zip(&w2) {
                    assert!(
                        (a - b).abs() <= 1e-5 * (1.0 + a.abs()),
                        "lane {k}: {a} vs {b}"
                    );
                }
                assert!((b1 - b2).abs() <= 1e-5 * (1.0 + b1.abs()));
                let r = t.regularizer();
                assert!((r - lanes.regularizer(k)).abs() <= 1e-6 * (1.0 + r));
            }
        }
    }

    #[test]
    fn bad_settings_are_refused() {
        let c = cfg(1e-3, Loss::Hinge, 8, false);
        assert!(Lanes::new(100, vec![(Target::Class(0), c.clone())], vec![], None).is_err());
        assert!(Lanes::new(64, vec![], vec![], None).is_err());
        let other = cfg(1e-3, Loss::Hinge, 16, false);
        assert!(Lanes::new(
            64,
            vec![(Target::Class(0), c), (Target::Class(0), other)],
            vec![],
            None
        )
        .is_err());
    }
}
