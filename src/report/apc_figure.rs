//! The figures of `braid apc` (PNG and SVG).
//!
//! - `apc_effects`: three panels side by side (age, period, cohort). In
//!   each, the level effects under every constraint, one line per constraint
//!   in its own colour: a fan of lines that pivot about the middle level,
//!   which shows at a glance that the constraints differ only in the linear
//!   trend they assign.
//! - `apc_curvature`: three panels with each interior level's second
//!   difference as a dot with its ±1.96 SE whisker, over a zero line: the
//!   part of each dimension that needs no constraint.
//! - `apc_line` (always) with the bounds when assumptions were given: the
//!   age, period and cohort slopes as straight lines in t along the line of
//!   solutions b₀ + t·v, a tick for each constraint's t, and the interval of
//!   t that the assumptions allow as a shaded band.
//! - `apc_exact` (records): three panels with each time scale's deviation
//!   from linearity in the exact-value model over a zero line, with its 95%
//!   pointwise band shaded and the knots marked as ticks on the zero line.

use std::path::Path;

use plotters::coord::Shift;
use plotters::prelude::*;

use super::figure::{GROUND, INK, PALETTE, render, styled_legend, styled_mesh};
use crate::apc::Dimension;
use crate::apc::analysis::ApcReport;
use crate::error::Result;

const WIDE: (u32, u32) = (1500, 560);
const SQUARE: (u32, u32) = (1000, 640);

type Panel<'a, DB> = DrawingArea<DB, Shift>;

fn range(values: impl Iterator<Item = f64>) -> (f64, f64) {
    let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
    for v in values.filter(|v| v.is_finite()) {
        lo = lo.min(v);
        hi = hi.max(v);
    }
    if !lo.is_finite() {
        return (-1.0, 1.0);
    }
    let pad = 0.08 * (hi - lo).max(1e-9);
    (lo - pad, hi + pad)
}

fn level_axis(labels: &[String]) -> impl Fn(&f64) -> String + '_ {
    move |x: &f64| {
        let i = x.round();
        if (x - i).abs() < 1e-6 && i >= 0.0 && (i as usize) < labels.len() {
            labels[i as usize].clone()
        } else {
            String::new()
        }
    }
}

fn effects_panel<DB: DrawingBackend>(area: &Panel<DB>, r: &ApcReport, d: Dimension) -> std::result::Result<(), String> {
    let e = |x: DrawingAreaErrorKind<DB::ErrorType>| x.to_string();
    let labels = r.labels.of(d);
    let series: Vec<&Vec<f64>> = r
        .solutions
        .iter()
        .map(|s| match d {
            Dimension::Age => &s.effects.age,
            Dimension::Period => &s.effects.period,
            Dimension::Cohort => &s.effects.cohort,
        })
        .collect();
    let (lo, hi) = range(series.iter().flat_map(|v| v.iter().copied()));
    // The age panel carries the legend: room above the curves for it (about
    // 16 pixels an entry in a panel about 440 pixels high), so it covers no
    // curve's end.
    let hi = if d == Dimension::Age {
        let share = (r.solutions.len() as f64 * 16.0 + 20.0) / 440.0;
        hi + (hi - lo) * share / (1.0 - share)
    } else {
        hi
    };
    let n = labels.len();
    let formatter = level_axis(labels);
    let mut chart = ChartBuilder::on(area)
        .caption(
            format!("{} effects", d.name()),
            ("sans-serif", 19).into_font().color(&INK),
        )
        .margin(14)
        .x_label_area_size(44)
        .y_label_area_size(56)
        .build_cartesian_2d(-0.4..(n as f64 - 0.6), lo..hi)
        .map_err(e)?;
    styled_mesh(&mut chart, 12)
        .x_labels(n.min(14))
        .x_label_formatter(&formatter)
        .x_desc(d.name())
        .y_desc(if r.outcome == crate::apc::analysis::OutcomeKind::Counts {
            "log rate ratio"
        } else {
            "effect"
        })
        .draw()
        .map_err(e)?;
    for (k, (v, s)) in series.iter().zip(&r.solutions).enumerate() {
        let color = PALETTE[k % PALETTE.len()];
        let drawn = chart
            .draw_series(LineSeries::new(
                v.iter().enumerate().map(|(i, y)| (i as f64, *y)),
                color.stroke_width(2),
            ))
            .map_err(e)?;
        if d == Dimension::Age {
            drawn
                .label(s.constraint.clone())
                .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 20, y)], color.stroke_width(2)));
        }
        chart
            .draw_series(
                v.iter()
                    .enumerate()
                    .map(|(i, y)| Circle::new((i as f64, *y), 3, color.filled())),
            )
            .map_err(e)?;
    }
    if d == Dimension::Age {
        styled_legend(&mut chart, SeriesLabelPosition::UpperLeft, 12)?;
    }
    Ok(())
}

