//! Scoring raw text with a model: input → features → margins, streaming, in
//! input order, on several threads.

use std::sync::atomic::AtomicU64;
use std::sync::mpsc::sync_channel;
use std::sync::Arc;

use rayon::prelude::*;

use crate::error::{Error, Result};
use crate::features::Featurizer;
use crate::input::{
    parse_chunk, read_inputs, BadReason, Chunk, InputSpec, LabelMode, ParseScratch, ReadMsg,
};
use crate::model::{Decision, Model, Scorer, UNDECIDED};
use crate::shard::Row;

/// The outcome of one input record.
#[derive(Debug, Clone, PartialEq)]
pub enum Outcome {
    /// A scored record.
    Scored {
        /// Index of the input it came from.
        input: usize,
        /// 1-based line where it starts.
        line: u64,
        /// Predicted label ([`UNDECIDED`] when a one-vs-rest model with
        /// thresholds finds no class above its threshold).
        label: String,
        /// The score: the margin `w·x + b` of a binary model, or the margin of
        /// the predicted class's model (the largest margin when undecided).
        score: f64,
        /// The probability of the positive class (binary) or of the top class's
        /// model (one-vs-rest, not normalised over classes): Platt scaling for a
        /// calibrated model, `σ(score)` for a logistic one, else `None`.
        probability: Option<f64>,
        /// The record's own label, when it had one.
        truth: Option<String>,
        /// Scores of every model (kept only when labels are required, for
        /// evaluation).
        scores: Vec<f64>,
    },
    /// A record that could not be scored.
    Skipped {
        /// Index of the input it came from.
        input: usize,
        /// 1-based line.
        line: u64,
        /// Why.
        reason: BadReason,
        /// Details.
        detail: String,
    },
}

/// Labels a model predicts: for a binary model the positive label and a
/// negative name (the other label when the dataset had two, else `not-LABEL`).
pub fn decision_labels(model: &Model) -> Vec<String> {
    match &model.meta.positive {
        Some(p) => {
            let others: Vec<&String> = model.meta.labels.iter().filter(|l| *l != p).collect();
            let neg = if others.len() == 1 {
                others[0].clone()
            } else {
                format!("not-{p}")
            };
            vec![neg, p.clone()]
        }
        None => model.meta.model_labels.clone(),
    }
}

struct Worker {
    feat: Featurizer,
    scratch: ParseScratch,
    idx: Vec<u32>,
    val: Vec<f32>,
    scores: Vec<f64>,
}

fn score_chunk(
    chunk: &Chunk,
    spec: &InputSpec,
    mode: LabelMode,
    scorer: &Scorer<'_>,
    model: &Model,
    names: &[String],
    w: &mut Worker,
) -> Vec<Outcome> {
    let mut out = Vec::new();
    let Worker {
        feat,
        scratch,
        idx,
        val,
        scores,
    } = w;
    let mut bad = Vec::new();
    parse_chunk(
        chunk,
        spec,
        mode,
        scratch,
        |f| {
            feat.begin_row();
            for (i, t) in f.texts.iter().enumerate() {
                feat.add_text(i, t);
            }
            for (i, v) in f.numbers.iter().enumerate() {
                if let Some(v) = v {
                    feat.add_numeric(i, *v);
                }
            }
            if feat.is_empty() {
                out.push(Outcome::Skipped {
                    input: chunk.input,
                    line: f.line,
                    reason: BadReason::EmptyText,
                    detail: "no word in the text".into(),
                });
                return;
            }
            idx.clear();
            val.clear();
            feat.finish_row(idx, val);
            let row = Row {
                label: 0,
                indices: idx,
                values: val,
            };
            scorer.scores(&row, scores);
            // The reported score: the binary margin, or the margin of the predicted
            // class (the highest margin when no class clears its threshold).
            let decision = model.decide(scores);
            let (label, shown) = match decision {
                Decision::Class(c) if model.is_binary() => (names[c].clone(), 0),
                Decision::Class(c) => (names[c].clone(), c),
                Decision::Undecided => {
                    let mut best = 0;
                    for (c, &s) in scores.iter().enumerate() {
                        if s > scores[best] {
                            best = c;
                        }
                    }
                    (UNDECIDED.to_string(), best)
                }
            };
            let score = scores[shown];
            out.push(Outcome::Scored {
                input: chunk.input,
                line: f.line,
                label,
                score,
                probability: model.probability(shown, score),
                truth: f.label.as_deref().map(str::to_string),
                scores: if mode == LabelMode::Required {
                    scores.clone()
                } else {
                    Vec::new()
                },
            });
        },
        |b| {
            bad.push(Outcome::Skipped {
                input: chunk.input,
                line: b.line,
                reason: b.reason,
                detail: b.detail,
            })
        },
    );
    if !bad.is_empty() {
        out.extend(bad);
        out.sort_by_key(|o| match o {
            Outcome::Scored { line, .. } | Outcome::Skipped { line, .. } => *line,
        });
    }
    out
}

