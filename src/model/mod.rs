//! Model files: everything needed to score raw text, in one file.
//!
//! A [`crate::container`] file of kind 3, format version [`VERSION`]. Header
//! parameters: models `M` (1 for a binary task, one per class for one-vs-rest),
//! dimension `D` (`2^log2_buckets`), 1 if idf factors are stored, 0. Sections:
//!
//! | id | name      | contents                                              |
//! |----|-----------|-------------------------------------------------------|
//! | 1  | `meta`    | UTF-8 JSON [`ModelMeta`]: feature settings, labels, training settings, epoch log |
//! | 2  | `weights` | `f32`, `M × D`, model-major                           |
//! | 3  | `biases`  | `f32`, `M`                                            |
//! | 4  | `idf`     | `f32`, `D` (only when trained with idf)               |
//! | 5  | `sketch`  | the dataset's token sketch (optional; layout in [`crate::dataset::sketch`]) |
//!
//! A model without section 5 (older files, or data ingested with `--no-sketch`)
//! loads as a model without a sketch; builds that predate it ignore it.
//!
//! Written atomically; loading checks the header, sizes, every checksum and that
//! the metadata agrees with the sections.

use std::path::Path;

use serde::{Deserialize, Serialize};

use crate::calibrate::Calibration;
use crate::container::{self, cast_section, Container, ContainerWriter, Kind};
use crate::dataset::sketch::TokenSketch;
use crate::error::{Error, Result};
use crate::features::FeatureConfig;
use crate::input::InputSpec;
use crate::shard::Row;
use crate::solver::{Loss, SolverConfig};

/// Current model format version.
pub const VERSION: u32 = 1;
const SEC_META: u32 = 1;
const SEC_WEIGHTS: u32 = 2;
const SEC_BIASES: u32 = 3;
const SEC_IDF: u32 = 4;
const SEC_SKETCH: u32 = 5;

fn section_name(id: u32) -> String {
    match id {
        SEC_META => "meta".into(),
        SEC_WEIGHTS => "weights".into(),
        SEC_BIASES => "biases".into(),
        SEC_IDF => "idf".into(),
        SEC_SKETCH => "sketch".into(),
        other => format!("unknown section {other}"),
    }
}

/// One row of the per-epoch training log.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct EpochLog {
    /// Epoch number, from 1.
    pub epoch: u32,
    /// Estimated objective: λ/2‖w‖² at the end of the epoch plus the mean weighted
    /// loss seen during the epoch (summed over models).
    pub objective: f64,
    /// Mean loss on the validation split (averaged iterate), if there is one.
    pub validation_loss: Option<f64>,
    /// Accuracy on the validation split, if there is one.
    pub validation_accuracy: Option<f64>,
    /// Macro-averaged F1 on the validation split (multiclass), if there is one.
    pub validation_macro_f1: Option<f64>,
    /// Rows per second in this epoch (printed, not stored: the model file must
    /// not depend on timing).
    #[serde(skip)]
    pub rows_per_second: f64,
    /// Nonzeros per second in this epoch (printed, not stored).
    #[serde(skip)]
    pub nnz_per_second: f64,
    /// Seconds spent on this epoch, training and validation (printed, not stored).
    #[serde(skip)]
    pub seconds: f64,
}

/// How the model was trained.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TrainSettings {
    /// Solver settings.
    pub solver: SolverConfig,
    /// Epochs asked for.
    pub epochs: u32,
    /// Seed of the epoch order.
    pub seed: u64,
    /// Example weight per class id.
    pub class_weights: Vec<f64>,
    /// How class weights were chosen (`none`, `balanced` or the list given).
    pub class_weight_rule: String,
    /// Whether features were multiplied by idf factors.
    pub idf: bool,
    /// Early stopping patience, if any.
    pub patience: Option<u32>,
    /// The model this run started from (`--init-from`), if any.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub init_from: Option<WarmStart>,
    /// Replicas of the models trained side by side on alternate batches and
    /// replaced by their mean every `sync_every` rows (1: a single copy).
    #[serde(default = "one")]
    pub replicas: u32,
    /// Training rows (all replicas together) between two mixes of the
    /// replicas; every epoch also ends with one. 0 with one replica.
    #[serde(default)]
    pub sync_every: u64,
    /// Processes of a distributed run (`train --distributed`), each training
    /// `replicas` replicas on its own share of the shards; 1 (not written) for
    /// a run on one process. `sync_every` then counts the rows of all of them,
    /// and 0 mixes at epoch ends only.
    #[serde(default = "one", skip_serializing_if = "is_one")]
    pub ranks: u32,
}

fn one() -> u32 {
    1
}

