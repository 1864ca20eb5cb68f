//! Scoring raw text with a model: input → features → margins, streaming, in
//! input order, on several threads.

use std::sync::atomic::AtomicU64;
use std::sync::Arc;

use crate::error::{Error, Result};
use crate::features::Featurizer;
use crate::input::pipeline::{Pipeline, Step};
use crate::input::{parse_chunk, BadReason, Chunk, InputSpec, LabelMode, ParseScratch};
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

/// An [`Outcome`] borrowed from the worker that produced it: what a consumer
/// formats without copying the label or the scores.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum OutcomeRef<'a> {
    /// A scored record (see [`Outcome::Scored`]).
    Scored {
        /// Index of the input it came from.
        input: usize,
        /// 1-based line where it starts.
        line: u64,
        /// Predicted label.
        label: &'a str,
        /// The score.
        score: f64,
        /// The probability, when the model gives one.
        probability: Option<f64>,
        /// The record's own label, when it had one.
        truth: Option<&'a str>,
        /// Scores of every model (empty unless labels are required).
        scores: &'a [f64],
    },
    /// A record that could not be scored (see [`Outcome::Skipped`]).
    Skipped {
        /// Index of the input it came from.
        input: usize,
        /// 1-based line.
        line: u64,
        /// Why.
        reason: BadReason,
        /// Details.
        detail: &'a str,
    },
}

impl OutcomeRef<'_> {
    /// An owned copy.
    pub fn to_owned(&self) -> Outcome {
        match *self {
            OutcomeRef::Scored {
                input,
                line,
                label,
                score,
                probability,
                truth,
                scores,
            } => Outcome::Scored {
                input,
                line,
                label: label.to_string(),
                score,
                probability,
                truth: truth.map(str::to_string),
                scores: scores.to_vec(),
            },
            OutcomeRef::Skipped {
                input,
                line,
                reason,
                detail,
            } => Outcome::Skipped {
                input,
                line,
                reason,
                detail: detail.to_string(),
            },
        }
    }
}

struct Worker {
    feat: Featurizer,
    scratch: ParseScratch,
    idx: Vec<u32>,
    val: Vec<f32>,
    scores: Vec<f64>,
}

/// Score the records of one chunk, calling `emit` with each outcome in input
/// order.
#[allow(clippy::too_many_arguments)]
fn score_chunk(
    chunk: &Chunk,
    spec: &InputSpec,
    mode: LabelMode,
    scorer: &Scorer<'_>,
    model: &Model,
    names: &[String],
    w: &mut Worker,
    emit: &mut dyn FnMut(OutcomeRef<'_>),
) {
    let Worker {
        feat,
        scratch,
        idx,
        val,
        scores,
    } = w;
    // Both callbacks of `parse_chunk` emit, in input order.
    let emit = std::cell::RefCell::new(emit);
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
                (emit.borrow_mut())(OutcomeRef::Skipped {
                    input: chunk.input,
                    line: f.line,
                    reason: BadReason::EmptyText,
                    detail: "no word in the text",
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
                Decision::Class(c) if model.is_binary() => (names[c].as_str(), 0),
                Decision::Class(c) => (names[c].as_str(), c),
                Decision::Undecided => {
                    let mut best = 0;
                    for (c, &s) in scores.iter().enumerate() {
                        if s > scores[best] {
                            best = c;
                        }
                    }
                    (UNDECIDED, best)
                }
            };
            let score = scores[shown];
            (emit.borrow_mut())(OutcomeRef::Scored {
                input: chunk.input,
                line: f.line,
                label,
                score,
                probability: model.probability(shown, score),
                truth: f.label.as_deref(),
                scores: if mode == LabelMode::Required {
                    scores
                } else {
                    &[]
                },
            });
        },
        |b| {
            (emit.borrow_mut())(OutcomeRef::Skipped {
                input: chunk.input,
                line: b.line,
                reason: b.reason,
                detail: &b.detail,
            })
        },
    );
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
    score_inputs_into(
        model,
        inputs,
        spec,
        mode,
        threads,
        Vec::new,
        |outs: &mut Vec<Outcome>, o| outs.push(o.to_owned()),
        |outs| sink(std::mem::take(outs)),
    )
}

/// Score `inputs` with `model` on `threads` threads, each worker gathering the
/// outcomes of a chunk into an output of its own with `add` (formatting them,
/// say, so that this work is shared by the threads too); `consume` takes the
/// outputs in input order, on the calling thread, and leaves them empty to be
/// used again.
#[allow(clippy::too_many_arguments)]
pub fn score_inputs_into<O: Send>(
    model: &Model,
    inputs: &[String],
    spec: &InputSpec,
    mode: LabelMode,
    threads: usize,
    new_output: impl Fn() -> O,
    add: impl Fn(&mut O, OutcomeRef<'_>) + Sync,
    mut consume: impl FnMut(&mut O) -> Result<()>,
) -> Result<()> {
    check_spec(model, spec)?;
    let names = decision_labels(model);
    let scorer = model.scorer();
    let threads = threads.max(1);
    let workers: Vec<Worker> = (0..threads)
        .map(|_| {
            Ok(Worker {
                feat: Featurizer::new(&model.meta.features)?,
                scratch: ParseScratch::default(),
                idx: Vec::new(),
                val: Vec::new(),
                scores: Vec::new(),
            })
        })
        .collect::<Result<_>>()?;
    let pipeline = Pipeline {
        inputs,
        spec,
        mode,
        progress: Arc::new(AtomicU64::new(0)),
        outputs: 2 * threads + 2,
    };
    pipeline.run(
        workers,
        new_output,
        |w, c, out| {
            score_chunk(c, spec, mode, &scorer, model, &names, w, &mut |o| {
                add(out, o)
            })
        },
        |step| match step {
            Step::Chunk(out) => consume(out),
            Step::Done(..) => Ok(()),
        },
    )?;
    Ok(())
}
