//! `tamis ingest`: raw labelled text → dataset of shards.

use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::{bail, Context};
use tamis::dataset::{self, Choices, IngestOptions};
use tamis::features::CharNgrams;
use tamis::input::{Format, InputSpec};

/// Options of `tamis ingest`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// Input files, read in order into one dataset; `-` reads standard input.
    /// gzip and zstd are recognised by their first bytes.
    #[arg(required = true, value_name = "INPUT")]
    pub inputs: Vec<String>,

    /// Dataset folder to create (or to add to with --append).
    #[arg(long, short = 'o', value_name = "DIR")]
    pub out: PathBuf,

    /// Record format: tsv (`label<TAB>text`), csv (RFC 4180 with a header row) or
    /// jsonl (one JSON object per line).
    #[arg(long, value_enum, default_value_t = Format::Tsv)]
    pub format: Format,

    /// CSV column or JSON field that holds the label [default: label].
    #[arg(
        long = "label-column",
        visible_alias = "label-field",
        value_name = "NAME"
    )]
    pub label: Option<String>,

    /// CSV column or JSON field that holds text; repeat for several, each hashed
    /// into a feature space of its own [default: text].
    #[arg(
        long = "text-column",
        visible_alias = "text-field",
        value_name = "NAME"
    )]
    pub text: Vec<String>,

    /// CSV column or JSON field that holds a number, which becomes the value of one
    /// feature named after the field; repeatable.
    #[arg(
        long = "numeric-field",
        visible_alias = "numeric-column",
        value_name = "NAME"
    )]
    pub numeric: Vec<String>,

    /// Word n-grams up to this order: 1 = single words, 2 = words and pairs [default: 2].
    #[arg(long, value_name = "N")]
    pub ngrams: Option<u32>,

    /// Also hash character n-grams of MIN to MAX characters inside each word, such
    /// as 3..5 (catches deliberate misspellings) [default: off].
    #[arg(long, value_name = "MIN..MAX")]
    pub char_ngrams: Option<CharNgrams>,

    /// Hash features into 2^K buckets, K in 10..=28 [default: 20].
    #[arg(long, value_name = "K")]
    pub log2_buckets: Option<u32>,

    /// Keep raw summed counts instead of ln(1+count) damping and unit-length rows.
    #[arg(long)]
    pub raw_counts: bool,

    /// Replace every run of digits inside a word by `#` before hashing (`order12345`
    /// becomes `order#`): phone, account and order numbers are not learnt or kept.
    /// Stored with the dataset and the model, so scoring masks the same way.
    #[arg(long)]
    pub mask_digits: bool,

    /// Replace every e-mail-like span (`name@host.domain`) by the token `@email`
    /// before hashing. Stored with the dataset and the model, like --mask-digits.
    #[arg(long)]
    pub mask_emails: bool,

    /// Keep no token sketch for this batch (the sketch lists frequent words so that
    /// `tamis inspect` can name what a model weighs; it stores raw words).
    #[arg(long)]
    pub no_sketch: bool,

    /// Words kept in the token sketch per text field; memory is about 100 bytes
    /// per word kept [default: 10000].
    #[arg(long, value_name = "N")]
    pub sketch_size: Option<usize>,

    /// Write only words certainly seen in at least this many rows to the token
    /// sketch, so that rare words (names, addresses) are not kept [default: 20].
    #[arg(long, value_name = "ROWS")]
    pub sketch_min_count: Option<u64>,

    /// Seed of the feature hash, the validation split and the shard scatter [default: 1].
    #[arg(long, value_name = "S")]
    pub seed: Option<u64>,

    /// Make this a binary task: LABEL is the positive class, every other label negative.
    #[arg(long, value_name = "LABEL")]
    pub positive: Option<String>,

    /// Fraction of rows held out for validation, chosen by a seeded hash of each
    /// row's content [default: 0.1].
    #[arg(long, value_name = "FRACTION")]
    pub validation: Option<f64>,

    /// Add the inputs to the existing dataset at --out as a new batch; its stored
    /// settings are used and contradicting options are refused.
    #[arg(long)]
    pub append: bool,

    /// Replace an existing dataset at --out, or use a folder that holds other files
    /// (they are left alone). The old dataset stays intact until the new one is complete.
    #[arg(long)]
    pub force: bool,

    /// Threads that parse and hash [default: all cores].
    #[arg(long, short = 'j', value_name = "N", value_parser = super::parse_threads)]
    pub threads: Option<usize>,

    /// Records longer than this many bytes are skipped and counted.
    #[arg(long, value_name = "BYTES", default_value_t = 1 << 20)]
    pub max_line_bytes: usize,

    /// Fail, writing nothing, when more than this fraction of records is unusable.
    #[arg(long, value_name = "FRACTION", default_value_t = 0.01)]
    pub max_bad_fraction: f64,

    /// Close a shard after this many rows [default: 1048576].
    #[arg(long, value_name = "ROWS")]
    pub shard_rows: Option<u64>,

    /// Spread training rows over this many open shards, so that input sorted by
    /// time or label is mixed [default: 8].
    #[arg(long, value_name = "W")]
    pub scatter: Option<u32>,

    /// Split the dataset into P parts, one per node of a cluster that trains
    /// with `train --distributed` on P ranks: each training and validation shard
    /// belongs to one part, and a node needs only its own part's shards (listed
    /// by `tamis stats DIR --part-files K`) [default: 1]. --scatter is rounded up
    /// to a multiple of P.
    #[arg(long, value_name = "P")]
    pub parts: Option<u32>,

    /// Do not wait for shards to reach the disk before the manifest names them:
    /// faster where the disk is slower than hashing, but a power loss during or
    /// just after the run may leave a damaged dataset (`tamis verify` finds it).
    #[arg(long)]
    pub no_sync: bool,

    /// Print nothing but errors (no progress bar, no summary, no skipped-line reports).
    #[arg(long, short = 'q')]
    pub quiet: bool,
}

