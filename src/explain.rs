//! Reading a hashed model in words: `inspect` (which known words carry the
//! largest weights) and `explain` (how one text's features make its score).
//!
//! Hashing forgets words; two things bring them back. `explain` has the text
//! itself: it replays the tokenizer ([`feature_origins`]) to learn which words,
//! word n-grams, character n-grams and numeric fields fed each bucket, while
//! the row's values come from the very [`Featurizer`] that `score` uses, so the
//! total equals the score. `inspect` has only the model: it names buckets by
//! the words of the token sketch copied from the training data
//! ([`crate::dataset::sketch`]); buckets without a known word are shown by id.
//!
//! Damping (`ln(1+|count|)`) and the unit-length scaling act on a bucket's
//! summed signed count, so a contribution belongs to a bucket, not to a single
//! token: explanations list buckets, each with the features that fed it.

use std::collections::HashMap;

use serde::Serialize;

use crate::error::{Error, Result};
use crate::features::{
    bucket_sign, char_ngram_hash, field_seed, ngram_hash, numeric_hash, tokenize_masked,
    FeatureConfig, Featurizer, Masks,
};
use crate::model::Model;
use crate::score::decision_labels;
use crate::shard::Row;

/// What kind of feature fed a bucket.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum FeatureKind {
    /// A word (after lowercasing and masking).
    Word,
    /// `n` consecutive words, shown joined by spaces.
    WordNgram(u32),
    /// `n` characters inside a word padded as `<word>`.
    CharNgram(u32),
    /// A numeric field, shown as `name = value`.
    Numeric,
}

impl FeatureKind {
    /// A short name for tables.
    pub fn label(self) -> String {
        match self {
            FeatureKind::Word => "word".into(),
            FeatureKind::WordNgram(2) => "word pair".into(),
            FeatureKind::WordNgram(n) => format!("{n} words"),
            FeatureKind::CharNgram(n) => format!("{n} chars"),
            FeatureKind::Numeric => "number".into(),
        }
    }
}

/// One feature of a text and the bucket it fed.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FeatureUse {
    /// Bucket.
    pub bucket: u32,
    /// Field name.
    pub field: String,
    /// Kind.
    pub kind: FeatureKind,
    /// The feature's text.
    pub text: String,
    /// Sign of its hash (+1 or −1).
    pub sign: f32,
    /// Occurrences in the text.
    pub occurrences: u32,
}

/// Replay the tokenizer on the fields of one record and list every feature
/// with its bucket, sign and occurrences, in order of first appearance.
/// `texts` follow `cfg.text_fields`, `numbers` follow `cfg.numeric_fields`.
pub fn feature_origins(
    cfg: &FeatureConfig,
    texts: &[&[u8]],
    numbers: &[Option<f64>],
) -> Vec<FeatureUse> {
    let mask = cfg.buckets() - 1;
    let n = cfg.ngrams as usize;
    let mut out: Vec<FeatureUse> = Vec::new();
    let mut seen: HashMap<(u32, FeatureKind, String, bool), usize> = HashMap::new();
    let mut add = |out: &mut Vec<FeatureUse>, h: u64, field: &str, kind, text: String| {
        let (bucket, sign) = bucket_sign(h, mask);
        let key = (bucket, kind, text, sign < 0.0);
        match seen.get(&key) {
            Some(&i) => out[i].occurrences += 1,
            None => {
                seen.insert(key.clone(), out.len());
                out.push(FeatureUse {
                    bucket,
                    field: field.to_string(),
                    kind,
                    text: key.2,
                    sign,
                    occurrences: 1,
                });
            }
        }
    };
    let (mut buf, mut masked) = (Vec::new(), Vec::new());
    for (name, text) in cfg.text_fields.iter().zip(texts) {
        let seed = field_seed(cfg.hash_seed, name);
        let mut recent: Vec<(u64, String)> = Vec::with_capacity(n);
        tokenize_masked(
            text,
            Masks::of(cfg),
            &mut buf,
            &mut masked,
            |tok, placeholder| {
                let word = String::from_utf8_lossy(tok).into_owned();
                let h = xxhash_rust::xxh3::xxh3_64_with_seed(tok, seed);
                add(&mut out, h, name, FeatureKind::Word, word.clone());
                if n > 1 {
                    recent.push((h, word));
                    if recent.len() > n {
                        recent.remove(0);
                    }
                    let have = recent.len();
                    for order in 2..=have {
                        let gram = &recent[have - order..];
                        let hashes: Vec<u64> = gram.iter().map(|g| g.0).collect();
                        let text = gram
                            .iter()
                            .map(|g| g.1.as_str())
                            .collect::<Vec<_>>()
                            .join(" ");
                        add(
                            &mut out,
                            ngram_hash(seed, &hashes),
                            name,
                            FeatureKind::WordNgram(order as u32),
                            text,
                        );
                    }
                }
                if let (Some(cn), false) = (cfg.char_ngrams, placeholder) {
                    let padded: Vec<char> = std::iter::once('<')
                        .chain(String::from_utf8_lossy(tok).chars())
                        .chain(std::iter::once('>'))
                        .collect();
                    for len in cn.min as usize..=cn.max as usize {
                        if len > padded.len() {
                            break;
                        }
                        for w in padded.windows(len) {
                            let g: String = w.iter().collect();
                            add(
                                &mut out,
                                char_ngram_hash(seed, g.as_bytes(), len),
                                name,
                                FeatureKind::CharNgram(len as u32),
                                g,
                            );
                        }
                    }
                }
            },
        );
    }
    for (name, v) in cfg.numeric_fields.iter().zip(numbers) {
        if let Some(v) = v {
            add(
                &mut out,
                numeric_hash(cfg.hash_seed, name),
                name,
                FeatureKind::Numeric,
                format!("{name} = {v}"),
            );
        }
    }
    out
}

