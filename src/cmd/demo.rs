//! `tamis demo`: the whole job on invented data.

use std::io::BufWriter;
use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::Context;
use tamis::dataset::{self, Choices, IngestOptions};
use tamis::input::InputSpec;
use tamis::synth::{Synth, SynthConfig};
use tamis::train::{self, TrainOptions};

/// Options of `tamis demo`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// Folder for the demo's files; an earlier demo's files in it are replaced.
    #[arg(long, default_value = "tamis-demo", value_name = "DIR")]
    pub dir: PathBuf,

    /// Messages to generate.
    #[arg(long, default_value_t = 60_000)]
    pub rows: u64,

    /// Seed of the generator.
    #[arg(long, default_value_t = 7)]
    pub seed: u64,

    /// Threads [default: all cores].
    #[arg(long, short = 'j', value_name = "N", value_parser = super::parse_threads)]
    pub threads: Option<usize>,
}

/// Run `tamis demo`.
pub fn run(a: Args) -> anyhow::Result<ExitCode> {
    std::fs::create_dir_all(&a.dir)
        .with_context(|| format!("cannot create {}", a.dir.display()))?;
    let inbox = a.dir.join("inbox.tsv");
    outln!(
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
    outln!("2. ingesting into {}", data.display());
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
        sync: true,
    };
    let summary = dataset::ingest(&opts, super::stderr_log(false))?;
    outln!("   {}", summary.line());
    outln!("3. the dataset:");
    let s = dataset::stats(&data)?;
    super::stats::print(&s, false, &mut std::io::stdout().lock())?;
    outln!();
    let model = a.dir.join("inbox.tmm");
    outln!(
        "4. training a one-vs-rest hinge model → {}",
        model.display()
    );
    let topts = TrainOptions {
        threads: opts.threads,
        progress: true,
        ..TrainOptions::defaults(&data, &model)
    };
    train::train(
        &topts,
        std::sync::Arc::new(|s: &str| {
            use std::io::Write as _;
            let _ = writeln!(std::io::stdout(), "   {s}");
        }),
    )?;
    outln!();
    outln!(
        "5. choosing the operating point: flag as spam at most 1% of the real messages of the validation split"
    );
    let calibrated = super::calibrate::run(super::calibrate::Args {
        model: model.clone(),
        dir: data.clone(),
        max_false_positive_rate: Some(0.01),
        min_precision: None,
        min_recall: None,
        positive: Some("spam".into()),
        out: None,
        json: false,
    });
    match calibrated {
        Ok(_) => outln!(
            "   a message is spam only at or above that threshold; the other classes have none and take the rest by highest score"
        ),
        // A tiny demo (`--rows`) can leave a class out of the validation split;
        // the rest of the demo still runs, without a stored threshold.
        Err(e) => outln!("   skipped: {e:#}"),
    }
    outln!();
    let report = a.dir.join("report.html");
    outln!(
        "6. evaluating on the validation split at that threshold (curves and histograms: {}):",
        report.display()
    );
    super::eval::run(super::eval::Args {
        model: model.clone(),
        data: vec![data.to_string_lossy().into_owned()],
        split: super::eval::Which::Validation,
        fields: Default::default(),
        json: false,
        report: Some(report.clone()),
        threads: Some(opts.threads),
    })?;
    let examples = a.dir.join("examples.txt");
    std::fs::write(&examples, EXAMPLES)?;
    outln!();
    outln!("7. scoring a few new messages ({}):", examples.display());
    let loaded = tamis::model::Model::load(&model)?;
    let lines: Vec<&str> = EXAMPLES.lines().collect();
    tamis::score::score_inputs(
        &loaded,
        &[examples.to_string_lossy().into_owned()],
        &loaded.meta.input,
        tamis::input::LabelMode::Optional,
        opts.threads,
        |outs| {
            for o in outs {
                if let tamis::score::Outcome::Scored {
                    line, label, score, ..
                } = o
                {
                    use std::io::Write as _;
                    let _ = writeln!(
                        std::io::stdout(),
                        "   {label:<14} {score:>7.3}  {}",
                        lines[line as usize - 1]
                    );
                }
            }
            Ok(())
        },
    )?;
    outln!();
    outln!(
        "files: {} (messages), {} (dataset), {} (model), {} (report)",
        inbox.display(),
        data.display(),
        model.display(),
        report.display()
    );
    outln!(
        "next: `tamis score {m} FILE`, `tamis eval {m} {d}`, `tamis stats {d}`,",
        m = model.display(),
        d = data.display()
    );
    outln!(
        "      `tamis inspect {m} --class spam`, `tamis explain {m} \"claim your free prize\"`",
        m = model.display()
    );
    Ok(ExitCode::SUCCESS)
}

/// New messages scored at the end of the demo (invented).
const EXAMPLES: &str = "\
The 7:40 sailing from Osk was cancelled again, is there a later crossing?
Congratulations! You have been selected to claim a free cash prize, click the link
I left a blue umbrella on the upper deck of the Tarn ferry yesterday
Is there a ramp for wheelchair boarding at Pellow pier?
I was charged twice for my season pass, please refund one
The crew were lovely and the coffee was great
";
