//! Design figures (PNG and SVG): the Lexis diagram and the coverage chart.
//!
//! Both share the look of the trajectory figure: warm off-white ground, one
//! colour per cohort in the order of their youngest age.
//!
//! - **Lexis diagram.** Calendar time across, age up. Each sampled
//!   participant is a lifeline from first to last assessment, with a dot at
//!   each assessment, so each cohort appears as a band of parallel diagonal
//!   segments. Thin grey diagonals mark constant birth years. Without
//!   calendar times in the file the horizontal axis is time since the
//!   participant's first assessment, and the axis title says so.
//! - **Coverage chart.** One row per cohort, one tile per age band, shaded by
//!   the number of observations with the count written in; a dark bar between
//!   neighbouring rows marks their shared ages.

use std::path::Path;

use plotters::coord::Shift;
use plotters::prelude::*;

use super::figure::{CURVE, GROUND, INK, PALETTE, SIZE, render, styled_legend, styled_mesh};
use crate::design::DesignReport;
use crate::design::lexis::LexisData;
use crate::error::Result;

fn bounds(data: &LexisData) -> ((f64, f64), (f64, f64)) {
    let (mut t0, mut t1, mut a0, mut a1) = (f64::INFINITY, f64::NEG_INFINITY, f64::INFINITY, f64::NEG_INFINITY);
    for c in &data.cohorts {
        for l in &c.lines {
            for &(t, a) in l {
                t0 = t0.min(t);
                t1 = t1.max(t);
                a0 = a0.min(a);
                a1 = a1.max(a);
            }
        }
    }
    let pad = |lo: f64, hi: f64| {
        let p = 0.05 * (hi - lo).max(1.0);
        (lo - p, hi + p)
    };
    (pad(t0, t1), pad(a0, a1))
}

/// Widen one axis's range so that a year of age and a year of time take the
/// same length on the page: a lifeline then runs at 45°, as a reader of a
/// Lexis diagram expects. The plotting area is the figure less its margins,
/// caption and label areas, as `draw_lexis` lays them out.
fn equal_scales(((t0, t1), (a0, a1)): ((f64, f64), (f64, f64)), (w, h): (u32, u32)) -> ((f64, f64), (f64, f64)) {
    let pw = (f64::from(w) - 2.0 * 24.0 - 60.0).max(1.0);
    let ph = (f64::from(h) - 2.0 * 24.0 - 52.0 - 40.0).max(1.0);
    let (kx, ky) = ((t1 - t0) / pw, (a1 - a0) / ph);
    if kx < ky {
        let (mid, half) = ((t0 + t1) / 2.0, ky * pw / 2.0);
        ((mid - half, mid + half), (a0, a1))
    } else {
        let (mid, half) = ((a0 + a1) / 2.0, kx * ph / 2.0);
        ((t0, t1), (mid - half, mid + half))
    }
}

fn draw_lexis<DB: DrawingBackend>(root: DrawingArea<DB, Shift>, data: &LexisData) -> std::result::Result<(), String> {
    let e = |x: DrawingAreaErrorKind<DB::ErrorType>| x.to_string();
    root.fill(&GROUND).map_err(e)?;
    let ((t0, t1), (a0, a1)) = equal_scales(bounds(data), root.dim_in_pixel());
    let mut chart = ChartBuilder::on(&root)
        .caption(
            "Lexis diagram: each cohort's assessments along its diagonal",
            ("sans-serif", 22).into_font().color(&INK),
        )
        .margin(24)
        .x_label_area_size(52)
        .y_label_area_size(60)
        .build_cartesian_2d(t0..t1, a0..a1)
        .map_err(e)?;
    styled_mesh(&mut chart, 14)
        .x_desc(data.time_label.clone())
        .y_desc(data.age_label.clone())
        .draw()
        .map_err(e)?;
    if data.calendar {
        // Constant birth year b: age = t − b, drawn every two years.
        let (b0, b1) = ((t0 - a1).floor() as i64, (t1 - a0).ceil() as i64);
        let diagonal = RGBColor(205, 200, 190);
        for b in (b0..=b1).filter(|b| b % 2 == 0) {
            let b = b as f64;
            // The part of age = t − b inside the plot (plotters clamps, not clips).
            let (from, to) = (t0.max(a0 + b), t1.min(a1 + b));
            if from < to {
                chart
                    .draw_series(LineSeries::new(
                        [(from, from - b), (to, to - b)],
                        diagonal.stroke_width(1),
                    ))
                    .map_err(e)?;
            }
        }
        chart
            .draw_series(std::iter::empty::<PathElement<(f64, f64)>>())
            .map_err(e)?
            .label("grey diagonals: one birth year (every second year)")
            .legend(move |(x, y)| PathElement::new(vec![(x, y + 5), (x + 22, y - 5)], diagonal.stroke_width(2)));
    }
    for (k, c) in data.cohorts.iter().enumerate() {
        let color = PALETTE[k % PALETTE.len()];
        for l in &c.lines {
            chart
                .draw_series(LineSeries::new(l.iter().copied(), color.mix(0.45).stroke_width(1)))
                .map_err(e)?;
        }
        let shown: usize = c.lines.len();
        chart
            .draw_series(
                c.lines
                    .iter()
                    .flatten()
                    .map(|&(t, a)| Circle::new((t, a), 3, color.mix(0.85).filled())),
            )
            .map_err(e)?
            .label(format!("cohort {} ({} shown of {})", c.cohort, shown, c.n_participants))
            .legend(move |(x, y)| Circle::new((x + 11, y), 5, color.filled()));
    }
    styled_legend(&mut chart, SeriesLabelPosition::UpperLeft, 14)?;
    root.present().map_err(e)?;
    Ok(())
}

