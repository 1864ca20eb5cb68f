//! `tamis inspect`: the words with the largest weights of a model.

use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::Context;
use tamis::explain::{self, Inspection, WeightedFeature};
use tamis::model::Model;
use tamis::util::thousands;

/// Options of `tamis inspect`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// Model file written by `tamis train`.
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,

    /// Features listed per sign and class.
    #[arg(long, value_name = "N", default_value_t = 15)]
    pub top: usize,

    /// Only this class (one-vs-rest); a binary model has one, its positive label
    /// [default: every class].
    #[arg(long, value_name = "LABEL")]
    pub class: Option<String>,

    /// Print JSON instead of tables.
    #[arg(long)]
    pub json: bool,
}

/// What a model without a sketch means, said once.
pub const NO_SKETCH: &str = "this model carries no token sketch (its data was ingested with --no-sketch, or by a tamis without sketches): buckets are shown by id only";

fn row(f: &WeightedFeature, fields: usize) -> String {
    let what = match (&f.token, &f.field) {
        (Some(t), Some(field)) if fields > 1 => format!("{field}:{t}"),
        (Some(t), _) => t.clone(),
        _ => format!("[bucket {}]", f.bucket),
    };
    let rows = f.rows.map_or("-".to_string(), thousands);
    let shares = match (&f.token, f.shares_with) {
        (None, _) => "no known word".to_string(),
        (Some(_), 0) => String::new(),
        (Some(_), k) => format!("shared with {k} known word(s)"),
    };
    format!(
        "  {:>+10.4}  {:<28} {:>9}  {:>9}  {shares}",
        f.weight, what, rows, f.bucket
    )
    .trim_end()
    .to_string()
}

/// Run `tamis inspect`.
pub fn run(a: Args) -> anyhow::Result<ExitCode> {
    let model = Model::load(&a.model)
        .with_context(|| format!("cannot load model {}", a.model.display()))?;
    let ins: Inspection = explain::inspect(&model, a.class.as_deref(), a.top)?;
    if a.json {
        let mut v = serde_json::to_value(&ins)?;
        v["model"] = a.model.display().to_string().into();
        if !ins.has_sketch {
            v["note"] = NO_SKETCH.into();
        }
        outln!("{}", serde_json::to_string_pretty(&v)?);
        return Ok(ExitCode::SUCCESS);
    }
    let kind = if model.is_binary() {
        "binary".to_string()
    } else {
        format!("{} classes, one-vs-rest", model.models())
    };
    outln!("model {}: {kind}", a.model.display());
    if ins.has_sketch {
        outln!(
            "token sketch: {} words, each seen in at least {} training rows",
            thousands(ins.sketch_tokens as u64),
            ins.sketch_min_count
        );
        outln!("(word pairs, longer n-grams and character n-grams are not in the sketch: their buckets show by id)");
    } else {
        outln!("{NO_SKETCH}");
    }
    let fields = model.meta.features.text_fields.len();
    for c in &ins.classes {
        outln!();
        outln!("class {} (bias {:+.4})", c.label, c.bias);
        outln!(
            "  {:>10}  {:<28} {:>9}  {:>9}",
            "weight",
            "word",
            "rows",
            "bucket"
        );
        outln!("  pushes towards {}:", c.label);
        for f in &c.positive {
            outln!("{}", row(f, fields));
        }
        outln!("  pushes away from {}:", c.label);
        for f in &c.negative {
            outln!("{}", row(f, fields));
        }
    }
    Ok(ExitCode::SUCCESS)
}
