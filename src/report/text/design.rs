//! The screen of `braid inspect`.

use std::fmt::Write;

use super::{columns, data_line, header, rules, title};

/// Render the design report of `braid inspect`.
pub fn design_summary(r: &crate::design::DesignReport) -> String {
    let mut s = String::new();
    title(&mut s, "inspect", &r.data);
    let _ = writeln!(s, "{:<11}{}", "Data", data_line(&r.data));
    rules(&mut s, &r.cohort_rule, Some(&r.wave_rule));
    let sp = &r.span;
    let _ = writeln!(
        s,
        "{:<11}ages {:.2} to {:.2} ({:.1} years of age) covered in {:.1} years of follow-up: {:.1} years of age per year",
        "Span", sp.age_from, sp.age_to, sp.age_years, sp.calendar_years, sp.acceleration
    );
    header(&mut s, &["Coverage"], &[0]);
    columns(
        &mut s,
        &["", "cohort", "wave", "n", "youngest", "median", "oldest"],
        &[-2, -10, -8, 8, 10, 10, 10],
    );
    for c in &r.cohorts {
        let _ = writeln!(
            s,
            "  {:<10}{:<8}{:>8}{:>10.2}{:>10.2}{:>10.2}   ({} participants)",
            c.cohort, "all", c.n_obs, c.age_min, c.age_median, c.age_max, c.n_participants
        );
        for w in &c.waves {
            let _ = writeln!(
                s,
                "  {:<10}{:<8}{:>8}{:>10.2}{:>10.2}{:>10.2}",
                "", w.wave, w.n, w.age_min, w.age_median, w.age_max
            );
        }
    }
    bands_block(&mut s, r);
    header(
        &mut s,
        &["Overlap of neighbours", "shared ages", "n (a)", "n (b)", "   link"],
        &[-24, 20, 10, 10, 0],
    );
    for o in &r.overlap {
        let ages = if o.linked {
            format!("{:.2} to {:.2}", o.age_from, o.age_to)
        } else {
            "none".to_string()
        };
        let link = if !o.linked {
            "NOT LINKED"
        } else if o.thin {
            "thin"
        } else {
            "linked"
        };
        let _ = writeln!(
            s,
            "  {:<22}{:>20}{:>10}{:>10}   {link}",
            format!("{} – {}", o.cohort_a, o.cohort_b),
            ages,
            o.n_a,
            o.n_b
        );
    }
    let _ = writeln!(s);
    let _ = writeln!(s, "Retention\n  {:<10}{:<8}{:>8}{:>10}", "cohort", "wave", "n", "share");
    let mut last = "";
    for t in &r.retention {
        let head = if t.cohort != last { t.cohort.as_str() } else { "" };
        last = &t.cohort;
        let _ = writeln!(s, "  {:<10}{:<8}{:>8}{:>9.1}%", head, t.wave, t.n, 100.0 * t.share);
    }
    let p = &r.attrition.patterns;
    let _ = writeln!(s);
    let _ = writeln!(
        s,
        "{:<11}{} complete · {} monotone dropout · {} intermittent (missed a wave, came back)",
        "Patterns", p.complete, p.monotone, p.intermittent
    );
    if !r.attrition.baseline.is_empty() {
        let _ = writeln!(
            s,
            "{:<24}{:>10}{:>10}{:>12}{:>9}{:>14}",
            "Baseline: stayed − left", "stayed", "left", "difference", "SE", "standardized"
        );
        for b in &r.attrition.baseline {
            let _ = writeln!(
                s,
                "  {:<22}{:>10.3}{:>10.3}{:>12.3}{:>9.3}{:>14.3}",
                b.variable, b.stayers_mean, b.leavers_mean, b.difference, b.se, b.standardized
            );
        }
    }
    let _ = writeln!(
        s,
        "{:<11}time in study against the number of prior assessments: R² = {:.4}",
        "Collinear", r.collinear.time_retest_r2
    );
    for n in &r.collinear.notes {
        let _ = writeln!(s, "{:<11}{n}", "");
    }
    for (i, w) in r.warnings.iter().enumerate() {
        let _ = writeln!(s, "{:<11}{w}", if i == 0 { "\nWarnings" } else { "" });
    }
    let _ = writeln!(s);
    let _ = writeln!(s, "{:<11}{}", "Caution", crate::report::CAUTIONS[2]);
    s
}

/// At most this many age bands are printed as columns; wider tables are in
/// the JSON and the coverage chart.
const MAX_BAND_COLUMNS: usize = 14;

/// Observations per cohort and age band (the `band` width), cohorts down and
/// bands across; a band a cohort never reached is left blank.
fn bands_block(s: &mut String, r: &crate::design::DesignReport) {
    let mut starts: Vec<f64> = r.bands.iter().map(|b| b.age_from).collect();
    starts.sort_by(f64::total_cmp);
    starts.dedup();
    let width = r.options.band_width;
    let _ = writeln!(s);
    if starts.len() > MAX_BAND_COLUMNS {
        let _ = writeln!(
            s,
            "{:<11}{} age bands of {width} years: too many to print; see design.json and the coverage chart",
            "Age bands",
            starts.len()
        );
        return;
    }
    let label = |a: f64| {
        if (a - a.round()).abs() < 1e-9 {
            format!("{a:.0}")
        } else {
            format!("{a:.1}")
        }
    };
    let unit = if width == 1.0 { "year" } else { "years" };
    let _ = writeln!(s, "Observations per age band of {width} {unit} (band start)");
    let _ = write!(s, "  {:<10}", "cohort");
    for &a in &starts {
        let _ = write!(s, "{:>6}", label(a));
    }
    let _ = writeln!(s);
    for c in &r.cohorts {
        let mut row = format!("  {:<10}", c.cohort);
        for &a in &starts {
            let n = r
                .bands
                .iter()
                .find(|b| b.cohort == c.cohort && b.age_from == a)
                .map(|b| b.n);
            let _ = write!(row, "{:>6}", n.map(|n| n.to_string()).unwrap_or_default());
        }
        let _ = writeln!(s, "{}", row.trim_end());
    }
}
