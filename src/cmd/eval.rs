//! `tamis eval`: metrics of a model on a dataset split or on labelled raw text.

use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::ExitCode;

use anyhow::{bail, Context};
use tamis::dataset::Split;
use tamis::eval::{self, Metrics, ScoredRows};
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
    /// undecided, hinge_loss, log_loss, brier, expected_calibration_error,
    /// roc_auc, average_precision, precision, recall, false_positive_rate,
    /// thresholds).
    #[arg(long)]
    pub json: bool,

    /// Also write an HTML page of plots (ROC and precision–recall curves, score
    /// histograms, confusion grid, reliability diagram, training curves) to FILE.
    #[arg(long, value_name = "FILE")]
    pub report: Option<PathBuf>,

    /// Threads [default: all cores].
    #[arg(long, short = 'j', value_name = "N", value_parser = super::parse_threads)]
    pub threads: Option<usize>,
}

/// The scored rows of a dataset split (checked against the model).
pub fn scored_split(model: &Model, dir: &Path, which: Which) -> anyhow::Result<ScoredRows> {
    let splits: &[Split] = match which {
        Which::Validation => &[Split::Validation],
        Which::Train => &[Split::Train],
        Which::All => &[Split::Train, Split::Validation],
    };
    let (shards, positive) = eval::open_for(model, dir, splits)?;
    if shards.is_empty() {
        bail!(
            "{}: the dataset has no rows in the chosen split",
            dir.display()
        );
    }
    let rows = eval::score_shards(&shards, model, positive);
    if let Some(mut i) = rows.first_non_finite() {
        for sh in &shards {
            if i < sh.rows() {
                bail!("{}: row {}: {NOT_FINITE}", sh.path().display(), i + 1);
            }
            i -= sh.rows();
        }
    }
    Ok(rows)
}

/// Why a record with a score that is not finite cannot be evaluated.
const NOT_FINITE: &str =
    "the model's score is not finite (a value too large for the weights); it cannot be evaluated";

fn on_inputs(model: &Model, a: &Args, threads: usize) -> anyhow::Result<(ScoredRows, u64)> {
    let spec = a.fields.spec(model, 1 << 20);
    let labels = score::decision_labels(model);
    let mut rows = ScoredRows::new(model.models());
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
                    Outcome::Scored {
                        input,
                        line,
                        truth,
                        scores,
                        ..
                    } => {
                        if scores.iter().any(|x| !x.is_finite()) {
                            return Err(tamis::Error::Invalid(format!(
                                "{}:{line}: {NOT_FINITE}",
                                a.data[input]
                            )));
                        }
                        let t = truth.unwrap_or_default();
                        let class = match &model.meta.positive {
                            Some(p) => Some((t == *p) as usize),
                            None => labels.iter().position(|l| *l == t),
                        };
                        match class {
                            Some(c) => rows.push(&scores, c as u32),
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
    if rows.rows() == 0 {
        bail!("no labelled record could be evaluated");
    }
    Ok((rows, skipped + unknown))
}

fn opt(x: Option<f64>) -> String {
    x.map_or_else(|| "-".into(), |v| format!("{v:.4}"))
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
    writeln!(out, "ROC AUC    {:>12}", opt(m.roc_auc))?;
    writeln!(out, "avg prec.  {:>12}", opt(m.average_precision))?;
    if m.brier.is_some() {
        writeln!(out, "Brier      {:>12}", opt(m.brier))?;
        writeln!(out, "ECE        {:>12}", opt(m.expected_calibration_error))?;
    }
    let at = match &m.thresholds {
        Some(t) if t.len() == 1 => match t[0] {
            Some(t) => format!("at the stored threshold {t:.6}"),
            None => "at margin 0".into(),
        },
        Some(t) if t.contains(&None) => {
            "at the stored thresholds, classes without one by highest score (means over classes)"
                .into()
        }
        Some(_) => "at the stored per-class thresholds (means over classes)".into(),
        None if m.per_class.len() == 2 && m.confusion_labels.len() == 2 => "at margin 0".into(),
        None => "at the highest score (means over classes)".into(),
    };
    writeln!(
        out,
        "precision {:.4}  recall {:.4}  false-positive rate {:.4}  {at}",
        m.precision, m.recall, m.false_positive_rate
    )?;
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
    let undecided: u64 = m.undecided.iter().sum();
    if undecided > 0 {
        writeln!(
            out,
            "{} rows cleared no class's threshold ({}); per true class: {}",
            thousands(undecided),
            tamis::model::UNDECIDED,
            m.confusion_labels
                .iter()
                .zip(&m.undecided)
                .map(|(l, n)| format!("{l} {n}"))
                .collect::<Vec<_>>()
                .join(", ")
        )?;
    }
    Ok(())
}

/// Run `tamis eval`.
pub fn run(a: Args) -> anyhow::Result<ExitCode> {
    let model = Model::load(&a.model)
        .with_context(|| format!("cannot load model {}", a.model.display()))?;
    if let Some(r) = &a.report {
        // The report must not replace what it reports on.
        let inputs = a.data.iter().map(Path::new).filter(|p| !p.is_dir());
        if let Some(p) = std::iter::once(a.model.as_path())
            .chain(inputs)
            .find(|p| tamis::container::same_place(p, r))
        {
            bail!(
                "{}: the report cannot be written over its own input {}",
                r.display(),
                p.display()
            );
        }
    }
    let threads = a.threads.unwrap_or_else(super::default_threads);
    let (rows, skipped) = if a.data.len() == 1 && Path::new(&a.data[0]).is_dir() {
        let dir = Path::new(&a.data[0]);
        if let Some(r) = &a.report {
            let m = tamis::dataset::Manifest::load(dir)?;
            tamis::dataset::refuse_own_file(dir, &m, r, "report")?;
        }
        (scored_split(&model, dir, a.split)?, 0)
    } else {
        on_inputs(&model, &a, threads)?
    };
    let labels = score::decision_labels(&model);
    let m = eval::metrics(&model, &rows, &labels, skipped);
    if let Some(path) = &a.report {
        let what = if a.data.len() == 1 && Path::new(&a.data[0]).is_dir() {
            let split = match a.split {
                Which::Validation => "validation",
                Which::Train => "train",
                Which::All => "all",
            };
            format!("{} ({split} split)", a.data[0])
        } else {
            a.data.join(", ")
        };
        let page = tamis::report::html(&tamis::report::ReportInput {
            model: &model,
            rows: &rows,
            metrics: &m,
            labels: &labels,
            model_labels: &model.meta.model_labels,
            what: &what,
            model_name: &a.model.display().to_string(),
        })?;
        tamis::report::write(path, &page)
            .with_context(|| format!("cannot write the report {}", path.display()))?;
        eprintln!("wrote {}", path.display());
    }
    let mut out = std::io::stdout().lock();
    if a.json {
        serde_json::to_writer_pretty(&mut out, &m)?;
        writeln!(out)?;
    } else {
        print(&m, &mut out)?;
    }
    Ok(ExitCode::SUCCESS)
}
