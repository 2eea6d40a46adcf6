//! SVG charts of an evaluation: the ROC curve with chosen operating points, and the score
//! distributions of spam and ham with the thresholds drawn across them.
//!
//! Mail operators live at the far left of the ROC curve (false-positive rates of 1e-4 to
//! 1e-2), which a linear axis squeezes into a few pixels; [`FprScale::Log`] gives that
//! region most of the width. Only the SVG backend of `plotters` is used, so no font or
//! image libraries are needed; the viewer renders the text. Each chart is drawn in memory
//! and written through [`crate::fsio`], so a link or device planted at the chart's path is
//! refused rather than followed.

use std::path::Path;

use plotters::coord::Shift;
use plotters::coord::combinators::LogCoord;
use plotters::coord::types::RangedCoordf64;
use plotters::prelude::*;

use super::eval_error::{Class, EvalError};
use super::roc::{OperatingPoint, RocCurve};

const SIZE: (u32, u32) = (900, 650);
const SPAM_COLOR: RGBColor = RGBColor(200, 60, 40);
const HAM_COLOR: RGBColor = RGBColor(40, 100, 190);
const CURVE_COLOR: RGBColor = RGBColor(30, 30, 140);
const MARK_COLORS: [RGBColor; 4] = [
    RGBColor(220, 120, 0),
    RGBColor(0, 140, 70),
    RGBColor(150, 40, 160),
    RGBColor(120, 120, 120),
];
const HISTOGRAM_BINS: usize = 50;

/// Why a chart could not be written.
#[derive(Debug, thiserror::Error)]
pub enum PlotError {
    /// The data to plot was rejected.
    #[error(transparent)]
    Input(#[from] EvalError),
    /// A score to plot is NaN or infinite.
    #[error("{class} score at index {index} is not a finite number ({value})")]
    NonFiniteScore {
        /// Which list the score came from.
        class: Class,
        /// Its position in that list.
        index: usize,
        /// The value.
        value: f64,
    },
    /// The drawing library failed.
    #[error("cannot draw {path}: {message}")]
    Draw {
        /// The file being written.
        path: String,
        /// What the drawing library reported.
        message: String,
    },
    /// The chart could not be written to its file.
    #[error(transparent)]
    Write(#[from] crate::fsio::FsioError),
}

/// How the false-positive-rate axis of a ROC chart is scaled.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum FprScale {
    /// Logarithmic from 1e-4 (or lower, if the data has smaller non-zero rates) to 1. A
    /// false-positive rate of exactly 0 is drawn on the left edge.
    Log,
    /// Linear from 0 to 1.
    Linear,
}

fn draw_error(path: &Path) -> impl Fn(&dyn std::fmt::Display) -> PlotError + '_ {
    move |e| PlotError::Draw {
        path: path.display().to_string(),
        message: e.to_string(),
    }
}

fn percent(rate: f64) -> String {
    let p = rate * 100.0;
    if p == 0.0 || p >= 1.0 {
        format!("{p:.1}%")
    } else {
        format!("{p:.3}%")
    }
}

/// Writes the ROC curve as an SVG file at `path`, with the area under it in the legend and
/// each `(label, point)` of `marks` drawn as a dot with its rates and threshold.
///
/// # Errors
/// [`PlotError::Draw`] when drawing fails, [`PlotError::Write`] when the file cannot be
/// written (or its path is a link, folder, FIFO or device).
pub fn write_roc_svg(
    path: &Path,
    curve: &RocCurve,
    auc: f64,
    marks: &[(&str, OperatingPoint)],
    scale: FprScale,
) -> Result<(), PlotError> {
    let fail = draw_error(path);
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, SIZE).into_drawing_area();
        root.fill(&WHITE).map_err(|e| fail(&e))?;
        let caption = format!(
            "ROC curve: {} spam, {} ham",
            curve.positives(),
            curve.negatives()
        );
        match scale {
            FprScale::Linear => {
                let chart = roc_chart::<RangedCoordf64, _>(&root, &caption, 0.0..1.0)?;
                let x_desc = "False-positive rate (share of ham marked as spam)";
                draw_roc(chart, x_desc, curve, auc, marks, |f| f, path)?;
            }
            FprScale::Log => {
                let smallest = curve
                    .points()
                    .iter()
                    .map(|p| p.fpr)
                    .find(|&f| f > 0.0)
                    .unwrap_or(1e-4);
                // Round down to a power of ten so the axis starts on a labelled decade.
                let left = 1e-4_f64.min(10f64.powf(smallest.log10().floor()));
                let chart =
                    roc_chart::<LogCoord<f64>, _>(&root, &caption, (left..1.0).log_scale())?;
                let x_desc = "False-positive rate (share of ham marked as spam; log scale, 0 at the left edge)";
                draw_roc(
                    chart,
                    x_desc,
                    curve,
                    auc,
                    marks,
                    move |f: f64| f.max(left),
                    path,
                )?;
            }
        }
        root.present().map_err(|e| fail(&e))?;
    }
    crate::fsio::write_bytes(path, svg.as_bytes())?;
    Ok(())
}

