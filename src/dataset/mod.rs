//! Datasets: a folder of shards listed by a manifest, built by [`ingest()`].
//!
//! ```text
//! DIR/manifest.json          the manifest (JSON, checksummed, replaced atomically)
//! DIR/train-000000.tms ...   training shards
//! DIR/valid-000007.tms ...   validation shards
//! DIR/docfreq-000009.tmd     document frequencies of one ingest batch
//! DIR/sketch-000010.tmk      token sketch of one ingest batch (unless --no-sketch)
//! DIR/.lock                  present while a command writes the dataset
//! ```

pub mod docfreq;
pub mod ingest;
pub mod manifest;
pub mod sketch;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use serde::Serialize;

use crate::error::{Error, Result};
use crate::shard::Shard;

pub use ingest::{ingest, Choices, IngestOptions, IngestSummary, Log};
pub use manifest::{DocFreqEntry, Manifest, ShardEntry, Split};

/// Path of a file listed in the manifest of the dataset in `dir`.
pub fn file_in(dir: &Path, name: &str) -> PathBuf {
    dir.join(name)
}

/// Refuse `dest` as the output `what` when it is one of the dataset's own
/// files (its manifest or a file the manifest lists), however it is named:
/// writing it would replace that file and destroy the dataset.
pub fn refuse_own_file(dir: &Path, m: &Manifest, dest: &Path, what: &str) -> Result<()> {
    for f in std::iter::once(manifest::MANIFEST_FILE).chain(m.files()) {
        if crate::container::same_place(&file_in(dir, f), dest) {
            return Err(Error::Invalid(format!(
                "{}: the {what} cannot be written over one of the dataset's own files",
                dest.display()
            )));
        }
    }
    Ok(())
}

/// Open the shard of an entry of `m` and check that it is the file the
/// manifest lists, and as wide as the dataset's buckets (its indices would
/// otherwise be masked into other features without a word).
pub fn open_shard(dir: &Path, m: &Manifest, e: &ShardEntry) -> Result<Shard> {
    let path = file_in(dir, &e.file);
    if !path.exists() {
        return Err(Error::Corrupt {
            path,
            what: "listed in the manifest but missing".into(),
        });
    }
    let s = Shard::open(&path)?;
    let sum = format!("{:016x}", s.header_checksum());
    if s.rows() as u64 != e.rows || s.nnz() as u64 != e.nnz || sum != e.checksum {
        return Err(Error::Mismatch {
            path,
            what: format!(
                "shard holds {} rows, {} nonzeros, checksum {sum}; the manifest lists {} rows, {} nonzeros, checksum {}",
                s.rows(),
                s.nnz(),
                e.rows,
                e.nnz,
                e.checksum
            ),
        });
    }
    if s.cols() != m.features.buckets() {
        return Err(Error::Mismatch {
            path,
            what: format!(
                "shard has {} columns, the dataset {}",
                s.cols(),
                m.features.buckets()
            ),
        });
    }
    Ok(s)
}

/// Open the document-frequency file of an entry of `m`, every checksum
/// verified, and check that it is the file the manifest lists: its checksum,
/// the dataset's bucket count and the batch's training rows.
pub fn open_doc_freq(dir: &Path, m: &Manifest, d: &DocFreqEntry) -> Result<docfreq::DocFreq> {
    let path = file_in(dir, &d.file);
    let f = docfreq::DocFreq::open(&path, true)?;
    if format!("{:016x}", f.checksum()) != d.checksum
        || f.log2_buckets() != m.features.log2_buckets
        || f.rows() != d.train_rows
    {
        return Err(Error::Mismatch {
            path,
            what: "document-frequency file is not the one the manifest lists".into(),
        });
    }
    Ok(f)
}

/// Outcome of [`verify`].
#[derive(Debug, Default)]
pub struct VerifyReport {
    /// Files checked.
    pub checked: usize,
    /// Bytes checked.
    pub bytes: u64,
    /// Problems found, each naming its file.
    pub problems: Vec<Error>,
}

/// Recompute every checksum of the dataset in `dir`: manifest, shards (all
/// sections, structure, labels) and document-frequency files.
pub fn verify(dir: &Path) -> Result<VerifyReport> {
    verify_part(dir, None)
}

