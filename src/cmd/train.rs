//! `tamis train`: fit a model on a dataset.

use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::Context;
use tamis::solver::{Loss, SolverConfig};
use tamis::train::{self, ClassWeight, TrainOptions};

/// Options of `tamis train`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// Dataset folder written by `tamis ingest`.
    #[arg(value_name = "DIR")]
    pub dir: PathBuf,

    /// Where to write the model (replaced atomically).
    #[arg(long, short = 'm', value_name = "FILE")]
    pub model: PathBuf,

    /// Loss: hinge (max-margin), logistic (probabilities) or squared-hinge.
    #[arg(long, value_enum, default_value_t = Loss::Hinge)]
    pub loss: Loss,

    /// Regularisation strength λ of λ/2·‖w‖²: larger means simpler models.
    #[arg(long, default_value_t = 1e-5, value_name = "L")]
    pub lambda: f64,

    /// Passes over the training rows.
    #[arg(long, default_value_t = 5, value_name = "E")]
    pub epochs: u32,

    /// Rows per step; margins of a batch are computed in parallel.
    #[arg(long, default_value_t = 64, value_name = "B")]
    pub batch: usize,

    /// Size of the first step on a row (a batch of B takes B times it); later
    /// steps are 1/(λ(t + t₀)) with t₀ = max(1, 1/(λ·η₀·B)) [default: 1, and 0.01
    /// for squared-hinge, whose gradient grows with the violation].
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

    /// Stop when the validation loss has not improved for P epochs.
    #[arg(long, value_name = "P")]
    pub patience: Option<u32>,

    /// Seed of the order in which rows are visited.
    #[arg(long, default_value_t = 1, value_name = "S")]
    pub seed: u64,

    /// Threads [default: all cores]. The model does not depend on it.
    #[arg(long, short = 'j', value_name = "N")]
    pub threads: Option<usize>,

    /// Print nothing but errors.
    #[arg(long, short = 'q')]
    pub quiet: bool,
}

/// Library options from the command line.
pub fn options(a: &Args) -> TrainOptions {
    TrainOptions {
        dir: a.dir.clone(),
        model: a.model.clone(),
        solver: SolverConfig {
            lambda: a.lambda,
            loss: a.loss,
            batch: a.batch,
            eta0: a.eta0.unwrap_or(match a.loss {
                Loss::SquaredHinge => 0.01,
                _ => 1.0,
            }),
            project: a.project,
            average_from: a.average_from,
        },
        epochs: a.epochs,
        seed: a.seed,
        class_weight: a.class_weight.clone().unwrap_or(ClassWeight::None),
        idf: a.idf,
        patience: a.patience,
        threads: a.threads.unwrap_or_else(super::default_threads),
        progress: !a.quiet,
    }
}

/// Run `tamis train`.
pub fn run(a: Args) -> anyhow::Result<ExitCode> {
    let r = train::train(&options(&a), super::stderr_log(a.quiet))
        .with_context(|| format!("training on {} failed", a.dir.display()))?;
    if !a.quiet {
        eprintln!(
            "wrote {} ({} model(s) of {} features) in {:.2} s",
            a.model.display(),
            r.model.models(),
            r.model.dim(),
            r.seconds
        );
    }
    Ok(ExitCode::SUCCESS)
}