fn curvature_panel<DB: DrawingBackend>(
    area: &Panel<DB>,
    r: &ApcReport,
    d: Dimension,
) -> std::result::Result<(), String> {
    let e = |x: DrawingAreaErrorKind<DB::ErrorType>| x.to_string();
    let labels = r.labels.of(d);
    let prefix = format!("{} second difference at ", d.name());
    let pts: Vec<(f64, f64, f64)> = r
        .identified
        .iter()
        .filter(|q| q.quantity.starts_with(&prefix))
        .enumerate()
        .map(|(k, q)| ((k + 1) as f64, q.estimate, q.se))
        .collect();
    let (lo, hi) = range(pts.iter().flat_map(|p| [p.1 - 1.96 * p.2, p.1 + 1.96 * p.2, 0.0]));
    let n = labels.len();
    let formatter = level_axis(labels);
    let color = PALETTE[match d {
        Dimension::Age => 0,
        Dimension::Period => 1,
        Dimension::Cohort => 2,
    }];
    let mut chart = ChartBuilder::on(area)
        .caption(
            format!("{}: second differences ±1.96 SE", d.name()),
            ("sans-serif", 19).into_font().color(&INK),
        )
        .margin(14)
        .x_label_area_size(44)
        .y_label_area_size(56)
        .build_cartesian_2d(-0.4..(n as f64 - 0.6), lo..hi)
        .map_err(e)?;
    styled_mesh(&mut chart, 12)
        .x_labels(n.min(14))
        .x_label_formatter(&formatter)
        .x_desc(d.name())
        .draw()
        .map_err(e)?;
    chart
        .draw_series(LineSeries::new(
            [(-0.4, 0.0), (n as f64 - 0.6, 0.0)],
            INK.stroke_width(1),
        ))
        .map_err(e)?;
    chart
        .draw_series(
            pts.iter()
                .map(|&(x, y, s)| ErrorBar::new_vertical(x, y - 1.96 * s, y, y + 1.96 * s, color.stroke_width(2), 8)),
        )
        .map_err(e)?;
    chart
        .draw_series(pts.iter().map(|&(x, y, _)| Circle::new((x, y), 5, color.filled())))
        .map_err(e)?;
    Ok(())
}

