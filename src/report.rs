//! The HTML report of `tamis eval --report`: one self-contained page (inline
//! SVG drawn with the `plotters` crate, inline CSS, no script, no network) with
//! six plots, each one `<svg>` inside a `<figure>`:
//!
//! | figure id     | plot                                                      |
//! |---------------|-----------------------------------------------------------|
//! | `roc`         | ROC curve per model, the operating point marked            |
//! | `pr`          | precision–recall curve per model, the operating point marked |
//! | `histograms`  | score histograms of each class's rows against the rest     |
//! | `confusion`   | the confusion matrix as a shaded grid                      |
//! | `reliability` | reliability diagram of the probabilities                   |
//! | `training`    | per-epoch objective, validation loss and accuracy          |
//!
//! Colours come from the Okabe–Ito palette (Okabe and Ito 2008, "Color
//! Universal Design"), chosen to stay apart for the common colour-vision
//! deficiencies; every series also has its own dash pattern and marker shape so
//! that the page reads in grey-scale. The confusion grid is shaded in grey with
//! the counts written in every cell.

use plotters::coord::types::RangedCoordf64;
use plotters::coord::Shift;
use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};

use crate::error::{Error, Result};
use crate::eval::rank::{self, Ranking};
use crate::eval::{Metrics, ScoredRows};
use crate::model::Model;

/// The Okabe–Ito palette, black first.
pub const OKABE_ITO: [RGBColor; 8] = [
    RGBColor(0x00, 0x00, 0x00),
    RGBColor(0xE6, 0x9F, 0x00),
    RGBColor(0x56, 0xB4, 0xE9),
    RGBColor(0x00, 0x9E, 0x73),
    RGBColor(0xF0, 0xE4, 0x42),
    RGBColor(0x00, 0x72, 0xB2),
    RGBColor(0xD5, 0x5E, 0x00),
    RGBColor(0xCC, 0x79, 0xA7),
];

/// Series order: black, blue, vermillion, bluish green, reddish purple, orange,
/// sky blue, yellow (the light ones last, as they are faint on white).
const ORDER: [usize; 8] = [0, 5, 6, 3, 7, 1, 2, 4];

/// Dash length and gap (pixels) of series `i`; `(0, 0)` is a solid line.
const DASHES: [(u32, u32); 8] = [
    (0, 0),
    (10, 5),
    (3, 4),
    (14, 4),
    (6, 3),
    (2, 7),
    (18, 6),
    (8, 8),
];

fn colour(i: usize) -> RGBColor {
    OKABE_ITO[ORDER[i % 8]]
}

/// The figures of the page, in order: `(id, title)`.
pub const FIGURES: [(&str, &str); 6] = [
    ("roc", "ROC curve"),
    ("pr", "Precision–recall curve"),
    ("histograms", "Score histograms"),
    ("confusion", "Confusion matrix"),
    ("reliability", "Reliability diagram"),
    ("training", "Training curves"),
];

type Draw<'a> = DrawingArea<SVGBackend<'a>, Shift>;
type Chart<'a, 'b> = ChartContext<'a, SVGBackend<'b>, Cartesian2d<RangedCoordf64, RangedCoordf64>>;
type DrawResult = std::result::Result<(), Box<dyn std::error::Error>>;

