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
    /// model, checkpoint, token sketch or manifest).
    #[arg(value_name = "PATH")]
    pub path: PathBuf,

    /// With a dataset folder split into parts (`ingest --parts`): check only
    /// the shards of part K (what a node holding that part has), besides the
    /// manifest and the other common files.
    #[arg(long, value_name = "K")]
    pub part: Option<u32>,
}

/// Run `tamis verify`.
pub fn run(a: Args) -> anyhow::Result<ExitCode> {
    let p = &a.path;
    if p.is_dir() {
        let r = dataset::verify_part(p, a.part)?;
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
    // The kind is in the first 16 bytes; only a manifest (JSON) is read whole here.
    let mut head = [0u8; 16];
    let got = {
        use std::io::Read as _;
        let mut f =
            std::fs::File::open(p).with_context(|| format!("cannot read {}", p.display()))?;
        f.read(&mut head)
            .with_context(|| format!("cannot read {}", p.display()))?
    };
    match container::peek_kind(&head[..got]) {
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
        Some((Kind::Checkpoint, _)) => {
            let c = tamis::checkpoint::Checkpoint::verify(p)?;
            let pos = c.position;
            let epochs = c.settings.epochs;
            outln!(
                "ok: checkpoint {} ({}, step {}, dataset {}, model {})",
                p.display(),
                if pos.epoch >= epochs {
                    format!("all {epochs} epochs done")
                } else {
                    format!("epoch {} of {epochs}", pos.epoch + 1)
                },
                thousands(pos.step),
                c.dataset.display(),
                c.model.display()
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
        None if p
            .file_name()
            .is_some_and(|n| n == dataset::manifest::MANIFEST_FILE) =>
        {
            let bytes = std::fs::read(p).with_context(|| format!("cannot read {}", p.display()))?;
            dataset::Manifest::from_bytes(&bytes, p)?;
            outln!(
                "ok: manifest {} (pass the folder to check its files too)",
                p.display()
            );
        }
        None => bail!("{}: not a tamis file", p.display()),
    }
    Ok(ExitCode::SUCCESS)
}