type Chart<'a, X> = ChartContext<'a, SVGBackend<'a>, Cartesian2d<X, RangedCoordf64>>;

fn roc_chart<'a, X, R>(
    root: &DrawingArea<SVGBackend<'a>, Shift>,
    caption: &str,
    x_range: R,
) -> Result<Chart<'a, X>, PlotError>
where
    R: Into<X>,
    X: Ranged<ValueType = f64>,
{
    ChartBuilder::on(root)
        .caption(caption, ("sans-serif", 24))
        .margin(20)
        .x_label_area_size(55)
        .y_label_area_size(70)
        .build_cartesian_2d(x_range.into(), 0.0..1.0)
        .map_err(|e| PlotError::Draw {
            path: String::new(),
            message: e.to_string(),
        })
}

fn draw_roc<X>(
    mut chart: Chart<'_, X>,
    x_desc: &str,
    curve: &RocCurve,
    auc: f64,
    marks: &[(&str, OperatingPoint)],
    place_x: impl Fn(f64) -> f64,
    path: &Path,
) -> Result<(), PlotError>
where
    X: Ranged<ValueType = f64> + plotters::coord::ranged1d::ValueFormatter<f64>,
{
    let fail = draw_error(path);
    chart
        .configure_mesh()
        .x_desc(x_desc)
        .y_desc("True-positive rate (share of spam caught)")
        .x_label_formatter(&|v| percent(*v))
        .y_label_formatter(&|v| percent(*v))
        .axis_desc_style(("sans-serif", 18))
        .label_style(("sans-serif", 14))
        .light_line_style(WHITE.mix(0.0))
        .draw()
        .map_err(|e| fail(&e))?;

    // Straight segments of the curve (ties) and of the chance line bend on a log axis, so
    // they are sampled rather than drawn as one line.
    let chance: Vec<(f64, f64)> = (0..=200)
        .map(|i| {
            let f = 10f64.powf(-6.0 + 6.0 * f64::from(i) / 200.0);
            (place_x(f), f)
        })
        .collect();
    chart
        .draw_series(LineSeries::new(
            chance,
            ShapeStyle::from(&BLACK.mix(0.4)).stroke_width(1),
        ))
        .map_err(|e| fail(&e))?
        .label("random guessing")
        .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 20, y)], BLACK.mix(0.4)));

    let mut line = Vec::with_capacity(curve.points().len() * 2);
    for pair in curve.points().windows(2) {
        let (from, to) = (pair[0], pair[1]);
        let steps = if to.fpr > from.fpr && to.tpr > from.tpr {
            24
        } else {
            1
        };
        for s in 0..steps {
            let t = f64::from(s) / f64::from(steps);
            let f = from.fpr + t * (to.fpr - from.fpr);
            line.push((place_x(f), from.tpr + t * (to.tpr - from.tpr)));
        }
    }
    if let Some(last) = curve.points().last() {
        line.push((place_x(last.fpr), last.tpr));
    }
    chart
        .draw_series(LineSeries::new(line, CURVE_COLOR.stroke_width(3)))
        .map_err(|e| fail(&e))?
        .label(format!("model (area under curve {auc:.4})"))
        .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 20, y)], CURVE_COLOR.stroke_width(3)));

    for (i, (label, point)) in marks.iter().enumerate() {
        let color = MARK_COLORS[i % MARK_COLORS.len()];
        let at = (place_x(point.fpr), point.tpr);
        chart
            .draw_series(std::iter::once(Circle::new(at, 7, color.filled())))
            .map_err(|e| fail(&e))?
            .label(format!(
                "{label}: {} of ham, {} of spam, threshold {:.4}",
                percent(point.fpr),
                percent(point.tpr),
                point.threshold
            ))
            .legend(move |(x, y)| Circle::new((x + 10, y), 6, color.filled()));
    }

    chart
        .configure_series_labels()
        .position(SeriesLabelPosition::LowerRight)
        .label_font(("sans-serif", 15))
        .background_style(WHITE.mix(0.9))
        .border_style(BLACK.mix(0.5))
        .draw()
        .map_err(|e| fail(&e))?;
    Ok(())
}

