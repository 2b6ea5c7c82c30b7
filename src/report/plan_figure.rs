//! The figures of `braid plan` (PNG and SVG): power against participants
//! per cohort, one panel per power target and one colour per design (the
//! expected-information line, simulated points with ±2 Monte Carlo SE
//! whiskers, the required power dashed); and the expected 95% half-width of
//! the mean across age for the recommended design, with the target.

use std::path::Path;

use plotters::coord::Shift;
use plotters::prelude::*;

use super::figure::{CURVE, GROUND, INK, PALETTE, SIZE, framed, render, styled_legend};
use crate::error::Result;
use crate::plan::{DesignResult, PlanReport};

fn draw_power<DB: DrawingBackend>(root: DrawingArea<DB, Shift>, r: &PlanReport) -> std::result::Result<(), String> {
    let e = |x: DrawingAreaErrorKind<DB::ErrorType>| x.to_string();
    root.fill(&GROUND).map_err(e)?;
    let keys: Vec<(&str, f64)> = r.plan.targets.powers();
    let panels = root.split_evenly((1, keys.len().max(1)));
    // The x range: up to 2.5 × the largest chosen n, within what was probed.
    let chosen = r.designs.iter().map(|d| d.n_per_cohort).max().unwrap_or(10) as f64;
    let probed_max = r
        .designs
        .iter()
        .flat_map(|d| d.probes.iter().map(|p| p.n))
        .max()
        .unwrap_or(10) as f64;
    let x_hi = (2.5 * chosen).min(probed_max).max(chosen * 1.1);
    for (panel, (key, required)) in panels.iter().zip(&keys) {
        let caption = format!("Power: {}", key.replace('_', " "));
        let mut chart = framed(
            panel,
            &caption,
            0.0..x_hi,
            0.0..1.05,
            ("participants per cohort", "power"),
        )?;
        chart
            .draw_series(DashedLineSeries::new(
                [(0.0, *required), (x_hi, *required)],
                6,
                4,
                INK.mix(0.6).stroke_width(1),
            ))
            .map_err(e)?
            .label(format!("required {required}"))
            .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 22, y)], INK.mix(0.6).stroke_width(1)));
        for (k, d) in r.designs.iter().enumerate() {
            let color = PALETTE[k % PALETTE.len()];
            draw_design(&mut chart, d, key, x_hi, color).map_err(e)?;
        }
        styled_legend(&mut chart, SeriesLabelPosition::LowerRight, 13)?;
    }
    root.present().map_err(e)?;
    Ok(())
}

type Chart<'a, DB> = plotters::chart::ChartContext<'a, DB, super::figure::Plane>;

fn draw_design<DB: DrawingBackend>(
    chart: &mut Chart<'_, DB>,
    d: &DesignResult,
    key: &str,
    x_hi: f64,
    color: RGBColor,
) -> std::result::Result<(), DrawingAreaErrorKind<DB::ErrorType>> {
    let line: Vec<(f64, f64)> = d
        .probes
        .iter()
        .filter(|p| (p.n as f64) <= x_hi)
        .filter_map(|p| p.power.get(key).and_then(|v| v[0]).map(|v| (p.n as f64, v)))
        .collect();
    chart
        .draw_series(LineSeries::new(line, color.stroke_width(2)))?
        .label(d.name.clone())
        .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 22, y)], color.stroke_width(2)));
    let points: Vec<(f64, f64, f64)> = d
        .probes
        .iter()
        .filter(|p| (p.n as f64) <= x_hi)
        .filter_map(|p| {
            let v = p.power.get(key)?;
            Some((p.n as f64, v[1]?, v[2]?))
        })
        .collect();
    chart.draw_series(points.iter().map(|&(x, y, se)| {
        ErrorBar::new_vertical(
            x,
            (y - 2.0 * se).max(0.0),
            y,
            (y + 2.0 * se).min(1.0),
            color.stroke_width(2),
            8,
        )
    }))?;
    chart.draw_series(points.iter().map(|&(x, y, _)| Circle::new((x, y), 5, color.filled())))?;
    Ok(())
}

