//! The solver: averaged Pegasos-style stochastic sub-gradient descent for
//! regularised linear classifiers.
//!
//! Objective (per class model in one-vs-rest):
//!
//! ```text
//! F(w, b) = λ/2·‖w‖² + (1/n)·Σᵢ cᵢ·loss(yᵢ(w·xᵢ + b)),   b unregularised
//! ```
//!
//! Step `t = 0, 1, …` (one mini-batch `Bₜ` of size `k`) with `ηₜ = 1/(λ(t + t₀))`
//! (Shalev-Shwartz, Singer, Srebro, Cotter 2011, "Pegasos"). The offset is
//! `t₀ = max(1, 1/(λ·η₀·k))`: the first step is `k·η₀` on the mean gradient of the
//! batch, which moves as far as `k` single steps of `η₀` (the linear scaling of
//! step size with batch size, common practice), so an epoch makes the same
//! progress whatever the batch size. With `t₀ = 1` the first shrink factor
//! is 0; the scale then restarts at 1 from `v = 0` (see `renormalize`):
//!
//! ```text
//! w ← (1 − ηₜλ)·w − (ηₜ/k)·Σ_{i∈Bₜ} cᵢ·loss'(mᵢ)·yᵢ·xᵢ        mᵢ = yᵢ(w·xᵢ + b)
//! b ← b − (ηₜ/k)·Σ_{i∈Bₜ} cᵢ·loss'(mᵢ)·yᵢ
//! optionally w ← min(1, (1/√λ)/‖w‖)·w                          (projection)
//! ```
//!
//! **Scale trick.** `w = s·v`: the shrink is `s ← s(1 − ηλ)` and the sparse part
//! updates `v` by `−(η/(k·s))·g·x`, so a step costs O(nnz). When `s` falls below
//! `1e-9` (or `v` grows large) `v` is multiplied by `s` and `s` reset to 1, so
//! nothing underflows or overflows.
//!
//! **Lazy averaging** (the sparse averaged SGD of Xu 2011; Bottou 2012, "Stochastic
//! Gradient Descent Tricks", gives the form w̄ = (A + αW)/β). From the first step
//! of epoch `average_from` on, the sum of the iterates is kept as `U + B·v`: when
//! `v` changes by a sparse `δ` and the scale becomes `s'`, then `U ← U − B·δ` and
//! `B ← B + s'`; a renormalisation of `v` by `s` divides `B` by `s`. The average is
//! `(U + B·v)/K` after `K` averaged steps, and this is the model written.

pub mod lanes;
pub mod mix;
pub mod order;

use std::time::Instant;

use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};
use crate::shard::{Row, Shard};
use crate::util::{prefetch, HugeVec};

/// Loss functions of the margin `m = y(w·x + b)`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, clap::ValueEnum)]
#[serde(rename_all = "kebab-case")]
pub enum Loss {
    /// `max(0, 1 − m)`: the soft-margin support vector machine.
    Hinge,
    /// `ln(1 + e^(−m))`: logistic regression; scores map to probabilities.
    Logistic,
    /// `max(0, 1 − m)²`: smooth, penalises violations more.
    SquaredHinge,
}

impl Loss {
    /// The loss at margin `m`.
    #[inline]
    pub fn value(self, m: f64) -> f64 {
        match self {
            Loss::Hinge => (1.0 - m).max(0.0),
            Loss::Logistic => {
                if m > 0.0 {
                    (-m).exp().ln_1p()
                } else {
                    -m + m.exp().ln_1p()
                }
            }
            Loss::SquaredHinge => {
                let h = (1.0 - m).max(0.0);
                h * h
            }
        }
    }

    /// A (sub)derivative of the loss with respect to `m`.
    #[inline]
    pub fn derivative(self, m: f64) -> f64 {
        match self {
            Loss::Hinge => {
                if m < 1.0 {
                    -1.0
                } else {
                    0.0
                }
            }
            Loss::Logistic => {
                if m > 0.0 {
                    let e = (-m).exp();
                    -e / (1.0 + e)
                } else {
                    -1.0 / (1.0 + m.exp())
                }
            }
            Loss::SquaredHinge => -2.0 * (1.0 - m).max(0.0),
        }
    }

    /// Name used in files and tables.
    pub fn name(self) -> &'static str {
        match self {
            Loss::Hinge => "hinge",
            Loss::Logistic => "logistic",
            Loss::SquaredHinge => "squared-hinge",
        }
    }
}

/// Rows the solver can read: a shard, or rows held in memory (tests, benches).
pub trait Rows: Sync {
    /// Number of rows.
    fn len(&self) -> usize;
    /// Whether there are no rows.
    fn is_empty(&self) -> bool {
        self.len() == 0
    }
    /// Row `i`.
    fn row(&self, i: usize) -> Row<'_>;
    /// Hint that row `i` will be read soon (start loading where it is
    /// described); never changes a result. Does nothing unless overridden.
    #[inline]
    fn prefetch(&self, i: usize) {
        let _ = i;
    }
}

impl<B: AsRef<[u8]> + Sync> Rows for Shard<B> {
    fn len(&self) -> usize {
        self.rows()
    }
    fn row(&self, i: usize) -> Row<'_> {
        Shard::row(self, i)
    }
    #[inline]
    fn prefetch(&self, i: usize) {
        if let (Some(p), Some(l)) = (self.indptr().get(i), self.labels().get(i)) {
            prefetch(p);
            prefetch(l);
        }
    }
}