fn line_figure<DB: DrawingBackend>(root: Panel<DB>, r: &ApcReport) -> std::result::Result<(), String> {
    let e = |x: DrawingAreaErrorKind<DB::ErrorType>| x.to_string();
    root.fill(&GROUND).map_err(e)?;
    let ts: Vec<f64> = r.solutions.iter().map(|s| s.t).collect();
    let mut t_all = ts.clone();
    if let Some(b) = &r.bounds {
        t_all.extend(b.t_from.iter().chain(b.t_to.iter()).copied());
    }
    let (t0, t1) = range(t_all.into_iter().chain([0.0]));
    let (t0, t1) = (t0 - 0.1 * (t1 - t0), t1 + 0.1 * (t1 - t0));
    // Each slope is linear in t: through its values at two solutions.
    let slope_at = |d: &str, t: f64| -> f64 {
        let s0 = &r.solutions[0];
        let v0 = s0.slopes.iter().find(|x| x.term == d).map_or(0.0, |x| x.value);
        let gv = match d {
            "age" | "cohort" => 1.0,
            _ => -1.0,
        };
        v0 + (t - s0.t) * gv
    };
    let dims = ["age", "period", "cohort"];
    let (lo, hi) = range(dims.iter().flat_map(|d| [slope_at(d, t0), slope_at(d, t1)]));
    // Room below the lines for the legend (about 17 pixels an entry in a
    // plot about 470 pixels high), so that it covers no line, and a strip
    // above them for the constraints' letters.
    let entries = dims.len() + r.solutions.len() + usize::from(r.bounds.is_some());
    let share = (entries as f64 * 17.0 + 24.0) / 470.0;
    let lo = lo - (hi - lo) * share / (1.0 - share);
    let hi = hi + 0.06 * (hi - lo);
    let mut chart = ChartBuilder::on(&root)
        .caption(
            "Linear slopes along the line of solutions b₀ + t·v",
            ("sans-serif", 22).into_font().color(&INK),
        )
        .margin(24)
        .x_label_area_size(52)
        .y_label_area_size(68)
        .build_cartesian_2d(t0..t1, lo..hi)
        .map_err(e)?;
    styled_mesh(&mut chart, 14)
        .x_desc("t (position on the line of solutions)")
        .y_desc("slope per group step")
        .draw()
        .map_err(e)?;
    if let Some(b) = r.bounds.as_ref().filter(|b| !b.contradiction) {
        {
            let (a, z) = (b.t_from.unwrap_or(t0).max(t0), b.t_to.unwrap_or(t1).min(t1));
            chart
                .draw_series(std::iter::once(Rectangle::new(
                    [(a, lo), (z.max(a + 1e-9 * (t1 - t0)), hi)],
                    RGBColor(0, 95, 105).mix(0.15).filled(),
                )))
                .map_err(e)?
                .label(format!("allowed by: {}", b.assumptions.join("; ")))
                .legend(|(x, y)| {
                    Rectangle::new([(x, y - 6), (x + 20, y + 6)], RGBColor(0, 95, 105).mix(0.15).filled())
                });
        }
    }
    for (k, d) in dims.iter().enumerate() {
        let color = PALETTE[k];
        chart
            .draw_series(LineSeries::new(
                [(t0, slope_at(d, t0)), (t1, slope_at(d, t1))],
                color.stroke_width(3),
            ))
            .map_err(e)?
            .label(format!("{d} slope"))
            .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 20, y)], color.stroke_width(3)));
    }
    // Each constraint is a vertical line with a letter at its top; the
    // legend spells the constraint out, so no label is cut off or crosses a line.
    for (k, s) in r.solutions.iter().enumerate() {
        let letter = char::from(b'A' + (k % 26) as u8);
        chart
            .draw_series(LineSeries::new([(s.t, lo), (s.t, hi)], INK.mix(0.35).stroke_width(1)))
            .map_err(e)?
            .label(format!("{} (t = {:.3})", s.constraint, s.t))
            .legend(move |(x, y)| {
                EmptyElement::at((x, y))
                    + Text::new(letter.to_string(), (4, -7), ("sans-serif", 13).into_font().color(&INK))
            });
        chart
            .draw_series(std::iter::once(Text::new(
                letter.to_string(),
                (s.t, hi),
                ("sans-serif", 13).into_font().color(&INK),
            )))
            .map_err(e)?;
    }
    styled_legend(&mut chart, SeriesLabelPosition::LowerRight, 13)?;
    root.present().map_err(e)?;
    Ok(())
}

