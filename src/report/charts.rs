//! The report's charts, drawn with the plotters SVG backend into strings: reliability diagram
//! with its count panel, confidence histogram, and risk–coverage curve.

use super::data::{SetView, HISTOGRAM_BINS};
use super::format::{count, percent, threshold};
use super::style::{
    legend, mesh_style, render, text, AXIS, BAR_ALPHA, CALIBRATED, DASH_PX, HISTOGRAM_H, INK,
    LINE_PX, RELIABILITY_COUNTS_H, RELIABILITY_DIAGRAM_H, RELIABILITY_W, RISK_COVERAGE_H, TARGET,
    THRESHOLD, TICK_PX, UNCALIBRATED, WIDE_W,
};
use super::ReportError;
use plotters::element::DashedPathElement;
use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};

/// Headroom above the tallest bar or curve point, as a factor.
const HEADROOM: f64 = 1.12;
/// Smallest upper end of the risk axis, in percent, so an error-free curve still has a scale.
const MIN_RISK_AXIS_PERCENT: f64 = 1.0;
/// Margin around each chart's plotting area, pixels.
const MARGIN_PX: u32 = 14;

/// Which series a chart draws: the uncalibrated one dashed in orange, the calibrated one solid
/// in blue.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Series {
    /// Before recalibration.
    Uncalibrated,
    /// After recalibration.
    Calibrated,
}

impl Series {
    fn colour(self) -> RGBColor {
        match self {
            Series::Uncalibrated => UNCALIBRATED,
            Series::Calibrated => CALIBRATED,
        }
    }
}

/// A dashed legend key for a dashed series, starting at (x, y).
fn dashed_key(
    x: i32,
    y: i32,
    style: ShapeStyle,
) -> DashedPathElement<std::array::IntoIter<(i32, i32), 2>, u32> {
    DashedPathElement::new([(x, y), (x + 16, y)], 4, 3, style)
}

/// Reliability diagram of one set (bars of accuracy per bin, markers at the bins' mean
/// confidence, the diagonal) with the per-bin item counts under it.
///
/// # Errors
/// [`ReportError::Chart`] if drawing fails.
pub fn reliability(view: &SetView, series: Series) -> Result<String, ReportError> {
    let colour = series.colour();
    let h = RELIABILITY_DIAGRAM_H + RELIABILITY_COUNTS_H;
    render("reliability diagram", RELIABILITY_W, h, |root| {
        let (upper, lower) = root.split_vertically(RELIABILITY_DIAGRAM_H);
        let mut chart = ChartBuilder::on(&upper)
            .margin(MARGIN_PX)
            .x_label_area_size(40)
            .y_label_area_size(56)
            .build_cartesian_2d(0f64..1f64, 0f64..1f64)?;
        let mut mesh = chart.configure_mesh();
        mesh_style(&mut mesh);
        mesh.x_labels(6)
            .y_labels(6)
            .x_desc("Confidence (mean of bin)")
            .y_desc("Accuracy (share right)")
            .x_label_formatter(&|v| format!("{v:.1}"))
            .y_label_formatter(&|v| format!("{v:.1}"))
            .draw()?;
        let bins = &view.reliability;
        chart
            .draw_series(bins.iter().filter_map(|b| {
                let acc = b.accuracy?;
                Some(Rectangle::new(
                    [(b.lower, 0.0), (b.upper, acc)],
                    colour.mix(BAR_ALPHA).filled(),
                ))
            }))?
            .label("Accuracy of bin")
            .legend(move |(x, y)| {
                Rectangle::new(
                    [(x, y - 5), (x + 14, y + 5)],
                    colour.mix(BAR_ALPHA).filled(),
                )
            });
        chart.draw_series(bins.iter().filter_map(|b| {
            let acc = b.accuracy?;
            Some(Rectangle::new(
                [(b.lower, 0.0), (b.upper, acc)],
                colour.stroke_width(1),
            ))
        }))?;
        chart
            .draw_series(DashedLineSeries::new(
                [(0.0, 0.0), (1.0, 1.0)],
                DASH_PX,
                DASH_PX,
                INK.stroke_width(1),
            ))?
            .label("Perfect calibration")
            .legend(|(x, y)| dashed_key(x, y, INK.stroke_width(1)));
        chart
            .draw_series(bins.iter().filter_map(|b| {
                Some(Circle::new(
                    (b.mean_confidence?, b.accuracy?),
                    3,
                    INK.filled(),
                ))
            }))?
            .label("Mean confidence, accuracy")
            .legend(|(x, y)| Circle::new((x + 7, y), 3, INK.filled()));
        legend(&mut chart, SeriesLabelPosition::UpperLeft)?;

        let most = bins.iter().map(|b| b.count).max().unwrap_or(0).max(1) as f64;
        let mut counts = ChartBuilder::on(&lower)
            .margin(MARGIN_PX)
            .margin_top(0)
            .x_label_area_size(40)
            .y_label_area_size(56)
            .build_cartesian_2d(0f64..1f64, 0f64..most * HEADROOM)?;
        let mut mesh = counts.configure_mesh();
        mesh_style(&mut mesh);
        mesh.x_labels(6)
            .y_labels(3)
            .x_desc("Confidence bin")
            .y_desc("Items")
            .x_label_formatter(&|v| format!("{v:.1}"))
            .y_label_formatter(&|v| count(v.round().max(0.0) as u64))
            .draw()?;
        counts.draw_series(bins.iter().filter(|b| b.count > 0).map(|b| {
            Rectangle::new(
                [(b.lower, 0.0), (b.upper, b.count as f64)],
                AXIS.mix(0.7).filled(),
            )
        }))?;
        Ok(())
    })
}