/// Rows held in memory in CSR form.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct MemRows {
    /// Row offsets (`len + 1`).
    pub indptr: Vec<usize>,
    /// Column indices.
    pub indices: Vec<u32>,
    /// Values.
    pub values: Vec<f32>,
    /// Class ids.
    pub labels: Vec<u32>,
}

impl MemRows {
    /// An empty set.
    pub fn new() -> Self {
        MemRows {
            indptr: vec![0],
            ..Default::default()
        }
    }

    /// Append a row (indices strictly increasing).
    pub fn push(&mut self, label: u32, indices: &[u32], values: &[f32]) {
        self.indices.extend_from_slice(indices);
        self.values.extend_from_slice(values);
        self.indptr.push(self.indices.len());
        self.labels.push(label);
    }
}

impl Rows for MemRows {
    fn len(&self) -> usize {
        self.labels.len()
    }
    fn row(&self, i: usize) -> Row<'_> {
        let (a, b) = (self.indptr[i], self.indptr[i + 1]);
        Row {
            label: self.labels[i],
            indices: &self.indices[a..b],
            values: &self.values[a..b],
        }
    }
}

/// Settings of a training run.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SolverConfig {
    /// Regularisation strength λ > 0.
    pub lambda: f64,
    /// Loss.
    pub loss: Loss,
    /// Rows per step.
    pub batch: usize,
    /// First step size η₀ (sets the offset t₀ = max(1, 1/(λ·η₀))).
    pub eta0: f64,
    /// Project onto the ball of radius 1/√λ after each step.
    pub project: bool,
    /// Epoch (0-based) from whose first step the iterates are averaged.
    pub average_from: u32,
}

impl SolverConfig {
    /// Check ranges.
    pub fn validate(&self) -> Result<()> {
        if !(self.lambda > 0.0 && self.lambda.is_finite()) {
            return Err(Error::Invalid(format!(
                "--lambda must be a positive number, got {}",
                self.lambda
            )));
        }
        if self.batch == 0 || self.batch > 1 << 20 {
            return Err(Error::Invalid(format!(
                "--batch must be in 1..=1048576, got {}",
                self.batch
            )));
        }
        if !(self.eta0 > 0.0 && self.eta0.is_finite()) {
            return Err(Error::Invalid(format!(
                "--eta0 must be a positive number, got {}",
                self.eta0
            )));
        }
        Ok(())
    }

    /// The step offset t₀ = max(1, 1/(λ·η₀·batch)).
    pub fn t0(&self) -> f64 {
        (1.0 / (self.lambda * self.eta0 * self.batch as f64)).max(1.0)
    }

    /// The step size of step `t` (from 0).
    pub fn eta(&self, t: u64) -> f64 {
        1.0 / (self.lambda * (t as f64 + self.t0()))
    }
}

/// One linear model `w·x + b` with `w = s·v` and its lazily kept average.
#[derive(Debug, Clone, PartialEq)]
pub struct Linear {
    v: HugeVec,
    s: f64,
    b: f64,
    /// ‖v‖², kept for the projection.
    vnorm2: f64,
    u: HugeVec,
    big_b: f64,
    bias_sum: f64,
    averaged: u64,
}

const RENORM_BELOW: f64 = 1e-9;

impl Linear {
    /// A zero model over `dim` features.
    pub fn new(dim: usize) -> Self {
        Linear {
            v: HugeVec::zeroed(dim),
            s: 1.0,
            b: 0.0,
            vnorm2: 0.0,
            u: HugeVec::zeroed(dim),
            big_b: 0.0,
            bias_sum: 0.0,
            averaged: 0,
        }
    }

    /// A model starting from weights `w` and bias `b`.
    pub fn from_weights(w: &[f32], b: f32) -> Self {
        let mut m = Linear::new(w.len());
        for (v, &x) in m.v.iter_mut().zip(w) {
            *v = x as f64;
        }
        m.vnorm2 = m.v.iter().map(|x| x * x).sum();
        m.b = b as f64;
        m
    }

    /// Number of features.
    pub fn dim(&self) -> usize {
        self.v.len()
    }

    /// The whole state, for checkpoints: `v`, `U`, the scalars
    /// `[s, b, ‖v‖², B, Σb]` and the number of averaged steps.
    pub fn state(&self) -> (&[f64], &[f64], [f64; 5], u64) {
        (
            &self.v,
            &self.u,
            [self.s, self.b, self.vnorm2, self.big_b, self.bias_sum],
            self.averaged,
        )
    }

    /// Rebuild a model from [`Linear::state`] (`v` and `u` are copied).
    pub fn from_state(v: &[f64], u: &[f64], scalars: [f64; 5], averaged: u64) -> Self {
        let [s, b, vnorm2, big_b, bias_sum] = scalars;
        Linear {
            v: HugeVec::from(v),
            s,
            b,
            vnorm2,
            u: HugeVec::from(u),
            big_b,
            bias_sum,
            averaged,
        }
    }

    /// Fold the scale into the arrays: `U += B·v`, then `v = s·v`, `s = 1`,
    /// `B = 0` (the iterate and the sum of iterates keep their values). Returns
    /// `v`, `U` and the scalars `[s, b, ‖v‖², B, Σb]` for a mix across
    /// processes, which must put them back with [`Linear::set_scalars`].
    pub(crate) fn fold_scale(&mut self) -> (&mut [f64], &mut [f64], [f64; 5]) {
        let (s, big_b) = (self.s, self.big_b);
        if s != 1.0 || big_b != 0.0 {
            for (v, u) in self.v.iter_mut().zip(self.u.iter_mut()) {
                *u += big_b * *v;
                *v *= s;
            }
            self.vnorm2 *= s * s;
            self.s = 1.0;
            self.big_b = 0.0;
        }
        let scalars = [self.s, self.b, self.vnorm2, self.big_b, self.bias_sum];
        (&mut self.v, &mut self.u, scalars)
    }