fn svg(w: u32, h: u32, f: impl FnOnce(&Draw<'_>) -> DrawResult) -> Result<String> {
    let mut buf = String::new();
    {
        let root = SVGBackend::with_string(&mut buf, (w, h)).into_drawing_area();
        root.fill(&WHITE)
            .map_err(|e| Error::Invalid(format!("cannot draw the report: {e}")))?;
        f(&root).map_err(|e| Error::Invalid(format!("cannot draw the report: {e}")))?;
        root.present()
            .map_err(|e| Error::Invalid(format!("cannot draw the report: {e}")))?;
    }
    Ok(buf)
}

/// A line series in series style `i`: coloured, dashed, with a marker shape of
/// its own every few points.
fn series<'a, 'b: 'a>(
    chart: &mut Chart<'a, 'b>,
    pts: &[(f64, f64)],
    i: usize,
    label: &str,
) -> DrawResult {
    let c = colour(i);
    let style = ShapeStyle {
        color: c.to_rgba(),
        filled: false,
        stroke_width: 2,
    };
    let (dash, gap) = DASHES[i % 8];
    if dash == 0 {
        chart.draw_series(LineSeries::new(pts.iter().copied(), style))?;
    } else {
        chart.draw_series(DashedLineSeries::new(pts.iter().copied(), dash, gap, style))?;
    }
    let every = (pts.len() / 8).max(1);
    let marks: Vec<(f64, f64)> = pts
        .iter()
        .copied()
        .enumerate()
        .filter(|(k, _)| (k + i).is_multiple_of(every))
        .map(|(_, p)| p)
        .collect();
    markers(chart, &marks, i, Some(label))
}

/// Draw markers of series `i` at `pts` (circle, triangle, square, cross, filled
/// circle, filled triangle, filled square, filled diamond), with a
/// legend entry when `label` is given.
fn markers<'a, 'b: 'a>(
    chart: &mut Chart<'a, 'b>,
    pts: &[(f64, f64)],
    i: usize,
    label: Option<&str>,
) -> DrawResult {
    let c = colour(i);
    let line = ShapeStyle {
        color: c.to_rgba(),
        filled: false,
        stroke_width: 2,
    };
    let fill = c.filled();
    macro_rules! draw {
        ($shape:expr) => {{
            let anno = chart.draw_series(pts.iter().map(|&p| EmptyElement::at(p) + $shape))?;
            if let Some(l) = label {
                anno.label(l).legend(move |q| {
                    EmptyElement::at(q) + PathElement::new(vec![(-8, 0), (8, 0)], line) + $shape
                });
            }
        }};
    }
    match i % 8 {
        0 => draw!(Circle::new((0, 0), 4, line)),
        1 => draw!(TriangleMarker::new((0, 0), 5, line)),
        2 => draw!(Rectangle::new([(-4, -4), (4, 4)], line)),
        3 => draw!(Cross::new((0, 0), 4, line)),
        4 => draw!(Circle::new((0, 0), 4, fill)),
        5 => draw!(TriangleMarker::new((0, 0), 5, fill)),
        6 => draw!(Rectangle::new([(-4, -4), (4, 4)], fill)),
        _ => draw!(Polygon::new(vec![(0, -6), (6, 0), (0, 6), (-6, 0)], fill)),
    }
    Ok(())
}

fn legend<'a, 'b: 'a>(chart: &mut Chart<'a, 'b>, pos: SeriesLabelPosition) -> DrawResult {
    chart
        .configure_series_labels()
        .position(pos)
        .background_style(WHITE.mix(0.9))
        .border_style(BLACK.mix(0.4))
        .label_font(("sans-serif", 13))
        .draw()?;
    Ok(())
}

/// The operating point of model `m`: its stored threshold, else margin 0.
fn threshold(model: &Model, m: usize) -> f64 {
    model.threshold_of(m).unwrap_or(0.0)
}

/// What the page needs.
pub struct ReportInput<'a> {
    /// The model evaluated.
    pub model: &'a Model,
    /// Its scores on the evaluated rows.
    pub rows: &'a ScoredRows,
    /// The metrics of those rows.
    pub metrics: &'a Metrics,
    /// The labels of the decisions (confusion matrix order).
    pub labels: &'a [String],
    /// The model's labels per model (curve legends).
    pub model_labels: &'a [String],
    /// What was evaluated, for the title (a dataset split or input files).
    pub what: &'a str,
    /// The model's file name, for the title.
    pub model_name: &'a str,
}

/// Curves of every model against the rest, for the ROC and PR plots.
struct Curves {
    label: String,
    roc: Vec<(f64, f64)>,
    pr: Vec<(f64, f64)>,
    /// (fpr, recall, precision) at the operating point.
    point: Option<(f64, f64, f64)>,
}

