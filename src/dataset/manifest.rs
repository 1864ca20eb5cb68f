//! The dataset manifest: a JSON file that lists everything a dataset holds.
//!
//! `DIR/manifest.json` is the only entry point of a dataset: shards and
//! document-frequency files that it does not list do not belong to the dataset.
//! It is replaced atomically (temporary file, fsync, rename, fsync of the folder).
//!
//! Integrity: the first key is `"checksum"`, 16 hex digits of the xxh3-64 of the
//! whole file as written with those 16 digits replaced by `0`. Any changed byte
//! is caught, and the file stays plain JSON that `jq` reads.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};
use xxhash_rust::xxh3::xxh3_64;

use crate::container;
use crate::error::{Error, IoContext, Result};
use crate::features::FeatureConfig;
use crate::input::{Fingerprint, InputSpec};

/// File name of the manifest inside a dataset folder.
pub const MANIFEST_FILE: &str = "manifest.json";
/// Value of the `format` key.
pub const FORMAT_NAME: &str = "tamis-dataset";
/// Current manifest format version.
pub const VERSION: u32 = 1;
const ZERO_SUM: &str = "0000000000000000";
const SUM_KEY: &str = "\"checksum\": \"";

/// Which part of the data a shard holds.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Split {
    /// Training rows.
    Train,
    /// Held-out validation rows.
    Validation,
}

/// One label of the label dictionary; its position is its class id.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct LabelEntry {
    /// Label as found in the input.
    pub name: String,
    /// Training rows with this label.
    pub train_rows: u64,
    /// Validation rows with this label.
    pub validation_rows: u64,
}

/// One shard of the dataset.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct ShardEntry {
    /// File name inside the dataset folder.
    pub file: String,
    /// Which split.
    pub split: Split,
    /// Rows.
    pub rows: u64,
    /// Nonzeros.
    pub nnz: u64,
    /// File size in bytes.
    pub bytes: u64,
    /// The shard's header checksum, hex.
    pub checksum: String,
    /// The ingest batch that wrote it.
    pub batch: u32,
    /// The part of the dataset it belongs to (`ingest --parts`; 0, not
    /// written, in a dataset of one part).
    #[serde(default, skip_serializing_if = "is_zero")]
    pub part: u32,
}

fn is_zero(x: &u32) -> bool {
    *x == 0
}

fn one() -> u32 {
    1
}

fn is_one(x: &u32) -> bool {
    *x == 1
}

/// One document-frequency file (one per ingest batch).
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct DocFreqEntry {
    /// File name inside the dataset folder.
    pub file: String,
    /// The ingest batch.
    pub batch: u32,
    /// Training rows counted.
    pub train_rows: u64,
    /// The file's header checksum, hex.
    pub checksum: String,
}

/// One token-sketch file (one per ingest batch that kept a sketch).
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct SketchFileEntry {
    /// File name inside the dataset folder.
    pub file: String,
    /// The ingest batch.
    pub batch: u32,
    /// Tokens listed.
    pub tokens: u64,
    /// The file's header checksum, hex.
    pub checksum: String,
}

/// Rule that routes rows to the validation split.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SplitRule {
    /// How: `xxh3-content` (a row is held out when the xxh3-64 of its record
    /// bytes, seeded with `seed`, scaled to [0, 1), is below the fraction).
    pub rule: String,
    /// Seed of the split hash.
    pub seed: u64,
    /// Fraction of rows held out.
    pub validation_fraction: f64,
}

/// How rows are spread over shards.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct ScatterRule {
    /// Seed of the writer choice.
    pub seed: u64,
    /// Training shard writers open at once.
    pub writers: u32,
    /// Rows at which a shard is closed.
    pub shard_rows: u64,
    /// Parts the dataset is split into (`ingest --parts P`), so that each node
    /// of a cluster can hold only its own: training writer `i` writes part
    /// `i mod P`, and each validation row goes to the part its hash picks. 1 (not
    /// written) for a dataset in one piece.
    #[serde(default = "one", skip_serializing_if = "is_one")]
    pub parts: u32,
}

