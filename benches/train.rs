//! Criterion benchmarks of the training and scoring kernels on hashed rows held
//! in memory: one epoch of binary hinge steps (sequential and parallel batch
//! sizes), one epoch of a 6-class one-vs-rest, and scoring rows with a model.
//!
//! Rows: invented messages from `tamis::synth`, hashed with the default
//! settings (2^20 buckets, words and word pairs).
//! Run: `cargo bench --bench train`.

use criterion::{criterion_group, criterion_main, Criterion, Throughput};
use tamis::features::{FeatureConfig, Featurizer};
use tamis::solver::order::Interleave;
use tamis::solver::{scores, Loss, MemRows, Rows, SolverConfig, Target, Trainer};
use tamis::synth::{Synth, SynthConfig, LABELS};

fn rows(n: u64) -> MemRows {
    let cfg = FeatureConfig::plain(1, 20);
    let mut f = Featurizer::new(&cfg).unwrap();
    let mut text = Vec::new();
    Synth::new(SynthConfig::default())
        .write_rows(n, &mut text)
        .unwrap();
    let mut out = MemRows::new();
    let (mut idx, mut val) = (Vec::new(), Vec::new());
    for line in text.split(|&b| b == b'\n').filter(|l| !l.is_empty()) {
        let tab = line.iter().position(|&b| b == b'\t').unwrap();
        let label = LABELS
            .iter()
            .position(|l| l.as_bytes() == &line[..tab])
            .unwrap() as u32;
        idx.clear();
        val.clear();
        f.begin_row();
        f.add_text(0, &line[tab + 1..]);
        f.finish_row(&mut idx, &mut val);
        out.push(label, &idx, &val);
    }
    out
}

fn epoch(data: &MemRows, targets: Vec<Target>, batch: usize) -> u64 {
    let cfg = SolverConfig {
        lambda: 1e-5,
        loss: Loss::Hinge,
        batch,
        eta0: 1.0,
        project: false,
        average_from: 0,
    };
    let mut t = Trainer::new(1 << 20, targets, vec![], cfg, None).unwrap();
    let mut order = Interleave::new(&[data.len()], 1, 0, 0);
    let mut b = Vec::new();
    let mut nnz = 0;
    while order.remaining() > 0 {
        order.next_batch(batch, &mut b);
        nnz += t.step(data, &b, true).nnz;
    }
    nnz
}

fn bench(c: &mut Criterion) {
    let data = rows(100_000);
    let nnz = data.indices.len() as u64;
    let mut g = c.benchmark_group("train");
    g.sample_size(10);
    g.throughput(Throughput::Elements(nnz));
    for batch in [8, 64, 256] {
        g.bench_function(format!("binary_hinge_epoch_batch{batch}"), |b| {
            b.iter(|| epoch(&data, vec![Target::Class(0)], batch))
        });
    }
    g.throughput(Throughput::Elements(nnz * 6));
    g.bench_function("ovr6_hinge_epoch_batch64", |b| {
        b.iter(|| epoch(&data, (0..6).map(Target::Class).collect(), 64))
    });
    g.finish();

    let mut g = c.benchmark_group("score");
    g.sample_size(10);
    g.throughput(Throughput::Elements(nnz * 6));
    let weights: Vec<f32> = (0..6 << 20)
        .map(|i| ((i % 97) as f32 - 48.0) / 100.0)
        .collect();
    let biases = vec![0.1f32; 6];
    g.bench_function("ovr6_scores", |b| {
        let mut out = Vec::new();
        b.iter(|| {
            let mut acc = 0.0;
            for i in 0..data.len() {
                scores(&weights, &biases, 1 << 20, &data.row(i), None, &mut out);
                acc += out[0];
            }
            acc
        })
    });
    g.finish();
}

criterion_group!(benches, bench);
criterion_main!(benches);