fn curves(inp: &ReportInput<'_>) -> Vec<Curves> {
    (0..inp.rows.models)
        .map(|m| {
            let (s, y) = inp.rows.one_vs_rest(m);
            let r = Ranking::new(&s, &y);
            // Without a stored threshold a binary model is positive above 0, not at 0.
            let c = match inp.model.threshold_of(m) {
                Some(t) => rank::counts_at(&s, &y, t),
                None => rank::counts_of(s.iter().map(|&x| x > 0.0), &y),
            };
            let point = match (c.false_positive_rate(), c.recall()) {
                (Some(f), Some(r)) => Some((f, r, c.precision().unwrap_or(1.0))),
                _ => None,
            };
            Curves {
                label: inp.model_labels[m].clone(),
                roc: r.roc_points(400),
                pr: r.pr_points(400),
                point,
            }
        })
        .collect()
}

fn xy_chart<'a, 'b>(
    area: &'a Draw<'b>,
    caption: &str,
    x: (&str, std::ops::Range<f64>),
    y: (&str, std::ops::Range<f64>),
    whole_x: bool,
) -> std::result::Result<Chart<'a, 'b>, Box<dyn std::error::Error>> {
    let mut chart = ChartBuilder::on(area)
        .caption(caption, ("sans-serif", 18))
        .margin(12)
        .x_label_area_size(40)
        .y_label_area_size(52)
        .build_cartesian_2d(x.1, y.1)?;
    let whole = |v: &f64| {
        if v.fract() == 0.0 {
            format!("{v:.0}")
        } else {
            String::new()
        }
    };
    let plain = |v: &f64| format!("{}", (v * 1000.0).round() / 1000.0);
    let fmt: &dyn Fn(&f64) -> String = if whole_x { &whole } else { &plain };
    chart
        .configure_mesh()
        .x_label_formatter(fmt)
        .x_desc(x.0)
        .y_desc(y.0)
        .light_line_style(BLACK.mix(0.06))
        .bold_line_style(BLACK.mix(0.15))
        .label_style(("sans-serif", 13))
        .axis_desc_style(("sans-serif", 14))
        .draw()?;
    Ok(chart)
}

/// A large dot in series `i`'s colour with a black ring.
fn operating_point<'a, 'b: 'a>(chart: &mut Chart<'a, 'b>, p: (f64, f64), i: usize) -> DrawResult {
    chart.draw_series(std::iter::once(Circle::new(p, 7, colour(i).filled())))?;
    chart.draw_series(std::iter::once(Circle::new(p, 7, BLACK.stroke_width(1))))?;
    Ok(())
}

fn roc_svg(cs: &[Curves]) -> Result<String> {
    svg(560, 480, |root| {
        let mut chart = xy_chart(
            root,
            "ROC curve (● operating point)",
            ("false-positive rate", 0.0..1.0),
            ("true-positive rate (recall)", 0.0..1.0),
            false,
        )?;
        chart.draw_series(DashedLineSeries::new(
            vec![(0.0, 0.0), (1.0, 1.0)],
            2,
            5,
            BLACK.mix(0.35).stroke_width(1),
        ))?;
        for (i, c) in cs.iter().enumerate() {
            series(&mut chart, &c.roc, i, &c.label)?;
        }
        for (i, c) in cs.iter().enumerate() {
            if let Some((f, r, _)) = c.point {
                operating_point(&mut chart, (f, r), i)?;
            }
        }
        legend(&mut chart, SeriesLabelPosition::LowerRight)
    })
}

fn pr_svg(cs: &[Curves]) -> Result<String> {
    svg(560, 480, |root| {
        let mut chart = xy_chart(
            root,
            "Precision–recall curve (● operating point)",
            ("recall", 0.0..1.0),
            ("precision", 0.0..1.02),
            false,
        )?;
        for (i, c) in cs.iter().enumerate() {
            series(&mut chart, &c.pr, i, &c.label)?;
        }
        for (i, c) in cs.iter().enumerate() {
            if let Some((_, r, p)) = c.point {
                operating_point(&mut chart, (r, p), i)?;
            }
        }
        legend(&mut chart, SeriesLabelPosition::LowerLeft)
    })
}

