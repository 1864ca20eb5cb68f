//! Write an invented TSV message stream of at least BYTES bytes to standard
//! output, for benchmarks: `cargo run --release --example synth -- 1000000000 > inbox.tsv`.

use std::io::Write;

use tamis::synth::{Synth, SynthConfig};

fn main() {
    let mut args = std::env::args().skip(1);
    let bytes: u64 = args
        .next()
        .and_then(|s| s.parse().ok())
        .unwrap_or(100_000_000);
    let seed: u64 = args.next().and_then(|s| s.parse().ok()).unwrap_or(7);
    let out = std::io::stdout();
    let mut out = std::io::BufWriter::with_capacity(1 << 20, out.lock());
    let r = Synth::new(SynthConfig {
        seed,
        ..SynthConfig::default()
    })
    .write_bytes(bytes, &mut out)
    .and_then(|_| out.flush());
    if let Err(e) = r {
        if e.kind() != std::io::ErrorKind::BrokenPipe {
            eprintln!("error: {e}");
            std::process::exit(1);
        }
    }
}