/// Histogram of the top-label confidence: calibrated as bars, uncalibrated as a dashed step
/// line, every threshold in force as a vertical line.
///
/// # Errors
/// [`ReportError::Chart`] if drawing fails.
pub fn confidence_histogram(
    uncalibrated: &SetView,
    calibrated: &SetView,
    thresholds: &[f64],
) -> Result<String, ReportError> {
    render("confidence histogram", WIDE_W, HISTOGRAM_H, |root| {
        let width = 1.0 / HISTOGRAM_BINS as f64;
        let most = calibrated
            .histogram
            .iter()
            .chain(&uncalibrated.histogram)
            .copied()
            .max()
            .unwrap_or(0)
            .max(1) as f64;
        let mut chart = ChartBuilder::on(root)
            .margin(MARGIN_PX)
            .x_label_area_size(40)
            .y_label_area_size(64)
            .build_cartesian_2d(0f64..1f64, 0f64..most * HEADROOM)?;
        let mut mesh = chart.configure_mesh();
        mesh_style(&mut mesh);
        mesh.x_labels(11)
            .y_labels(5)
            .x_desc("Top-label confidence (probability of the predicted class)")
            .y_desc("Items")
            .x_label_formatter(&|v| format!("{v:.1}"))
            .y_label_formatter(&|v| count(v.round().max(0.0) as u64))
            .draw()?;
        let bar = |(b, &c): (usize, &u64)| {
            let lo = b as f64 * width;
            Rectangle::new(
                [(lo, 0.0), (lo + width, c as f64)],
                CALIBRATED.mix(BAR_ALPHA).filled(),
            )
        };
        chart
            .draw_series(
                calibrated
                    .histogram
                    .iter()
                    .enumerate()
                    .filter(|(_, &c)| c > 0)
                    .map(bar),
            )?
            .label("Calibrated")
            .legend(|(x, y)| {
                Rectangle::new(
                    [(x, y - 5), (x + 14, y + 5)],
                    CALIBRATED.mix(BAR_ALPHA).filled(),
                )
            });
        let steps: Vec<(f64, f64)> = uncalibrated
            .histogram
            .iter()
            .enumerate()
            .flat_map(|(b, &c)| {
                [
                    (b as f64 * width, c as f64),
                    ((b + 1) as f64 * width, c as f64),
                ]
            })
            .collect();
        chart
            .draw_series(DashedLineSeries::new(
                steps,
                DASH_PX,
                DASH_PX / 2,
                UNCALIBRATED.stroke_width(LINE_PX),
            ))?
            .label("Uncalibrated")
            .legend(|(x, y)| dashed_key(x, y, UNCALIBRATED.stroke_width(LINE_PX)));
        for (i, &t) in thresholds.iter().enumerate() {
            let line = chart.draw_series(LineSeries::new(
                [(t, 0.0), (t, most * HEADROOM)],
                THRESHOLD.stroke_width(LINE_PX),
            ))?;
            if i == 0 {
                let name = if thresholds.len() == 1 {
                    format!("Threshold {}", threshold(Some(t)))
                } else {
                    "Per-class thresholds".to_owned()
                };
                line.label(name).legend(|(x, y)| {
                    PathElement::new([(x, y), (x + 14, y)], THRESHOLD.stroke_width(LINE_PX))
                });
            }
            chart.draw_series(std::iter::once(
                EmptyElement::at((t, most * HEADROOM))
                    + Text::new(
                        threshold(Some(t)),
                        (-5, 2),
                        text(TICK_PX, &THRESHOLD).pos(Pos::new(HPos::Right, VPos::Top)),
                    ),
            ))?;
        }
        legend(&mut chart, SeriesLabelPosition::UpperLeft)?;
        Ok(())
    })
}