/// Share of rows per bin of `[lo, hi)` (the ends clamped), as step points.
fn histogram(v: &[f64], lo: f64, hi: f64, bins: usize) -> Vec<(f64, f64)> {
    let mut n = vec![0u64; bins];
    let w = (hi - lo) / bins as f64;
    for &x in v {
        let b = (((x - lo) / w).floor().max(0.0) as usize).min(bins - 1);
        n[b] += 1;
    }
    let total = v.len().max(1) as f64;
    let mut pts = vec![(lo, 0.0)];
    for (b, &c) in n.iter().enumerate() {
        let h = c as f64 / total;
        pts.push((lo + b as f64 * w, h));
        pts.push((lo + (b + 1) as f64 * w, h));
    }
    pts.push((hi, 0.0));
    pts
}

fn histograms_svg(inp: &ReportInput<'_>) -> Result<String> {
    let m = inp.rows.models;
    let cols = if m == 1 { 1 } else { 2 };
    let rows = m.div_ceil(cols);
    let (w, h) = (if m == 1 { 640 } else { 960 }, 300 * rows as u32);
    svg(w, h, |root| {
        let panels = root.split_evenly((rows, cols));
        for (k, panel) in panels.iter().enumerate().take(m) {
            let (s, y) = inp.rows.one_vs_rest(k);
            let mut lo = s.iter().copied().fold(f64::INFINITY, f64::min);
            let mut hi = s.iter().copied().fold(f64::NEG_INFINITY, f64::max);
            if !(lo.is_finite() && hi.is_finite()) || hi - lo < 1e-9 {
                lo -= 1.0;
                hi += 1.0;
            }
            let pos: Vec<f64> = s.iter().zip(&y).filter(|p| *p.1).map(|p| *p.0).collect();
            let neg: Vec<f64> = s.iter().zip(&y).filter(|p| !*p.1).map(|p| *p.0).collect();
            let hp = histogram(&pos, lo, hi, 40);
            let hn = histogram(&neg, lo, hi, 40);
            let top = hp
                .iter()
                .chain(&hn)
                .map(|p| p.1)
                .fold(0.0, f64::max)
                .max(1e-3)
                * 1.1;
            let name = &inp.model_labels[k];
            let mut chart = xy_chart(
                panel,
                &format!("{name}: score of its rows and of the rest"),
                ("score (margin)", lo..hi),
                ("share of rows", 0.0..top),
                false,
            )?;
            // The class's rows: filled, solid black outline; the rest: dashed blue.
            chart.draw_series(AreaSeries::new(
                hp.iter().copied(),
                0.0,
                colour(0).mix(0.18),
            ))?;
            series(&mut chart, &hp, 0, &format!("{name} ({})", pos.len()))?;
            series(&mut chart, &hn, 1, &format!("other ({})", neg.len()))?;
            let t = threshold(inp.model, k);
            if t >= lo && t <= hi {
                chart
                    .draw_series(DashedLineSeries::new(
                        vec![(t, 0.0), (t, top)],
                        3,
                        3,
                        colour(2).stroke_width(2),
                    ))?
                    .label(format!("threshold {t:.3}"))
                    .legend(|(x, y)| {
                        PathElement::new(vec![(x - 8, y), (x + 8, y)], colour(2).stroke_width(2))
                    });
            }
            // The legend goes to the upper corner over the lower curves, so it
            // hides as little of the histograms as it can.
            let peak_over = |from: f64, to: f64| {
                hp.iter()
                    .chain(&hn)
                    .filter(|p| p.0 >= from && p.0 <= to)
                    .map(|p| p.1)
                    .fold(0.0, f64::max)
            };
            let span = hi - lo;
            let corner = if peak_over(hi - 0.4 * span, hi) < peak_over(lo, lo + 0.4 * span) {
                SeriesLabelPosition::UpperRight
            } else {
                SeriesLabelPosition::UpperLeft
            };
            legend(&mut chart, corner)?;
        }
        Ok(())
    })
}

