//! `tamis train`: fit a model on a dataset, with checkpoints, resume and warm
//! starts.

use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::sync::atomic::AtomicBool;
use std::sync::Arc;

use anyhow::{bail, Context};
use tamis::checkpoint::Checkpoint;
use tamis::solver::{Loss, SolverConfig};
use tamis::train::{self, ClassWeight, Outcome, Resume, TrainOptions};

/// Exit status after an interruption that saved a checkpoint (128 + SIGINT).
pub const INTERRUPTED: u8 = 130;

/// Options of `tamis train`.
///
/// The solver options have no built-in defaults on the command line so that a
/// resumed run can tell which were given (and must agree with the checkpoint);
/// the defaults are applied by [`options`].
#[derive(Debug, clap::Args)]
pub struct Args {
    /// Dataset folder written by `tamis ingest` (with --resume: defaults to the
    /// checkpoint's).
    #[arg(value_name = "DIR", required_unless_present = "resume")]
    pub dir: Option<PathBuf>,

    /// Where to write the model, replaced atomically (with --resume: defaults to
    /// the checkpoint's).
    #[arg(
        long,
        short = 'm',
        value_name = "FILE",
        required_unless_present = "resume"
    )]
    pub model: Option<PathBuf>,

    /// Loss: hinge (max-margin), logistic (probabilities) or squared-hinge
    /// [default: hinge].
    #[arg(long, value_enum)]
    pub loss: Option<Loss>,

    /// Regularisation strength λ of λ/2·‖w‖²: larger means simpler models
    /// [default: 1e-5].
    #[arg(long, value_name = "L")]
    pub lambda: Option<f64>,

    /// Passes over the training rows [default: 5].
    #[arg(long, value_name = "E")]
    pub epochs: Option<u32>,

    /// Rows per step; margins of a batch are computed in parallel [default: 64].
    #[arg(long, value_name = "B")]
    pub batch: Option<usize>,

    /// Size of the first step on a row (a batch of B takes B times it); later
    /// steps are 1/(λ(t + t₀)) with t₀ = max(1, 1/(λ·η₀·B)) [default: 1, and 0.01
    /// for squared-hinge, whose gradient grows with the violation].
    #[arg(long, value_name = "ETA")]
    pub eta0: Option<f64>,

    /// Project the weights onto the ball of radius 1/√λ after each step.
    #[arg(long)]
    pub project: bool,

    /// Average the iterates from the start of this epoch (0 = from the first
    /// step) [default: 1, and 0 with --init-from].
    #[arg(long, value_name = "EPOCH")]
    pub average_from: Option<u32>,

    /// Example weights: `balanced` (inverse class frequency) or `LABEL=W,...`.
    #[arg(long, value_name = "RULE")]
    pub class_weight: Option<ClassWeight>,

    /// Multiply features by idf factors from the dataset's document frequencies.
    #[arg(long)]
    pub idf: bool,

    /// Stop when the validation loss has not improved for P epochs.
    #[arg(long, value_name = "P")]
    pub patience: Option<u32>,

    /// Seed of the order in which rows are visited [default: 1].
    #[arg(long, value_name = "S")]
    pub seed: Option<u64>,

    /// Save the whole training state to FILE every --checkpoint-every seconds and
    /// at every epoch end (replaced atomically). Without it, only Ctrl-C or
    /// SIGTERM saves a checkpoint, next to the model as MODEL.tmc.
    #[arg(long, value_name = "FILE")]
    pub checkpoint: Option<PathBuf>,

    /// Seconds between checkpoints; 0 saves after every stretch of at most 16,384
    /// rows (slow) [default: 60].
    #[arg(long, value_name = "SECONDS")]
    pub checkpoint_every: Option<f64>,

    /// Continue the run saved in this checkpoint, with its settings; options
    /// given again must agree with them. The final model equals that of a run
    /// that was never interrupted.
    #[arg(long, value_name = "FILE", conflicts_with = "init_from")]
    pub resume: Option<PathBuf>,

    /// With --resume: accept shards appended to the dataset since the
    /// checkpoint; they join from the next epoch.
    #[arg(long, requires = "resume")]
    pub allow_appended: bool,

    /// Start from the weights of an earlier model (yesterday's filter on today's
    /// data); its tokenizing and hashing settings must match the dataset's.
    #[arg(long, value_name = "MODEL")]
    pub init_from: Option<PathBuf>,

    /// Copies of the model trained side by side, each on every R-th batch, and
    /// replaced by their mean every --sync-every rows and at every epoch end
    /// (parameter mixing). They run on separate cores, so R up to the number of
    /// cores trains up to R times faster, at a cost in accuracy per epoch like
    /// that of a larger batch; 1 trains a single copy [default: 2 for a binary
    /// task of at least 1,048,576 training rows (per rank with --distributed),
    /// else 1].
    #[arg(long, value_name = "R")]
    pub replicas: Option<usize>,

    /// Training rows (all replicas together, of all ranks with --distributed)
    /// between two mixes of the replicas [default: about 16 nonzeros per
    /// feature per replica, e.g. 1.4 M rows for messages of 24 nonzeros at 2^20
    /// features; with --distributed on several ranks, epoch ends only].
    #[arg(long, value_name = "ROWS")]
    pub sync_every: Option<u64>,

    /// Train as one process (rank) of an MPI job: `mpirun -n P tamis train DIR
    /// --model FILE --distributed`, or the same under srun. Each rank trains on
    /// its own share of the shards, and the ranks average their models every
    /// --sync-every rows (default: at every epoch end). Rank 0 writes the model,
    /// checkpoints and log. Needs a tamis built with `--features mpi`.
    #[arg(long)]
    pub distributed: bool,

    /// Threads [default: all cores]. The model does not depend on it (only on
    /// --replicas).
    #[arg(long, short = 'j', value_name = "N", value_parser = super::parse_threads)]
    pub threads: Option<usize>,

    /// Print nothing but errors.
    #[arg(long, short = 'q')]
    pub quiet: bool,
}