fn check_finite(scores: &[f64], class: Class) -> Result<(), PlotError> {
    match scores.iter().enumerate().find(|(_, s)| !s.is_finite()) {
        Some((index, &value)) => Err(PlotError::NonFiniteScore {
            class,
            index,
            value,
        }),
        None => Ok(()),
    }
}

/// Writes overlaid histograms of spam and ham scores as an SVG file at `path`, each class
/// scaled to its own total (so a rare class stays visible), with each `(label, threshold)`
/// drawn as a vertical line.
///
/// # Errors
/// [`PlotError::Input`] with [`EvalError::Empty`] when both lists are empty,
/// [`PlotError::NonFiniteScore`], [`PlotError::Draw`] when drawing fails, or
/// [`PlotError::Write`] when the file cannot be written.
pub fn write_score_histograms_svg(
    path: &Path,
    spam_scores: &[f64],
    ham_scores: &[f64],
    thresholds: &[(&str, f64)],
) -> Result<(), PlotError> {
    check_finite(spam_scores, Class::Spam)?;
    check_finite(ham_scores, Class::Ham)?;
    let all = spam_scores.iter().chain(ham_scores);
    let (min, max) = all.fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &s| {
        (lo.min(s), hi.max(s))
    });
    if min > max {
        return Err(EvalError::Empty.into());
    }
    let (min, max) = thresholds
        .iter()
        .filter(|(_, t)| t.is_finite())
        .fold((min, max), |(lo, hi), &(_, t)| (lo.min(t), hi.max(t)));
    let pad = if max > min { (max - min) * 0.02 } else { 0.5 };
    let (lo, hi) = (min - pad, max + pad);
    let width = (hi - lo) / HISTOGRAM_BINS as f64;

    let shares = |scores: &[f64]| -> Vec<f64> {
        let mut counts = vec![0u64; HISTOGRAM_BINS];
        for &s in scores {
            let bin = (((s - lo) / width) as usize).min(HISTOGRAM_BINS - 1);
            if let Some(c) = counts.get_mut(bin) {
                *c += 1;
            }
        }
        let total = scores.len().max(1) as f64;
        counts.iter().map(|&c| c as f64 / total).collect()
    };
    let (spam, ham) = (shares(spam_scores), shares(ham_scores));
    let top = spam.iter().chain(&ham).fold(0.0_f64, |m, &v| m.max(v)) * 1.12;

    let fail = draw_error(path);
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, SIZE).into_drawing_area();
        root.fill(&WHITE).map_err(|e| fail(&e))?;
        let mut chart = ChartBuilder::on(&root)
            .caption("Scores of spam and ham", ("sans-serif", 24))
            .margin(20)
            .x_label_area_size(55)
            .y_label_area_size(70)
            .build_cartesian_2d(lo..hi, 0.0..top.max(1e-9))
            .map_err(|e| fail(&e))?;
        chart
            .configure_mesh()
            .x_desc("Score (margin of the model)")
            .y_desc("Share of the messages of each class")
            .y_label_formatter(&|v| percent(*v))
            .axis_desc_style(("sans-serif", 18))
            .label_style(("sans-serif", 14))
            .light_line_style(WHITE.mix(0.0))
            .draw()
            .map_err(|e| fail(&e))?;

        for (shares, color, name, count) in [
            (&ham, HAM_COLOR, "ham", ham_scores.len()),
            (&spam, SPAM_COLOR, "spam", spam_scores.len()),
        ] {
            let bars = shares
                .iter()
                .enumerate()
                .filter(|(_, v)| **v > 0.0)
                .map(|(i, &v)| {
                    let x0 = lo + width * i as f64;
                    Rectangle::new([(x0, 0.0), (x0 + width, v)], color.mix(0.35).filled())
                });
            chart
                .draw_series(bars)
                .map_err(|e| fail(&e))?
                .label(format!("{name} ({count} messages)"))
                .legend(move |(x, y)| {
                    Rectangle::new([(x, y - 6), (x + 20, y + 6)], color.mix(0.35).filled())
                });
            // An outline on top keeps each class readable where the two overlap.
            let outline = shares.iter().enumerate().flat_map(|(i, &v)| {
                let x0 = lo + width * i as f64;
                [(x0, v), (x0 + width, v)]
            });
            let outline: Vec<(f64, f64)> = std::iter::once((lo, 0.0))
                .chain(outline)
                .chain(std::iter::once((hi, 0.0)))
                .collect();
            chart
                .draw_series(LineSeries::new(outline, color.stroke_width(2)))
                .map_err(|e| fail(&e))?;
        }

        for (i, &(label, t)) in thresholds.iter().enumerate() {
            if !t.is_finite() {
                continue;
            }
            let color = MARK_COLORS[i % MARK_COLORS.len()];
            chart
                .draw_series(LineSeries::new([(t, 0.0), (t, top)], color.stroke_width(2)))
                .map_err(|e| fail(&e))?
                .label(format!("{label} threshold {t:.4}"))
                .legend(move |(x, y)| {
                    PathElement::new(vec![(x, y), (x + 20, y)], color.stroke_width(2))
                });
        }

        chart
            .configure_series_labels()
            .position(SeriesLabelPosition::UpperRight)
            .label_font(("sans-serif", 15))
            .background_style(WHITE.mix(0.9))
            .border_style(BLACK.mix(0.5))
            .draw()
            .map_err(|e| fail(&e))?;
        root.present().map_err(|e| fail(&e))?;
    }
    crate::fsio::write_bytes(path, svg.as_bytes())?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::train::roc::roc_curve;

    #[test]
    fn both_charts_render_to_svg() {
        let dir = tempfile::tempdir().unwrap();
        let scores = [0.1, 0.4, 0.35, 0.8, 0.7, 0.2, 0.9, 0.05];
        let labels = [false, false, true, true, true, false, true, false];
        let curve = roc_curve(&scores, &labels).unwrap();
        let mark = curve.tpr_at_fpr(0.25).unwrap();
        for scale in [FprScale::Log, FprScale::Linear] {
            let path = dir.path().join("roc.svg");
            write_roc_svg(&path, &curve, curve.auc(), &[("tag", mark)], scale).unwrap();
            let text = std::fs::read_to_string(&path).unwrap();
            assert!(text.starts_with("<svg") && text.contains("False-positive rate"));
        }
        let path = dir.path().join("hist.svg");
        write_score_histograms_svg(&path, &[0.7, 0.9], &[0.1, 0.2, 0.2], &[("tag", 0.5)]).unwrap();
        assert!(
            std::fs::read_to_string(&path)
                .unwrap()
                .contains("Scores of spam and ham")
        );
    }

    #[test]
    fn histogram_input_is_checked() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("hist.svg");
        assert!(matches!(
            write_score_histograms_svg(&path, &[], &[], &[]),
            Err(PlotError::Input(EvalError::Empty))
        ));
        assert!(matches!(
            write_score_histograms_svg(&path, &[1.0], &[f64::NAN], &[]),
            Err(PlotError::NonFiniteScore {
                class: Class::Ham,
                index: 0,
                ..
            })
        ));
        // All scores equal still gives a drawable range.
        write_score_histograms_svg(&path, &[1.0], &[1.0], &[("t", f64::INFINITY)]).unwrap();
    }
}
