//! The shared-age figure of `braid converge` (PNG and SVG).
//!
//! One panel across ages: for each pair of neighbouring cohorts, the
//! difference of their predicted means (later minus earlier) at each shared
//! age as a dot, with a thick whisker for the pointwise 95% interval and a
//! thin one for the simultaneous interval, in the pair's colour. A pale band
//! marks the equivalence margin ±m around zero and a dark line marks zero,
//! so a reader sees at once whether the intervals sit inside the band.

use std::path::Path;

use plotters::coord::Shift;
use plotters::prelude::*;

use super::figure::{CURVE, GROUND, INK, PALETTE, SIZE, framed, render, styled_legend};
use crate::error::Result;
use crate::linkage::ConvergeReport;

fn draw<DB: DrawingBackend>(root: DrawingArea<DB, Shift>, r: &ConvergeReport) -> std::result::Result<(), String> {
    let e = |x: DrawingAreaErrorKind<DB::ErrorType>| x.to_string();
    root.fill(&GROUND).map_err(e)?;
    let (mut x0, mut x1) = (f64::INFINITY, f64::NEG_INFINITY);
    let (mut y0, mut y1) = (-r.margin, r.margin);
    for d in &r.shared_ages {
        x0 = x0.min(d.age);
        x1 = x1.max(d.age);
        y0 = y0.min(d.lower_simultaneous);
        y1 = y1.max(d.upper_simultaneous);
    }
    if !x0.is_finite() {
        x0 = r.reference_age - 1.0;
        x1 = r.reference_age + 1.0;
    }
    let mut pairs: Vec<(String, String)> = Vec::new();
    for d in &r.shared_ages {
        let key = (d.cohort_a.clone(), d.cohort_b.clone());
        if !pairs.contains(&key) {
            pairs.push(key);
        }
    }
    let px = 0.05 * (x1 - x0).max(1.0);
    let py = 0.08 * (y1 - y0).max(1e-9);
    // Headroom above the bars for the legend (a row of about 18 pixels per
    // entry in a plot about 470 pixels high), so that it hides no bar.
    let share = ((pairs.len() + 3) as f64 * 18.0 + 24.0) / 470.0;
    let y1 = y1 + py + (y1 - y0 + 2.0 * py) * share / (1.0 - share);
    let (x_desc, y_desc) = (
        format!("{} (years)", r.data.age),
        format!("{}: later minus earlier cohort", r.data.outcome),
    );
    let mut chart = framed(
        &root,
        "Cohort differences at shared ages, against the equivalence margin",
        (x0 - px)..(x1 + px),
        (y0 - py)..(y1 + py),
        (&x_desc, &y_desc),
    )?;
    chart
        .draw_series(std::iter::once(Rectangle::new(
            [(x0 - px, -r.margin), (x1 + px, r.margin)],
            CURVE.mix(0.14).filled(),
        )))
        .map_err(e)?
        .label(format!("equivalence margin ±{:.2}", r.margin))
        .legend(|(x, y)| Rectangle::new([(x, y - 6), (x + 22, y + 6)], CURVE.mix(0.14).filled()));
    for (label, width) in [
        ("thick bar: 95% interval at that age", 3),
        ("thin bar: 95% simultaneous over all ages", 1),
    ] {
        chart
            .draw_series(std::iter::empty::<PathElement<(f64, f64)>>())
            .map_err(e)?
            .label(label)
            .legend(move |(x, y)| PathElement::new(vec![(x + 11, y - 7), (x + 11, y + 7)], INK.stroke_width(width)));
    }
    chart
        .draw_series(LineSeries::new([(x0 - px, 0.0), (x1 + px, 0.0)], INK.stroke_width(1)))
        .map_err(e)?;
    for (k, (a, b)) in pairs.iter().enumerate() {
        let color = PALETTE[k % PALETTE.len()];
        let pts: Vec<_> = r
            .shared_ages
            .iter()
            .filter(|d| &d.cohort_a == a && &d.cohort_b == b)
            .collect();
        chart
            .draw_series(pts.iter().map(|d| {
                ErrorBar::new_vertical(
                    d.age,
                    d.lower_simultaneous,
                    d.difference,
                    d.upper_simultaneous,
                    color.mix(0.6).stroke_width(1),
                    6,
                )
            }))
            .map_err(e)?;
        chart
            .draw_series(
                pts.iter()
                    .map(|d| ErrorBar::new_vertical(d.age, d.lower, d.difference, d.upper, color.stroke_width(3), 0)),
            )
            .map_err(e)?;
        chart
            .draw_series(
                pts.iter()
                    .map(|d| Circle::new((d.age, d.difference), 5, color.filled())),
            )
            .map_err(e)?
            .label(format!("cohort {b} − cohort {a}"))
            .legend(move |(x, y)| Circle::new((x + 11, y), 5, color.filled()));
    }
    styled_legend(&mut chart, SeriesLabelPosition::UpperMiddle, 14)?;
    root.present().map_err(e)?;
    Ok(())
}

/// Draw the shared-age figure as PNG and SVG.
///
/// # Errors
/// [`Error::Output`] when a file cannot be drawn or written.
pub fn shared_ages(png: &Path, svg: &Path, r: &ConvergeReport) -> Result<()> {
    render!(png, BitMapBackend, SIZE, |root| draw(root, r))?;
    render!(svg, SVGBackend, SIZE, |root| draw(root, r))
}