fn draw_coverage<DB: DrawingBackend>(
    root: DrawingArea<DB, Shift>,
    report: &DesignReport,
) -> std::result::Result<(), String> {
    let e = |x: DrawingAreaErrorKind<DB::ErrorType>| x.to_string();
    root.fill(&GROUND).map_err(e)?;
    let mut order: Vec<&crate::design::CohortCoverage> = report.cohorts.iter().collect();
    order.sort_by(|a, b| a.age_min.total_cmp(&b.age_min));
    let k = order.len();
    let row_of = |c: &str| order.iter().position(|o| o.cohort == c);
    let (mut x0, mut x1) = (f64::INFINITY, f64::NEG_INFINITY);
    let mut max_n = 1usize;
    for b in &report.bands {
        x0 = x0.min(b.age_from);
        x1 = x1.max(b.age_to);
        max_n = max_n.max(b.n);
    }
    let labels: Vec<String> = order.iter().map(|c| c.cohort.clone()).collect();
    let mut chart = ChartBuilder::on(&root)
        .caption(
            "Coverage: observations per cohort and age band (bars between rows: shared ages)",
            ("sans-serif", 22).into_font().color(&INK),
        )
        .margin(24)
        .x_label_area_size(52)
        .y_label_area_size(80)
        .build_cartesian_2d(x0..x1, -0.6..(k as f64 - 0.4))
        .map_err(e)?;
    styled_mesh(&mut chart, 14)
        .disable_y_mesh()
        .x_desc(format!("{} (years)", report.data.age))
        .y_desc("cohort")
        .y_labels(k.max(1))
        .y_label_formatter(&|y: &f64| {
            let i = y.round();
            if (y - i).abs() < 1e-6 && i >= 0.0 && (i as usize) < labels.len() {
                labels[i as usize].clone()
            } else {
                String::new()
            }
        })
        .draw()
        .map_err(e)?;
    let width_px = f64::from(SIZE.0 - 130) / (x1 - x0).max(1e-9);
    for b in &report.bands {
        let Some(row) = row_of(&b.cohort) else { continue };
        let y = row as f64;
        let share = b.n as f64 / max_n as f64;
        let fill = CURVE.mix(0.12 + 0.78 * share);
        chart
            .draw_series(std::iter::once(Rectangle::new(
                [(b.age_from, y - 0.38), (b.age_to, y + 0.38)],
                fill.filled(),
            )))
            .map_err(e)?;
        if (b.age_to - b.age_from) * width_px >= 34.0 {
            let ink = if share > 0.5 { GROUND } else { INK };
            chart
                .draw_series(std::iter::once(Text::new(
                    b.n.to_string(),
                    ((b.age_from + b.age_to) / 2.0, y),
                    ("sans-serif", 13)
                        .into_font()
                        .color(&ink)
                        .pos(plotters::style::text_anchor::Pos::new(
                            plotters::style::text_anchor::HPos::Center,
                            plotters::style::text_anchor::VPos::Center,
                        )),
                )))
                .map_err(e)?;
        }
    }
    for o in report.overlap.iter().filter(|o| o.linked) {
        let (Some(a), Some(b)) = (row_of(&o.cohort_a), row_of(&o.cohort_b)) else {
            continue;
        };
        let y = (a as f64 + b as f64) / 2.0;
        chart
            .draw_series(std::iter::once(Rectangle::new(
                [(o.age_from, y - 0.05), (o.age_to, y + 0.05)],
                INK.mix(if o.thin { 0.35 } else { 0.85 }).filled(),
            )))
            .map_err(e)?;
    }
    root.present().map_err(e)?;
    Ok(())
}

/// Draw the Lexis diagram as PNG and SVG.
///
/// # Errors
/// [`Error::Output`] when a file cannot be drawn or written.
pub fn lexis(png: &Path, svg: &Path, data: &LexisData) -> Result<()> {
    render!(png, BitMapBackend, SIZE, |root| draw_lexis(root, data))?;
    render!(svg, SVGBackend, SIZE, |root| draw_lexis(root, data))
}

/// Draw the coverage chart as PNG and SVG.
///
/// # Errors
/// [`Error::Output`] when a file cannot be drawn or written.
pub fn coverage(png: &Path, svg: &Path, report: &DesignReport) -> Result<()> {
    render!(png, BitMapBackend, SIZE, |root| draw_coverage(root, report))?;
    render!(svg, SVGBackend, SIZE, |root| draw_coverage(root, report))
}