fn draw_precision<DB: DrawingBackend>(
    root: DrawingArea<DB, Shift>,
    r: &PlanReport,
    d: &DesignResult,
) -> std::result::Result<(), String> {
    let e = |x: DrawingAreaErrorKind<DB::ErrorType>| x.to_string();
    root.fill(&GROUND).map_err(e)?;
    let curve = &d.half_width_curve;
    let (x_lo, x_hi) = (curve[0][0], curve[curve.len() - 1][0]);
    let target = r.plan.targets.half_width.as_ref().map(|h| h.at_most);
    let y_hi = curve.iter().map(|p| p[1]).chain(target).fold(0.0_f64, f64::max) * 1.15;
    let caption = format!(
        "Expected 95% half-width of the mean: \"{}\", {} per cohort",
        d.name, d.n_per_cohort
    );
    let mut chart = framed(
        &root,
        &caption,
        x_lo..x_hi,
        0.0..y_hi,
        ("age (years)", "half-width (outcome units)"),
    )?;
    chart
        .draw_series(LineSeries::new(
            curve.iter().map(|p| (p[0], p[1])),
            CURVE.stroke_width(3),
        ))
        .map_err(e)?
        .label("expected half-width")
        .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 22, y)], CURVE.stroke_width(3)));
    if let Some(h) = &r.plan.targets.half_width {
        chart
            .draw_series(DashedLineSeries::new(
                [(x_lo, h.at_most), (x_hi, h.at_most)],
                6,
                4,
                INK.mix(0.6).stroke_width(1),
            ))
            .map_err(e)?
            .label(format!("at most {}", super::figure::tick(&h.at_most)))
            .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 22, y)], INK.mix(0.6).stroke_width(1)));
        let marks: Vec<(f64, f64)> = d.precision.iter().map(|p| (p.age, p.information)).collect();
        chart
            .draw_series(marks.iter().map(|&(x, y)| Circle::new((x, y), 6, PALETTE[0].filled())))
            .map_err(e)?
            .label("target ages")
            .legend(|(x, y)| Circle::new((x + 11, y), 6, PALETTE[0].filled()));
    }
    styled_legend(&mut chart, SeriesLabelPosition::UpperMiddle, 14)?;
    root.present().map_err(e)?;
    Ok(())
}

/// The design whose precision is drawn: the recommended one, else the first.
fn shown(r: &PlanReport) -> Option<&DesignResult> {
    r.recommended
        .as_ref()
        .and_then(|name| r.designs.iter().find(|d| &d.name == name))
        .or_else(|| r.designs.first())
        .filter(|d| d.half_width_curve.len() > 1)
}

/// Draw the plan's figures into `dir`; returns the file names.
///
/// # Errors
/// [`crate::Error::Output`] when a file cannot be drawn or written.
pub fn figures(dir: &Path, r: &PlanReport) -> Result<Vec<String>> {
    let mut names = Vec::new();
    if !r.plan.targets.powers().is_empty() {
        let size = (SIZE.0.max(560 * r.plan.targets.powers().len() as u32), SIZE.1);
        let (png, svg) = (dir.join("plan_power.png"), dir.join("plan_power.svg"));
        render!(&png, BitMapBackend, size, |root| draw_power(root, r))?;
        render!(&svg, SVGBackend, size, |root| draw_power(root, r))?;
        names.extend(["plan_power.png".to_string(), "plan_power.svg".to_string()]);
    }
    if let Some(d) = shown(r) {
        let (png, svg) = (dir.join("plan_precision.png"), dir.join("plan_precision.svg"));
        render!(&png, BitMapBackend, SIZE, |root| draw_precision(root, r, d))?;
        render!(&svg, SVGBackend, SIZE, |root| draw_precision(root, r, d))?;
        names.extend(["plan_precision.png".to_string(), "plan_precision.svg".to_string()]);
    }
    Ok(names)
}