/// One bucket's part in a score.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Contribution {
    /// Bucket.
    pub bucket: u32,
    /// The row's value in the bucket (after damping and scaling).
    pub value: f32,
    /// idf factor, when the model uses idf.
    pub idf: Option<f32>,
    /// The model's weight.
    pub weight: f32,
    /// `value × idf × weight`, as the score adds it.
    pub contribution: f64,
    /// Features of the text that fed the bucket.
    pub features: Vec<FeatureUse>,
}

/// How a text's score is made.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Explanation {
    /// The class explained (for a binary model, its positive label).
    pub class: String,
    /// The label `score` predicts.
    pub predicted: String,
    /// Bias of the class's model.
    pub bias: f64,
    /// Contributions, largest magnitude first.
    pub contributions: Vec<Contribution>,
    /// Bias plus every contribution, added in the order `score` adds them:
    /// the class's score exactly.
    pub total: f64,
}

/// The first index of the largest score (the class `score` predicts).
fn argmax(scores: &[f64]) -> usize {
    let mut best = 0;
    for (i, &s) in scores.iter().enumerate() {
        if s > scores[best] {
            best = i;
        }
    }
    best
}

/// The model index explaining `class` (`None`: the predicted class; a binary
/// model has one score, for its positive label).
fn class_index(model: &Model, class: Option<&str>, scores: &[f64]) -> Result<usize> {
    if model.is_binary() {
        let pos = model.meta.positive.as_deref().unwrap_or("");
        return match class {
            None => Ok(0),
            Some(c) if c == pos => Ok(0),
            Some(c) => Err(Error::Invalid(format!(
                "a binary model has one score, for its positive class {pos:?}; {c:?} is not it"
            ))),
        };
    }
    match class {
        Some(c) => model
            .meta
            .model_labels
            .iter()
            .position(|l| l == c)
            .ok_or_else(|| {
                Error::Invalid(format!(
                    "no class {c:?} in the model (classes: {})",
                    model.meta.model_labels.join(", ")
                ))
            }),
        None => Ok(argmax(scores)),
    }
}

/// Explain the score of one record (`texts` in the model's text-field order,
/// `numbers` in its numeric-field order) for `class` or the predicted class.
pub fn explain(
    model: &Model,
    texts: &[&[u8]],
    numbers: &[Option<f64>],
    class: Option<&str>,
) -> Result<Explanation> {
    let cfg = &model.meta.features;
    let mut feat = Featurizer::new(cfg)?;
    feat.begin_row();
    for (i, t) in texts.iter().enumerate() {
        feat.add_text(i, t);
    }
    for (i, v) in numbers.iter().enumerate() {
        if let Some(v) = v {
            feat.add_numeric(i, *v);
        }
    }
    if feat.is_empty() {
        return Err(Error::Invalid(
            "the text holds no word to explain (no letter or digit)".into(),
        ));
    }
    let (mut idx, mut val) = (Vec::new(), Vec::new());
    feat.finish_row(&mut idx, &mut val);
    let row = Row {
        label: 0,
        indices: &idx,
        values: &val,
    };
    let mut scores = Vec::new();
    model.scores(&row, &mut scores);
    let m = class_index(model, class, &scores)?;
    let names = decision_labels(model);
    let predicted = if model.is_binary() {
        names[(scores[0] > 0.0) as usize].clone()
    } else {
        names[argmax(&scores)].clone()
    };
    let w = model.weights_of(m);
    let mask = model.dim() - 1;
    let mut by_bucket: HashMap<u32, Vec<FeatureUse>> = HashMap::new();
    for f in feature_origins(cfg, texts, numbers) {
        by_bucket.entry(f.bucket).or_default().push(f);
    }
    // The same terms, in the same order and precision, as `solver::scores`.
    let mut acc = 0.0f64;
    let mut contributions = Vec::with_capacity(idx.len());
    for (&i, &v) in idx.iter().zip(&val) {
        let j = i as usize & mask;
        let idf = model.idf.as_ref().map(|d| d[j]);
        let xv = match idf {
            Some(f) => v * f,
            None => v,
        };
        let c = (w[j] * xv) as f64;
        acc += c;
        contributions.push(Contribution {
            bucket: i,
            value: v,
            idf,
            weight: w[j],
            contribution: c,
            features: by_bucket.remove(&i).unwrap_or_default(),
        });
    }
    let bias = model.biases[m] as f64;
    contributions.sort_by(|a, b| {
        b.contribution
            .abs()
            .total_cmp(&a.contribution.abs())
            .then(a.bucket.cmp(&b.bucket))
    });
    Ok(Explanation {
        class: model.meta.model_labels[m].clone(),
        predicted,
        bias,
        contributions,
        total: acc + bias,
    })
}

