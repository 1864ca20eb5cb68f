//! `tamis stats`: summary of a dataset.

use std::io::Write;
use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::Context;
use tamis::dataset;
use tamis::util::{bytes, thousands};

/// Options of `tamis stats`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// Dataset folder.
    #[arg(value_name = "DIR")]
    pub dir: PathBuf,

    /// Print JSON (keys include rows, train_rows, validation_rows, nnz, labels).
    #[arg(long)]
    pub json: bool,

    /// Also list every shard.
    #[arg(long)]
    pub shards: bool,

    /// Print only the files that a node holding part K of a split dataset
    /// (`ingest --parts`) needs, one per line, relative to DIR: for `rsync
    /// --files-from` or `tar -T`.
    #[arg(long, value_name = "K", conflicts_with_all = ["json", "shards"])]
    pub part_files: Option<u32>,
}

/// Print the human-readable summary of `s`.
pub fn print(s: &dataset::Stats, shards: bool, out: &mut impl Write) -> std::io::Result<()> {
    writeln!(
        out,
        "rows        {:>14}   train {}   validation {}",
        thousands(s.rows),
        thousands(s.train_rows),
        thousands(s.validation_rows)
    )?;
    writeln!(
        out,
        "nonzeros    {:>14}   {:.1} per row",
        thousands(s.nnz),
        s.mean_nnz_per_row
    )?;
    writeln!(
        out,
        "buckets     {:>14}   {:.1}% used; ~{} distinct features, ~{:.1}% of them share a bucket",
        thousands(s.buckets),
        100.0 * s.bucket_fill,
        thousands(s.estimated_distinct_features.min(1e18) as u64),
        100.0 * s.estimated_collision_share
    )?;
    writeln!(
        out,
        "shards      {:>14}   {} in {} batch(es)",
        s.shards.len(),
        bytes(s.shard_bytes),
        s.batches
    )?;
    let skipped: u64 = s.bad.values().sum();
    let reasons: Vec<String> = s
        .bad
        .iter()
        .filter(|(_, &n)| n > 0)
        .map(|(k, n)| format!("{k} {}", thousands(*n)))
        .collect();
    writeln!(
        out,
        "skipped     {:>14}   {}",
        thousands(skipped),
        reasons.join(", ")
    )?;
    if s.lossy_utf8_rows > 0 {
        writeln!(
            out,
            "lossy UTF-8 {:>14}   rows kept",
            thousands(s.lossy_utf8_rows)
        )?;
    }
    if s.parts > 1 {
        let per_part: Vec<String> = (0..s.parts)
            .map(|k| {
                let rows: u64 = s
                    .shards
                    .iter()
                    .filter(|x| x.part == k)
                    .map(|x| x.rows)
                    .sum();
                format!("{k}: {}", thousands(rows))
            })
            .collect();
        writeln!(
            out,
            "parts       {:>14}   rows per part: {}",
            s.parts,
            per_part.join(", ")
        )?;
    }
    match &s.positive {
        Some(p) => writeln!(out, "task        binary, positive label {p:?}")?,
        None => writeln!(out, "task        {} classes, one-vs-rest", s.labels.len())?,
    }
    writeln!(out)?;
    writeln!(
        out,
        "{:>4}  {:<24} {:>12} {:>12} {:>7}",
        "id", "label", "train", "validation", "share"
    )?;
    for l in &s.labels {
        writeln!(
            out,
            "{:>4}  {:<24} {:>12} {:>12} {:>6.1}%",
            l.id,
            l.name,
            thousands(l.train_rows),
            thousands(l.validation_rows),
            100.0 * l.rows as f64 / s.rows.max(1) as f64
        )?;
    }
    if shards {
        writeln!(out)?;
        let part = |x: String| if s.parts > 1 { x } else { String::new() };
        writeln!(
            out,
            "{:<20} {:<10} {:>10} {:>12} {:>10} {:>5}{}",
            "shard",
            "split",
            "rows",
            "nonzeros",
            "size",
            "batch",
            part(format!(" {:>5}", "part"))
        )?;
        for sh in &s.shards {
            writeln!(
                out,
                "{:<20} {:<10} {:>10} {:>12} {:>10} {:>5}{}",
                sh.file,
                format!("{:?}", sh.split).to_lowercase(),
                thousands(sh.rows),
                thousands(sh.nnz),
                bytes(sh.bytes),
                sh.batch,
                part(format!(" {:>5}", sh.part))
            )?;
        }
    }
    Ok(())
}

/// Run `tamis stats`.
pub fn run(a: Args) -> anyhow::Result<ExitCode> {
    if let Some(k) = a.part_files {
        let files = dataset::part_files(&a.dir, k)
            .with_context(|| format!("cannot read dataset {}", a.dir.display()))?;
        let mut out = std::io::stdout().lock();
        for f in files {
            writeln!(out, "{f}")?;
        }
        return Ok(ExitCode::SUCCESS);
    }
    let s = dataset::stats(&a.dir)
        .with_context(|| format!("cannot read dataset {}", a.dir.display()))?;
    let mut out = std::io::stdout().lock();
    if a.json {
        serde_json::to_writer_pretty(&mut out, &s)?;
        writeln!(out)?;
    } else {
        print(&s, a.shards, &mut out)?;
    }
    Ok(ExitCode::SUCCESS)
}
