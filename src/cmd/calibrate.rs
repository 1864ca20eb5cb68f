//! `tamis calibrate`: choose operating thresholds and fit Platt scaling on a
//! dataset's validation split, and store them in the model.

use std::io::Write;
use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::{bail, Context};
use tamis::calibrate::{self, Rate, Report, Target};
use tamis::dataset::Manifest;
use tamis::model::Model;
use tamis::util::thousands;

/// Options of `tamis calibrate`.
#[derive(Debug, clap::Args)]
#[command(group(clap::ArgGroup::new("target").multiple(false)))]
pub struct Args {
    /// Model file written by `tamis train`; rewritten in place unless `--out` is given.
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,

    /// Dataset folder hashed with the model's settings; its validation split is used.
    #[arg(value_name = "DIR")]
    pub dir: PathBuf,

    /// Keep the false-positive rate on the validation split at most R (0..1);
    /// recall as high as possible.
    #[arg(long, value_name = "R", group = "target")]
    pub max_false_positive_rate: Option<f64>,

    /// Keep precision at least P (0..1]; recall as high as possible.
    #[arg(long, value_name = "P", group = "target")]
    pub min_precision: Option<f64>,

    /// Keep recall at least Q (0..1]; false-positive rate as low as possible.
    #[arg(long, value_name = "Q", group = "target")]
    pub min_recall: Option<f64>,

    /// For a one-vs-rest model: set the threshold of this class only (the others
    /// keep theirs, or margin 0). For a binary model it must be the positive label.
    #[arg(long, value_name = "LABEL")]
    pub positive: Option<String>,

    /// Write the calibrated model here instead of rewriting MODEL.
    #[arg(long, value_name = "FILE")]
    pub out: Option<PathBuf>,

    /// Print the report as JSON.
    #[arg(long)]
    pub json: bool,
}

impl Args {
    fn target(&self) -> anyhow::Result<Option<Target>> {
        let t = match (
            self.max_false_positive_rate,
            self.min_precision,
            self.min_recall,
        ) {
            (Some(r), _, _) => {
                if !(0.0..1.0).contains(&r) {
                    bail!("--max-false-positive-rate must be at least 0 and below 1, not {r}");
                }
                Some(Target::MaxFalsePositiveRate(r))
            }
            (_, Some(p), _) => {
                if !(p > 0.0 && p <= 1.0) {
                    bail!("--min-precision must be above 0 and at most 1, not {p}");
                }
                Some(Target::MinPrecision(p))
            }
            (_, _, Some(q)) => {
                if !(q > 0.0 && q <= 1.0) {
                    bail!("--min-recall must be above 0 and at most 1, not {q}");
                }
                Some(Target::MinRecall(q))
            }
            _ => None,
        };
        Ok(t)
    }
}

fn rate(r: &Option<Rate>) -> String {
    match r {
        Some(r) => format!("{:.4} ({:.4}–{:.4})", r.value, r.low, r.high),
        None => "-".into(),
    }
}

