//! Criterion benchmarks of the ingest kernels: tokenizing alone, tokenizing +
//! hashing a row, parsing + hashing a whole TSV chunk, and that with what else an
//! ingest worker does to a chunk (the split hash of each record, document
//! frequencies and the token sketch's counts).
//!
//! Input: `fixtures/inbox.tsv` (committed, invented) repeated to about 4 MiB, and
//! a generated stream of short messages from `tamis::synth`.
//! Run: `cargo bench --bench ingest`.

use criterion::{criterion_group, criterion_main, Criterion, Throughput};
use tamis::dataset::docfreq::DocCounter;
use tamis::dataset::sketch::ChunkCounter;
use tamis::features::{FeatureConfig, Featurizer};
use tamis::input::{parse_chunk, Chunk, Fields, InputSpec, LabelMode, ParseScratch};
use tamis::synth::{Synth, SynthConfig};
use xxhash_rust::xxh3::xxh3_64_with_seed;

fn config() -> FeatureConfig {
    FeatureConfig::plain(1, 20)
}

fn corpus() -> Vec<(&'static str, Vec<u8>)> {
    let mut out = Vec::new();
    let fixture = std::fs::read(concat!(env!("CARGO_MANIFEST_DIR"), "/fixtures/inbox.tsv"));
    if let Ok(f) = fixture {
        let mut data = Vec::new();
        while data.len() < 4 << 20 && !f.is_empty() {
            data.extend_from_slice(&f);
        }
        out.push(("fixture", data));
    }
    let mut data = Vec::new();
    Synth::new(SynthConfig::default())
        .write_bytes(4 << 20, &mut data)
        .expect("in memory");
    out.push(("synth", data));
    out
}

/// Parse a TSV chunk as ingest does, calling `row` with every good record.
fn each_record(
    chunk: &Chunk,
    spec: &InputSpec,
    scratch: &mut ParseScratch,
    row: impl FnMut(&Fields<'_>),
) {
    parse_chunk(chunk, spec, LabelMode::Required, scratch, row, |_| {});
}

fn bench(c: &mut Criterion) {
    let spec = InputSpec::tsv(1 << 20);
    for (name, data) in corpus() {
        let mut g = c.benchmark_group(format!("ingest/{name}"));
        g.throughput(Throughput::Bytes(data.len() as u64));
        g.sample_size(20);
        let texts: Vec<&[u8]> = data
            .split(|&b| b == b'\n')
            .filter_map(|l| l.iter().position(|&b| b == b'\t').map(|t| &l[t + 1..]))
            .collect();
        g.bench_function("tokenize", |b| {
            let mut buf = Vec::new();
            b.iter(|| {
                let mut n = 0usize;
                for t in &texts {
                    tamis::features::tokenize(t, &mut buf, |tok| n += tok.len());
                }
                n
            })
        });
        g.bench_function("tokenize_hash_rows", |b| {
            let mut f = Featurizer::new(&config()).unwrap();
            let (mut idx, mut val) = (Vec::new(), Vec::new());
            b.iter(|| {
                idx.clear();
                val.clear();
                for t in &texts {
                    f.begin_row();
                    f.add_text(0, t);
                    f.finish_row(&mut idx, &mut val);
                }
                idx.len()
            })
        });
        let chunk = Chunk {
            input: 0,
            seq: 0,
            first_line: 1,
            data: data.clone(),
            skipped: None,
            columns: None,
        };
        g.bench_function("parse_tokenize_hash_chunk", |b| {
            let mut f = Featurizer::new(&config()).unwrap();
            let mut scratch = ParseScratch::default();
            let (mut idx, mut val) = (Vec::new(), Vec::new());
            b.iter(|| {
                idx.clear();
                val.clear();
                each_record(&chunk, &spec, &mut scratch, |r| {
                    f.begin_row();
                    f.add_text(0, r.texts[0]);
                    f.finish_row(&mut idx, &mut val);
                });
                idx.len()
            })
        });
        g.bench_function("worker_chunk", |b| {
            let mut f = Featurizer::new(&config()).unwrap();
            let mut scratch = ParseScratch::default();
            let mut df = DocCounter::new(1 << 20);
            let mut tokens = ChunkCounter::new(1);
            let mut summary = Vec::new();
            let (mut idx, mut val) = (Vec::new(), Vec::new());
            b.iter(|| {
                idx.clear();
                val.clear();
                let mut validation = 0;
                each_record(&chunk, &spec, &mut scratch, |r| {
                    f.begin_row();
                    tokens.next_row();
                    let mut words = tokens.field(0);
                    f.add_text_with(0, r.texts[0], |t, h| words.see(t, h));
                    let start = idx.len();
                    f.finish_row(&mut idx, &mut val);
                    if xxh3_64_with_seed(r.raw, 5) >> 60 == 0 {
                        validation += 1;
                    } else {
                        idx[start..].iter().for_each(|&i| df.add(i as usize));
                    }
                });
                tokens.finish_into(10_000, &mut summary);
                idx.len() + validation
            })
        });
        g.finish();
    }
}

criterion_group!(benches, bench);
criterion_main!(benches);