/// What one input contributed.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct InputEntry {
    /// Identity of the input.
    #[serde(flatten)]
    pub fingerprint: Fingerprint,
    /// Rows kept.
    pub rows: u64,
    /// Records skipped.
    pub bad: u64,
}

/// One run of `ingest` (the first, or an `--append`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Batch {
    /// Batch number, from 0.
    pub id: u32,
    /// Seconds since the Unix epoch when the batch was committed.
    pub created_unix: u64,
    /// How records were read.
    pub input: InputSpec,
    /// The inputs, in order.
    pub inputs: Vec<InputEntry>,
    /// Training rows added.
    pub train_rows: u64,
    /// Validation rows added.
    pub validation_rows: u64,
    /// Nonzeros added.
    pub nnz: u64,
    /// Skipped records by reason.
    pub bad: BTreeMap<String, u64>,
    /// Rows kept although invalid UTF-8 had to be replaced.
    pub lossy_utf8_rows: u64,
    /// Blank lines passed over.
    pub blank_lines: u64,
}

/// The dataset manifest.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Manifest {
    /// Integrity check, see the module documentation.
    pub checksum: String,
    /// Always [`FORMAT_NAME`].
    pub format: String,
    /// Manifest format version.
    pub format_version: u32,
    /// The tamis version that last wrote it.
    pub written_by: String,
    /// Tokenizing and hashing settings.
    pub features: FeatureConfig,
    /// The positive label of a binary task (all others are negative), if any.
    pub positive: Option<String>,
    /// The validation split rule.
    pub split: SplitRule,
    /// How rows were spread over shards.
    pub scatter: ScatterRule,
    /// Label dictionary; a label's position is its class id.
    pub labels: Vec<LabelEntry>,
    /// Shards, in the order they were finished.
    pub shards: Vec<ShardEntry>,
    /// Document-frequency files, one per batch.
    pub doc_freq: Vec<DocFreqEntry>,
    /// Token-sketch files, one per batch that kept a sketch (absent in
    /// manifests written before sketches existed).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub sketches: Vec<SketchFileEntry>,
    /// Ingest runs.
    pub batches: Vec<Batch>,
    /// Next free shard number.
    pub next_shard: u64,
}

impl Manifest {
    /// Path of the manifest in `dir`.
    pub fn path_in(dir: &Path) -> PathBuf {
        dir.join(MANIFEST_FILE)
    }

    /// Serialise with the checksum filled in.
    pub fn to_bytes(&self) -> Vec<u8> {
        let mut m = self.clone();
        m.checksum = ZERO_SUM.into();
        let mut bytes = serde_json::to_vec_pretty(&m).expect("manifest serialises");
        bytes.push(b'\n');
        let at = find_sum(&bytes).expect("checksum is the first key");
        let sum = format!("{:016x}", xxh3_64(&bytes));
        bytes[at..at + 16].copy_from_slice(sum.as_bytes());
        bytes
    }