/// Build the library's options from the command line.
pub fn options(a: &Args) -> anyhow::Result<IngestOptions> {
    let spec = match a.format {
        Format::Tsv => {
            if a.label.is_some() || !a.text.is_empty() || !a.numeric.is_empty() {
                bail!("--label-column, --text-column and --numeric-field apply to --format csv and jsonl; TSV is always label<TAB>text");
            }
            InputSpec::tsv(a.max_line_bytes)
        }
        Format::Csv | Format::Jsonl => InputSpec {
            format: a.format,
            label: a.label.clone().unwrap_or_else(|| "label".into()),
            text: if a.text.is_empty() {
                vec!["text".into()]
            } else {
                a.text.clone()
            },
            numeric: a.numeric.clone(),
            max_line_bytes: a.max_line_bytes,
        },
    };
    Ok(IngestOptions {
        inputs: a.inputs.clone(),
        out: a.out.clone(),
        spec,
        choices: Choices {
            seed: a.seed,
            log2_buckets: a.log2_buckets,
            ngrams: a.ngrams,
            char_ngrams: a.char_ngrams,
            raw_counts: a.raw_counts.then_some(true),
            validation: a.validation,
            positive: a.positive.clone(),
            shard_rows: a.shard_rows,
            scatter: a.scatter,
            parts: a.parts,
            mask_digits: a.mask_digits.then_some(true),
            mask_emails: a.mask_emails.then_some(true),
            no_sketch: a.no_sketch,
            sketch_size: a.sketch_size,
            sketch_min_count: a.sketch_min_count,
        },
        append: a.append,
        force: a.force,
        threads: a.threads.unwrap_or_else(super::default_threads),
        max_bad_fraction: a.max_bad_fraction,
        progress: !a.quiet,
        sync: !a.no_sync,
    })
}

/// Run `tamis ingest`.
pub fn run(a: Args) -> anyhow::Result<ExitCode> {
    let opts = options(&a)?;
    let summary = dataset::ingest(&opts, super::stderr_log(a.quiet))
        .with_context(|| format!("ingest into {} failed", a.out.display()))?;
    if !a.quiet {
        eprintln!("{}", summary.line());
        let bad: Vec<String> = summary
            .bad
            .iter()
            .filter(|(_, &n)| n > 0)
            .map(|(k, n)| format!("{k} {n}"))
            .collect();
        if !bad.is_empty() {
            eprintln!("skipped by reason: {}", bad.join(", "));
        }
        if summary.lossy_utf8_rows > 0 {
            eprintln!(
                "{} rows held invalid UTF-8, replaced and kept",
                summary.lossy_utf8_rows
            );
        }
    }
    Ok(ExitCode::SUCCESS)
}
