//! `tamis bench`: measure ingest, training and scoring on this machine against
//! plain reads of the same bytes.

use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::Context;
use tamis::bench::{self, BenchOptions, TrainStageOutput};
use tamis::train::{self, TrainOptions};

/// Options of `tamis bench`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// Size of the invented input to generate, e.g. 250MB, 1GB, 4GiB (a run
    /// needs about 5.5 times that of free disk at its peak).
    #[arg(long, default_value = "1GB", value_parser = bench::parse_size, value_name = "SIZE")]
    pub size: u64,

    /// Threads of the parallel runs; every stage also runs with 1 thread to
    /// show the scaling [default: all cores].
    #[arg(long, short = 'j', value_name = "N", value_parser = super::parse_threads)]
    pub threads: Option<usize>,

    /// Print the results as one JSON object instead of a table.
    #[arg(long)]
    pub json: bool,

    /// Keep the generated input, datasets and models in DIR (a new or empty
    /// folder) instead of a temporary folder that is removed.
    #[arg(long, value_name = "DIR")]
    pub keep: Option<PathBuf>,

    /// Seed of the generated messages.
    #[arg(long, default_value_t = 7, value_name = "S")]
    pub seed: u64,

    /// Internal: run one training stage on DIR and print its epoch timings as
    /// JSON (how `tamis bench` runs training in a child process).
    #[arg(long, hide = true, value_name = "DIR", requires = "model")]
    pub stage_train: Option<PathBuf>,

    /// Internal: the model file of `--stage-train`.
    #[arg(long, hide = true, value_name = "FILE")]
    pub model: Option<PathBuf>,
}

/// Run `tamis bench`.
pub fn run(a: Args) -> anyhow::Result<ExitCode> {
    let threads = a.threads.unwrap_or_else(super::default_threads);
    if let (Some(dir), Some(model)) = (&a.stage_train, &a.model) {
        return stage_train(dir, model, threads);
    }
    let exe = std::env::current_exe().context("cannot find the tamis executable")?;
    let opts = BenchOptions {
        size: a.size,
        threads,
        keep: a.keep.clone(),
        exe,
        seed: a.seed,
    };
    let report = bench::run(&opts, &|s| eprintln!("bench: {s}")).context("bench failed")?;
    if a.json {
        outln!("{}", serde_json::to_string_pretty(&report)?);
    } else {
        use std::io::Write as _;
        write!(std::io::stdout(), "{}", bench::table(&report))?;
        if a.keep.is_some() {
            outln!("files kept in {}", report.dir.display());
        }
    }
    Ok(ExitCode::SUCCESS)
}

/// Train with the default settings for [`bench::EPOCHS`] epochs and print each
/// epoch's sweep timing.
fn stage_train(
    dir: &std::path::Path,
    model: &std::path::Path,
    threads: usize,
) -> anyhow::Result<ExitCode> {
    let opts = TrainOptions {
        epochs: bench::EPOCHS,
        threads,
        // A checkpoint at every epoch end, for the checkpoint-cost stages.
        checkpoint: Some(model.with_extension("tmc")),
        checkpoint_every: 1e9,
        ..TrainOptions::defaults(dir, model)
    };
    let train_rows = tamis::dataset::Manifest::load(dir)
        .with_context(|| format!("cannot read the dataset {}", dir.display()))?
        .train_rows() as f64;
    let r = train::train(&opts, super::stderr_log(true))
        .and_then(|o| o.finished())
        .with_context(|| format!("training on {} failed", dir.display()))?;
    let checkpoint = match (r.last_checkpoint, &opts.checkpoint) {
        (Some(c), Some(path)) => {
            let t = std::time::Instant::now();
            tamis::checkpoint::Checkpoint::load(path)?;
            let load = t.elapsed().as_secs_f64();
            let _ = std::fs::remove_file(path);
            Some((c.bytes, c.seconds, load))
        }
        _ => None,
    };
    // The sweep's own time (the epoch table's rows/s), without validation.
    let out = TrainStageOutput {
        epochs: r
            .model
            .meta
            .epochs
            .iter()
            .map(|e| {
                (
                    train_rows / e.rows_per_second.max(1e-9),
                    e.rows_per_second,
                    e.nnz_per_second,
                )
            })
            .collect(),
        checkpoint,
    };
    outln!("{}", serde_json::to_string(&out)?);
    Ok(ExitCode::SUCCESS)
}
