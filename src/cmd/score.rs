//! `tamis score`: predicted label and score for every input record.

use std::io::{BufWriter, Write};
use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::{bail, Context};
use tamis::input::{Format, InputSpec, LabelMode};
use tamis::model::Model;
use tamis::score::{self, OutcomeRef};
use tamis::util::push_fixed6;

/// Output formats of `tamis score`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum OutputFormat {
    /// `WHERE<TAB>LABEL<TAB>SCORE[<TAB>PROBABILITY]`, or `WHERE<TAB>!skipped<TAB>REASON: DETAIL`.
    Tsv,
    /// One JSON object per record with `where`, `label`, `score` (and `probability`), or `where`, `skipped`, `detail`.
    Jsonl,
}

/// Options of `tamis score`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// Model file written by `tamis train`.
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,

    /// Inputs in the training data's format (a label, if present, is ignored);
    /// `-` or nothing reads standard input.
    #[arg(value_name = "INPUT")]
    pub inputs: Vec<String>,

    #[command(flatten)]
    pub fields: ModelFields,

    /// Add the probability column: Platt scaling stored by `tamis calibrate`
    /// (logistic models always print σ(score)). An error for an uncalibrated
    /// hinge model.
    #[arg(long)]
    pub probabilities: bool,

    /// Output format.
    #[arg(long, value_enum, default_value_t = OutputFormat::Tsv)]
    pub output_format: OutputFormat,

    /// Records longer than this many bytes are reported as skipped.
    #[arg(long, value_name = "BYTES", default_value_t = 1 << 20)]
    pub max_line_bytes: usize,

    /// Threads [default: all cores]; the output order is the input order regardless.
    #[arg(long, short = 'j', value_name = "N", value_parser = super::parse_threads)]
    pub threads: Option<usize>,

    /// Do not print the summary line on standard error.
    #[arg(long, short = 'q')]
    pub quiet: bool,
}

/// How raw text is read when a model scores it: the model's own settings unless
/// given here (shared by `score` and `eval`).
#[derive(Debug, Clone, Default, clap::Args)]
pub struct ModelFields {
    /// Record format of raw inputs [default: the one the model was trained on].
    #[arg(long, value_enum)]
    pub format: Option<Format>,

    /// CSV column or JSON field with the label, if any [default: the model's].
    #[arg(
        long = "label-column",
        visible_alias = "label-field",
        value_name = "NAME"
    )]
    pub label: Option<String>,

    /// CSV columns or JSON fields with text, in the model's order [default: the model's].
    #[arg(
        long = "text-column",
        visible_alias = "text-field",
        value_name = "NAME"
    )]
    pub text: Vec<String>,

    /// CSV columns or JSON fields with numbers [default: the model's].
    #[arg(
        long = "numeric-field",
        visible_alias = "numeric-column",
        value_name = "NAME"
    )]
    pub numeric: Vec<String>,
}

impl ModelFields {
    /// The input specification: the model's, with any field given here replacing it.
    pub fn spec(&self, model: &Model, max_line_bytes: usize) -> InputSpec {
        let mut spec = model.meta.input.clone();
        if let Some(f) = self.format {
            if f != spec.format {
                spec.format = f;
                if f == Format::Tsv {
                    spec = InputSpec::tsv(max_line_bytes);
                }
            }
        }
        if let Some(l) = &self.label {
            spec.label = l.clone();
        }
        if !self.text.is_empty() {
            spec.text = self.text.clone();
        }
        if !self.numeric.is_empty() {
            spec.numeric = self.numeric.clone();
        }
        spec.max_line_bytes = max_line_bytes;
        spec
    }
}

/// The output lines of one chunk, formatted by a scoring thread.
#[derive(Default)]
struct Lines {
    bytes: Vec<u8>,
    scored: u64,
    skipped: u64,
}

fn json_str(s: &str) -> String {
    serde_json::to_string(s).expect("strings serialise")
}