/// [`verify`], with the shards of one part only (`ingest --parts`: what a node
/// holding that part has) when `part` is given.
pub fn verify_part(dir: &Path, part: Option<u32>) -> Result<VerifyReport> {
    let m = Manifest::load(dir)?;
    if let Some(k) = part {
        check_part(dir, &m, k)?;
    }
    let mut r = VerifyReport {
        checked: 1,
        ..Default::default()
    };
    let n_labels = m.labels.len() as u32;
    // Rows of each label in each split (training, validation), as the shards hold them.
    let mut held = vec![[0u64; 2]; m.labels.len()];
    for e in m.shards.iter().filter(|e| part.is_none_or(|k| e.part == k)) {
        r.checked += 1;
        match open_shard(dir, &m, e).and_then(|s| {
            s.verify(Some(n_labels))?;
            let split = (e.split == Split::Validation) as usize;
            for &c in s.labels() {
                held[c as usize][split] += 1;
            }
            Ok(())
        }) {
            Ok(()) => r.bytes += e.bytes,
            Err(err) => r.problems.push(err),
        }
    }
    // The label dictionary's counts must be the shards' (when every shard of
    // the dataset was read and found sound).
    if part.is_none() && r.problems.is_empty() {
        for (l, h) in m.labels.iter().zip(&held) {
            if [l.train_rows, l.validation_rows] != *h {
                r.problems.push(Error::Mismatch {
                    path: dir.join(manifest::MANIFEST_FILE),
                    what: format!(
                        "label {:?}: the manifest counts {} training and {} validation rows, the shards hold {} and {}",
                        l.name, l.train_rows, l.validation_rows, h[0], h[1]
                    ),
                });
            }
        }
    }
    for d in &m.doc_freq {
        r.checked += 1;
        if let Err(err) = open_doc_freq(dir, &m, d) {
            r.problems.push(err);
        }
    }
    for e in &m.sketches {
        r.checked += 1;
        let path = file_in(dir, &e.file);
        let res = sketch::read(&path).and_then(|(s, sum)| {
            if format!("{sum:016x}") != e.checksum {
                return Err(Error::Mismatch {
                    path: path.clone(),
                    what: "token sketch is not the file the manifest lists".into(),
                });
            }
            s.check(&m.features, &path)
        });
        if let Err(err) = res {
            r.problems.push(err);
        }
    }
    Ok(r)
}

/// Per-label row counts in [`Stats`].
#[derive(Debug, Clone, Serialize)]
pub struct LabelStats {
    /// Label.
    pub name: String,
    /// Class id.
    pub id: u32,
    /// All rows.
    pub rows: u64,
    /// Training rows.
    pub train_rows: u64,
    /// Validation rows.
    pub validation_rows: u64,
}

/// Shard summary in [`Stats`].
#[derive(Debug, Clone, Serialize)]
pub struct ShardStats {
    /// File name.
    pub file: String,
    /// Split.
    pub split: Split,
    /// Rows.
    pub rows: u64,
    /// Nonzeros.
    pub nnz: u64,
    /// Bytes.
    pub bytes: u64,
    /// Ingest batch.
    pub batch: u32,
    /// Part (`ingest --parts`).
    pub part: u32,
}

/// Summary of a dataset (`tamis stats`).
#[derive(Debug, Clone, Serialize)]
pub struct Stats {
    /// All rows.
    pub rows: u64,
    /// Training rows.
    pub train_rows: u64,
    /// Validation rows.
    pub validation_rows: u64,
    /// Nonzeros.
    pub nnz: u64,
    /// Mean nonzeros per row.
    pub mean_nnz_per_row: f64,
    /// Labels with counts.
    pub labels: Vec<LabelStats>,
    /// Positive label of a binary task.
    pub positive: Option<String>,
    /// Hash buckets.
    pub buckets: u64,
    /// Buckets nonzero in at least one training row.
    pub buckets_used: u64,
    /// `buckets_used / buckets`.
    pub bucket_fill: f64,
    /// Estimated distinct features behind the used buckets, from the occupancy of
    /// uniform hashing: `D = −m·ln(1 − used/m)`.
    pub estimated_distinct_features: f64,
    /// Estimated share of features that share their bucket with another
    /// feature: `1 − exp(−D/m)`, which equals the fill.
    pub estimated_collision_share: f64,
    /// Skipped records by reason, all batches.
    pub bad: BTreeMap<String, u64>,
    /// Rows kept with replaced invalid UTF-8.
    pub lossy_utf8_rows: u64,
    /// Ingest batches.
    pub batches: usize,
    /// Shards.
    pub shards: Vec<ShardStats>,
    /// Bytes of all shards.
    pub shard_bytes: u64,
    /// Parts the dataset is split into (`ingest --parts`).
    pub parts: u32,
}

