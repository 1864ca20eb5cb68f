//! What each step of an ingest worker costs per byte of input, on one core with
//! the data in memory: every line adds one step to the line before it, so the
//! differences between lines are the steps' costs (best of 7 passes each).
//!
//! `cargo run --release --example ingest_steps -- inbox.tsv [MEGABYTES]`
//! (a TSV file of `label<TAB>text` lines, such as `examples/synth` writes; the
//! first 40 MB by default). The default feature settings: 2^20 buckets, words
//! and word pairs, a token sketch of 10,000 entries per chunk.

use std::time::Instant;

use tamis::dataset::docfreq::DocCounter;
use tamis::dataset::sketch::ChunkCounter;
use tamis::features::{tokenize, FeatureConfig, Featurizer};
use tamis::input::{parse_chunk, Chunk, Fields, InputSpec, LabelMode, ParseScratch};
use xxhash_rust::xxh3::xxh3_64_with_seed;

/// Run `f` 7 times; print the best time per byte.
fn step(name: &str, bytes: usize, mut f: impl FnMut() -> usize) {
    let mut best = f64::MAX;
    let mut sink = 0;
    for _ in 0..7 {
        let t = Instant::now();
        sink ^= f();
        best = best.min(t.elapsed().as_secs_f64());
    }
    println!(
        "{name:44} {:6.2} ns/byte {:7.1} MB/s   ({sink:x})",
        best * 1e9 / bytes as f64,
        bytes as f64 / best / 1e6
    );
}

fn main() {
    let mut args = std::env::args().skip(1);
    let Some(path) = args.next() else {
        eprintln!("usage: ingest_steps FILE.tsv [MEGABYTES]");
        std::process::exit(2);
    };
    let mb: usize = args.next().and_then(|s| s.parse().ok()).unwrap_or(40);
    let mut data = std::fs::read(&path).unwrap_or_else(|e| {
        eprintln!("error: {path}: {e}");
        std::process::exit(1)
    });
    // Whole lines only.
    let mut cut = (mb << 20).min(data.len());
    while cut < data.len() && data[cut - 1] != b'\n' {
        cut += 1;
    }
    data.truncate(cut);
    let n = data.len();
    let texts: Vec<&[u8]> = data
        .split(|&b| b == b'\n')
        .filter_map(|l| l.iter().position(|&b| b == b'\t').map(|t| &l[t + 1..]))
        .collect();
    // 1 MiB chunks ending on a line, as the reader cuts them.
    let mut chunks = Vec::new();
    let mut at = 0;
    while at < n {
        let mut end = (at + (1 << 20)).min(n);
        while end < n && data[end - 1] != b'\n' {
            end += 1;
        }
        chunks.push(Chunk {
            input: 0,
            seq: chunks.len() as u64,
            first_line: 1,
            data: data[at..end].to_vec(),
            skipped: None,
            columns: None,
        });
        at = end;
    }
    println!("{path}: {n} bytes, {} records", texts.len());

    let seed = 7;
    let mut buf = Vec::new();
    step("tokenize", n, || {
        let mut s = 0;
        for t in &texts {
            tokenize(t, &mut buf, |tok| s += tok.len());
        }
        s
    });
    step("+ xxh3 of each word", n, || {
        let mut s = 0u64;
        for t in &texts {
            tokenize(t, &mut buf, |tok| {
                s = s.wrapping_add(xxh3_64_with_seed(tok, seed))
            });
        }
        s as usize
    });
    let mut f = Featurizer::new(&FeatureConfig::plain(1, 20)).expect("valid settings");
    step("+ word pairs and keys (add_text)", n, || {
        let mut s = 0;
        for t in &texts {
            f.begin_row();
            s += f.add_text(0, t).tokens as usize;
        }
        s
    });
    let (mut idx, mut val) = (Vec::new(), Vec::new());
    step("+ finish rows (sort, count, damp, normalise)", n, || {
        idx.clear();
        val.clear();
        for t in &texts {
            f.begin_row();
            f.add_text(0, t);
            f.finish_row(&mut idx, &mut val);
        }
        idx.len()
    });
    // The steps from here on read the chunks as a worker does; `level` says how
    // much of a worker's work each record gets.
    let spec = InputSpec::tsv(1 << 20);
    let mut scratch = ParseScratch::default();
    let mut df = DocCounter::new(1 << 20);
    let mut tokens = ChunkCounter::new(1);
    let mut summary = Vec::new();
    let mut pass = |level: u8| {
        let mut s = 0;
        for c in &chunks {
            idx.clear();
            val.clear();
            let row = |r: &Fields<'_>| {
                f.begin_row();
                if level >= 4 {
                    tokens.next_row();
                    let mut words = tokens.field(0);
                    f.add_text_with(0, r.texts[0], |t, h| words.see(t, h));
                } else {
                    f.add_text(0, r.texts[0]);
                }
                let start = idx.len();
                f.finish_row(&mut idx, &mut val);
                if level >= 2 {
                    s += (xxh3_64_with_seed(r.raw, seed) >> 60) as usize;
                }
                if level >= 3 {
                    idx[start..].iter().for_each(|&i| df.add(i as usize));
                }
            };
            parse_chunk(c, &spec, LabelMode::Required, &mut scratch, row, |_| {});
            if level >= 4 {
                tokens.finish_into(10_000, &mut summary);
            }
            s += idx.len();
        }
        s
    };
    step("+ split lines and fields (parse_chunk)", n, || pass(1));
    step("+ the split hash of each record", n, || pass(2));
    step("+ document frequencies", n, || pass(3));
    step("+ the token sketch's counts", n, || pass(4));
}