fn confusion_svg(inp: &ReportInput<'_>) -> Result<String> {
    let met = inp.metrics;
    let k = met.confusion.len();
    let undecided = met.undecided.iter().any(|&u| u > 0);
    let cols = k + undecided as usize;
    let cell = (520 / cols.max(1)).clamp(48, 110) as i32;
    let left = 140i32;
    let topm = 170i32;
    let w = (left + cell * cols as i32 + 30) as u32;
    let h = (topm + cell * k as i32 + 60) as u32;
    svg(w, h, |root| {
        let font = ("sans-serif", 14).into_font();
        let title = ("sans-serif", 18).into_font();
        root.draw(&Text::new(
            "Rows: truth; columns: prediction; darker = larger share of the row",
            (10, 10),
            title.clone().into_text_style(root),
        ))?;
        let mut names: Vec<String> = inp.labels.to_vec();
        if undecided {
            names.push(crate::model::UNDECIDED.to_string());
        }
        let short = |s: &str| -> String {
            if s.chars().count() > 16 {
                s.chars().take(15).collect::<String>() + "…"
            } else {
                s.to_string()
            }
        };
        for (j, n) in names.iter().enumerate() {
            let x = left + j as i32 * cell + cell / 2;
            root.draw(&Text::new(
                short(n),
                (x, topm - 8),
                font.clone()
                    .transform(FontTransform::Rotate270)
                    .into_text_style(root)
                    .pos(Pos::new(HPos::Left, VPos::Center)),
            ))?;
        }
        for (i, row) in met.confusion.iter().enumerate() {
            let total: u64 = row.iter().sum::<u64>() + met.undecided[i];
            let y = topm + i as i32 * cell;
            root.draw(&Text::new(
                short(&inp.labels[i]),
                (left - 8, y + cell / 2),
                font.clone()
                    .into_text_style(root)
                    .pos(Pos::new(HPos::Right, VPos::Center)),
            ))?;
            let mut vals = row.clone();
            if undecided {
                vals.push(met.undecided[i]);
            }
            for (j, &v) in vals.iter().enumerate() {
                let share = if total > 0 {
                    v as f64 / total as f64
                } else {
                    0.0
                };
                // Grey from white (0) to near black (1).
                let g = (255.0 * (1.0 - 0.85 * share)).round() as u8;
                let x = left + j as i32 * cell;
                root.draw(&Rectangle::new(
                    [(x, y), (x + cell, y + cell)],
                    RGBColor(g, g, g).filled(),
                ))?;
                root.draw(&Rectangle::new(
                    [(x, y), (x + cell, y + cell)],
                    BLACK.mix(0.25).stroke_width(1),
                ))?;
                let ink = if g < 128 { WHITE } else { BLACK };
                root.draw(&Text::new(
                    v.to_string(),
                    (x + cell / 2, y + cell / 2),
                    font.clone()
                        .color(&ink)
                        .into_text_style(root)
                        .pos(Pos::new(HPos::Center, VPos::Center)),
                ))?;
            }
        }
        Ok(())
    })
}

fn reliability_svg(inp: &ReportInput<'_>, calibrated: bool) -> Result<String> {
    svg(560, 480, |root| {
        let caption = if calibrated {
            "Reliability diagram (10 equal-width bins)"
        } else {
            "Reliability of σ(score) (not calibrated)"
        };
        let mut chart = xy_chart(
            root,
            caption,
            ("mean predicted probability", 0.0..1.0),
            ("share of positive rows", 0.0..1.0),
            false,
        )?;
        chart
            .draw_series(DashedLineSeries::new(
                vec![(0.0, 0.0), (1.0, 1.0)],
                2,
                5,
                BLACK.mix(0.35).stroke_width(1),
            ))?
            .label("perfect calibration")
            .legend(|(x, y)| PathElement::new(vec![(x - 8, y), (x + 8, y)], BLACK.mix(0.35)));
        for m in 0..inp.rows.models {
            let (s, y) = inp.rows.one_vs_rest(m);
            let p: Vec<f64> = s
                .iter()
                .map(|&x| {
                    inp.model
                        .probability(m, x)
                        .unwrap_or_else(|| rank::sigmoid(x))
                })
                .collect();
            let bins = rank::reliability(&p, &y, rank::CALIBRATION_BINS);
            let pts: Vec<(f64, f64)> = bins
                .iter()
                .filter(|b| b.rows > 0)
                .map(|b| (b.mean_probability, b.positive_share))
                .collect();
            let ece = rank::expected_calibration_error(&p, &y).unwrap_or(0.0);
            series(
                &mut chart,
                &pts,
                m,
                &format!("{} (ECE {ece:.3})", inp.model_labels[m]),
            )?;
            markers(&mut chart, &pts, m, None)?;
        }
        legend(&mut chart, SeriesLabelPosition::LowerRight)
    })
}