    /// Parse and check manifest bytes read from `path`.
    pub fn from_bytes(bytes: &[u8], path: &Path) -> Result<Manifest> {
        let corrupt = |what: String| Error::Corrupt {
            path: path.to_path_buf(),
            what,
        };
        let at = find_sum(bytes)
            .ok_or_else(|| corrupt("not a tamis manifest (no checksum key at the start)".into()))?;
        let digits = &bytes[at..at + 16];
        let stored = std::str::from_utf8(digits)
            .ok()
            .filter(|_| {
                digits
                    .iter()
                    .all(|b| b.is_ascii_digit() || (b'a'..=b'f').contains(b))
            })
            .and_then(|s| u64::from_str_radix(s, 16).ok())
            .ok_or_else(|| corrupt("checksum is not 16 lowercase hex digits".into()))?;
        let mut zeroed = bytes.to_vec();
        zeroed[at..at + 16].copy_from_slice(ZERO_SUM.as_bytes());
        let got = xxh3_64(&zeroed);
        if got != stored {
            return Err(Error::Checksum {
                path: path.to_path_buf(),
                section: "manifest".into(),
                expected: stored,
                got,
            });
        }
        let m: Manifest = serde_json::from_slice(bytes)
            .map_err(|e| corrupt(format!("bad manifest JSON: {e}")))?;
        if m.format != FORMAT_NAME {
            return Err(corrupt(format!(
                "format is {:?}, not {FORMAT_NAME:?}",
                m.format
            )));
        }
        if m.format_version != VERSION {
            return Err(Error::Version {
                path: path.to_path_buf(),
                oldest: VERSION,
                newest: VERSION,
                got: m.format_version,
            });
        }
        m.features.validate().map_err(|e| corrupt(e.to_string()))?;
        let sc = &m.scatter;
        if sc.parts == 0
            || sc.writers == 0
            || !sc.writers.is_multiple_of(sc.parts)
            || sc.shard_rows == 0
        {
            return Err(corrupt(format!(
                "scatter rule of {} writer(s) in {} part(s) with {} rows per shard is not one ingest writes",
                sc.writers, sc.parts, sc.shard_rows
            )));
        }
        if let Some(s) = m.shards.iter().find(|s| s.part >= sc.parts) {
            return Err(corrupt(format!(
                "shard {} is in part {} of {}",
                s.file, s.part, sc.parts
            )));
        }
        // New files are named from `next_shard`: one at or below a listed
        // file's number would make an append replace that file.
        for f in m.files() {
            if file_number(f).is_some_and(|n| n >= m.next_shard) {
                return Err(corrupt(format!(
                    "next_shard {} does not lie above the number of {f}, which it lists",
                    m.next_shard
                )));
            }
        }
        Ok(m)
    }

    /// Read the manifest of the dataset in `dir`.
    pub fn load(dir: &Path) -> Result<Manifest> {
        let path = Self::path_in(dir);
        if !path.exists() {
            return Err(Error::Invalid(format!(
                "{}: no dataset here (no {MANIFEST_FILE}); create one with `tamis ingest`",
                dir.display()
            )));
        }
        let bytes = std::fs::read(&path).at(&path)?;
        Self::from_bytes(&bytes, &path)
    }

    /// Write the manifest into `dir` atomically.
    pub fn store(&self, dir: &Path) -> Result<()> {
        container::write_atomic(&Self::path_in(dir), &self.to_bytes())
    }

    /// Rows in the training split.
    pub fn train_rows(&self) -> u64 {
        self.labels.iter().map(|l| l.train_rows).sum()
    }

    /// Rows in the validation split.
    pub fn validation_rows(&self) -> u64 {
        self.labels.iter().map(|l| l.validation_rows).sum()
    }

    /// All nonzeros.
    pub fn nnz(&self) -> u64 {
        self.shards.iter().map(|s| s.nnz).sum()
    }

    /// Skipped records by reason over all batches.
    pub fn bad_totals(&self) -> BTreeMap<String, u64> {
        let mut t = BTreeMap::new();
        for b in &self.batches {
            for (k, v) in &b.bad {
                *t.entry(k.clone()).or_insert(0) += v;
            }
        }
        t
    }

    /// Every file the manifest lists, by name inside the dataset folder:
    /// shards, document-frequency files, token sketches.
    pub fn files(&self) -> impl Iterator<Item = &str> {
        (self.shards.iter().map(|s| s.file.as_str()))
            .chain(self.doc_freq.iter().map(|d| d.file.as_str()))
            .chain(self.sketches.iter().map(|k| k.file.as_str()))
    }

    /// The shards of one split.
    pub fn shards_of(&self, split: Split) -> impl Iterator<Item = &ShardEntry> {
        self.shards.iter().filter(move |s| s.split == split)
    }

    /// A fingerprint of the dataset's content: xxh3 over the feature settings,
    /// labels and every shard's name and checksum. Changes whenever rows change.
    pub fn fingerprint(&self) -> u64 {
        let mut h = xxhash_rust::xxh3::Xxh3::new();
        h.update(&serde_json::to_vec(&self.features).expect("serialises"));
        for l in &self.labels {
            h.update(l.name.as_bytes());
            h.update(&[0]);
        }
        for s in &self.shards {
            h.update(s.file.as_bytes());
            h.update(s.checksum.as_bytes());
        }
        h.digest()
    }
}