/// Risk (share of accepted items that are wrong) against coverage (share accepted) for both
/// sets, with the policy's operating points and the target risk.
///
/// # Errors
/// [`ReportError::Chart`] if drawing fails.
pub fn risk_coverage(
    uncalibrated: &SetView,
    calibrated: &SetView,
    target_risk: Option<f64>,
) -> Result<String, ReportError> {
    render("risk–coverage curve", WIDE_W, RISK_COVERAGE_H, |root| {
        let pct = |(c, r): (f64, f64)| (c * 100.0, r * 100.0);
        let highest = calibrated
            .risk_coverage
            .iter()
            .chain(&uncalibrated.risk_coverage)
            .map(|p| p.1 * 100.0)
            .chain(target_risk.map(|t| t * 100.0))
            .fold(MIN_RISK_AXIS_PERCENT, f64::max);
        let top = (highest * HEADROOM).min(100.0);
        let mut chart = ChartBuilder::on(root)
            .margin(MARGIN_PX)
            .x_label_area_size(40)
            .y_label_area_size(64)
            .build_cartesian_2d(0f64..100f64, 0f64..top)?;
        let mut mesh = chart.configure_mesh();
        mesh_style(&mut mesh);
        mesh.x_labels(11)
            .y_labels(6)
            .x_desc("Coverage (% of items accepted, most confident first)")
            .y_desc("Risk (% of accepted items wrong)")
            .x_label_formatter(&|v| format!("{v:.0}%"))
            .y_label_formatter(&|v| format!("{v:.1}%"))
            .draw()?;
        if let Some(t) = target_risk {
            let y = t * 100.0;
            chart
                .draw_series(DashedLineSeries::new(
                    [(0.0, y), (100.0, y)],
                    DASH_PX * 2,
                    DASH_PX,
                    TARGET.stroke_width(LINE_PX),
                ))?
                .label(format!("Target risk {}", percent(t, 1)))
                .legend(|(x, y)| dashed_key(x, y, TARGET.stroke_width(LINE_PX)));
        }
        // Calibrated first, so the dashed uncalibrated curve stays visible where they overlap
        // (a rank-preserving map such as temperature scaling gives the same curve).
        chart
            .draw_series(LineSeries::new(
                calibrated.risk_coverage.iter().copied().map(pct),
                CALIBRATED.stroke_width(LINE_PX),
            ))?
            .label("Calibrated")
            .legend(|(x, y)| {
                PathElement::new([(x, y), (x + 14, y)], CALIBRATED.stroke_width(LINE_PX))
            });
        chart
            .draw_series(DashedLineSeries::new(
                uncalibrated.risk_coverage.iter().copied().map(pct),
                DASH_PX,
                DASH_PX / 2,
                UNCALIBRATED.stroke_width(LINE_PX),
            ))?
            .label("Uncalibrated")
            .legend(|(x, y)| dashed_key(x, y, UNCALIBRATED.stroke_width(LINE_PX)));
        if let (c, Some(r)) = uncalibrated.operating_point {
            chart
                .draw_series(std::iter::once(Circle::new(
                    pct((c, r)),
                    5,
                    UNCALIBRATED.stroke_width(LINE_PX),
                )))?
                .label("Same rule, uncalibrated")
                .legend(|(x, y)| Circle::new((x + 7, y), 5, UNCALIBRATED.stroke_width(LINE_PX)));
        }
        if let (c, Some(r)) = calibrated.operating_point {
            let label = format!(
                "policy: {} accepted, {} wrong",
                percent(c, 1),
                percent(r, 1)
            );
            chart
                .draw_series(std::iter::once(
                    EmptyElement::at(pct((c, r)))
                        + Circle::new((0, 0), 6, THRESHOLD.filled())
                        + Circle::new((0, 0), 6, INK.stroke_width(1))
                        + Text::new(
                            label,
                            (-10, -22),
                            text(TICK_PX, &INK).pos(Pos::new(HPos::Right, VPos::Top)),
                        ),
                ))?
                .label("Operating point of the policy")
                .legend(|(x, y)| Circle::new((x + 7, y), 5, THRESHOLD.filled()));
        }
        legend(&mut chart, SeriesLabelPosition::UpperLeft)?;
        Ok(())
    })
}