fn is_one(x: &u32) -> bool {
    *x == 1
}

/// Where a warm start came from.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct WarmStart {
    /// The model file as given.
    pub model: String,
    /// Solver steps behind that model; the step counter continues from here.
    pub steps: u64,
}

/// The metadata section of a model.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ModelMeta {
    /// Always `tamis-model`.
    pub format: String,
    /// The tamis version that wrote it.
    pub written_by: String,
    /// Tokenizing and hashing settings (must match the text being scored).
    pub features: FeatureConfig,
    /// How the training data was read (scoring uses the same fields by default).
    pub input: InputSpec,
    /// Label dictionary of the dataset (position = class id).
    pub labels: Vec<String>,
    /// The positive label of a binary model; `None` for one-vs-rest.
    pub positive: Option<String>,
    /// For each model, the label it scores.
    pub model_labels: Vec<String>,
    /// Loss trained with.
    pub loss: Loss,
    /// Training settings.
    pub training: TrainSettings,
    /// Per-epoch log.
    pub epochs: Vec<EpochLog>,
    /// Fingerprint of the dataset trained on (hex).
    pub dataset_fingerprint: String,
    /// Solver steps behind the weights, counting those of a warm start's model
    /// (0 in models written before this was recorded).
    #[serde(default)]
    pub steps: u64,
    /// Thresholds and Platt scaling set by `tamis calibrate`; absent in models
    /// that were never calibrated (and in files written before it existed).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub calibration: Option<Calibration>,
}

/// Scores many rows with a model. For one-vs-rest the classes' weights of a
/// bucket are copied side by side (`w[j·M + c]`), so a nonzero costs one memory
/// access for all `M` classes instead of one per class; the copy takes as much
/// memory as the weights. Every class's sum runs over the row's nonzeros in the
/// same order and precision as [`Model::scores`], so the scores are the same,
/// bit for bit.
pub struct Scorer<'a> {
    model: &'a Model,
    interleaved: Option<Vec<f32>>,
}

impl Scorer<'_> {
    /// Scores (`w·x + b`) of a hashed row under every model.
    pub fn scores(&self, x: &Row<'_>, out: &mut Vec<f64>) {
        let Some(w) = &self.interleaved else {
            return self.model.scores(x, out);
        };
        let model = self.model;
        let m = model.models();
        let mask = model.dim() - 1;
        out.clear();
        out.resize(m, 0.0);
        // The weights of a row's buckets lie far apart in a table larger than
        // the caches: ask for all of them before summing.
        for &i in x.indices {
            let j = (i as usize & mask) * m;
            crate::util::prefetch(&w[j]);
            crate::util::prefetch(&w[j + m - 1]);
        }
        for (&i, &v) in x.indices.iter().zip(x.values) {
            let j = i as usize & mask;
            let xv = match &model.idf {
                Some(idf) => v * idf[j],
                None => v,
            };
            for (o, &wc) in out.iter_mut().zip(&w[j * m..j * m + m]) {
                *o += (wc * xv) as f64;
            }
        }
        for (o, &b) in out.iter_mut().zip(&model.biases) {
            *o += b as f64;
        }
    }
}

/// What the model decides for one record.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Decision {
    /// A class: for a binary model 1 positive, 0 negative; else the class's model.
    Class(usize),
    /// One-vs-rest with thresholds: no class cleared its threshold.
    Undecided,
}

/// How an undecided record is labelled in output (`?` keeps it apart from
/// label names, as `!` does for skipped records).
pub const UNDECIDED: &str = "?undecided";

/// A loaded model.
#[derive(Debug, Clone, PartialEq)]
pub struct Model {
    /// Metadata.
    pub meta: ModelMeta,
    /// `models × dim` weights.
    pub weights: Vec<f32>,
    /// One bias per model.
    pub biases: Vec<f32>,
    /// idf factors, if trained with them.
    pub idf: Option<Vec<f32>>,
    /// The training data's token sketch, if it kept one.
    pub sketch: Option<TokenSketch>,
}

impl Model {
    /// Number of models (1 binary, else classes).
    pub fn models(&self) -> usize {
        self.biases.len()
    }

    /// Feature dimension.
    pub fn dim(&self) -> usize {
        self.meta.features.buckets() as usize
    }

    /// Whether this is a binary model.
    pub fn is_binary(&self) -> bool {
        self.meta.positive.is_some()
    }

    /// Weights of model `m`.
    pub fn weights_of(&self, m: usize) -> &[f32] {
        let d = self.dim();
        &self.weights[m * d..(m + 1) * d]
    }

