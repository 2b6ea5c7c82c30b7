//! The figure of `braid score` (PNG and SVG): Cronbach's α at each wave with
//! Feldt's 95% interval as a whisker and ω as an open ring beside it, for
//! all respondents (dark) and for each cohort (one colour each, set slightly
//! apart), over a dotted line at the common rule of thumb of .70.

use std::path::Path;

use plotters::coord::Shift;
use plotters::prelude::*;

use super::figure::{GROUND, INK, PALETTE, SIZE, render, styled_legend, styled_mesh};
use crate::error::Result;
use crate::score::{ALPHA_FLAG, Reliability, ScoreReport};

/// One group's points: its name, colour, and (x, entry) at each wave.
type Series<'a> = (String, RGBColor, Vec<(f64, &'a Reliability)>);

fn draw<DB: DrawingBackend>(root: DrawingArea<DB, Shift>, r: &ScoreReport) -> std::result::Result<(), String> {
    let e = |x: DrawingAreaErrorKind<DB::ErrorType>| x.to_string();
    root.fill(&GROUND).map_err(e)?;
    let waves: Vec<String> = r.per_wave.iter().filter_map(|w| w.wave.clone()).collect();
    let mut cohorts: Vec<String> = Vec::new();
    for c in r.per_cohort.iter().filter_map(|c| c.cohort.clone()) {
        cohorts.push(c);
    }
    let all = |rel: &Reliability| [rel.alpha_lower, rel.alpha_upper, rel.omega.unwrap_or(rel.alpha)];
    let (mut lo, mut hi) = (ALPHA_FLAG, ALPHA_FLAG);
    for v in r
        .per_wave
        .iter()
        .chain(&r.per_cohort_wave)
        .flat_map(all)
        .filter(|v| v.is_finite())
    {
        lo = lo.min(v);
        hi = hi.max(v);
    }
    let pad = 0.08 * (hi - lo).max(0.05);
    // Headroom for the legend.
    let hi = (hi + pad + (hi - lo) * 0.35).min(1.0 + pad);
    let n = waves.len() as f64;
    let formatter = |x: &f64| {
        let i = x.round();
        if (x - i).abs() < 1e-6 && i >= 0.0 && (i as usize) < waves.len() {
            format!("wave {}", waves[i as usize])
        } else {
            String::new()
        }
    };
    let mut chart = ChartBuilder::on(&root)
        .caption(
            "Reliability by wave: α with Feldt's 95% interval (dots), ω (rings)",
            ("sans-serif", 22).into_font().color(&INK),
        )
        .margin(24)
        .x_label_area_size(52)
        .y_label_area_size(68)
        .build_cartesian_2d(-0.5..(n - 0.5), (lo - pad)..hi)
        .map_err(e)?;
    styled_mesh(&mut chart, 14)
        .x_labels(waves.len().min(12))
        .x_label_formatter(&formatter)
        .y_desc("reliability")
        .draw()
        .map_err(e)?;
    chart
        .draw_series(DashedLineSeries::new(
            [(-0.5, ALPHA_FLAG), (n - 0.5, ALPHA_FLAG)],
            6,
            4,
            INK.mix(0.6).stroke_width(1),
        ))
        .map_err(e)?
        .label(format!("α = {ALPHA_FLAG:.2}, a rule of thumb"))
        .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 22, y)], INK.mix(0.6).stroke_width(1)));
    let groups = cohorts.len() + 1;
    let offset = |g: usize| (g as f64 - (groups as f64 - 1.0) / 2.0) * 0.6 / groups as f64;
    let mut series: Vec<Series<'_>> = vec![(
        "all respondents".into(),
        INK,
        r.per_wave
            .iter()
            .enumerate()
            .map(|(i, w)| (i as f64 + offset(0), w))
            .collect(),
    )];
    for (g, c) in cohorts.iter().enumerate() {
        let pts = r
            .per_cohort_wave
            .iter()
            .filter(|rel| rel.cohort.as_deref() == Some(c.as_str()))
            .filter_map(|rel| {
                let i = waves.iter().position(|w| Some(w.as_str()) == rel.wave.as_deref())?;
                Some((i as f64 + offset(g + 1), rel))
            })
            .collect();
        series.push((format!("cohort {c}"), PALETTE[g % PALETTE.len()], pts));
    }
    for (name, color, pts) in &series {
        let color = *color;
        chart
            .draw_series(pts.iter().map(|(x, rel)| {
                ErrorBar::new_vertical(
                    *x,
                    rel.alpha_lower,
                    rel.alpha,
                    rel.alpha_upper,
                    color.stroke_width(2),
                    8,
                )
            }))
            .map_err(e)?;
        chart
            .draw_series(
                pts.iter()
                    .map(|(x, rel)| Circle::new((*x, rel.alpha), 5, color.filled())),
            )
            .map_err(e)?
            .label(name.clone())
            .legend(move |(x, y)| Circle::new((x + 11, y), 5, color.filled()));
        chart
            .draw_series(
                pts.iter()
                    .filter_map(|(x, rel)| rel.omega.map(|o| Circle::new((*x + 0.05, o), 5, color.stroke_width(2)))),
            )
            .map_err(e)?;
    }
    styled_legend(&mut chart, SeriesLabelPosition::UpperLeft, 14)?;
    root.present().map_err(e)?;
    Ok(())
}

/// Draw the reliability figure as PNG and SVG.
///
/// # Errors
/// [`crate::Error::Output`] when a file cannot be drawn or written.
pub fn reliability(png: &Path, svg: &Path, r: &ScoreReport) -> Result<()> {
    render!(png, BitMapBackend, SIZE, |root| draw(root, r))?;
    render!(svg, SVGBackend, SIZE, |root| draw(root, r))
}