/// Refuse a part number the dataset in `dir` does not have (a loaded
/// manifest has at least one part).
fn check_part(dir: &Path, m: &Manifest, part: u32) -> Result<()> {
    if part >= m.scatter.parts {
        return Err(Error::Invalid(format!(
            "{}: part {part} does not exist: the dataset has {} part(s), numbered from 0",
            dir.display(),
            m.scatter.parts
        )));
    }
    Ok(())
}

/// The files a node holding part `part` of the dataset in `dir` needs, relative
/// to the folder: the manifest, the document-frequency and sketch files, and
/// the shards of that part.
pub fn part_files(dir: &Path, part: u32) -> Result<Vec<String>> {
    let m = Manifest::load(dir)?;
    check_part(dir, &m, part)?;
    let mut files = vec![manifest::MANIFEST_FILE.to_string()];
    files.extend(m.doc_freq.iter().map(|d| d.file.clone()));
    files.extend(m.sketches.iter().map(|s| s.file.clone()));
    files.extend(
        m.shards
            .iter()
            .filter(|s| s.part == part)
            .map(|s| s.file.clone()),
    );
    Ok(files)
}

/// Compute [`Stats`] for the dataset in `dir` (reads the manifest and the
/// document-frequency files, not the shards).
pub fn stats(dir: &Path) -> Result<Stats> {
    let m = Manifest::load(dir)?;
    let buckets = m.features.buckets();
    let mut used = vec![false; buckets as usize];
    for d in &m.doc_freq {
        let f = docfreq::DocFreq::open(&file_in(dir, &d.file), false)?;
        for (u, &c) in used.iter_mut().zip(f.counts()?) {
            *u |= c > 0;
        }
    }
    let buckets_used = used.iter().filter(|&&u| u).count() as u64;
    let fill = buckets_used as f64 / buckets as f64;
    let distinct = if buckets_used < buckets {
        -(buckets as f64) * (1.0 - fill).ln()
    } else {
        f64::INFINITY
    };
    let rows = m.train_rows() + m.validation_rows();
    let nnz = m.nnz();
    Ok(Stats {
        rows,
        train_rows: m.train_rows(),
        validation_rows: m.validation_rows(),
        nnz,
        mean_nnz_per_row: if rows > 0 {
            nnz as f64 / rows as f64
        } else {
            0.0
        },
        labels: m
            .labels
            .iter()
            .enumerate()
            .map(|(i, l)| LabelStats {
                name: l.name.clone(),
                id: i as u32,
                rows: l.train_rows + l.validation_rows,
                train_rows: l.train_rows,
                validation_rows: l.validation_rows,
            })
            .collect(),
        positive: m.positive.clone(),
        buckets,
        buckets_used,
        bucket_fill: fill,
        estimated_distinct_features: distinct,
        estimated_collision_share: 1.0 - (-distinct / buckets as f64).exp(),
        bad: m.bad_totals(),
        lossy_utf8_rows: m.batches.iter().map(|b| b.lossy_utf8_rows).sum(),
        batches: m.batches.len(),
        shards: m
            .shards
            .iter()
            .map(|s| ShardStats {
                file: s.file.clone(),
                split: s.split,
                rows: s.rows,
                nnz: s.nnz,
                bytes: s.bytes,
                batch: s.batch,
                part: s.part,
            })
            .collect(),
        shard_bytes: m.shards.iter().map(|s| s.bytes).sum(),
        parts: m.scatter.parts,
    })
}
