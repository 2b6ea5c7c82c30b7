//! Trajectory figures (PNG and SVG) drawn with plotters.
//!
//! The look is braid's own: a warm off-white ground, the stitched curve in a
//! deep teal over a pale band for its 95% interval, each cohort's observed
//! wave means as coloured dots with ±1.96 SE whiskers so the reader sees how
//! the segments line up, and optional thin grey individual paths underneath.

use std::path::Path;
use std::sync::Once;

use plotters::chart::{ChartContext, MeshStyle};
use plotters::coord::CoordTranslate;
use plotters::coord::Shift;
use plotters::coord::types::RangedCoordf64;

/// The coordinate system of every braid figure.
pub(crate) type Plane = Cartesian2d<RangedCoordf64, RangedCoordf64>;
use plotters::prelude::*;
use plotters::style::FontStyle;

use super::FitReport;
use crate::error::Result;

/// One participant's observed path: (age, outcome) pairs in age order.
pub type Line = Vec<(f64, f64)>;

static FONT: Once = Once::new();
static FONT_BYTES: &[u8] = include_bytes!("font/DejaVuSans.ttf");

/// Draw one figure into `path` with a plotters backend at `size` pixels, or
/// say why it could not be drawn: `render!(path, BitMapBackend, SIZE, |root|
/// draw(root, report))`.
macro_rules! render {
    ($path:expr, $backend:ident, $size:expr, $draw:expr) => {{
        $crate::report::figure::register_font();
        let root = $backend::new($path, $size).into_drawing_area();
        $draw(root).map_err(|m: String| $crate::error::Error::Output {
            path: $path.to_path_buf(),
            message: format!("cannot draw the figure ({m})"),
        })
    }};
}
pub(crate) use render;

pub(crate) fn register_font() {
    FONT.call_once(|| {
        // The embedded font is valid; a failure here would leave text blank, not crash.
        let _ = plotters::style::register_font("sans-serif", FontStyle::Normal, FONT_BYTES);
    });
}

pub(crate) const GROUND: RGBColor = RGBColor(252, 250, 245);
pub(crate) const INK: RGBColor = RGBColor(40, 40, 48);
pub(crate) const CURVE: RGBColor = RGBColor(0, 95, 105);
/// Group colours: the palette of Okabe & Ito (2008, *Color Universal
/// Design*), told apart by readers with the common colour-vision
/// deficiencies; yellow comes last, as it is faint on the light ground.
pub(crate) const PALETTE: [RGBColor; 8] = [
    RGBColor(0, 114, 178),
    RGBColor(230, 159, 0),
    RGBColor(0, 158, 115),
    RGBColor(213, 94, 0),
    RGBColor(204, 121, 167),
    RGBColor(86, 180, 233),
    RGBColor(0, 0, 0),
    RGBColor(240, 228, 66),
];

/// Size of the figures in pixels.
pub const SIZE: (u32, u32) = (1000, 640);

/// braid's mesh: a pale grid, muted axes and ink labels at `label` points
/// (axis titles two points larger). Callers add titles and formatters.
pub(crate) fn styled_mesh<'a, 'b, DB: DrawingBackend>(
    chart: &'b mut ChartContext<'a, DB, Plane>,
    label: u32,
) -> MeshStyle<'a, 'b, RangedCoordf64, RangedCoordf64, DB> {
    let mut mesh = chart.configure_mesh();
    mesh.x_label_formatter(&tick)
        .y_label_formatter(&tick)
        .axis_desc_style(("sans-serif", label + 2).into_font().color(&INK))
        .label_style(("sans-serif", label).into_font().color(&INK))
        .bold_line_style(RGBColor(232, 228, 218))
        .light_line_style(GROUND)
        .axis_style(RGBColor(150, 145, 135));
    mesh
}

/// A tick label with no needless decimals: 12 rather than 12.0, 2031.5 as
/// is, and never "-0".
pub(crate) fn tick(v: &f64) -> String {
    crate::stats::plain_number(*v)
}

/// A one-panel chart in braid's frame: the caption, margins and label areas
/// of the full-size figures, and the mesh with its two axis titles drawn.
pub(crate) fn framed<'a, DB: DrawingBackend>(
    root: &'a DrawingArea<DB, Shift>,
    caption: &str,
    x: std::ops::Range<f64>,
    y: std::ops::Range<f64>,
    (x_desc, y_desc): (&str, &str),
) -> std::result::Result<ChartContext<'a, DB, Plane>, String> {
    let e = |x: DrawingAreaErrorKind<DB::ErrorType>| x.to_string();
    let mut chart = ChartBuilder::on(root)
        .caption(caption, ("sans-serif", 22).into_font().color(&INK))
        .margin(24)
        .x_label_area_size(52)
        .y_label_area_size(68)
        .build_cartesian_2d(x, y)
        .map_err(e)?;
    styled_mesh(&mut chart, 14)
        .x_desc(x_desc)
        .y_desc(y_desc)
        .draw()
        .map_err(e)?;
    Ok(chart)
}

