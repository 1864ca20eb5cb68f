//! `tamis explain`: how one text's features make its score.

use std::io::Read;
use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::{bail, Context};
use tamis::explain::{self, Contribution};
use tamis::model::Model;

/// Options of `tamis explain`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// Model file written by `tamis train`.
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,

    /// The text to explain; without it, standard input is read (all of it, as one text).
    #[arg(value_name = "TEXT")]
    pub text: Option<String>,

    /// Explain the score of this class [default: the predicted class; a binary model
    /// has one score, for its positive label].
    #[arg(long, value_name = "LABEL")]
    pub class: Option<String>,

    /// The text field the text belongs to, for models trained on several
    /// [default: the first].
    #[arg(long, value_name = "NAME")]
    pub field: Option<String>,

    /// Value of a numeric field, as NAME=NUMBER; repeatable.
    #[arg(long = "value", value_name = "NAME=NUMBER")]
    pub values: Vec<String>,

    /// Show only the N largest contributions (the total still counts them all).
    #[arg(long, value_name = "N")]
    pub top: Option<usize>,

    /// Print JSON instead of a table.
    #[arg(long)]
    pub json: bool,
}

fn features_of(c: &Contribution, fields: usize) -> String {
    if c.features.is_empty() {
        return "(no feature of the text: cancelled signs)".into();
    }
    c.features
        .iter()
        .map(|f| {
            let mut s = if fields > 1 && f.kind != explain::FeatureKind::Numeric {
                format!("{}:\"{}\"", f.field, f.text)
            } else if f.kind == explain::FeatureKind::Numeric {
                f.text.clone()
            } else {
                format!("\"{}\"", f.text)
            };
            s.push_str(&format!(" ({}", f.kind.label()));
            if f.occurrences > 1 {
                s.push_str(&format!(" ×{}", f.occurrences));
            }
            if f.sign < 0.0 {
                s.push_str(", sign −");
            }
            s.push(')');
            s
        })
        .collect::<Vec<_>>()
        .join(", ")
}

/// Run `tamis explain`.
pub fn run(a: Args) -> anyhow::Result<ExitCode> {
    let model = Model::load(&a.model)
        .with_context(|| format!("cannot load model {}", a.model.display()))?;
    let text = match &a.text {
        Some(t) => t.clone().into_bytes(),
        None => {
            let mut b = Vec::new();
            std::io::stdin()
                .read_to_end(&mut b)
                .context("cannot read the text from standard input")?;
            b
        }
    };
    let cfg = &model.meta.features;
    let field = match &a.field {
        None => 0,
        Some(f) => match cfg.text_fields.iter().position(|x| x == f) {
            Some(i) => i,
            None => bail!(
                "the model has no text field {f:?} (its text fields: {})",
                cfg.text_fields.join(", ")
            ),
        },
    };
    let mut texts: Vec<&[u8]> = vec![b""; cfg.text_fields.len()];
    texts[field] = &text;
    let mut numbers = vec![None; cfg.numeric_fields.len()];
    for v in &a.values {
        let (name, num) = v
            .split_once('=')
            .with_context(|| format!("--value {v:?}: expected NAME=NUMBER"))?;
        let Some(i) = cfg.numeric_fields.iter().position(|x| x == name) else {
            bail!(
                "--value {v:?}: the model has no numeric field {name:?} (its numeric fields: {})",
                if cfg.numeric_fields.is_empty() {
                    "none".to_string()
                } else {
                    cfg.numeric_fields.join(", ")
                }
            );
        };
        let x: f64 = num
            .trim()
            .parse()
            .ok()
            .filter(|x: &f64| x.is_finite())
            .with_context(|| format!("--value {v:?}: {num:?} is not a finite number"))?;
        numbers[i] = Some(x);
    }
    let e = explain::explain(&model, &texts, &numbers, a.class.as_deref())?;
    let shown = a.top.unwrap_or(usize::MAX).min(e.contributions.len());
    if a.json {
        let mut v = serde_json::to_value(&e)?;
        v["contributions"] = serde_json::to_value(&e.contributions[..shown])?;
        v["features_total"] = e.contributions.len().into();
        outln!("{}", serde_json::to_string_pretty(&v)?);
        return Ok(ExitCode::SUCCESS);
    }
    let what = if model.is_binary() {
        format!("score of {} (predicted: {})", e.class, e.predicted)
    } else if e.class == e.predicted {
        format!("score of class {} (predicted)", e.class)
    } else {
        format!("score of class {} (predicted: {})", e.class, e.predicted)
    };
    outln!("{what}");
    let idf = model.idf.is_some();
    if idf {
        outln!(
            "{:>13}  {:>9}  {:>7}  {:>9}  {:>9}  features",
            "contribution",
            "value",
            "idf",
            "weight",
            "bucket"
        );
    } else {
        outln!(
            "{:>13}  {:>9}  {:>9}  {:>9}  features",
            "contribution",
            "value",
            "weight",
            "bucket"
        );
    }
    let fields = cfg.text_fields.len();
    for c in &e.contributions[..shown] {
        let feats = features_of(c, fields);
        // Print a zero contribution without a minus sign.
        let c = &Contribution {
            contribution: c.contribution + 0.0,
            ..c.clone()
        };
        match c.idf {
            Some(f) => outln!(
                "{:>+13.6}  {:>9.5}  {:>7.3}  {:>+9.4}  {:>9}  {feats}",
                c.contribution,
                c.value,
                f,
                c.weight,
                c.bucket
            ),
            None => outln!(
                "{:>+13.6}  {:>9.5}  {:>+9.4}  {:>9}  {feats}",
                c.contribution,
                c.value,
                c.weight,
                c.bucket
            ),
        }
    }
    if shown < e.contributions.len() {
        let rest: f64 = e.contributions[shown..]
            .iter()
            .map(|c| c.contribution)
            .sum();
        outln!(
            "{:>+13.6}  ({} smaller contributions)",
            rest,
            e.contributions.len() - shown
        );
    }
    outln!("{:>+13.6}  bias", e.bias);
    outln!("{:>+13.6}  total (the score `tamis score` prints)", e.total);
    Ok(ExitCode::SUCCESS)
}