/// Check that the input's fields are the ones the model was trained on.
pub fn check_spec(model: &Model, spec: &InputSpec) -> Result<()> {
    let f = &model.meta.features;
    if spec.text != f.text_fields || spec.numeric != f.numeric_fields {
        return Err(Error::Invalid(format!(
            "the model was trained on text fields {:?} and numeric fields {:?}; the input gives {:?} and {:?}",
            f.text_fields, f.numeric_fields, spec.text, spec.numeric
        )));
    }
    Ok(())
}

/// Score `inputs` with `model` on `threads` threads, calling `sink` with the
/// outcomes of each chunk in input order. `mode` says whether records must
/// carry labels (evaluation) or may (scoring).
pub fn score_inputs(
    model: &Model,
    inputs: &[String],
    spec: &InputSpec,
    mode: LabelMode,
    threads: usize,
    mut sink: impl FnMut(Vec<Outcome>) -> Result<()>,
) -> Result<()> {
    check_spec(model, spec)?;
    let names = decision_labels(model);
    let scorer = model.scorer();
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(threads.max(1))
        .thread_name(|i| format!("tamis-score-{i}"))
        .build()
        .map_err(|e| Error::Invalid(format!("cannot start threads: {e}")))?;
    let batch_len = 2 * threads.max(1);
    let score_batch = |batch: Vec<Chunk>| -> Vec<Vec<Outcome>> {
        pool.install(|| {
            batch
                .par_iter()
                .map_init(
                    || Worker {
                        feat: Featurizer::new(&model.meta.features).expect("validated on load"),
                        scratch: ParseScratch::default(),
                        idx: Vec::new(),
                        val: Vec::new(),
                        scores: Vec::new(),
                    },
                    |w, c| score_chunk(c, spec, mode, &scorer, model, &names, w),
                )
                .collect()
        })
    };
    std::thread::scope(|s| -> Result<()> {
        let (tx, rx) = sync_channel::<ReadMsg>(batch_len + 2);
        let progress = Arc::new(AtomicU64::new(0));
        std::thread::Builder::new()
            .name("tamis-read".into())
            .spawn_scoped(s, move || read_inputs(inputs, spec, mode, progress, tx))
            .map_err(|e| Error::Invalid(format!("cannot start a thread: {e}")))?;
        // The sink (output, on this thread) takes the results of one batch
        // while the pool scores the next, in input order.
        let mut ready: Vec<Vec<Outcome>> = Vec::new();
        loop {
            let mut batch = Vec::with_capacity(batch_len);
            let mut done = false;
            let mut failure = None;
            while batch.len() < batch_len {
                match rx.recv() {
                    Ok(ReadMsg::Chunk(c)) => batch.push(c),
                    Ok(ReadMsg::Done(..)) => break,
                    Ok(ReadMsg::Failed(e)) => {
                        failure = Some(e);
                        break;
                    }
                    Err(_) => {
                        done = true;
                        break;
                    }
                }
            }
            let outs = std::thread::scope(|inner| -> Result<Vec<Vec<Outcome>>> {
                let scoring = std::thread::Builder::new()
                    .name("tamis-score".into())
                    .spawn_scoped(inner, || score_batch(batch))
                    .map_err(|e| Error::Invalid(format!("cannot start a thread: {e}")))?;
                let sunk = std::mem::take(&mut ready)
                    .into_iter()
                    .try_for_each(&mut sink);
                let outs = scoring
                    .join()
                    .map_err(|_| Error::Invalid("internal: scoring thread panicked".into()))?;
                sunk.map(|_| outs)
            })?;
            ready = outs;
            if let Some(e) = failure {
                ready.into_iter().try_for_each(&mut sink)?;
                return Err(e);
            }
            if done {
                return ready.into_iter().try_for_each(&mut sink);
            }
        }
    })
}