    /// Make this model a copy of `other` (of the same dimension), in place:
    /// no new memory, unlike `clone`.
    pub(crate) fn assign(&mut self, other: &Linear) {
        self.v.copy_from_slice(&other.v);
        self.u.copy_from_slice(&other.u);
        self.s = other.s;
        self.b = other.b;
        self.vnorm2 = other.vnorm2;
        self.big_b = other.big_b;
        self.bias_sum = other.bias_sum;
        self.averaged = other.averaged;
    }

    /// Set `[s, b, ‖v‖², B, Σb]` (after [`Linear::fold_scale`]).
    pub(crate) fn set_scalars(&mut self, [s, b, vnorm2, big_b, bias_sum]: [f64; 5]) {
        self.s = s;
        self.b = b;
        self.vnorm2 = vnorm2;
        self.big_b = big_b;
        self.bias_sum = bias_sum;
    }

    /// `w·x + b` with the current iterate; indices are masked to the dimension
    /// (a damaged shard cannot index out of bounds).
    #[inline]
    pub fn margin(&self, x: &Row<'_>, idf: Option<&[f32]>) -> f64 {
        let mask = self.v.len() - 1;
        let mut acc = 0.0f64;
        match idf {
            None => {
                for (&i, &val) in x.indices.iter().zip(x.values) {
                    acc += self.v[i as usize & mask] * val as f64;
                }
            }
            Some(idf) => {
                for (&i, &val) in x.indices.iter().zip(x.values) {
                    let j = i as usize & mask;
                    acc += self.v[j] * (val * idf[j]) as f64;
                }
            }
        }
        self.s * acc + self.b
    }