fn training_svg(model: &Model) -> Result<String> {
    let ep = &model.meta.epochs;
    svg(960, 340, |root| {
        let (a, b) = root.split_horizontally(480);
        let n = ep.len().max(1) as f64;
        let losses: Vec<f64> = ep
            .iter()
            .flat_map(|e| std::iter::once(e.objective).chain(e.validation_loss))
            .filter(|x| x.is_finite())
            .collect();
        let top = losses.iter().copied().fold(0.0, f64::max).max(1e-3) * 1.1;
        let mut chart = xy_chart(
            &a,
            "Objective and validation loss per epoch",
            ("epoch", 0.5..n + 0.5),
            ("loss", 0.0..top),
            true,
        )?;
        let obj: Vec<(f64, f64)> = ep.iter().map(|e| (e.epoch as f64, e.objective)).collect();
        series(&mut chart, &obj, 0, "objective (training)")?;
        let val: Vec<(f64, f64)> = ep
            .iter()
            .filter_map(|e| e.validation_loss.map(|v| (e.epoch as f64, v)))
            .collect();
        if !val.is_empty() {
            series(&mut chart, &val, 1, "validation loss")?;
            markers(&mut chart, &val, 1, None)?;
        }
        legend(&mut chart, SeriesLabelPosition::UpperRight)?;
        let mut chart = xy_chart(
            &b,
            "Validation accuracy and macro-F1 per epoch",
            ("epoch", 0.5..n + 0.5),
            ("share", 0.0..1.0),
            true,
        )?;
        let acc: Vec<(f64, f64)> = ep
            .iter()
            .filter_map(|e| e.validation_accuracy.map(|v| (e.epoch as f64, v)))
            .collect();
        let f1: Vec<(f64, f64)> = ep
            .iter()
            .filter_map(|e| e.validation_macro_f1.map(|v| (e.epoch as f64, v)))
            .collect();
        if !acc.is_empty() {
            series(&mut chart, &acc, 2, "accuracy")?;
            markers(&mut chart, &acc, 2, None)?;
        }
        if !f1.is_empty() {
            series(&mut chart, &f1, 3, "macro-F1")?;
            markers(&mut chart, &f1, 3, None)?;
        }
        legend(&mut chart, SeriesLabelPosition::LowerRight)
    })
}

fn esc(s: &str) -> String {
    let mut o = String::with_capacity(s.len());
    for c in s.chars() {
        match c {
            '&' => o.push_str("&amp;"),
            '<' => o.push_str("&lt;"),
            '>' => o.push_str("&gt;"),
            '"' => o.push_str("&quot;"),
            '\'' => o.push_str("&#39;"),
            c => o.push(c),
        }
    }
    o
}

fn num(x: Option<f64>) -> String {
    x.map_or_else(|| "–".into(), |v| format!("{v:.4}"))
}