/// Library options for a fresh run (defaults applied).
pub fn options(a: &Args) -> anyhow::Result<TrainOptions> {
    let (Some(dir), Some(model)) = (&a.dir, &a.model) else {
        bail!("train needs a dataset folder and --model (or --resume FILE)");
    };
    let loss = a.loss.unwrap_or(Loss::Hinge);
    Ok(TrainOptions {
        dir: dir.clone(),
        model: model.clone(),
        solver: SolverConfig {
            lambda: a.lambda.unwrap_or(1e-5),
            loss,
            batch: a.batch.unwrap_or(64),
            eta0: a.eta0.unwrap_or(default_eta0(loss)),
            project: a.project,
            average_from: a
                .average_from
                .unwrap_or(if a.init_from.is_some() { 0 } else { 1 }),
        },
        epochs: a.epochs.unwrap_or(5),
        seed: a.seed.unwrap_or(1),
        class_weight: a.class_weight.clone().unwrap_or(ClassWeight::None),
        idf: a.idf,
        patience: a.patience,
        replicas: a.replicas,
        sync_every: a.sync_every,
        threads: a.threads.unwrap_or_else(super::default_threads),
        progress: !a.quiet,
        checkpoint: a.checkpoint.clone(),
        checkpoint_every: a
            .checkpoint_every
            .unwrap_or(train::DEFAULT_CHECKPOINT_SECONDS),
        init_from: a.init_from.clone(),
        stop: None,
    })
}

fn default_eta0(loss: Loss) -> f64 {
    match loss {
        Loss::SquaredHinge => 0.01,
        _ => 1.0,
    }
}

