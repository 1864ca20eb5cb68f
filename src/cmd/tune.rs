//! `tamis tune`: train every combination of λ values and losses in one pass
//! and keep the best.

use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::Context;
use tamis::solver::Loss;
use tamis::train::ClassWeight;
use tamis::tune::{self, Metric, TuneOptions};

/// Options of `tamis tune`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// Dataset folder written by `tamis ingest` (it needs a validation split).
    #[arg(value_name = "DIR")]
    pub dir: PathBuf,

    /// Where to write the best model (replaced atomically).
    #[arg(long, short = 'm', value_name = "FILE")]
    pub model: PathBuf,

    /// λ values to try, comma-separated.
    #[arg(
        long,
        value_delimiter = ',',
        default_value = "1e-4,1e-5,1e-6",
        value_name = "L,..."
    )]
    pub lambdas: Vec<f64>,

    /// Losses to try, comma-separated (hinge, logistic, squared-hinge).
    #[arg(
        long,
        value_enum,
        value_delimiter = ',',
        default_value = "hinge",
        value_name = "LOSS,..."
    )]
    pub losses: Vec<Loss>,

    /// How candidates are compared on the validation split (log-loss: after
    /// Platt scaling fitted on it, so every loss is judged as probabilities).
    #[arg(long, value_enum, default_value_t = Metric::LogLoss)]
    pub metric: Metric,

    /// Passes over the training rows, for every candidate.
    #[arg(long, default_value_t = 5, value_name = "E")]
    pub epochs: u32,

    /// Rows per step.
    #[arg(long, default_value_t = 64, value_name = "B")]
    pub batch: usize,

    /// Size of the first step on a row [default: 1, and 0.01 for squared-hinge].
    #[arg(long, value_name = "ETA")]
    pub eta0: Option<f64>,

    /// Project the weights onto the ball of radius 1/√λ after each step.
    #[arg(long)]
    pub project: bool,

    /// Average the iterates from the start of this epoch (0 = from the first step).
    #[arg(long, default_value_t = 1, value_name = "EPOCH")]
    pub average_from: u32,

    /// Example weights: `balanced` (inverse class frequency) or `LABEL=W,...`.
    #[arg(long, value_name = "RULE")]
    pub class_weight: Option<ClassWeight>,

    /// Multiply features by idf factors from the dataset's document frequencies.
    #[arg(long)]
    pub idf: bool,

    /// Seed of the order in which rows are visited.
    #[arg(long, default_value_t = 1, value_name = "S")]
    pub seed: u64,

    /// Also write every candidate's model into this folder
    /// (LOSS-lambda-VALUE.tmm).
    #[arg(long, value_name = "DIR")]
    pub keep: Option<PathBuf>,

    /// Print the table as JSON (keys: metric, best, candidates with lambda, loss,
    /// log_loss, accuracy, macro_f1, hinge_loss, score, failed, model).
    #[arg(long)]
    pub json: bool,

    /// Threads [default: all cores]. The models do not depend on it.
    #[arg(long, short = 'j', value_name = "N", value_parser = super::parse_threads)]
    pub threads: Option<usize>,

    /// Print nothing but errors and the table.
    #[arg(long, short = 'q')]
    pub quiet: bool,
}

/// Run `tamis tune`.
pub fn run(a: Args) -> anyhow::Result<ExitCode> {
    let opts = TuneOptions {
        dir: a.dir.clone(),
        model: a.model.clone(),
        lambdas: a.lambdas.clone(),
        losses: a.losses.clone(),
        epochs: a.epochs,
        batch: a.batch,
        eta0: a.eta0,
        project: a.project,
        average_from: a.average_from,
        seed: a.seed,
        class_weight: a.class_weight.clone().unwrap_or(ClassWeight::None),
        idf: a.idf,
        metric: a.metric,
        keep: a.keep.clone(),
        threads: a.threads.unwrap_or_else(super::default_threads),
    };
    let r = tune::tune(&opts, super::stderr_log(a.quiet || a.json))
        .with_context(|| format!("tuning on {} failed", a.dir.display()))?;
    if a.json {
        let v = serde_json::json!({
            "metric": a.metric,
            "best": r.best,
            "model": a.model,
            "seconds": r.seconds,
            "candidates": r.candidates,
        });
        outln!("{}", serde_json::to_string_pretty(&v)?);
        return Ok(ExitCode::SUCCESS);
    }
    let pct = |x: Option<f64>| x.map_or("-".to_string(), |v| format!("{:.2}%", 100.0 * v));
    let num = |x: Option<f64>| x.map_or("-".to_string(), |v| format!("{v:.4}"));
    outln!(
        "{:>14} {:>10} {:>9} {:>9} {:>9} {:>9}",
        "loss",
        "lambda",
        "log-loss",
        "val-acc",
        "macro-F1",
        "hinge"
    );
    for (i, c) in r.candidates.iter().enumerate() {
        let mark = if i == r.best { "  <- best" } else { "" };
        let note = c
            .failed
            .as_ref()
            .map(|_| "  diverged".to_string())
            .unwrap_or_default();
        outln!(
            "{:>14} {:>10} {:>9} {:>9} {:>9} {:>9}{mark}{note}",
            c.loss.name(),
            format!("{:e}", c.lambda),
            num(c.log_loss),
            pct(c.accuracy),
            num(c.macro_f1),
            num(c.hinge_loss),
        );
    }
    let b = &r.candidates[r.best];
    outln!(
        "best by {}: {} loss, λ = {:e}; wrote {} ({} candidates in {:.2} s)",
        a.metric.name(),
        b.loss.name(),
        b.lambda,
        a.model.display(),
        r.candidates.len(),
        r.seconds
    );
    Ok(ExitCode::SUCCESS)
}
