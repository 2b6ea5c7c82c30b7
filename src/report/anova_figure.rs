//! The figure of `braid anova` (PNG and SVG): each cohort's wave means on an
//! age axis, at the cell's mean exact age, with a ±1.96 SE whisker and a line
//! through the cohort's waves, one colour per cohort. Drawn on age rather
//! than on wave, so the reader sees the cohort segments that the ANOVA's
//! wave factor lays on top of each other.

use std::path::Path;

use plotters::coord::Shift;
use plotters::prelude::*;

use super::figure::{GROUND, PALETTE, SIZE, framed, render, styled_legend};
use crate::anova::AnovaReport;
use crate::error::Result;

fn draw<DB: DrawingBackend>(root: DrawingArea<DB, Shift>, r: &AnovaReport) -> std::result::Result<(), String> {
    let e = |x: DrawingAreaErrorKind<DB::ErrorType>| x.to_string();
    root.fill(&GROUND).map_err(e)?;
    let (mut x0, mut x1, mut y0, mut y1) = (f64::INFINITY, f64::NEG_INFINITY, f64::INFINITY, f64::NEG_INFINITY);
    for g in 0..r.cohorts.len() {
        for j in 0..r.waves.len() {
            let (m, se, a) = (r.means[g][j], r.mean_se[g][j], r.mean_ages[g][j]);
            x0 = x0.min(a);
            x1 = x1.max(a);
            y0 = y0.min(m - 1.96 * se);
            y1 = y1.max(m + 1.96 * se);
        }
    }
    let px = 0.05 * (x1 - x0).max(1.0);
    let py = 0.08 * (y1 - y0).max(1e-9);
    // Headroom for the legend (about 18 pixels an entry in 470).
    let share = ((r.cohorts.len() + 1) as f64 * 18.0 + 24.0) / 470.0;
    let y1 = y1 + py + (y1 - y0 + 2.0 * py) * share / (1.0 - share);
    let (x_desc, y_desc) = (
        format!("{} (years)", r.data.age),
        format!("mean {}, ±1.96 SE", r.data.outcome),
    );
    let mut chart = framed(
        &root,
        "Cohort × wave means (complete cases) at each cell's mean age",
        (x0 - px)..(x1 + px),
        (y0 - py)..(y1 + py),
        (&x_desc, &y_desc),
    )?;
    for (g, cohort) in r.cohorts.iter().enumerate() {
        let color = PALETTE[g % PALETTE.len()];
        let pts: Vec<(f64, f64, f64)> = (0..r.waves.len())
            .map(|j| (r.mean_ages[g][j], r.means[g][j], r.mean_se[g][j]))
            .collect();
        chart
            .draw_series(LineSeries::new(pts.iter().map(|p| (p.0, p.1)), color.stroke_width(2)))
            .map_err(e)?;
        chart
            .draw_series(pts.iter().map(|&(a, m, se)| {
                ErrorBar::new_vertical(a, m - 1.96 * se, m, m + 1.96 * se, color.stroke_width(2), 8)
            }))
            .map_err(e)?;
        chart
            .draw_series(pts.iter().map(|&(a, m, _)| Circle::new((a, m), 5, color.filled())))
            .map_err(e)?
            .label(format!("cohort {cohort} (n = {})", r.cohort_sizes[g]))
            .legend(move |(x, y)| Circle::new((x + 11, y), 5, color.filled()));
    }
    styled_legend(&mut chart, SeriesLabelPosition::UpperLeft, 14)?;
    root.present().map_err(e)?;
    Ok(())
}

/// Draw the cohort × wave means figure as PNG and SVG.
///
/// # Errors
/// [`Error::Output`] when a file cannot be drawn or written.
pub fn means(png: &Path, svg: &Path, r: &AnovaReport) -> Result<()> {
    render!(png, BitMapBackend, SIZE, |root| draw(root, r))?;
    render!(svg, SVGBackend, SIZE, |root| draw(root, r))
}

/// The cohort × wave means as CSV: cohort, wave, n, mean, se, mean_age.
///
/// # Errors
/// [`Error::Output`] when the file cannot be written.
pub fn means_csv(path: &Path, r: &AnovaReport) -> Result<()> {
    let mut s = String::from("cohort,wave,n,mean,se,mean_age\n");
    for (g, cohort) in r.cohorts.iter().enumerate() {
        for (j, wave) in r.waves.iter().enumerate() {
            s.push_str(&format!(
                "{cohort},{wave},{},{},{},{}\n",
                r.cohort_sizes[g], r.means[g][j], r.mean_se[g][j], r.mean_ages[g][j]
            ));
        }
    }
    super::write_text(path, &s)
}