/// The whole page.
pub fn html(inp: &ReportInput<'_>) -> Result<String> {
    let model = inp.model;
    let m = inp.metrics;
    let cs = curves(inp);
    let calibrated = model.has_probabilities();
    let figs = [
        roc_svg(&cs)?,
        pr_svg(&cs)?,
        histograms_svg(inp)?,
        confusion_svg(inp)?,
        reliability_svg(inp, calibrated)?,
        training_svg(model)?,
    ];
    let notes = [
        "Each model against the rest. The dashed diagonal is a scorer that guesses.",
        "Each model against the rest; average precision is the area under the step curve.",
        "Shares of rows by score, the class's own rows against all others; the vertical line is the threshold.",
        "Counts; the shade is the count's share of its true class.",
        if calibrated {
            "Mean predicted probability against the observed share of positive rows in 10 equal-width bins (empty bins left out); points on the diagonal are well calibrated. Bins holding few rows scatter widely; the ECE weighs each bin by its rows."
        } else {
            "The model has no probabilities: the margin is read as log-odds. `tamis calibrate` fits Platt scaling."
        },
        "From the model's training log (validation figures only when the dataset had a validation split).",
    ];
    let decided: u64 = m.undecided.iter().sum();
    let rule = match model.thresholds() {
        Some(_) if model.partly_thresholded() => {
            "the stored thresholds (classes without one compete by their score)"
        }
        Some(_) => "the stored thresholds",
        None if model.is_binary() => "margin 0",
        None => "the highest score",
    };
    let mut page = String::new();
    page.push_str("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n");
    page.push_str(&format!(
        "<title>tamis report: {} on {}</title>\n",
        esc(inp.model_name),
        esc(inp.what)
    ));
    page.push_str(
        "<style>\nbody{font-family:sans-serif;margin:2em auto;max-width:1000px;color:#111;background:#fff}\n\
         h1{font-size:1.4em}table{border-collapse:collapse;margin:1em 0}\n\
         td,th{border:1px solid #999;padding:.25em .6em;text-align:right}th{background:#eee}\n\
         td:first-child,th:first-child{text-align:left}\n\
         figure{margin:2em 0;page-break-inside:avoid}figcaption{font-size:.9em;color:#333;max-width:60em}\n\
         svg{max-width:100%;height:auto;display:block}\n</style>\n</head>\n<body>\n",
    );
    page.push_str(&format!(
        "<h1>{} on {}</h1>\n<p>{} rows; decisions at {rule}; loss {}, λ {}; palette: Okabe–Ito, with dashes and markers per series.</p>\n",
        esc(inp.model_name),
        esc(inp.what),
        m.rows,
        model.meta.loss.name(),
        model.meta.training.solver.lambda
    ));
    page.push_str("<table>\n<tr><th>figure</th><th>value</th></tr>\n");
    let rows: Vec<(&str, String)> = vec![
        ("accuracy", format!("{:.4}", m.accuracy)),
        ("macro-F1", format!("{:.4}", m.macro_f1)),
        ("ROC AUC", num(m.roc_auc)),
        ("average precision", num(m.average_precision)),
        ("precision", format!("{:.4}", m.precision)),
        ("recall", format!("{:.4}", m.recall)),
        (
            "false-positive rate",
            format!("{:.4}", m.false_positive_rate),
        ),
        ("log loss", num(m.log_loss)),
        ("Brier score", num(m.brier)),
        (
            "expected calibration error",
            num(m.expected_calibration_error),
        ),
        ("hinge loss", format!("{:.4}", m.hinge_loss)),
        ("undecided rows", decided.to_string()),
    ];
    for (k, v) in rows {
        page.push_str(&format!("<tr><td>{k}</td><td>{v}</td></tr>\n"));
    }
    page.push_str("</table>\n");
    for (((id, title), svg), note) in FIGURES.iter().zip(figs).zip(notes) {
        page.push_str(&format!(
            "<figure id=\"{id}\">\n<h2>{title}</h2>\n{}\n<figcaption>{}</figcaption>\n</figure>\n",
            svg.trim(),
            esc(note)
        ));
    }
    page.push_str("</body>\n</html>\n");
    Ok(page)
}

/// Write the page to `path` atomically (a temporary name, then a rename).
pub fn write(path: &std::path::Path, page: &str) -> Result<()> {
    use std::io::Write as _;
    let mut f = crate::container::AtomicFile::create(path)?;
    let tmp = f.tmp_path().to_path_buf();
    f.file()
        .write_all(page.as_bytes())
        .map_err(|cause| Error::Io { path: tmp, cause })?;
    f.commit()
}