    /// Take one step: shrink by `1 − ηλ`, add `−η/k · Σ coef_i x_i` where
    /// `coef_i = cᵢ·loss'(mᵢ)·yᵢ` (zero entries skipped), update the bias and
    /// the average. With `splits` (per row, the offsets where its indices enter
    /// each of [`RANGES`] equal slices of the dimension), the slices are updated
    /// in parallel; the result does not depend on the number of threads.
    /// `on_pool` says whether the slices run on the rayon pool or one after
    /// the other on this thread: the same numbers either way.
    #[allow(clippy::too_many_arguments)]
    fn step(
        &mut self,
        xs: &[Row<'_>],
        coefs: &[f64],
        idf: Option<&[f32]>,
        eta: f64,
        cfg: &SolverConfig,
        average: bool,
        splits: Option<&[[u32; RANGES + 1]]>,
        on_pool: bool,
    ) {
        let k = xs.len() as f64;
        self.s *= 1.0 - eta * cfg.lambda;
        if self.s < RENORM_BELOW {
            self.renormalize();
        }
        let scale = eta / (k * self.s);
        let big_b = if average { self.big_b } else { 0.0 };
        let bias_grad: f64 = coefs.iter().sum();
        let mask = self.v.len() - 1;
        match splits {
            None => {
                self.prefetch_update(xs, coefs, big_b != 0.0);
                let mut dn = 0.0;
                for (x, &c) in xs.iter().zip(coefs) {
                    if c == 0.0 {
                        continue;
                    }
                    dn += apply(
                        &mut self.v,
                        &mut self.u,
                        mask,
                        0,
                        mask,
                        x,
                        0..x.indices.len(),
                        -scale * c,
                        big_b,
                        idf,
                    );
                }
                self.vnorm2 += dn;
            }
            Some(splits) => {
                let width = self.v.len() / RANGES;
                let slice = |(q, (v, u)): (usize, (&mut [f64], &mut [f64]))| {
                    let base = q * width;
                    for ((x, &c), sp) in xs.iter().zip(coefs).zip(splits) {
                        if c == 0.0 {
                            continue;
                        }
                        for &i in &x.indices[sp[q] as usize..sp[q + 1] as usize] {
                            let j = (i as usize & mask).wrapping_sub(base) & (width - 1);
                            prefetch(&v[j]);
                            if big_b != 0.0 {
                                prefetch(&u[j]);
                            }
                        }
                    }
                    let mut dn = 0.0;
                    for ((x, &c), sp) in xs.iter().zip(coefs).zip(splits) {
                        if c == 0.0 || sp[q] == sp[q + 1] {
                            continue;
                        }
                        dn += apply(
                            v,
                            u,
                            mask,
                            q * width,
                            width - 1,
                            x,
                            sp[q] as usize..sp[q + 1] as usize,
                            -scale * c,
                            big_b,
                            idf,
                        );
                    }
                    dn
                };
                let parts: [f64; RANGES] = if on_pool {
                    let mut parts = [0.0; RANGES];
                    let got: Vec<f64> = self
                        .v
                        .par_chunks_mut(width)
                        .zip(self.u.par_chunks_mut(width))
                        .enumerate()
                        .map(slice)
                        .collect();
                    parts.copy_from_slice(&got);
                    parts
                } else {
                    let mut parts = [0.0; RANGES];
                    for (p, vu) in parts.iter_mut().zip(
                        self.v
                            .chunks_mut(width)
                            .zip(self.u.chunks_mut(width))
                            .enumerate(),
                    ) {
                        *p = slice(vu);
                    }
                    parts
                };
                self.vnorm2 += parts.iter().sum::<f64>();
            }
        }
        self.b -= eta / k * bias_grad;
        if cfg.project {
            let r2 = 1.0 / cfg.lambda;
            let w2 = self.s * self.s * self.vnorm2.max(0.0);
            if w2 > r2 {
                self.s *= (r2 / w2).sqrt();
                if self.s < RENORM_BELOW {
                    self.renormalize();
                }
            }
        }
        if average {
            self.big_b += self.s;
            self.bias_sum += self.b;
            self.averaged += 1;
        }
    }

    /// Fold the scale into `v` (keeps the average intact).
    fn renormalize(&mut self) {
        let s = self.s;
        if s == 0.0 {
            // The shrink zeroed w (a first step of 1/λ): fold the running sum
            // into U and restart v from zero, so the average stays finite.
            for (u, v) in self.u.iter_mut().zip(self.v.iter_mut()) {
                *u += self.big_b * *v;
                *v = 0.0;
            }
            self.big_b = 0.0;
            self.vnorm2 = 0.0;
            self.s = 1.0;
            return;
        }
        for x in self.v.iter_mut() {
            *x *= s;
        }
        self.vnorm2 = self.v.iter().map(|x| x * x).sum();
        self.big_b /= s;
        self.s = 1.0;
    }

    /// The current iterate `w` and `b`.
    pub fn current(&self) -> (Vec<f32>, f32) {
        (
            self.v.iter().map(|&x| (self.s * x) as f32).collect(),
            self.b as f32,
        )
    }

    /// The averaged iterate (or the current one before averaging started).
    pub fn averaged(&self) -> (Vec<f32>, f32) {
        if self.averaged == 0 {
            return self.current();
        }
        let k = self.averaged as f64;
        (
            self.u
                .iter()
                .zip(self.v.iter())
                .map(|(&u, &v)| ((u + self.big_b * v) / k) as f32)
                .collect(),
            (self.bias_sum / k) as f32,
        )
    }

    /// Averaged steps taken.
    pub fn averaged_steps(&self) -> u64 {
        self.averaged
    }
}

/// Start loading a row's indices and values (up to 32 entries each).
#[inline(always)]
pub(crate) fn prefetch_row(x: &Row<'_>) {
    for part in [x.indices.first(), x.indices.get(16), x.indices.last()]
        .into_iter()
        .flatten()
    {
        prefetch(part);
    }
    for part in [x.values.first(), x.values.get(16), x.values.last()]
        .into_iter()
        .flatten()
    {
        prefetch(part);
    }
}

/// Rows whose weights are prefetched together before their margins are summed.
const PREFETCH_ROWS: usize = 8;

impl Linear {
    /// `w·x + b` for every row of `xs` into `out` (same values as
    /// [`Linear::margin`]), loading the weights of a block of rows ahead of use.
    fn margins_into(&self, xs: &[Row<'_>], idf: Option<&[f32]>, out: &mut [f64]) {
        let mask = self.v.len() - 1;
        // The rows themselves sit at random places of the shards.
        for x in xs {
            prefetch_row(x);
        }
        for (block, out) in xs.chunks(PREFETCH_ROWS).zip(out.chunks_mut(PREFETCH_ROWS)) {
            for x in block {
                for &i in x.indices {
                    prefetch(&self.v[i as usize & mask]);
                }
            }
            for (x, o) in block.iter().zip(out) {
                *o = self.margin(x, idf);
            }
        }
    }

    /// Start loading the entries of `v` (and of `U` when averaging) that the
    /// update of rows `xs` with nonzero coefficients will touch.
    fn prefetch_update(&self, xs: &[Row<'_>], coefs: &[f64], average: bool) {
        let mask = self.v.len() - 1;
        for (x, &c) in xs.iter().zip(coefs) {
            if c == 0.0 {
                continue;
            }
            for &i in x.indices {
                let j = i as usize & mask;
                prefetch(&self.v[j]);
                if average {
                    prefetch(&self.u[j]);
                }
            }
        }
    }
}

/// Slices of the dimension updated in parallel by a binary model's step (fixed,
/// so results do not depend on the number of threads).
pub const RANGES: usize = 4;

/// Where a row's indices enter each of the [`RANGES`] equal slices of a
/// dimension `dim` (a power of two): entry `q` is the first position whose
/// bucket is in slice `q` or later; the last is the row's length. Monotone and
/// within the row even for a damaged shard whose indices are out of order.
#[inline]
pub(crate) fn slice_splits(indices: &[u32], dim: usize) -> [u32; RANGES + 1] {
    let width = (dim / RANGES) as u32;
    let dmask = dim as u32 - 1;
    let n = indices.len() as u32;
    let mut sp = [n; RANGES + 1];
    sp[0] = 0;
    for q in 1..RANGES {
        let lim = q as u32 * width;
        sp[q] = (indices.partition_point(|&i| (i & dmask) < lim) as u32)
            .max(sp[q - 1])
            .min(n);
    }
    sp
}
/// Batches at least this large take the parallel path.
pub const PARALLEL_BATCH: usize = 64;

/// Add `f·x` over the entries `span` of row `x` to the slice `v` (covering
/// features `base..base+mask+1` of a dimension with mask `dim_mask`), and
/// `−big_b·f·x` to `u`; returns the change of ‖v‖². Indices are masked, so a
/// damaged row cannot index out of bounds.
#[allow(clippy::too_many_arguments)]
#[inline]
fn apply(
    v: &mut [f64],
    u: &mut [f64],
    dim_mask: usize,
    base: usize,
    mask: usize,
    x: &Row<'_>,
    span: std::ops::Range<usize>,
    f: f64,
    big_b: f64,
    idf: Option<&[f32]>,
) -> f64 {
    let mut dn = 0.0;
    for (&i, &val) in x.indices[span.clone()].iter().zip(&x.values[span]) {
        let g = i as usize & dim_mask;
        let j = g.wrapping_sub(base) & mask;
        let xv = match idf {
            Some(idf) => (val * idf[g]) as f64,
            None => val as f64,
        };
        let d = f * xv;
        let old = v[j];
        let new = old + d;
        dn += new * new - old * old;
        v[j] = new;
        if big_b != 0.0 {
            u[j] -= big_b * d;
        }
    }
    dn
}

/// The binary targets of a model: which class ids count as positive.
#[derive(Debug, Clone, PartialEq)]
pub enum Target {
    /// Positive when the class id equals this one.
    Class(u32),
}

impl Target {
    #[inline]
    fn y(&self, label: u32) -> f64 {
        match self {
            Target::Class(c) => {
                if label == *c {
                    1.0
                } else {
                    -1.0
                }
            }
        }
    }
}

/// A block of a binary step's margins and slice offsets, written together.
type MarginBlock<'a> = (&'a mut [f64], &'a mut [[u32; RANGES + 1]]);

/// Decides, by measuring, whether a binary model's steps run their parallel
/// parts (margins by blocks of rows, the update by slices of the dimension) on
/// the rayon pool or one after the other on the calling thread. Both compute
/// the same numbers in the same order, so the choice changes speed only.
///
/// A step is a few microseconds of memory-bound work; whether splitting it
/// between cores pays depends on the machine (on some virtual machines two
/// threads reading memory at random go barely faster than one, and the
/// hand-over costs more than it saves). So every [`Chooser::EVERY`] steps both
/// ways are timed on alternating runs of [`Chooser::TRIAL`] steps, and the
/// faster per nonzero is used until the next trial.
#[derive(Debug, Clone, Default)]
struct Chooser {
    /// Steps recorded so far.
    steps: u64,
    /// Nanoseconds and nonzeros of the current trial, per way (pool, thread).
    trial: [(u128, u64); 2],
    /// The way chosen by the last trial.
    pool: bool,
}

impl Chooser {
    /// Steps per timed run of one way.
    const TRIAL: u64 = 128;
    /// Runs in a trial (alternating ways).
    const RUNS: u64 = 6;
    /// Steps from one trial to the next.
    const EVERY: u64 = 20_000;

    /// Whether the next step should use the pool.
    fn on_pool(&self) -> bool {
        if rayon::current_num_threads() < 2 {
            return false;
        }
        let at = self.steps % Self::EVERY;
        if at < Self::TRIAL * Self::RUNS {
            (at / Self::TRIAL).is_multiple_of(2)
        } else {
            self.pool
        }
    }

    /// Record a step that took `took` over `nnz` nonzeros.
    fn record(&mut self, pool: bool, took: std::time::Duration, nnz: u64) {
        let at = self.steps % Self::EVERY;
        if at < Self::TRIAL * Self::RUNS {
            let t = &mut self.trial[usize::from(!pool)];
            t.0 += took.as_nanos();
            t.1 += nnz;
            if at + 1 == Self::TRIAL * Self::RUNS {
                let per = |(ns, nnz): (u128, u64)| ns as f64 / nnz.max(1) as f64;
                self.pool = per(self.trial[0]) < per(self.trial[1]);
                self.trial = [(0, 0); 2];
            }
        }
        self.steps += 1;
    }
}

/// Training state of all models of a task (one for binary, one per class for
/// one-vs-rest), sharing one read of each row.
#[derive(Clone)]
pub struct Trainer {
    /// The models.
    pub models: Vec<Linear>,
    targets: Vec<Target>,
    /// Per class id: the example weight cᵢ.
    pub class_weights: Vec<f64>,
    /// Configuration.
    pub cfg: SolverConfig,
    /// Steps taken so far: batches, counted over all replicas (a replica
    /// advances it by `Trainer::stride` a step).
    pub t: u64,
    /// Replicas taking batches in turn (1: a single copy); see
    /// [`Trainer::set_stride`].
    stride: u64,
    idf: Option<Vec<f32>>,
    coefs: Vec<Vec<f64>>,
    margins: Vec<f64>,
    splits: Vec<[u32; RANGES + 1]>,
    chooser: Chooser,
    /// Binary steps as one sequential pass (replicas that already run side by
    /// side).
    solo: bool,
}

/// Sums gathered while training on a batch or evaluating a set.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Tally {
    /// Rows seen.
    pub rows: u64,
    /// Nonzeros read.
    pub nnz: u64,
    /// Sum of cᵢ·loss over rows, summed over models.
    pub loss: f64,
}

impl Trainer {
    /// A trainer for `targets` (one model each) over `dim` features.
    pub fn new(
        dim: usize,
        targets: Vec<Target>,
        class_weights: Vec<f64>,
        cfg: SolverConfig,
        idf: Option<Vec<f32>>,
    ) -> Result<Self> {
        cfg.validate()?;
        if !dim.is_power_of_two() {
            return Err(Error::Invalid(format!(
                "dimension {dim} is not a power of two"
            )));
        }
        Ok(Trainer {
            models: targets.iter().map(|_| Linear::new(dim)).collect(),
            coefs: vec![Vec::new(); targets.len()],
            targets,
            class_weights,
            cfg,
            t: 0,
            idf,
            margins: Vec::new(),
            splits: Vec::new(),
            chooser: Chooser::default(),
            solo: false,
            stride: 1,
        })
    }

