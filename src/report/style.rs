//! The report's look: the Okabe–Ito colours, fonts and chart sizes, shared by the charts and the
//! page's CSS so both speak the same visual language, and the canvas, mesh and legend every
//! chart draws with.

use super::ReportError;
use plotters::chart::MeshStyle;
use plotters::coord::ranged1d::{Ranged, ValueFormatter};
use plotters::coord::{CoordTranslate, Shift};
use plotters::prelude::*;

/// Okabe–Ito blue: the calibrated series.
pub const CALIBRATED: RGBColor = RGBColor(0x00, 0x72, 0xB2);
/// Okabe–Ito orange: the uncalibrated series.
pub const UNCALIBRATED: RGBColor = RGBColor(0xE6, 0x9F, 0x00);
/// Okabe–Ito vermillion: thresholds and the policy's operating point.
pub const THRESHOLD: RGBColor = RGBColor(0xD5, 0x5E, 0x00);
/// Okabe–Ito bluish green: the target.
pub const TARGET: RGBColor = RGBColor(0x00, 0x9E, 0x73);
/// Near-black for text, axes and the diagonal.
pub const INK: RGBColor = RGBColor(0x22, 0x22, 0x22);
/// Light grey for grid lines.
pub const GRID: RGBColor = RGBColor(0xE4, 0xE4, 0xE4);
/// Mid grey for axis lines and secondary text.
pub const AXIS: RGBColor = RGBColor(0x88, 0x88, 0x88);

/// Font family of chart text (the reader's own sans-serif; nothing is embedded or fetched).
pub const FONT: &str = "sans-serif";
/// Tick label size, pixels.
pub const TICK_PX: u32 = 12;
/// Axis title and legend size, pixels.
pub const LABEL_PX: u32 = 13;

/// Reliability chart (diagram plus count panel) width, pixels.
pub const RELIABILITY_W: u32 = 440;
/// Reliability diagram panel height, pixels.
pub const RELIABILITY_DIAGRAM_H: u32 = 360;
/// Count panel height under each reliability diagram, pixels.
pub const RELIABILITY_COUNTS_H: u32 = 150;
/// Wide charts (confidence histogram, risk–coverage) width, pixels.
pub const WIDE_W: u32 = 880;
/// Confidence histogram height, pixels.
pub const HISTOGRAM_H: u32 = 300;
/// Risk–coverage chart height, pixels.
pub const RISK_COVERAGE_H: u32 = 380;

/// Fill opacity of bars.
pub const BAR_ALPHA: f64 = 0.55;
/// Stroke width of the data lines, pixels.
pub const LINE_PX: u32 = 2;
/// Dash and gap length of the uncalibrated and reference lines, pixels.
pub const DASH_PX: u32 = 6;

/// `#rrggbb` of a colour, for the page's CSS.
pub fn hex(c: RGBColor) -> String {
    format!("#{:02x}{:02x}{:02x}", c.0, c.1, c.2)
}

/// A drawing area on the SVG backend.
pub type Area<'a> = DrawingArea<SVGBackend<'a>, Shift>;
/// What a drawing step returns; turned into [`ReportError::Chart`] at the edge.
pub type Drawn = Result<(), Box<dyn std::error::Error>>;

/// plotters writes `font-size = size / 1.24` into the SVG; this undoes it so the sizes in
/// this file are the pixel sizes on the page.
const FONT_SCALE: f64 = 1.24;
/// A text style of `px` pixels on the page.
pub fn text(px: u32, colour: &'static RGBColor) -> TextStyle<'static> {
    TextStyle::from((FONT, f64::from(px) * FONT_SCALE).into_font()).color(colour)
}

/// Draws with `draw` on a `w`×`h` SVG canvas and returns the SVG document.
pub fn render(
    chart: &'static str,
    w: u32,
    h: u32,
    draw: impl FnOnce(&Area<'_>) -> Drawn,
) -> Result<String, ReportError> {
    let fail = |e: &dyn std::fmt::Display| ReportError::Chart {
        chart,
        message: e.to_string(),
    };
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (w, h)).into_drawing_area();
        root.fill(&WHITE).map_err(|e| fail(&e))?;
        draw(&root).map_err(|e| fail(&e))?;
        root.present().map_err(|e| fail(&e))?;
    }
    Ok(svg)
}

/// Light grid, grey axes, dark labels: the mesh every chart shares.
pub fn mesh_style<X, Y>(mesh: &mut MeshStyle<'_, '_, X, Y, SVGBackend<'_>>)
where
    X: Ranged<ValueType = f64> + ValueFormatter<f64>,
    Y: Ranged<ValueType = f64> + ValueFormatter<f64>,
{
    mesh.bold_line_style(GRID)
        .light_line_style(TRANSPARENT)
        .axis_style(AXIS)
        .label_style(text(TICK_PX, &INK))
        .axis_desc_style(text(LABEL_PX, &INK));
}

/// Legend box in the given corner.
pub fn legend<'a, DB: DrawingBackend + 'a, CT: CoordTranslate>(
    chart: &mut ChartContext<'a, DB, CT>,
    at: SeriesLabelPosition,
) -> Result<(), DrawingAreaErrorKind<DB::ErrorType>> {
    chart
        .configure_series_labels()
        .position(at)
        .margin(8)
        .label_font(text(TICK_PX, &INK))
        .background_style(WHITE.mix(0.9))
        .border_style(AXIS)
        .draw()
}