/// A word of the token sketch, or a bucket without one, with its weight.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct WeightedFeature {
    /// The word, or `None` for a bucket with no known word.
    pub token: Option<String>,
    /// The word's field (`None` for an unknown bucket).
    pub field: Option<String>,
    /// Bucket.
    pub bucket: u32,
    /// The weight the word meets: sign × weight (× idf); for an unknown bucket,
    /// the bucket's weight (× idf).
    pub weight: f64,
    /// Rows the word was seen in (the sketch's count).
    pub rows: Option<u64>,
    /// Other known words in the same bucket.
    pub shares_with: usize,
}

/// The heaviest features of one class.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ClassWeights {
    /// The class (for a binary model, its positive label).
    pub label: String,
    /// Bias.
    pub bias: f64,
    /// Largest positive weights, largest first.
    pub positive: Vec<WeightedFeature>,
    /// Largest negative weights, most negative first.
    pub negative: Vec<WeightedFeature>,
}

/// What `inspect` reports.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Inspection {
    /// Whether the model carries a token sketch.
    pub has_sketch: bool,
    /// Words in the sketch.
    pub sketch_tokens: usize,
    /// Least guaranteed rows of a word in the sketch.
    pub sketch_min_count: u64,
    /// One entry per class inspected.
    pub classes: Vec<ClassWeights>,
}

/// Keep the `n` largest by `key` (ties by bucket).
fn top(
    mut v: Vec<WeightedFeature>,
    n: usize,
    key: impl Fn(&WeightedFeature) -> f64,
) -> Vec<WeightedFeature> {
    v.sort_by(|a, b| key(b).total_cmp(&key(a)).then(a.bucket.cmp(&b.bucket)));
    v.truncate(n);
    v
}