fn exact_panel<DB: DrawingBackend>(area: &Panel<DB>, r: &ApcReport, d: Dimension) -> std::result::Result<(), String> {
    let e = |x: DrawingAreaErrorKind<DB::ErrorType>| x.to_string();
    let Some(exact) = &r.exact else {
        return Ok(());
    };
    let (k, name) = match d {
        Dimension::Age => (0, "age"),
        Dimension::Period => (1, "calendar time"),
        Dimension::Cohort => (2, "birth time"),
    };
    let color = PALETTE[k];
    let spline = &exact.splines[k];
    let curve = exact.curves.iter().find(|c| c.dimension == d);
    let (x0, x1) = (spline.knots[0], spline.knots[spline.knots.len() - 1]);
    let (x0, x1) = if x1 > x0 { (x0, x1) } else { (x0 - 0.5, x0 + 0.5) };
    let (lo, hi) = range(
        curve
            .into_iter()
            .flat_map(|c| c.lower.iter().chain(&c.upper).copied())
            .chain([0.0]),
    );
    let mut chart = ChartBuilder::on(area)
        .caption(
            format!("{name}: deviation from a line"),
            ("sans-serif", 19).into_font().color(&INK),
        )
        .margin(14)
        .x_label_area_size(44)
        .y_label_area_size(56)
        .build_cartesian_2d(x0..x1, lo..hi)
        .map_err(e)?;
    styled_mesh(&mut chart, 12)
        .x_labels(8)
        .x_desc(format!("{name} (years)"))
        .y_desc(format!("{}: deviation", r.data.outcome))
        .draw()
        .map_err(e)?;
    chart
        .draw_series(LineSeries::new([(x0, 0.0), (x1, 0.0)], INK.stroke_width(1)))
        .map_err(e)?;
    let tick = 0.02 * (hi - lo);
    chart
        .draw_series(
            spline
                .knots
                .iter()
                .map(|&x| PathElement::new(vec![(x, -tick), (x, tick)], INK.stroke_width(2))),
        )
        .map_err(e)?;
    if let Some(c) = curve {
        let band: Vec<(f64, f64)> =
            c.x.iter()
                .zip(&c.upper)
                .map(|(x, y)| (*x, *y))
                .chain(c.x.iter().zip(&c.lower).rev().map(|(x, y)| (*x, *y)))
                .collect();
        chart
            .draw_series(std::iter::once(Polygon::new(band, color.mix(0.18))))
            .map_err(e)?;
        chart
            .draw_series(LineSeries::new(
                c.x.iter().zip(&c.deviation).map(|(x, y)| (*x, *y)),
                color.stroke_width(3),
            ))
            .map_err(e)?;
    } else {
        // Too few distinct values for a curve: say so on the panel.
        chart
            .draw_series(std::iter::once(Text::new(
                "too few distinct values for a curve",
                (x0 + 0.05 * (x1 - x0), hi - 0.1 * (hi - lo)),
                ("sans-serif", 14).into_font().color(&INK),
            )))
            .map_err(e)?;
    }
    Ok(())
}

fn three<DB: DrawingBackend>(
    root: Panel<DB>,
    r: &ApcReport,
    panel: fn(&Panel<DB>, &ApcReport, Dimension) -> std::result::Result<(), String>,
) -> std::result::Result<(), String> {
    root.fill(&GROUND).map_err(|x| x.to_string())?;
    let areas = root.split_evenly((1, 3));
    for (area, d) in areas.iter().zip([Dimension::Age, Dimension::Period, Dimension::Cohort]) {
        panel(area, r, d)?;
    }
    root.present().map_err(|x| x.to_string())
}

/// Write the figures into `dir`; returns the file names.
///
/// # Errors
/// [`Error::Output`] when a figure cannot be drawn or written.
pub fn write(dir: &Path, r: &ApcReport) -> Result<Vec<String>> {
    let mut names = Vec::new();
    // The grouped model's figures, when there is a grouped model.
    let mut stems = if r.shape.a > 0 {
        vec!["apc_effects", "apc_curvature", "apc_line"]
    } else {
        Vec::new()
    };
    if r.exact.is_some() {
        stems.push("apc_exact");
    }
    for stem in stems {
        let png = dir.join(format!("{stem}.png"));
        let svg = dir.join(format!("{stem}.svg"));
        // The same drawing into both files.
        macro_rules! both {
            ($size:expr, $draw:expr) => {{
                render!(&png, BitMapBackend, $size, $draw)?;
                render!(&svg, SVGBackend, $size, $draw)?;
            }};
        }
        match stem {
            "apc_effects" => both!(WIDE, |root| three(root, r, effects_panel)),
            "apc_curvature" => both!(WIDE, |root| three(root, r, curvature_panel)),
            "apc_exact" => both!(WIDE, |root| three(root, r, exact_panel)),
            _ => both!(SQUARE, |root| line_figure(root, r)),
        }
        names.push(format!("{stem}.png"));
        names.push(format!("{stem}.svg"));
    }
    Ok(names)
}