    /// Replace the models (warm start); dimensions must match.
    pub fn set_models(&mut self, models: Vec<Linear>) -> Result<()> {
        if models.len() != self.models.len()
            || models.iter().any(|m| m.dim() != self.models[0].dim())
        {
            return Err(Error::Invalid(
                "warm-start models do not match the task".into(),
            ));
        }
        self.models = models;
        Ok(())
    }

    /// One step over the rows `batch` of `rows`. Margins are computed in
    /// parallel against the current weights; each model's update is applied in
    /// row order, models in parallel, so the result does not depend on the
    /// number of threads.
    pub fn step<R: Rows + ?Sized>(&mut self, rows: &R, batch: &[usize], average: bool) -> Tally {
        let eta = self.eta();
        self.t += self.stride;
        let cfg = &self.cfg;
        let idf = self.idf.as_deref();
        let weights = &self.class_weights;
        // Resolve the batch's rows once; every phase below works on the slices.
        // Rows are drawn at random places of the shards: start loading where
        // each is described before reading any of them.
        for &r in batch {
            rows.prefetch(r);
        }
        let xs: Vec<Row<'_>> = batch.iter().map(|&r| rows.row(r)).collect();
        let tally = Tally {
            rows: xs.len() as u64,
            nnz: xs.iter().map(|x| x.indices.len() as u64).sum(),
            loss: 0.0,
        };
        let losses: Vec<f64> = if self.models.len() == 1 {
            // Binary: rows in parallel for the margins (and where each row's
            // indices enter each slice of the dimension), then slices in parallel.
            let m = &self.models[0];
            let target = &self.targets[0];
            let parallel = xs.len() >= PARALLEL_BATCH && !self.solo;
            let dim = m.dim();
            self.margins.clear();
            self.splits.clear();
            self.margins.resize(xs.len(), 0.0);
            let on_pool = parallel && self.chooser.on_pool();
            let timer = parallel.then(Instant::now);
            if parallel {
                self.splits.resize(xs.len(), [0; RANGES + 1]);
                // Blocks of rows: each block's weights are prefetched, then its
                // margins and slice offsets computed.
                let block = PARALLEL_BATCH / 2;
                let margins = |((mg, sps), rows): (MarginBlock<'_>, &[Row<'_>])| {
                    m.margins_into(rows, idf, mg);
                    for (x, sp) in rows.iter().zip(sps) {
                        *sp = slice_splits(x.indices, dim);
                    }
                };
                if on_pool {
                    self.margins
                        .par_chunks_mut(block)
                        .zip(self.splits.par_chunks_mut(block))
                        .zip(xs.par_chunks(block))
                        .for_each(margins);
                } else {
                    self.margins
                        .chunks_mut(block)
                        .zip(self.splits.chunks_mut(block))
                        .zip(xs.chunks(block))
                        .for_each(margins);
                }
            } else {
                m.margins_into(&xs, idf, &mut self.margins);
            }
            let coefs = &mut self.coefs[0];
            coefs.clear();
            let mut loss = 0.0;
            for (x, &mg) in xs.iter().zip(&self.margins) {
                let y = target.y(x.label);
                let c = weights.get(x.label as usize).copied().unwrap_or(1.0);
                loss += c * cfg.loss.value(y * mg);
                coefs.push(c * cfg.loss.derivative(y * mg) * y);
            }
            let splits = parallel.then_some(&self.splits[..]);
            self.models[0].step(&xs, coefs, idf, eta, cfg, average, splits, on_pool);
            if let Some(t) = timer {
                self.chooser.record(on_pool, t.elapsed(), tally.nnz);
            }
            vec![loss]
        } else {
            // One-vs-rest: models in parallel, each over the whole batch.
            let xs = &xs;
            self.models
                .par_iter_mut()
                .zip(self.coefs.par_iter_mut())
                .zip(self.targets.par_iter())
                .map(|((m, coefs), target)| {
                    // The margins go into `coefs` first, then become coefficients.
                    coefs.clear();
                    coefs.resize(xs.len(), 0.0);
                    m.margins_into(xs, idf, coefs);
                    let mut loss = 0.0;
                    for (x, cf) in xs.iter().zip(coefs.iter_mut()) {
                        let y = target.y(x.label);
                        let c = weights.get(x.label as usize).copied().unwrap_or(1.0);
                        let mg = y * *cf;
                        loss += c * cfg.loss.value(mg);
                        *cf = c * cfg.loss.derivative(mg) * y;
                    }
                    m.step(xs, coefs, idf, eta, cfg, average, None, false);
                    loss
                })
                .collect()
        };
        Tally {
            loss: losses.iter().sum(),
            ..tally
        }
    }

