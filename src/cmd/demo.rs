//! `tamis demo`: the whole job on invented data.

use std::io::BufWriter;
use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::Context;
use tamis::dataset::{self, Choices, IngestOptions};
use tamis::input::InputSpec;
use tamis::synth::{Synth, SynthConfig};

/// Options of `tamis demo`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// Folder for the demo's files; replaced if it holds an earlier demo.
    #[arg(long, default_value = "tamis-demo", value_name = "DIR")]
    pub dir: PathBuf,

    /// Messages to generate.
    #[arg(long, default_value_t = 60_000)]
    pub rows: u64,

    /// Seed of the generator.
    #[arg(long, default_value_t = 7)]
    pub seed: u64,

    /// Threads [default: all cores].
    #[arg(long, short = 'j')]
    pub threads: Option<usize>,
}

/// Run `tamis demo`.
pub fn run(a: Args) -> anyhow::Result<ExitCode> {
    std::fs::create_dir_all(&a.dir)
        .with_context(|| format!("cannot create {}", a.dir.display()))?;
    let inbox = a.dir.join("inbox.tsv");
    println!(
        "1. generating {} invented messages to the Quillmere Ferry Cooperative's inbox → {}",
        a.rows,
        inbox.display()
    );
    {
        let f = std::fs::File::create(&inbox)
            .with_context(|| format!("cannot write {}", inbox.display()))?;
        let mut w = BufWriter::new(f);
        Synth::new(SynthConfig {
            seed: a.seed,
            ..SynthConfig::default()
        })
        .write_rows(a.rows, &mut w)?;
        std::io::Write::flush(&mut w)?;
    }
    let data = a.dir.join("dataset");
    println!("2. ingesting into {}", data.display());
    let opts = IngestOptions {
        inputs: vec![inbox.to_string_lossy().into_owned()],
        out: data.clone(),
        spec: InputSpec::tsv(1 << 20),
        choices: Choices::default(),
        append: false,
        force: true,
        threads: a.threads.unwrap_or_else(super::default_threads),
        max_bad_fraction: 0.01,
        progress: true,
    };
    let summary = dataset::ingest(&opts, super::stderr_log(false))?;
    println!("   {}", summary.line());
    println!("3. the dataset:");
    let s = dataset::stats(&data)?;
    let mut out = std::io::stdout().lock();
    super::stats::print(&s, false, &mut out)?;
    println!();
    println!(
        "files: {} (messages), {} (dataset)",
        inbox.display(),
        data.display()
    );
    println!(
        "next: `tamis stats {}`, `tamis verify {}`",
        data.display(),
        data.display()
    );
    Ok(ExitCode::SUCCESS)
}