/// Options that continue `ck`'s run; every setting given on the command line
/// must agree with the stored one.
fn resume_options(a: &Args, ck: &Checkpoint, path: &Path) -> anyhow::Result<TrainOptions> {
    let mut o = TrainOptions::from_checkpoint(&ck.meta, path);
    let s = &ck.meta.settings;
    let mut clash = Vec::new();
    let mut check = |flag: &str, given: Option<String>, stored: String| {
        if let Some(g) = given {
            if g != stored {
                clash.push(format!("{flag} {g} (the checkpoint has {stored})"));
            }
        }
    };
    check(
        "--loss",
        a.loss.map(|l| l.name().into()),
        s.solver.loss.name().into(),
    );
    check(
        "--lambda",
        a.lambda.map(|x| x.to_string()),
        s.solver.lambda.to_string(),
    );
    check(
        "--epochs",
        a.epochs.map(|x| x.to_string()),
        s.epochs.to_string(),
    );
    check(
        "--batch",
        a.batch.map(|x| x.to_string()),
        s.solver.batch.to_string(),
    );
    check(
        "--eta0",
        a.eta0.map(|x| x.to_string()),
        s.solver.eta0.to_string(),
    );
    check(
        "--project",
        a.project.then(|| "on".into()),
        if s.solver.project { "on" } else { "off" }.into(),
    );
    check(
        "--average-from",
        a.average_from.map(|x| x.to_string()),
        s.solver.average_from.to_string(),
    );
    check(
        "--class-weight",
        a.class_weight.as_ref().map(|c| c.rule()),
        s.class_weight_rule.clone(),
    );
    check(
        "--idf",
        a.idf.then(|| "on".into()),
        if s.idf { "on" } else { "off" }.into(),
    );
    check(
        "--patience",
        a.patience.map(|x| x.to_string()),
        s.patience.map_or("none".into(), |x| x.to_string()),
    );
    check("--seed", a.seed.map(|x| x.to_string()), s.seed.to_string());
    check(
        "--replicas",
        a.replicas.map(|x| x.to_string()),
        s.replicas.max(1).to_string(),
    );
    check(
        "--sync-every",
        a.sync_every.map(|x| x.to_string()),
        s.sync_every.to_string(),
    );
    if !clash.is_empty() {
        bail!(
            "{}: options contradict the checkpoint's settings: {}; leave them out to resume with the stored ones",
            path.display(),
            clash.join(", ")
        );
    }
    if let Some(d) = &a.dir {
        o.dir = d.clone();
    }
    if let Some(m) = &a.model {
        o.model = m.clone();
    }
    o.checkpoint = Some(a.checkpoint.clone().unwrap_or_else(|| path.to_path_buf()));
    if let Some(e) = a.checkpoint_every {
        o.checkpoint_every = e;
    }
    o.threads = a.threads.unwrap_or_else(super::default_threads);
    o.progress = !a.quiet;
    Ok(o)
}

/// Quote a path for a POSIX shell when it needs it.
fn shell_quote(p: &Path) -> String {
    let s = p.display().to_string();
    if !s.is_empty()
        && s.bytes()
            .all(|b| b.is_ascii_alphanumeric() || b"/._-+=:,@".contains(&b))
    {
        s
    } else {
        format!("'{}'", s.replace('\'', r"'\''"))
    }
}

/// SIGINT and SIGTERM set `flag`; a second one while it is set exits at once
/// with status 130 (the last checkpoint written is intact: writes are atomic).
fn install_stop_handler() -> anyhow::Result<Arc<AtomicBool>> {
    use signal_hook::consts::{SIGINT, SIGTERM};
    use signal_hook::flag;
    let stop = Arc::new(AtomicBool::new(false));
    for sig in [SIGINT, SIGTERM] {
        // The order matters: the conditional exit is checked first, so the first
        // signal only sets the flag and the second one exits.
        flag::register_conditional_shutdown(sig, INTERRUPTED as i32, Arc::clone(&stop))
            .context("cannot install the signal handler")?;
        flag::register(sig, Arc::clone(&stop)).context("cannot install the signal handler")?;
    }
    Ok(stop)
}