    /// Make this trainer one of `replicas` that take batches in turn and are
    /// mixed (averaged) now and then. Each step then advances the step counter
    /// by `replicas`, and the step size follows the rounds of `R` batches:
    /// `ηₜ = 1/(λ(t/R + t₀))`, so each replica takes the steps a single copy
    /// would take on its own share of the rows. (Steps `R` times as large, so
    /// that a round's mean move matched `R` steps of one copy, were measured
    /// to do worse: like a larger batch, they leave the iterates noisier.) One
    /// replica is the plain schedule.
    pub fn set_stride(&mut self, replicas: usize) {
        self.stride = replicas.max(1) as u64;
    }

    /// The step size of the next step.
    fn eta(&self) -> f64 {
        if self.stride == 1 {
            return self.cfg.eta(self.t);
        }
        let rounds = self.t as f64 / self.stride as f64;
        1.0 / (self.cfg.lambda * (rounds + self.cfg.t0()))
    }

    /// Run binary steps as one sequential pass on the calling thread (`true`),
    /// or, for batches of at least [`PARALLEL_BATCH`] rows, by blocks of rows
    /// and slices of the dimension, on the rayon pool when that is measured to
    /// be faster (`false`, the default). Replicas that run side by side set it:
    /// the pool is busy with the others, and the sequential pass does less
    /// work than the blocks and slices done one after the other (18% faster
    /// per replica, measured side by side). Its sums are ordered differently,
    /// so the last bits may differ from the default's.
    pub fn set_solo(&mut self, solo: bool) {
        self.solo = solo;
    }