    /// A scorer for many rows (see [`Scorer`]).
    pub fn scorer(&self) -> Scorer<'_> {
        let m = self.models();
        let interleaved = (m > 1).then(|| {
            let d = self.dim();
            let mut w = vec![0.0f32; m * d];
            for (c, wc) in self.weights.chunks_exact(d).enumerate() {
                for (j, &x) in wc.iter().enumerate() {
                    w[j * m + c] = x;
                }
            }
            w
        });
        Scorer {
            model: self,
            interleaved,
        }
    }

    /// Scores (`w·x + b`) of a hashed row under every model.
    pub fn scores(&self, x: &Row<'_>, out: &mut Vec<f64>) {
        crate::solver::scores(
            &self.weights,
            &self.biases,
            self.dim(),
            x,
            self.idf.as_deref(),
            out,
        )
    }

    /// The stored thresholds, one per model, if the model was calibrated with a target.
    pub fn thresholds(&self) -> Option<&[f64]> {
        self.meta
            .calibration
            .as_ref()
            .and_then(|c| c.thresholds.as_deref())
    }

    /// The threshold chosen for model `m` by `tamis calibrate`, if one was:
    /// `None` without thresholds, and for a one-vs-rest class left out of a
    /// calibration of other classes (see [`Calibration::chosen`]).
    pub fn threshold_of(&self, m: usize) -> Option<f64> {
        let c = self.meta.calibration.as_ref()?;
        let t = c.thresholds.as_ref()?;
        if c.chosen.as_ref().is_some_and(|k| !k[m]) {
            return None;
        }
        Some(t[m])
    }

    /// Whether some models have a chosen threshold and others not (a partial
    /// calibration of a one-vs-rest model).
    pub fn partly_thresholded(&self) -> bool {
        let c = (0..self.models()).map(|m| self.threshold_of(m).is_some());
        c.clone().any(|x| x) && c.clone().any(|x| !x)
    }

    /// The decision for the scores of every model. Binary: positive when the
    /// score is `≥` the stored threshold (`> 0` without one). One-vs-rest
    /// without thresholds: the highest score. With thresholds: the highest
    /// score among the classes whose score is `≥` their threshold, or whose
    /// class has no threshold chosen, or [`Decision::Undecided`] when there
    /// are none (only when every class has a threshold).
    pub fn decide(&self, scores: &[f64]) -> Decision {
        if self.is_binary() {
            let pos = match self.threshold_of(0) {
                Some(t) => scores[0] >= t,
                None => scores[0] > 0.0,
            };
            return Decision::Class(pos as usize);
        }
        let mut best: Option<usize> = None;
        for (c, &s) in scores.iter().enumerate() {
            if self.threshold_of(c).is_some_and(|t| s < t) {
                continue;
            }
            if best.is_none_or(|b| s > scores[b]) {
                best = Some(c);
            }
        }
        best.map_or(Decision::Undecided, Decision::Class)
    }

    /// Whether the model gives probabilities: calibrated with Platt scaling,
    /// or trained with the logistic loss.
    pub fn has_probabilities(&self) -> bool {
        self.platt().is_some() || self.meta.loss == Loss::Logistic
    }

    fn platt(&self) -> Option<&[crate::calibrate::Platt]> {
        self.meta
            .calibration
            .as_ref()
            .and_then(|c| c.platt.as_deref())
    }

    /// The log-odds that model `m`'s class is right at score `s`: `−(A·s + B)`
    /// with stored Platt scaling, else `s` for a logistic model, else `None`.
    pub fn logit(&self, m: usize, s: f64) -> Option<f64> {
        match self.platt() {
            Some(p) => Some(-(p[m].a * s + p[m].b)),
            None => (self.meta.loss == Loss::Logistic).then_some(s),
        }
    }

    /// The probability that model `m`'s class is right at score `s`,
    /// `σ(`[`Model::logit`]`)`.
    pub fn probability(&self, m: usize, s: f64) -> Option<f64> {
        self.logit(m, s).map(crate::eval::rank::sigmoid)
    }

    /// Check that sections and metadata agree.
    fn check(&self, path: &Path) -> Result<()> {
        let bad = |what: String| Error::Corrupt {
            path: path.to_path_buf(),
            what,
        };
        if self.meta.format != "tamis-model" {
            return Err(bad(format!(
                "format {:?} is not tamis-model",
                self.meta.format
            )));
        }
        self.meta
            .features
            .validate()
            .map_err(|e| bad(e.to_string()))?;
        let m = self.meta.model_labels.len();
        if m == 0 || self.biases.len() != m || self.weights.len() != m * self.dim() {
            return Err(bad(format!(
                "{} weights and {} biases do not fit {m} models of {} features",
                self.weights.len(),
                self.biases.len(),
                self.dim()
            )));
        }
        if let Some(idf) = &self.idf {
            if idf.len() != self.dim() {
                return Err(bad("idf section has the wrong length".into()));
            }
            if idf.iter().any(|v| !v.is_finite()) {
                return Err(bad("idf factors are not finite".into()));
            }
        }
        if self.idf.is_some() != self.meta.training.idf {
            return Err(bad("idf section and training settings disagree".into()));
        }
        if self
            .weights
            .iter()
            .chain(&self.biases)
            .any(|v| !v.is_finite())
        {
            return Err(bad("weights are not finite".into()));
        }
        if let Some(c) = &self.meta.calibration {
            let n = c.thresholds.as_ref().map_or(m, |t| t.len());
            let k = c.platt.as_ref().map_or(m, |p| p.len());
            let h = c.chosen.as_ref().map_or(m, |h| h.len());
            if n != m || k != m || h != m {
                return Err(bad(format!(
                    "calibration holds {n} thresholds, {h} chosen flags and {k} Platt pairs for {m} models"
                )));
            }
            if c.chosen.is_some() && c.thresholds.is_none() {
                return Err(bad(
                    "calibration marks chosen thresholds but holds none".into()
                ));
            }
            let finite = c.thresholds.iter().flatten().all(|t| t.is_finite())
                && c.platt
                    .iter()
                    .flatten()
                    .all(|p| p.a.is_finite() && p.b.is_finite());
            if !finite {
                return Err(bad("calibration values are not finite".into()));
            }
        }
        Ok(())
    }

    /// Write atomically to `path`.
    pub fn save(&self, path: &Path) -> Result<()> {
        self.check(path)?;
        let meta = serde_json::to_vec_pretty(&self.meta).expect("metadata serialises");
        let mut w = ContainerWriter::create(path, Kind::Model, VERSION, 5)?;
        w.section(SEC_META, &meta)?;
        w.section(SEC_WEIGHTS, bytemuck::cast_slice(&self.weights))?;
        w.section(SEC_BIASES, bytemuck::cast_slice(&self.biases))?;
        if let Some(idf) = &self.idf {
            w.section(SEC_IDF, bytemuck::cast_slice(idf))?;
        }
        if let Some(sk) = &self.sketch {
            w.section(SEC_SKETCH, &sk.to_bytes())?;
        }
        w.set_params([
            self.models() as u64,
            self.dim() as u64,
            self.idf.is_some() as u64,
            0,
        ]);
        w.finish()
    }

    /// Load and fully check a model file.
    pub fn load(path: &Path) -> Result<Model> {
        let c = Container::parse(
            container::map_file(path)?,
            path,
            Kind::Model,
            VERSION..=VERSION,
        )?;
        c.verify(section_name)?;
        Self::from_container(&c)
    }

    fn from_container<B: AsRef<[u8]>>(c: &Container<B>) -> Result<Model> {
        let path = c.path();
        let meta: ModelMeta =
            serde_json::from_slice(c.section(SEC_META, "meta")?).map_err(|e| Error::Corrupt {
                path: path.to_path_buf(),
                what: format!("bad model metadata: {e}"),
            })?;
        let weights: &[f32] = cast_section(c.section(SEC_WEIGHTS, "weights")?, path, "weights")?;
        let biases: &[f32] = cast_section(c.section(SEC_BIASES, "biases")?, path, "biases")?;
        let has_idf = c.header().sections.iter().any(|s| s.id == SEC_IDF);
        let idf = match c.header().params[2] {
            0 if !has_idf => None,
            1 => {
                let s: &[f32] = cast_section(c.section(SEC_IDF, "idf")?, path, "idf")?;
                Some(s.to_vec())
            }
            other => {
                return Err(Error::Corrupt {
                    path: path.to_path_buf(),
                    what: format!("idf flag {other} does not fit the idf section"),
                })
            }
        };
        let sketch = if c.header().sections.iter().any(|s| s.id == SEC_SKETCH) {
            let sk = TokenSketch::from_bytes(c.section(SEC_SKETCH, "sketch")?, path)?;
            sk.check(&meta.features, path)?;
            Some(sk)
        } else {
            None
        };
        let model = Model {
            meta,
            weights: weights.to_vec(),
            biases: biases.to_vec(),
            idf,
            sketch,
        };
        let [m, d, _, _] = c.header().params;
        if m as usize != model.models() || d as usize != model.dim() {
            return Err(Error::Corrupt {
                path: path.to_path_buf(),
                what: "header and metadata disagree on the model's shape".into(),
            });
        }
        model.check(path)?;
        Ok(model)
    }
}