/// braid's legend box at `position`, with text of `size` points.
pub(crate) fn styled_legend<'a, DB, CT>(
    chart: &mut ChartContext<'a, DB, CT>,
    position: SeriesLabelPosition,
    size: u32,
) -> std::result::Result<(), String>
where
    DB: DrawingBackend + 'a,
    CT: CoordTranslate,
{
    chart
        .configure_series_labels()
        .position(position)
        .background_style(GROUND.mix(0.9))
        .border_style(RGBColor(200, 195, 185))
        .label_font(("sans-serif", size).into_font().color(&INK))
        .draw()
        .map_err(|e| e.to_string())
}

fn draw<DB: DrawingBackend>(
    root: DrawingArea<DB, Shift>,
    report: &FitReport,
    lines: &[Line],
) -> std::result::Result<(), String> {
    let e = |x: DrawingAreaErrorKind<DB::ErrorType>| x.to_string();
    root.fill(&GROUND).map_err(e)?;
    let t = &report.trajectory;
    let (x0, x1) = (report.data.age_min, report.data.age_max);
    let pad_x = 0.03 * (x1 - x0);
    let mut lo = f64::INFINITY;
    let mut hi = f64::NEG_INFINITY;
    for p in &t.points {
        lo = lo.min(p.lower);
        hi = hi.max(p.upper);
    }
    for c in &report.cells {
        let w = if c.se.is_finite() { 1.96 * c.se } else { 0.0 };
        lo = lo.min(c.mean - w);
        hi = hi.max(c.mean + w);
    }
    for l in lines {
        for &(_, y) in l {
            lo = lo.min(y);
            hi = hi.max(y);
        }
    }
    let pad_y = 0.06 * (hi - lo).max(1e-9);
    let title = format!(
        "{} by {}: one trajectory stitched from {} cohort segments",
        report.data.outcome,
        report.data.age,
        cohort_count(report)
    );
    let mut chart = ChartBuilder::on(&root)
        .caption(title, ("sans-serif", 22).into_font().color(&INK))
        .margin(24)
        .x_label_area_size(52)
        .y_label_area_size(68)
        .build_cartesian_2d((x0 - pad_x)..(x1 + pad_x), (lo - pad_y)..(hi + pad_y))
        .map_err(e)?;
    styled_mesh(&mut chart, 14)
        .x_desc(format!("{} (years)", report.data.age))
        .y_desc(report.data.outcome.clone())
        .draw()
        .map_err(e)?;
    for l in lines {
        chart
            .draw_series(LineSeries::new(
                l.iter().copied(),
                RGBColor(170, 170, 170).mix(0.5).stroke_width(1),
            ))
            .map_err(e)?;
    }
    let mut band: Vec<(f64, f64)> = t.points.iter().map(|p| (p.age, p.upper)).collect();
    band.extend(t.points.iter().rev().map(|p| (p.age, p.lower)));
    chart
        .draw_series(std::iter::once(Polygon::new(band, CURVE.mix(0.18).filled())))
        .map_err(e)?
        .label("95% band of the mean")
        .legend(|(x, y)| Rectangle::new([(x, y - 6), (x + 22, y + 6)], CURVE.mix(0.18).filled()));
    // The mean curve as a filled ribbon of constant width on the page: a
    // bitmap's thick polyline notches at every joint, which makes a smooth
    // curve look wobbly.
    let (w_px, h_px) = chart.plotting_area().dim_in_pixel();
    let (x_span, y_span) = ((x1 - x0) + 2.0 * pad_x, (hi - lo) + 2.0 * pad_y);
    let ribbon = curve_ribbon(
        &t.points.iter().map(|p| (p.age, p.mean)).collect::<Vec<_>>(),
        f64::from(h_px.max(1)) / y_span,
        f64::from(w_px.max(1)) / x_span,
        CURVE_WIDTH_PX,
    );
    chart
        .draw_series(std::iter::once(Polygon::new(ribbon, CURVE.filled())))
        .map_err(e)?
        .label("stitched mean trajectory")
        .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 22, y)], CURVE.stroke_width(3)));
    let mut cohorts: Vec<&str> = Vec::new();
    for c in &report.cells {
        if !cohorts.contains(&c.cohort.as_str()) {
            cohorts.push(&c.cohort);
        }
    }
    if !lines.is_empty() {
        let n = lines.len();
        chart
            .draw_series(std::iter::empty::<PathElement<(f64, f64)>>())
            .map_err(e)?
            .label(format!("grey lines: {n} participants' observed paths"))
            .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 22, y)], RGBColor(170, 170, 170)));
    }
    // One legend line says what the dots are; each cohort's line names it only.
    chart
        .draw_series(std::iter::empty::<Circle<(f64, f64), i32>>())
        .map_err(e)?
        .label("dots: a cohort's wave means ±1.96 SE")
        .legend(|(x, y)| Circle::new((x + 11, y), 5, INK.filled()));
    for (k, name) in cohorts.iter().enumerate() {
        let color = PALETTE[k % PALETTE.len()];
        let cells: Vec<_> = report.cells.iter().filter(|c| c.cohort == *name).collect();
        chart
            .draw_series(cells.iter().filter(|c| c.se.is_finite()).map(|c| {
                ErrorBar::new_vertical(
                    c.age,
                    c.mean - 1.96 * c.se,
                    c.mean,
                    c.mean + 1.96 * c.se,
                    color.stroke_width(2),
                    8,
                )
            }))
            .map_err(e)?;
        chart
            .draw_series(LineSeries::new(
                cells.iter().map(|c| (c.age, c.mean)),
                color.mix(0.6).stroke_width(1),
            ))
            .map_err(e)?;
        let label = if name.parse::<f64>().is_ok() {
            format!("cohort {name}")
        } else {
            name.to_string()
        };
        chart
            .draw_series(cells.iter().map(|c| Circle::new((c.age, c.mean), 5, color.filled())))
            .map_err(e)?
            .label(label)
            .legend(move |(x, y)| Circle::new((x + 11, y), 5, color.filled()));
    }
    styled_legend(&mut chart, SeriesLabelPosition::LowerRight, 14)?;
    root.present().map_err(e)?;
    Ok(())
}