/// Print the human-readable report.
pub fn print(rep: &Report, dir: &str, out: &mut impl Write) -> std::io::Result<()> {
    let target = rep
        .target
        .map_or_else(|| "none, probabilities only".into(), |t| t.to_string());
    writeln!(
        out,
        "validation rows {} of {dir}; target: {target}",
        thousands(rep.rows)
    )?;
    let w = rep
        .models
        .iter()
        .map(|m| m.label.len())
        .max()
        .unwrap_or(5)
        .clamp(5, 24);
    if rep.models.iter().any(|m| m.point.is_some()) {
        writeln!(out)?;
        writeln!(
            out,
            "{:<w$} {:>12}  {:<24} {:<24} false-pos. rate (95%)",
            "class", "threshold", "precision (95%)", "recall (95%)"
        )?;
        for m in &rep.models {
            if let Some(p) = &m.point {
                writeln!(
                    out,
                    "{:<w$} {:>12.6}  {:<24} {:<24} {}{}",
                    m.label,
                    p.threshold,
                    rate(&p.precision),
                    rate(&p.recall),
                    rate(&p.false_positive_rate),
                    if p.met {
                        ""
                    } else {
                        "   target not met: closest point"
                    }
                )?;
            }
        }
        writeln!(
            out,
            "(intervals: Wilson score, 95%; rows labelled positive when the score is ≥ the threshold)"
        )?;
    }
    let q = |x: Option<calibrate::Quality>, f: fn(&calibrate::Quality) -> f64| {
        x.map_or_else(|| "-".into(), |v| format!("{:.4}", f(&v)))
    };
    writeln!(out)?;
    writeln!(
        out,
        "{:<w$} {:>10} {:>10}  {:>8} → {:<8} {:>8} → after",
        "class", "Platt A", "Platt B", "Brier", "after", "ECE"
    )?;
    for m in &rep.models {
        let (a, b) = m.platt.map_or(("-".into(), "-".into()), |p| {
            (format!("{:.4}", p.a), format!("{:.4}", p.b))
        });
        writeln!(
            out,
            "{:<w$} {a:>10} {b:>10}  {:>8} → {:<8} {:>8} → {}",
            m.label,
            q(m.before, |v| v.brier),
            q(m.after, |v| v.brier),
            q(m.before, |v| v.ece),
            q(m.after, |v| v.ece),
        )?;
    }
    writeln!(
        out,
        "(before: σ(score), the margin read as log-odds; after: Platt scaling; ECE over 10 equal-width bins)"
    )?;
    Ok(())
}

/// Run `tamis calibrate`.
pub fn run(a: Args) -> anyhow::Result<ExitCode> {
    let target = a.target()?;
    let mut model = Model::load(&a.model)
        .with_context(|| format!("cannot load model {}", a.model.display()))?;
    let only = match &a.positive {
        None => None,
        Some(p) if model.is_binary() => {
            if model.meta.positive.as_deref() != Some(p.as_str()) {
                bail!(
                    "--positive {p}: this binary model's positive label is {:?}",
                    model.meta.positive.as_deref().unwrap_or_default()
                );
            }
            None
        }
        Some(p) => match model.meta.model_labels.iter().position(|l| l == p) {
            Some(i) => Some(i),
            None => bail!(
                "--positive {p}: the model has no class {p:?} (classes: {})",
                model.meta.model_labels.join(", ")
            ),
        },
    };
    if target.is_none() && model.meta.loss == tamis::solver::Loss::Logistic {
        bail!("nothing to calibrate: a logistic model's probabilities are σ(score) already; give a target (--max-false-positive-rate, --min-precision or --min-recall)");
    }
    if only.is_some() && target.is_none() {
        bail!(
            "--positive needs a target: --max-false-positive-rate, --min-precision or --min-recall"
        );
    }
    let dest = a.out.as_ref().unwrap_or(&a.model);
    let manifest = Manifest::load(&a.dir)?;
    tamis::dataset::refuse_own_file(&a.dir, &manifest, dest, "model")?;
    let rows = super::eval::scored_split(&model, &a.dir, super::eval::Which::Validation)
        .with_context(|| format!("cannot score the validation split of {}", a.dir.display()))?;
    let fingerprint = format!("{:016x}", manifest.fingerprint());
    let rep = calibrate::calibrate(&model, &rows, &a.dir, &fingerprint, target, only)?;
    {
        let mut out = std::io::stdout().lock();
        if a.json {
            serde_json::to_writer_pretty(&mut out, &rep)?;
            writeln!(out)?;
        } else {
            print(&rep, &a.dir.display().to_string(), &mut out)?;
        }
    }
    if !rep.met {
        let t = target.expect("only a target can be unmet");
        bail!(
            "the target {t} cannot be met on the validation split; the closest reachable points are shown above; {} was not changed",
            a.model.display()
        );
    }
    model.meta.calibration = Some(rep.calibration.clone());
    model
        .save(dest)
        .with_context(|| format!("cannot write the model {}", dest.display()))?;
    eprintln!("wrote {}", dest.display());
    Ok(ExitCode::SUCCESS)
}
