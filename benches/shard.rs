//! Criterion benchmarks of reading shards, as training does: a sequential sweep
//! of every row of a memory-mapped shard, the same rows in a random order (an
//! epoch's order inside a shard), and the full checksum `verify`.
//!
//! The shard is written once per run from the committed fixture
//! `fixtures/inbox.tsv` repeated, plus generated messages from `tamis::synth`,
//! hashed with the default settings.
//! Run: `cargo bench --bench shard`.

use criterion::{criterion_group, criterion_main, Criterion, Throughput};
use tamis::features::{FeatureConfig, Featurizer};
use tamis::shard::{Shard, ShardWriter};
use tamis::solver::order::Interleave;
use tamis::synth::{Synth, SynthConfig};

fn text() -> Vec<u8> {
    let mut data = std::fs::read(concat!(env!("CARGO_MANIFEST_DIR"), "/fixtures/inbox.tsv"))
        .unwrap_or_default();
    Synth::new(SynthConfig::default())
        .write_bytes(24 << 20, &mut data)
        .expect("in memory");
    data
}

fn write_shard(path: &std::path::Path) {
    let cfg = FeatureConfig::plain(1, 20);
    let mut f = Featurizer::new(&cfg).unwrap();
    let mut w = ShardWriter::with_capacity(path, 1 << 20, 1 << 24).unwrap();
    let (mut idx, mut val) = (Vec::new(), Vec::new());
    for line in text().split(|&b| b == b'\n') {
        let Some(tab) = line.iter().position(|&b| b == b'\t') else {
            continue;
        };
        idx.clear();
        val.clear();
        f.begin_row();
        f.add_text(0, &line[tab + 1..]);
        f.finish_row(&mut idx, &mut val);
        if !idx.is_empty() && w.fits(idx.len()) {
            w.push(0, &idx, &val).unwrap();
        }
    }
    w.finish_with(false).unwrap();
}

fn bench(c: &mut Criterion) {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("bench.tms");
    write_shard(&path);
    let shard = Shard::open(&path).unwrap();
    let rows = shard.rows();
    let bytes = std::fs::metadata(&path).unwrap().len();
    let mut order = Vec::with_capacity(rows);
    let mut inter = Interleave::new(&[rows], 1, 0, 0);
    inter.next_batch(rows, &mut order);

    let mut g = c.benchmark_group("shard");
    g.sample_size(20);
    g.throughput(Throughput::Bytes(bytes));
    g.bench_function("sweep_rows_in_order", |b| {
        b.iter(|| {
            let mut acc = 0.0f32;
            for i in 0..rows {
                let r = shard.row(i);
                acc += r.values.iter().sum::<f32>() + r.indices.len() as f32;
            }
            acc
        })
    });
    g.bench_function("sweep_rows_in_epoch_order", |b| {
        b.iter(|| {
            let mut acc = 0.0f32;
            for &i in &order {
                let r = shard.row(i & ((1 << tamis::solver::order::ROW_BITS) - 1));
                acc += r.values.iter().sum::<f32>() + r.indices.len() as f32;
            }
            acc
        })
    });
    g.bench_function("verify", |b| b.iter(|| shard.verify(None).unwrap()));
    g.finish();
}

criterion_group!(benches, bench);
criterion_main!(benches);