/// Run `tamis train`.
pub fn run(a: Args) -> anyhow::Result<ExitCode> {
    if a.distributed {
        #[cfg(feature = "mpi")]
        return distributed::run(a);
        #[cfg(not(feature = "mpi"))]
        {
            // Under mpirun or srun every rank fails alike: rank 0 alone says why.
            let rank = [
                "OMPI_COMM_WORLD_RANK",
                "PMI_RANK",
                "PMIX_RANK",
                "SLURM_PROCID",
            ]
            .iter()
            .find_map(|v| std::env::var(v).ok());
            if rank.is_some_and(|r| r != "0") {
                return Ok(ExitCode::from(1));
            }
            bail!(
                "--distributed needs a tamis built with MPI: cargo build --release --features mpi \
                 (with the MPI development files and libclang installed; see the README)"
            );
        }
    }
    let log = super::stderr_log(a.quiet);
    let (mut opts, resume) = match &a.resume {
        Some(path) => {
            let ck = Checkpoint::load(path)
                .with_context(|| format!("cannot resume from {}", path.display()))?;
            let o = resume_options(&a, &ck, path)?;
            let r = Resume {
                checkpoint: ck,
                path: path.clone(),
                allow_appended: a.allow_appended,
            };
            (o, Some(r))
        }
        None => (options(&a)?, None),
    };
    opts.stop = Some(install_stop_handler()?);
    let dir = opts.dir.clone();
    let outcome = match resume {
        Some(r) => train::resume(&opts, r, log),
        None => train::train(&opts, log),
    }
    .with_context(|| format!("training on {} failed", dir.display()))?;
    match outcome {
        Outcome::Finished(r) => {
            if !a.quiet {
                eprintln!(
                    "wrote {} ({} model(s) of {} features) in {:.2} s",
                    opts.model.display(),
                    r.model.models(),
                    r.model.dim(),
                    r.seconds
                );
                if let (Some(c), Some(path)) = (r.last_checkpoint, &opts.checkpoint) {
                    eprintln!(
                        "checkpoint {} ({}, last write {:.0} ms)",
                        path.display(),
                        tamis::util::bytes(c.bytes),
                        c.seconds * 1e3
                    );
                }
            }
            Ok(ExitCode::SUCCESS)
        }
        Outcome::Stopped {
            checkpoint,
            position,
        } => Ok(interrupted(checkpoint, position, None)),
    }
}

/// Say where an interrupted run saved its state and how to resume it (under
/// `mpirun -n RANKS` for a distributed run); the exit status to return.
fn interrupted(
    checkpoint: PathBuf,
    position: tamis::checkpoint::Position,
    ranks: Option<usize>,
) -> ExitCode {
    let abs = std::path::absolute(&checkpoint).unwrap_or(checkpoint);
    eprintln!(
        "interrupted: saved the training state at epoch {}, step {} to {}",
        position.epoch + 1,
        position.step,
        abs.display()
    );
    let me = std::env::args().next().unwrap_or_else(|| "tamis".into());
    let me = shell_quote(Path::new(&me));
    match ranks {
        None => {
            eprintln!("resume with:");
            eprintln!("  {me} train --resume {}", shell_quote(&abs));
        }
        Some(n) => {
            eprintln!("resume with (or the same under your scheduler):");
            eprintln!(
                "  mpirun -n {n} {me} train --resume {} --distributed",
                shell_quote(&abs)
            );
        }
    }
    ExitCode::from(INTERRUPTED)
}

/// `tamis train --distributed`: one rank of an MPI job.
#[cfg(feature = "mpi")]
mod distributed {
    use super::*;
    use tamis::distributed::{agree, mpi, Collective, PEER_FAILED};

