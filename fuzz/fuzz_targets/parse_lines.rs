//! Feeds arbitrary bytes as one chunk to `tamis::input::parse_chunk` in each of
//! the three formats, in both label modes, and hashes every good record.
//!
//! Checked on every input: no panic; records and bad lines come in input order
//! with line numbers inside the chunk; good records carry one text per text field
//! and finite numbers, and a non-empty label when labels are required; hashed
//! rows have strictly increasing indices below the bucket count and finite
//! values (what `Shard::verify` demands of the shards ingest writes).
#![no_main]

use std::cell::Cell;
use std::sync::Arc;

use libfuzzer_sys::fuzz_target;
use tamis::features::{CharNgrams, FeatureConfig, Featurizer, HASH_SCHEME};
use tamis::input::parse::Columns;
use tamis::input::{parse_chunk, Chunk, Format, InputSpec, LabelMode, ParseScratch};

const LOG2_BUCKETS: u32 = 10;
const CSV_HEADER: &[u8] = b"label,subject,body,crossings\r\n";

fn spec(format: Format, max_line_bytes: usize) -> InputSpec {
    match format {
        Format::Tsv => InputSpec::tsv(max_line_bytes),
        Format::Csv | Format::Jsonl => InputSpec {
            format,
            label: if format == Format::Csv {
                "label"
            } else {
                "tag"
            }
            .into(),
            text: vec!["subject".into(), "body".into()],
            numeric: vec!["crossings".into()],
            max_line_bytes,
        },
    }
}

fn features(spec: &InputSpec) -> FeatureConfig {
    FeatureConfig {
        scheme: HASH_SCHEME.into(),
        hash_seed: 11,
        log2_buckets: LOG2_BUCKETS,
        ngrams: 3,
        char_ngrams: Some(CharNgrams { min: 2, max: 4 }),
        raw_counts: false,
        text_fields: spec.text.clone(),
        numeric_fields: spec.numeric.clone(),
        mask_digits: false,
        mask_emails: false,
    }
}

fuzz_target!(|input: &[u8]| {
    // The first byte picks the record length limit, so that the too-long path
    // is reached as well as the others.
    let (limit, data) = match input.split_first() {
        Some((&b, rest)) if b & 1 == 1 => (1 + (b as usize >> 1), rest),
        Some((_, rest)) => (1 << 20, rest),
        None => (1 << 20, input),
    };
    let lines = memchr_count(data) as u64 + 1;
    for format in [Format::Tsv, Format::Csv, Format::Jsonl] {
        let spec = spec(format, limit);
        let columns = if format == Format::Csv {
            // The data's own first record as a header must never panic either.
            let _ = Columns::from_header(data, &spec, "fuzz.csv");
            Some(Arc::new(
                Columns::from_header(CSV_HEADER, &spec, "fuzz.csv").expect("fixed header parses"),
            ))
        } else {
            None
        };
        let chunk = Chunk {
            input: 0,
            seq: 0,
            first_line: 1,
            data: data.to_vec(),
            skipped: None,
            columns,
        };
        for mode in [LabelMode::Required, LabelMode::Optional] {
            let mut feat = Featurizer::new(&features(&spec)).expect("valid config");
            let mut scratch = ParseScratch::default();
            let last = Cell::new(0u64);
            let in_order = |line: u64| {
                assert!(
                    (1..=lines).contains(&line),
                    "{format:?}: line {line} outside 1..={lines}"
                );
                assert!(
                    line >= last.get(),
                    "{format:?}: line {line} after {}",
                    last.get()
                );
                last.set(line);
            };
            let (mut idx, mut val) = (Vec::new(), Vec::new());
            parse_chunk(
                &chunk,
                &spec,
                mode,
                &mut scratch,
                |f| {
                    in_order(f.line);
                    assert_eq!(f.texts.len(), spec.text.len());
                    assert_eq!(f.numbers.len(), spec.numeric.len());
                    if mode == LabelMode::Required {
                        assert!(f.label.as_deref().is_some_and(|l| !l.is_empty()));
                    }
                    feat.begin_row();
                    for (i, t) in f.texts.iter().enumerate() {
                        feat.add_text(i, t);
                    }
                    for (i, n) in f.numbers.iter().enumerate() {
                        if let Some(v) = n {
                            assert!(v.is_finite(), "{format:?}: number {v}");
                            feat.add_numeric(i, *v);
                        }
                    }
                    idx.clear();
                    val.clear();
                    feat.finish_row(&mut idx, &mut val);
                    assert!(
                        idx.windows(2).all(|w| w[0] < w[1]),
                        "indices not increasing"
                    );
                    assert!(idx.iter().all(|&i| i < 1 << LOG2_BUCKETS));
                    assert!(
                        val.iter().all(|v| v.is_finite()),
                        "{format:?}: non-finite value in a hashed row: {val:?}"
                    );
                },
                |b| in_order(b.line),
            );
        }
    }
});

fn memchr_count(data: &[u8]) -> usize {
    data.iter().filter(|&&b| b == b'\n').count()
}