/// The width of the mean curve on the page, in pixels.
const CURVE_WIDTH_PX: f64 = 3.0;

/// The outline of a curve drawn `width` pixels wide: the points shifted up
/// and down by half the width along y, divided by the cosine of the curve's
/// slope on the page (`px_y`, `px_x`: pixels per unit of y and of x) so
/// that steep stretches are as wide as flat ones.
fn curve_ribbon(points: &[(f64, f64)], px_y: f64, px_x: f64, width: f64) -> Vec<(f64, f64)> {
    let n = points.len();
    let half = |i: usize| -> f64 {
        let (a, b) = (points[i.saturating_sub(1)], points[(i + 1).min(n - 1)]);
        let slope = if b.0 > a.0 {
            (b.1 - a.1) / (b.0 - a.0) * px_y / px_x
        } else {
            0.0
        };
        0.5 * width * (1.0 + slope * slope).sqrt() / px_y
    };
    let mut outline: Vec<(f64, f64)> = (0..n).map(|i| (points[i].0, points[i].1 + half(i))).collect();
    outline.extend((0..n).rev().map(|i| (points[i].0, points[i].1 - half(i))));
    outline
}

fn cohort_count(report: &FitReport) -> usize {
    let mut seen: Vec<&str> = Vec::new();
    for c in &report.cells {
        if !seen.contains(&c.cohort.as_str()) {
            seen.push(&c.cohort);
        }
    }
    seen.len()
}

/// Draw the trajectory figure as PNG.
///
/// # Errors
/// [`Error::Output`] when the file cannot be drawn or written.
pub fn trajectory_png(path: &Path, report: &FitReport, lines: &[Line]) -> Result<()> {
    render!(path, BitMapBackend, SIZE, |root| draw(root, report, lines))
}

/// Draw the trajectory figure as SVG.
///
/// # Errors
/// [`Error::Output`] when the file cannot be drawn or written.
pub fn trajectory_svg(path: &Path, report: &FitReport, lines: &[Line]) -> Result<()> {
    render!(path, SVGBackend, SIZE, |root| draw(root, report, lines))
}

#[cfg(test)]
mod tick_tests {
    // Integer ticks carry no decimals, others keep theirs, and no "-0".
    #[test]
    fn ticks_carry_no_needless_decimals() {
        assert_eq!(super::tick(&12.0), "12");
        assert_eq!(super::tick(&2031.5), "2031.5");
        assert_eq!(super::tick(&-0.0), "0");
        assert_eq!(super::tick(&-1e-9), "0");
        assert_eq!(super::tick(&0.25), "0.25");
    }
}

#[cfg(test)]
mod ribbon_tests {
    use super::curve_ribbon;

    // Closed-form geometry: a flat curve is `width` pixels tall; a line at
    // 45° on the page has a vertical extent of width·√2, so that its width
    // across the line is `width`; the outline goes out along the top and
    // back along the bottom.
    #[test]
    fn the_ribbon_is_as_wide_on_the_page_at_every_slope() {
        let (px_y, px_x) = (40.0, 20.0);
        let flat = curve_ribbon(&[(0.0, 1.0), (1.0, 1.0), (2.0, 1.0)], px_y, px_x, 3.0);
        assert_eq!(flat.len(), 6);
        assert!(((flat[1].1 - flat[4].1) * px_y - 3.0).abs() < 1e-12);
        // y rises 0.5 per unit x: 20 px up for 20 px across.
        let steep = curve_ribbon(&[(0.0, 0.0), (1.0, 0.5), (2.0, 1.0)], px_y, px_x, 3.0);
        assert!(((steep[1].1 - steep[4].1) * px_y - 3.0 * 2f64.sqrt()).abs() < 1e-12);
        assert_eq!(
            steep.iter().map(|p| p.0).collect::<Vec<_>>(),
            [0.0, 1.0, 2.0, 2.0, 1.0, 0.0]
        );
    }
}