/// The number in a file name that ingest gave it (`train-000012.tms`: 12).
fn file_number(name: &str) -> Option<u64> {
    let stem = name.rsplit_once('.').map_or(name, |(s, _)| s);
    stem.rsplit_once('-')?.1.parse().ok()
}

fn find_sum(bytes: &[u8]) -> Option<usize> {
    let head = &bytes[..bytes.len().min(64)];
    let at = memchr::memmem::find(head, SUM_KEY.as_bytes())? + SUM_KEY.len();
    (bytes.len() >= at + 16).then_some(at)
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;

    pub(crate) fn sample() -> Manifest {
        Manifest {
            checksum: String::new(),
            format: FORMAT_NAME.into(),
            format_version: VERSION,
            written_by: "test".into(),
            features: FeatureConfig::plain(3, 12),
            positive: Some("spam".into()),
            split: SplitRule {
                rule: "xxh3-content".into(),
                seed: 9,
                validation_fraction: 0.1,
            },
            scatter: ScatterRule {
                seed: 4,
                writers: 4,
                shard_rows: 100,
                parts: 2,
            },
            labels: vec![LabelEntry {
                name: "spam".into(),
                train_rows: 9,
                validation_rows: 1,
            }],
            shards: vec![ShardEntry {
                file: "train-000000.tms".into(),
                split: Split::Train,
                rows: 9,
                nnz: 90,
                bytes: 1000,
                checksum: "0123456789abcdef".into(),
                batch: 0,
                part: 1,
            }],
            doc_freq: vec![],
            sketches: vec![],
            batches: vec![],
            next_shard: 1,
        }
    }

    /// A manifest whose checksum is right but whose scatter rule or parts
    /// could not come from ingest is refused, not used (it would divide by
    /// zero or index out of range later).
    #[test]
    fn impossible_scatter_rules_are_refused() {
        let p = Path::new("manifest.json");
        for (writers, parts, part) in [(0, 1, 0), (4, 0, 0), (5, 2, 0), (4, 2, 2)] {
            let mut m = sample();
            m.scatter.writers = writers;
            m.scatter.parts = parts;
            m.shards[0].part = part;
            let err = Manifest::from_bytes(&m.to_bytes(), p)
                .unwrap_err()
                .to_string();
            assert!(err.contains("damaged file"), "{err}");
        }
        assert!(Manifest::from_bytes(&sample().to_bytes(), p).is_ok());
    }

    /// New files are named from `next_shard`, so it must lie above the
    /// number of every file listed, or an append would replace one.
    #[test]
    fn next_shard_at_or_below_a_listed_file_is_refused() {
        let p = Path::new("manifest.json");
        let mut m = sample();
        m.next_shard = 0;
        let err = Manifest::from_bytes(&m.to_bytes(), p)
            .unwrap_err()
            .to_string();
        assert!(
            err.contains("next_shard") && err.contains("train-000000.tms"),
            "{err}"
        );
    }

    #[test]
    fn round_trip_and_every_byte_checked() {
        let m = sample();
        let bytes = m.to_bytes();
        let p = Path::new("manifest.json");
        let back = Manifest::from_bytes(&bytes, p).unwrap();
        assert_eq!(back.labels, m.labels);
        assert_eq!(back.to_bytes(), bytes);
        // Plain JSON.
        let v: serde_json::Value = serde_json::from_slice(&bytes).unwrap();
        assert_eq!(v["shards"][0]["rows"], 9);
        for i in 0..bytes.len() {
            let mut bad = bytes.clone();
            bad[i] = if bad[i] == b'7' { b'8' } else { b'7' };
            assert!(
                Manifest::from_bytes(&bad, p).is_err(),
                "byte {i} not checked"
            );
        }
        assert!(Manifest::from_bytes(&bytes[..bytes.len() - 2], p).is_err());
    }
}
