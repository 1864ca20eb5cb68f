//! tamis: out-of-core max-margin linear text classifiers.
//!
//! The library follows the data flow of the `tamis` command:
//!
//! ```text
//! raw text (tsv, csv, jsonl; plain, gzip, zstd)
//!   → input     records and counted bad lines            (input)
//!   → features  tokens, n-grams, signed hashing          (features)
//!   → shard     write-once CSR files, memory-mapped      (shard, container)
//!   → dataset   manifest, document frequencies, ingest   (dataset)
//!   → solver    averaged Pegasos over row views          (solver)
//!   → training  epochs over shards, validation, logging  (train)
//!   → checkpoint whole solver state, resume exactly       (checkpoint)
//!   → model     settings + labels + weights, scoring     (model)
//!   → explain   weights and scores read in words         (explain)
//!   → eval      metrics, curves, intervals               (eval)
//!   → calibrate thresholds, Platt scaling                (calibrate)
//!   → report    the HTML page of plots                   (report)
//! ```
//!
//! # Example
//! ```
//! use tamis::features::{FeatureConfig, Featurizer, HASH_SCHEME};
//! let cfg = FeatureConfig {
//!     scheme: HASH_SCHEME.into(),
//!     hash_seed: 1,
//!     log2_buckets: 16,
//!     ngrams: 2,
//!     char_ngrams: None,
//!     raw_counts: false,
//!     text_fields: vec!["text".into()],
//!     numeric_fields: vec![],
//!     mask_digits: false,
//!     mask_emails: false,
//! };
//! let mut f = Featurizer::new(&cfg).unwrap();
//! let (mut idx, mut val) = (Vec::new(), Vec::new());
//! f.begin_row();
//! f.add_text(0, b"Ferry delayed again");
//! let n = f.finish_row(&mut idx, &mut val);
//! assert_eq!(n, 5); // 3 words + 2 bigrams
//! ```
#![warn(missing_docs)]

#[cfg(not(target_endian = "little"))]
compile_error!(
    "tamis maps its little-endian files directly and supports little-endian targets only"
);

pub mod bench;
pub mod calibrate;
pub mod checkpoint;
pub mod container;
pub mod dataset;
pub mod distributed;
pub mod error;
pub mod eval;
pub mod explain;
pub mod features;
pub mod input;
pub mod model;
pub mod report;
pub mod score;
pub mod shard;
pub mod solver;
pub mod synth;
pub mod train;
pub mod tune;
pub mod util;

pub use error::{Error, Result};
