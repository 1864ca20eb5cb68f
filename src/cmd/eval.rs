//! `tamis eval`: metrics of a model on a dataset split or on labelled raw text.

use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::ExitCode;

use anyhow::{bail, Context};
use tamis::dataset::{self, Manifest, Split};
use tamis::eval::{self, Accumulator, Metrics, Weights};
use tamis::input::LabelMode;
use tamis::model::Model;
use tamis::score::{self, Outcome};
use tamis::util::thousands;

/// Which rows of a dataset to evaluate on.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum Which {
    /// The held-out validation rows.
    Validation,
    /// The training rows.
    Train,
    /// Both.
    All,
}

/// Options of `tamis eval`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// Model file written by `tamis train`.
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,

    /// A dataset folder, or labelled raw inputs in the model's format (`-` for stdin).
    #[arg(value_name = "DIR|INPUT", required = true)]
    pub data: Vec<String>,

    /// For a dataset: which split to evaluate on.
    #[arg(long, value_enum, default_value_t = Which::Validation)]
    pub split: Which,

    /// For raw inputs: how records are read.
    #[command(flatten)]
    pub fields: super::score::ModelFields,

    /// Print JSON (keys include rows, accuracy, macro_f1, per_class, confusion,
    /// hinge_loss, log_loss).
    #[arg(long)]
    pub json: bool,

    /// Threads [default: all cores].
    #[arg(long, short = 'j', value_name = "N")]
    pub threads: Option<usize>,
}

fn on_dataset(model: &Model, dir: &Path, which: Which) -> anyhow::Result<(Metrics, Vec<String>)> {
    let m = Manifest::load(dir)?;
    if m.features != model.meta.features {
        bail!(
            "{}: the dataset's tokenizing and hashing settings differ from the model's; score raw text instead, or ingest with the model's settings",
            dir.display()
        );
    }
    let names: Vec<String> = m.labels.iter().map(|l| l.name.clone()).collect();
    if names.len() < model.meta.labels.len()
        || names[..model.meta.labels.len()] != model.meta.labels[..]
    {
        bail!(
            "{}: the dataset's labels do not start with the model's labels {:?}",
            dir.display(),
            model.meta.labels
        );
    }
    let positive = match &model.meta.positive {
        Some(p) => Some(names.iter().position(|n| n == p).expect("checked above") as u32),
        None => {
            if names.len() > model.meta.labels.len() {
                bail!(
                    "{}: the dataset has labels the model does not know: {:?}",
                    dir.display(),
                    &names[model.meta.labels.len()..]
                );
            }
            None
        }
    };
    let splits: &[Split] = match which {
        Which::Validation => &[Split::Validation],
        Which::Train => &[Split::Train],
        Which::All => &[Split::Train, Split::Validation],
    };
    let mut shards = Vec::new();
    for s in splits {
        for e in m.shards_of(*s) {
            let sh = dataset::open_shard(dir, e)?;
            sh.verify(Some(names.len() as u32))?;
            shards.push(sh);
        }
    }
    if shards.is_empty() {
        bail!(
            "{}: the dataset has no rows in the chosen split",
            dir.display()
        );
    }
    let ev = eval::evaluate(
        &shards,
        Weights {
            weights: &model.weights,
            biases: &model.biases,
            dim: model.dim(),
            idf: model.idf.as_deref(),
        },
        positive,
        names.len(),
        model.meta.loss,
    );
    let labels = score::decision_labels(model);
    Ok((
        eval::metrics(&ev, &labels, model.meta.loss, positive.is_some(), 0),
        labels,
    ))
}

fn on_inputs(model: &Model, a: &Args, threads: usize) -> anyhow::Result<(Metrics, Vec<String>)> {
    let spec = a.fields.spec(model, 1 << 20);
    let labels = score::decision_labels(model);
    let k = if model.is_binary() { 2 } else { labels.len() };
    let mut acc = Accumulator::new(k, model.meta.loss);
    let mut skipped = 0u64;
    let mut unknown = 0u64;
    score::score_inputs(
        model,
        &a.data,
        &spec,
        LabelMode::Required,
        threads,
        |outs| {
            for o in outs {
                match o {
                    Outcome::Scored { truth, scores, .. } => {
                        let t = truth.unwrap_or_default();
                        let class = match &model.meta.positive {
                            Some(p) => Some((t == *p) as usize),
                            None => labels.iter().position(|l| *l == t),
                        };
                        match class {
                            Some(c) => acc.add(&scores, c),
                            None => unknown += 1,
                        }
                    }
                    Outcome::Skipped { .. } => skipped += 1,
                }
            }
            Ok(())
        },
    )?;
    if unknown > 0 {
        eprintln!(
            "{} records carry labels the model does not know; they are not counted",
            thousands(unknown)
        );
    }
    let ev = acc.finish();
    if ev.rows == 0 {
        bail!("no labelled record could be evaluated");
    }
    Ok((
        eval::metrics(
            &ev,
            &labels,
            model.meta.loss,
            model.is_binary(),
            skipped + unknown,
        ),
        labels,
    ))
}

/// Print the human-readable report.
pub fn print(m: &Metrics, out: &mut impl Write) -> std::io::Result<()> {
    writeln!(
        out,
        "rows       {:>12}   skipped {}",
        thousands(m.rows),
        thousands(m.skipped)
    )?;
    writeln!(out, "accuracy   {:>11.2}%", 100.0 * m.accuracy)?;
    writeln!(out, "macro-F1   {:>12.4}", m.macro_f1)?;
    writeln!(out, "hinge loss {:>12.4}", m.hinge_loss)?;
    if let Some(l) = m.log_loss {
        writeln!(out, "log loss   {l:>12.4}")?;
    }
    writeln!(out)?;
    writeln!(
        out,
        "{:<24} {:>9} {:>9} {:>9} {:>10}",
        "class", "precision", "recall", "F1", "support"
    )?;
    for c in &m.per_class {
        writeln!(
            out,
            "{:<24} {:>9.4} {:>9.4} {:>9.4} {:>10}",
            c.label,
            c.precision,
            c.recall,
            c.f1,
            thousands(c.support)
        )?;
    }
    writeln!(out)?;
    writeln!(out, "confusion (rows: truth, columns: prediction)")?;
    let w = m
        .confusion_labels
        .iter()
        .map(|l| l.len())
        .max()
        .unwrap_or(4)
        .clamp(4, 16);
    write!(out, "{:>w$}", "")?;
    for l in &m.confusion_labels {
        write!(out, " {:>w$}", &l[..l.len().min(w)])?;
    }
    writeln!(out)?;
    for (l, row) in m.confusion_labels.iter().zip(&m.confusion) {
        write!(out, "{:>w$}", &l[..l.len().min(w)])?;
        for x in row {
            write!(out, " {x:>w$}")?;
        }
        writeln!(out)?;
    }
    Ok(())
}

/// Run `tamis eval`.
pub fn run(a: Args) -> anyhow::Result<ExitCode> {
    let model = Model::load(&a.model)
        .with_context(|| format!("cannot load model {}", a.model.display()))?;
    let threads = a.threads.unwrap_or_else(super::default_threads);
    let (m, _) = if a.data.len() == 1 && Path::new(&a.data[0]).is_dir() {
        on_dataset(&model, Path::new(&a.data[0]), a.split)?
    } else {
        on_inputs(&model, &a, threads)?
    };
    let mut out = std::io::stdout().lock();
    if a.json {
        serde_json::to_writer_pretty(&mut out, &m)?;
        writeln!(out)?;
    } else {
        print(&m, &mut out)?;
    }
    Ok(ExitCode::SUCCESS)
}