    /// A step without rows: the step counter advances and, when averaging, the
    /// current iterate is counted once more in the average, with no shrink and
    /// no update. A replica with no batch in the last round of a stretch holds,
    /// so that every replica has taken the same number of steps when they mix.
    pub fn hold(&mut self, average: bool) {
        self.t += self.stride;
        if average {
            for m in &mut self.models {
                m.big_b += m.s;
                m.bias_sum += m.b;
                m.averaged += 1;
            }
        }
    }

    /// The idf factors in use, if any.
    pub fn idf(&self) -> Option<&[f32]> {
        self.idf.as_deref()
    }

    /// λ/2·‖w‖² summed over models (current iterates).
    pub fn regularizer(&self) -> f64 {
        self.models
            .iter()
            .map(|m| 0.5 * self.cfg.lambda * m.s * m.s * m.vnorm2.max(0.0))
            .sum()
    }
}

/// Scores of a row under fixed weights (`classes × dim`, row-major) and biases.
pub fn scores(
    weights: &[f32],
    biases: &[f32],
    dim: usize,
    x: &Row<'_>,
    idf: Option<&[f32]>,
    out: &mut Vec<f64>,
) {
    out.clear();
    let mask = dim - 1;
    for (c, &b) in biases.iter().enumerate() {
        let w = &weights[c * dim..(c + 1) * dim];
        let mut acc = 0.0f64;
        for (&i, &v) in x.indices.iter().zip(x.values) {
            let j = i as usize & mask;
            let xv = match idf {
                Some(idf) => v * idf[j],
                None => v,
            };
            acc += (w[j] * xv) as f64;
        }
        out.push(acc + b as f64);
    }
}

/// The primal objective `λ/2‖w‖² + (1/n)Σ cᵢ loss(yᵢ(w·xᵢ+b))` of one binary
/// model on `rows` (used by tests and reports).
pub fn objective<R: Rows + ?Sized>(
    w: &[f32],
    b: f32,
    rows: &R,
    target: u32,
    loss: Loss,
    lambda: f64,
    weights: &[f64],
) -> f64 {
    let reg: f64 = w.iter().map(|&x| (x as f64) * (x as f64)).sum::<f64>() * lambda / 2.0;
    let mut sum = 0.0;
    let mut out = Vec::new();
    for i in 0..rows.len() {
        let x = rows.row(i);
        scores(w, &[b], w.len(), &x, None, &mut out);
        let y = if x.label == target { 1.0 } else { -1.0 };
        let c = weights.get(x.label as usize).copied().unwrap_or(1.0);
        sum += c * loss.value(y * out[0]);
    }
    reg + sum / rows.len().max(1) as f64
}

#[cfg(test)]
mod tests {
    use super::*;

    fn cfg(lambda: f64, batch: usize) -> SolverConfig {
        SolverConfig {
            lambda,
            loss: Loss::Hinge,
            batch,
            eta0: 1.0,
            project: false,
            average_from: 1,
        }
    }

    #[test]
    fn losses_and_derivatives() {
        for loss in [Loss::Hinge, Loss::Logistic, Loss::SquaredHinge] {
            for &m in &[-3.0, -0.5, 0.0, 0.3, 0.99, 1.5, 40.0, -40.0] {
                let h = 1e-6;
                if loss == Loss::Hinge && (m - 1.0f64).abs() < 1e-3 {
                    continue;
                }
                let num = (loss.value(m + h) - loss.value(m - h)) / (2.0 * h);
                assert!((num - loss.derivative(m)).abs() < 1e-4, "{loss:?} at {m}");
            }
        }
        assert!((Loss::Logistic.value(0.0) - 2f64.ln()).abs() < 1e-12);
        assert!(Loss::Logistic.value(-800.0).is_finite());
        assert_eq!(Loss::Hinge.value(2.0), 0.0);
    }