/// The `n` largest positive and negative weights of each class (or of `class`).
pub fn inspect(model: &Model, class: Option<&str>, n: usize) -> Result<Inspection> {
    let cfg = &model.meta.features;
    let mask = cfg.buckets() - 1;
    // Known words per bucket: (field, word, sign, rows).
    let mut known: HashMap<u32, Vec<(usize, &str, f32, u64)>> = HashMap::new();
    if let Some(sk) = &model.sketch {
        for (fi, f) in sk.fields.iter().enumerate() {
            for e in &f.entries {
                let (b, s) = bucket_sign(e.hash, mask);
                known.entry(b).or_default().push((fi, &e.token, s, e.count));
            }
        }
    }
    let ms: Vec<usize> = if model.is_binary() {
        class_index(model, class, &[0.0])?;
        vec![0]
    } else {
        match class {
            Some(c) => vec![class_index(model, Some(c), &[])?],
            None => (0..model.models()).collect(),
        }
    };
    let mut classes = Vec::new();
    for m in ms {
        let w = model.weights_of(m);
        let eff = |b: usize| -> f64 {
            let x = w[b] as f64;
            match &model.idf {
                Some(d) => x * d[b] as f64,
                None => x,
            }
        };
        let mut words = Vec::new();
        for (&b, list) in &known {
            let we = eff(b as usize);
            for &(fi, tok, sign, rows) in list {
                words.push(WeightedFeature {
                    token: Some(tok.to_string()),
                    field: Some(cfg.text_fields[fi].clone()),
                    bucket: b,
                    weight: sign as f64 * we,
                    rows: Some(rows),
                    shares_with: list.len() - 1,
                });
            }
        }
        // Buckets with no known word: the n heaviest of each sign, found in one
        // pass with a bounded buffer.
        let mut hi: Vec<(f64, u32)> = Vec::new();
        let mut lo: Vec<(f64, u32)> = Vec::new();
        let trim = |v: &mut Vec<(f64, u32)>, n: usize| {
            v.sort_by(|a, b| b.0.abs().total_cmp(&a.0.abs()).then(a.1.cmp(&b.1)));
            v.truncate(n);
        };
        for b in 0..w.len() {
            let we = eff(b);
            if we == 0.0 || known.contains_key(&(b as u32)) {
                continue;
            }
            let v = if we > 0.0 { &mut hi } else { &mut lo };
            v.push((we, b as u32));
            if v.len() >= 4 * n.max(1) {
                trim(v, n);
            }
        }
        trim(&mut hi, n);
        trim(&mut lo, n);
        let unknown = hi.into_iter().chain(lo).map(|(we, b)| WeightedFeature {
            token: None,
            field: None,
            bucket: b,
            weight: we,
            rows: None,
            shares_with: 0,
        });
        let all: Vec<WeightedFeature> = words.into_iter().chain(unknown).collect();
        let positive = top(
            all.iter().filter(|f| f.weight > 0.0).cloned().collect(),
            n,
            |f| f.weight,
        );
        let negative = top(
            all.into_iter().filter(|f| f.weight < 0.0).collect(),
            n,
            |f| -f.weight,
        );
        classes.push(ClassWeights {
            label: model.meta.model_labels[m].clone(),
            bias: model.biases[m] as f64,
            positive,
            negative,
        });
    }
    Ok(Inspection {
        has_sketch: model.sketch.is_some(),
        sketch_tokens: model.sketch.as_ref().map_or(0, |s| s.len()),
        sketch_min_count: model.sketch.as_ref().map_or(0, |s| s.min_count),
        classes,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::features::HASH_SCHEME;

    fn cfg() -> FeatureConfig {
        FeatureConfig {
            scheme: HASH_SCHEME.into(),
            hash_seed: 9,
            log2_buckets: 16,
            ngrams: 3,
            char_ngrams: Some("2..4".parse().unwrap()),
            raw_counts: false,
            text_fields: vec!["subject".into(), "body".into()],
            numeric_fields: vec!["attachments".into()],
            mask_digits: true,
            mask_emails: true,
        }
    }

    /// The replayed features land in exactly the buckets the featurizer fills
    /// (barring exact cancellation of signed counts, which this text avoids).
    #[test]
    fn origins_cover_the_featurizer_row() {
        let c = cfg();
        let texts: [&[u8]; 2] = [
            b"Lost umbrella on ferry 12",
            "Dear crew, I left my Umbrella (blue) on the 08:15 sailing; mail me at jo@example.org. Ölmund ÉTÉ"
                .as_bytes(),
        ];
        let nums = [Some(2.0)];
        let uses = feature_origins(&c, &texts, &nums);
        let mut f = Featurizer::new(&c).unwrap();
        f.begin_row();
        f.add_text(0, texts[0]);
        f.add_text(1, texts[1]);
        f.add_numeric(0, 2.0);
        let (mut idx, mut val) = (Vec::new(), Vec::new());
        f.finish_row(&mut idx, &mut val);
        // Net signed count per bucket from the replay.
        let mut net: HashMap<u32, f64> = HashMap::new();
        for u in &uses {
            *net.entry(u.bucket).or_default() += u.sign as f64 * u.occurrences as f64;
        }
        let mut replay: Vec<u32> = net
            .iter()
            .filter(|(_, &v)| v != 0.0)
            .map(|(&b, _)| b)
            .collect();
        replay.sort();
        assert_eq!(replay, idx);
        assert!(uses
            .iter()
            .any(|u| u.text == "@email" && u.kind == FeatureKind::Word));
        assert!(uses
            .iter()
            .any(|u| u.text == "the # #" && u.kind == FeatureKind::WordNgram(3)));
        assert!(uses
            .iter()
            .any(|u| u.text == "<ö" && u.kind == FeatureKind::CharNgram(2)));
        let umbrella: Vec<&FeatureUse> = uses.iter().filter(|u| u.text == "umbrella").collect();
        assert_eq!(umbrella.len(), 2, "one per field");
        assert_ne!(umbrella[0].bucket, umbrella[1].bucket, "fields hash apart");
        assert!(uses
            .iter()
            .any(|u| u.text == "#" && u.field == "body" && u.occurrences == 2));
        assert!(uses.iter().any(|u| u.kind == FeatureKind::Numeric));
    }
}