    /// What a rank ends with.
    enum Ended {
        Done(Outcome, Box<TrainOptions>, u64),
        Failed(anyhow::Error),
    }

    pub fn run(a: Args) -> anyhow::Result<ExitCode> {
        let Some((_universe, world)) = mpi::start() else {
            bail!("MPI was started already in this process");
        };
        let (rank, ranks) = (world.rank(), world.size());
        let stop = install_stop_handler()?;
        let ended = mpi::serve(&world, |comm| match rank_run(&a, comm, stop) {
            Ok((outcome, opts)) => Ended::Done(outcome, Box::new(opts), comm.bytes_sent()),
            Err(e) => Ended::Failed(e),
        });
        // MPI ends when `_universe` is dropped, on every rank alike: failures
        // were agreed on, so no rank is left waiting in a collective.
        match ended {
            Ended::Failed(e) => {
                let text = format!("{e:#}");
                // A failure every rank shares is printed once, by rank 0; one
                // of some ranks only, by the lowest of them (its message names
                // it); the others stop quietly.
                let own = text.contains(&format!("rank {rank}: "));
                if !text.ends_with(PEER_FAILED) && (rank == 0 || own) {
                    eprintln!("error: {text}");
                }
                Ok(ExitCode::from(1))
            }
            Ended::Done(outcome, opts, sent) => {
                if rank != 0 {
                    return Ok(match outcome {
                        Outcome::Finished(_) => ExitCode::SUCCESS,
                        Outcome::Stopped { .. } => ExitCode::from(INTERRUPTED),
                    });
                }
                match outcome {
                    Outcome::Finished(r) => {
                        if !a.quiet {
                            eprintln!(
                                "wrote {} ({} model(s) of {} features) in {:.2} s on {ranks} rank(s); \
                                 rank 0 sent {} to the others",
                                opts.model.display(),
                                r.model.models(),
                                r.model.dim(),
                                r.seconds,
                                tamis::util::bytes(sent)
                            );
                        }
                        Ok(ExitCode::SUCCESS)
                    }
                    Outcome::Stopped {
                        checkpoint,
                        position,
                    } => Ok(interrupted(checkpoint, position, Some(ranks))),
                }
            }
        }
    }

    /// One rank's run: options (a resumed run's checkpoint is read by rank 0
    /// and sent to the others), then training.
    fn rank_run(
        a: &Args,
        comm: &dyn Collective,
        stop: Arc<AtomicBool>,
    ) -> anyhow::Result<(Outcome, TrainOptions)> {
        let rank = comm.rank();
        let log = super::super::stderr_log(a.quiet || rank != 0);
        let (mut opts, resume) = match &a.resume {
            Some(path) => {
                let read = if rank == 0 {
                    std::fs::read(path).map_err(|cause| tamis::error::Error::Io {
                        path: path.clone(),
                        cause,
                    })
                } else {
                    Ok(Vec::new())
                };
                let mut bytes = agree(comm, read)
                    .with_context(|| format!("cannot resume from {}", path.display()))?;
                comm.broadcast(&mut bytes);
                let ck = Checkpoint::from_bytes(&bytes, path)
                    .with_context(|| format!("cannot resume from {}", path.display()))?;
                drop(bytes);
                let o = resume_options(a, &ck, path)?;
                let r = Resume {
                    checkpoint: ck,
                    path: path.clone(),
                    allow_appended: a.allow_appended,
                };
                (o, Some(r))
            }
            None => (options(a)?, None),
        };
        opts.stop = Some(stop);
        if rank != 0 {
            opts.progress = false;
        }
        let dir = opts.dir.clone();
        let outcome = match resume {
            Some(r) => train::resume_in(&opts, r, log, comm),
            None => train::train_in(&opts, log, comm),
        }
        .with_context(|| format!("training on {} failed", dir.display()))?;
        Ok((outcome, opts))
    }
}