/// Run `tamis score`.
pub fn run(a: Args) -> anyhow::Result<ExitCode> {
    let model = Model::load(&a.model)
        .with_context(|| format!("cannot load model {}", a.model.display()))?;
    if a.probabilities && !model.has_probabilities() {
        bail!(
            "{}: a {} model gives no probabilities until `tamis calibrate` fits Platt scaling on a validation split",
            a.model.display(),
            model.meta.loss.name()
        );
    }
    let show_p = a.probabilities || model.meta.loss == tamis::solver::Loss::Logistic;
    let spec = a.fields.spec(&model, a.max_line_bytes);
    let inputs = if a.inputs.is_empty() {
        vec!["-".to_string()]
    } else {
        a.inputs.clone()
    };
    let names: Vec<String> = inputs
        .iter()
        .map(|p| if p == "-" { "stdin".into() } else { p.clone() })
        .collect();
    let several = inputs.len() > 1;
    let stdout = std::io::stdout();
    let mut out = BufWriter::with_capacity(1 << 16, stdout.lock());
    let (mut scored, mut skipped) = (0u64, 0u64);
    let threads = a.threads.unwrap_or_else(super::default_threads);
    let mut io_err: Option<std::io::Error> = None;
    let format = a.output_format;
    // The lines are formatted by the scoring threads, a chunk at a time, and
    // written here in input order.
    let r = score::score_inputs_into(
        &model,
        &inputs,
        &spec,
        LabelMode::Optional,
        threads,
        Lines::default,
        |l: &mut Lines, o| {
            let place = |input: usize, line: u64| {
                if several {
                    format!("{}:{line}", names[input])
                } else {
                    line.to_string()
                }
            };
            let b = &mut l.bytes;
            // Writing into a `Vec` cannot fail.
            let _ = match (o, format) {
                (
                    OutcomeRef::Scored {
                        input,
                        line,
                        label,
                        score,
                        probability,
                        ..
                    },
                    OutputFormat::Tsv,
                ) => {
                    l.scored += 1;
                    if several {
                        write!(b, "{}", place(input, line))
                    } else {
                        write!(b, "{line}")
                    }
                    .map(|_| {
                        b.push(b'\t');
                        b.extend_from_slice(label.as_bytes());
                        b.push(b'\t');
                        push_fixed6(b, score);
                        if let Some(p) = probability.filter(|_| show_p) {
                            b.push(b'\t');
                            push_fixed6(b, p);
                        }
                        b.push(b'\n');
                    })
                }
                (
                    OutcomeRef::Scored {
                        input,
                        line,
                        label,
                        score,
                        probability,
                        ..
                    },
                    OutputFormat::Jsonl,
                ) => {
                    l.scored += 1;
                    let place = place(input, line);
                    write!(
                        b,
                        "{{\"where\":{},\"label\":{},\"score\":",
                        json_str(&place),
                        json_str(label)
                    )
                    .map(|_| {
                        push_fixed6(b, score);
                        if let Some(p) = probability.filter(|_| show_p) {
                            b.extend_from_slice(b",\"probability\":");
                            push_fixed6(b, p);
                        }
                        b.extend_from_slice(b"}\n");
                    })
                }
                (
                    OutcomeRef::Skipped {
                        input,
                        line,
                        reason,
                        detail,
                    },
                    OutputFormat::Tsv,
                ) => {
                    l.skipped += 1;
                    writeln!(
                        b,
                        "{}\t!skipped\t{reason}: {}",
                        place(input, line),
                        detail.replace(['\t', '\n'], " ")
                    )
                }
                (
                    OutcomeRef::Skipped {
                        input,
                        line,
                        reason,
                        detail,
                    },
                    OutputFormat::Jsonl,
                ) => {
                    l.skipped += 1;
                    writeln!(
                        b,
                        "{{\"where\":{},\"skipped\":{},\"detail\":{}}}",
                        json_str(&place(input, line)),
                        json_str(reason.key()),
                        json_str(detail)
                    )
                }
            };
        },
        |l| {
            scored += l.scored;
            skipped += l.skipped;
            let w = out.write_all(&l.bytes);
            l.bytes.clear();
            l.scored = 0;
            l.skipped = 0;
            if let Err(e) = w {
                io_err = Some(e);
                return Err(tamis::Error::Invalid("output closed".into()));
            }
            Ok(())
        },
    );
    if let Some(e) = io_err {
        return Err(anyhow::Error::new(e).context("cannot write the scores"));
    }
    r?;
    out.flush().context("cannot write the scores")?;
    if !a.quiet {
        eprintln!("scored {scored} records, skipped {skipped}");
    }
    Ok(ExitCode::SUCCESS)
}