    /// Scale trick + lazy average equal the plain computation (dense w, explicit
    /// running mean) on random sparse data.
    #[test]
    fn lazy_average_matches_explicit() {
        use rand::{Rng, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(5);
        let dim = 64;
        let mut rows = MemRows::new();
        for _ in 0..300 {
            let mut idx: Vec<u32> = (0..dim as u32)
                .filter(|_| rng.random::<f64>() < 0.1)
                .collect();
            idx.dedup();
            let val: Vec<f32> = idx.iter().map(|_| rng.random_range(-1.0..1.0)).collect();
            rows.push(rng.random_range(0..2), &idx, &val);
        }
        let c = SolverConfig {
            project: true,
            ..cfg(0.01, 3)
        };
        let mut tr = Trainer::new(dim, vec![Target::Class(1)], vec![], c.clone(), None).unwrap();
        // Explicit reference.
        let mut w = vec![0.0f64; dim];
        let mut b = 0.0f64;
        let mut sum = vec![0.0f64; dim];
        let mut bsum = 0.0;
        let mut k = 0.0;
        let order: Vec<usize> = (0..rows.len()).collect();
        for (t, batch) in order.chunks(3).enumerate() {
            let average = t >= 20;
            let eta = c.eta(t as u64);
            let mut g = vec![0.0; dim];
            let mut gb = 0.0;
            for &r in batch {
                let x = rows.row(r);
                let y = if x.label == 1 { 1.0 } else { -1.0 };
                let m: f64 = x
                    .indices
                    .iter()
                    .zip(x.values)
                    .map(|(&i, &v)| w[i as usize] * v as f64)
                    .sum::<f64>()
                    + b;
                let d = Loss::Hinge.derivative(y * m) * y;
                for (&i, &v) in x.indices.iter().zip(x.values) {
                    g[i as usize] += d * v as f64;
                }
                gb += d;
            }
            let kk = batch.len() as f64;
            for j in 0..dim {
                w[j] = (1.0 - eta * c.lambda) * w[j] - eta / kk * g[j];
            }
            b -= eta / kk * gb;
            let n2: f64 = w.iter().map(|x| x * x).sum();
            if n2 > 1.0 / c.lambda {
                let f = (1.0 / c.lambda / n2).sqrt();
                w.iter_mut().for_each(|x| *x *= f);
            }
            if average {
                for j in 0..dim {
                    sum[j] += w[j];
                }
                bsum += b;
                k += 1.0;
            }
            tr.step(&rows, batch, average);
        }
        let (cw, cb) = tr.models[0].current();
        let (aw, ab) = tr.models[0].averaged();
        for j in 0..dim {
            assert!(
                (cw[j] as f64 - w[j]).abs() < 1e-4 * (1.0 + w[j].abs()),
                "current {j}"
            );
            let mean = sum[j] / k;
            assert!(
                (aw[j] as f64 - mean).abs() < 1e-4 * (1.0 + mean.abs()),
                "average {j}: {} vs {mean}",
                aw[j]
            );
        }
        assert!((cb as f64 - b).abs() < 1e-4);
        assert!((ab as f64 - bsum / k).abs() < 1e-4);
    }

    #[test]
    fn renormalisation_keeps_values() {
        let mut m = Linear::new(4);
        m.v = HugeVec::from(&[1.0, -2.0, 0.0, 4.0][..]);
        m.vnorm2 = 21.0;
        m.s = 1e-12;
        m.u = HugeVec::from(&[0.5, 0.5, 0.5, 0.5][..]);
        m.big_b = 3e-12;
        m.averaged = 2;
        let before = (m.current(), m.averaged());
        m.renormalize();
        assert_eq!(m.s, 1.0);
        let after = (m.current(), m.averaged());
        for (a, b) in before.0 .0.iter().zip(&after.0 .0) {
            assert!((a - b).abs() <= 1e-6 * a.abs().max(1e-30));
        }
        for (a, b) in before.1 .0.iter().zip(&after.1 .0) {
            assert!((a - b).abs() <= 1e-6 * a.abs().max(1e-6));
        }
    }

    /// A binary model's steps give the same bits whether their blocks and
    /// slices run on the pool or on the calling thread: a run on two threads
    /// whose first trial alternates both ways (steps 0–127 on the pool, 128–255
    /// on the thread, ...) equals a run on one thread, which never uses the pool.
    #[test]
    fn pool_and_thread_steps_agree() {
        use rand::{Rng, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(11);
        let dim = 1024;
        let mut rows = MemRows::new();
        for _ in 0..6000 {
            let mut idx: Vec<u32> = (0..12).map(|_| rng.random_range(0..dim as u32)).collect();
            idx.sort();
            idx.dedup();
            let val: Vec<f32> = idx.iter().map(|_| rng.random_range(-1.0..1.0)).collect();
            rows.push(rng.random_range(0..2), &idx, &val);
        }
        let run = |threads: usize| {
            let pool = rayon::ThreadPoolBuilder::new()
                .num_threads(threads)
                .build()
                .unwrap();
            pool.install(|| {
                let mut tr =
                    Trainer::new(dim, vec![Target::Class(1)], vec![], cfg(1e-4, 64), None).unwrap();
                let order: Vec<usize> = (0..rows.len()).collect();
                for epoch in 0..4 {
                    for b in order.chunks(64) {
                        tr.step(&rows, b, epoch >= 1);
                    }
                }
                assert!(tr.t > 2 * Chooser::TRIAL);
                let (w, b) = tr.models[0].averaged();
                (
                    w.iter().map(|x| x.to_bits()).collect::<Vec<_>>(),
                    b.to_bits(),
                )
            })
        };
        assert_eq!(run(1), run(2));
    }

    #[test]
    fn bad_settings_are_refused() {
        assert!(cfg(0.0, 1).validate().is_err());
        assert!(cfg(-1.0, 1).validate().is_err());
        assert!(cfg(f64::NAN, 1).validate().is_err());
        assert!(cfg(1e-3, 0).validate().is_err());
        assert!(Trainer::new(100, vec![Target::Class(0)], vec![], cfg(1e-3, 1), None).is_err());
    }
}
