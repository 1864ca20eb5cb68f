//! `tamis verify`: recompute checksums and report damage.

use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::{bail, Context};
use tamis::container::{self, Kind};
use tamis::dataset;
use tamis::shard::Shard;
use tamis::util::{bytes, thousands};

/// Options of `tamis verify`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// A dataset folder, or a single tamis file (shard, document frequencies,
    /// token sketch, model or manifest).
    #[arg(value_name = "PATH")]
    pub path: PathBuf,
}

/// Run `tamis verify`.
pub fn run(a: Args) -> anyhow::Result<ExitCode> {
    let p = &a.path;
    if p.is_dir() {
        let r = dataset::verify(p)?;
        for e in &r.problems {
            eprintln!("damaged: {e}");
        }
        if r.problems.is_empty() {
            outln!(
                "ok: {} files ({} of shards) in {} verified",
                r.checked,
                bytes(r.bytes),
                p.display()
            );
            return Ok(ExitCode::SUCCESS);
        }
        bail!(
            "{} of {} files in {} are damaged",
            r.problems.len(),
            r.checked,
            p.display()
        );
    }
    let head = std::fs::read(p).with_context(|| format!("cannot read {}", p.display()))?;
    match container::peek_kind(&head) {
        Some((Kind::Shard, _)) => {
            let s = Shard::read(p)?;
            s.verify(None)?;
            outln!(
                "ok: shard {} ({} rows, {} nonzeros)",
                p.display(),
                thousands(s.rows() as u64),
                thousands(s.nnz() as u64)
            );
        }
        Some((Kind::DocFreq, _)) => {
            dataset::docfreq::DocFreq::open(p, true)?;
            outln!("ok: document frequencies {}", p.display());
        }
        Some((Kind::Model, _)) => {
            let m = tamis::model::Model::load(p)?;
            outln!(
                "ok: model {} ({} model(s) of {} features, labels {})",
                p.display(),
                m.models(),
                thousands(m.dim() as u64),
                m.meta.labels.join(", ")
            );
        }
        Some((Kind::TokenSketch, _)) => {
            let (sk, _) = dataset::sketch::read(p)?;
            outln!(
                "ok: token sketch {} ({} tokens in {} field(s), each seen in at least {} rows)",
                p.display(),
                thousands(sk.len() as u64),
                sk.fields.len(),
                sk.min_count
            );
        }
        Some((k, _)) => bail!(
            "{}: verifying {} files is not supported by this build",
            p.display(),
            k.name()
        ),
        None if p
            .file_name()
            .is_some_and(|n| n == dataset::manifest::MANIFEST_FILE) =>
        {
            dataset::Manifest::from_bytes(&head, p)?;
            outln!(
                "ok: manifest {} (pass the folder to check its files too)",
                p.display()
            );
        }
        None => bail!("{}: not a tamis file", p.display()),
    }
    Ok(ExitCode::SUCCESS)
}
