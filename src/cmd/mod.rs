//! Subcommands, one file each. Each has its own `Args` and a `run`.

/// `println!` that returns an error instead of panicking when standard output
/// is closed (the caller's `?` turns a broken pipe into a quiet exit).
macro_rules! outln {
    ($($t:tt)*) => {{
        use std::io::Write as _;
        writeln!(std::io::stdout(), $($t)*)?
    }};
}

pub mod bench;
pub mod calibrate;
pub mod demo;
pub mod eval;
pub mod explain;
pub mod ingest;
pub mod inspect;
pub mod score;
pub mod stats;
pub mod train;
pub mod tune;
pub mod verify;

use std::process::ExitCode;

use clap::{Parser, Subcommand};

/// tamis: train and run max-margin linear text classifiers on data that does not
/// fit in memory.
///
/// Exit status: 0 on success, 1 on an error (the message starts with `error:`),
/// 2 on a usage error.
#[derive(Debug, Parser)]
#[command(name = "tamis", version, about, long_about = None, max_term_width = 100)]
pub struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// Turn labelled raw text (TSV, CSV, JSON Lines; plain, gzip or zstd) into a
    /// dataset of hashed sparse shards.
    Ingest(Box<ingest::Args>),
    /// Train a max-margin (or logistic) linear classifier on a dataset.
    Train(Box<train::Args>),
    /// Score raw text with a model: predicted label and score for every record.
    Score(Box<score::Args>),
    /// Measure a model on a dataset split or on labelled raw text.
    Eval(Box<eval::Args>),
    /// Train every combination of λ values and losses in one pass over the data
    /// and keep the best by a validation metric.
    Tune(Box<tune::Args>),
    /// List the words with the largest weights of a model, by class (names come
    /// from the token sketch of the training data).
    Inspect(inspect::Args),
    /// Show how each word and feature of a text adds to its score.
    Explain(explain::Args),
    /// Choose score thresholds for a target (false-positive rate, precision or
    /// recall) and fit Platt scaling on a dataset's validation split; store them in the model.
    Calibrate(Box<calibrate::Args>),
    /// Summarise a dataset: rows, labels, nonzeros, bucket fill, shards.
    Stats(stats::Args),
    /// Recompute every checksum of a dataset or a tamis file and report damage.
    Verify(verify::Args),
    /// Run the whole job on built-in invented demo data.
    Demo(demo::Args),
    /// Measure ingest, training and scoring on this machine, against plain
    /// reads of the same bytes.
    Bench(Box<bench::Args>),
}

/// Run the parsed command line.
pub fn run(cli: Cli) -> anyhow::Result<ExitCode> {
    match cli.command {
        Command::Ingest(a) => ingest::run(*a),
        Command::Score(a) => score::run(*a),
        Command::Eval(a) => eval::run(*a),
        Command::Calibrate(a) => calibrate::run(*a),
        Command::Stats(a) => stats::run(a),
        Command::Inspect(a) => inspect::run(a),
        Command::Explain(a) => explain::run(a),
        Command::Train(a) => train::run(*a),
        Command::Tune(a) => tune::run(*a),
        Command::Verify(a) => verify::run(a),
        Command::Demo(a) => demo::run(a),
        Command::Bench(a) => bench::run(*a),
    }
}

/// The most threads a command takes: far above the cores of any machine it
/// runs on, and low enough that a mistyped count fails as a usage error
/// instead of starting millions of threads (each with its stack and buffers).
pub const MAX_THREADS: usize = 1024;

/// Parse a `--threads` value: a count up to [`MAX_THREADS`].
pub fn parse_threads(s: &str) -> Result<usize, String> {
    let n: usize = s.parse().map_err(|e| format!("{e}"))?;
    if n > MAX_THREADS {
        return Err(format!("at most {MAX_THREADS} threads, got {n}"));
    }
    Ok(n)
}

/// Default thread count: every core.
pub fn default_threads() -> usize {
    std::thread::available_parallelism().map_or(1, |n| n.get())
}

/// A log that prints to standard error unless quiet.
pub fn stderr_log(quiet: bool) -> tamis::dataset::Log {
    std::sync::Arc::new(move |s: &str| {
        if !quiet {
            eprintln!("{s}");
        }
    })
}
