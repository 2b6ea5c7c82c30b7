//! The screen of `braid anova`.

use std::fmt::Write;

use super::{data_line, header, labelled, p_is, pval, rules, thousands, title, wrap};
use crate::anova::AnovaReport;

/// Render the mixed ANOVA report of `braid anova`.
pub fn anova_summary(r: &AnovaReport) -> String {
    let mut s = String::new();
    title(&mut s, "anova", &r.data);
    labelled(&mut s, "Data", format_args!("{}", data_line(&r.data)));
    rules(&mut s, &r.cohort_rule, Some(&r.wave_rule));
    let total = r.n_complete + r.n_dropped;
    labelled(
        &mut s,
        "Design",
        format_args!(
            "cohort (between participants, {}) × wave (within, {}): {} of {} participants have every wave",
            r.cohorts.len(),
            r.waves.len(),
            thousands(r.n_complete),
            thousands(total)
        ),
    );
    if let Some(d) = &r.dropped {
        let text = format!(
            "{} left out for a missing wave; at their first assessment they averaged {:.2} against {:.2} for those kept \
             ({:+.2} SD of the kept): complete cases are a selected sample when these differ",
            thousands(r.n_dropped),
            d.dropped_baseline_mean,
            d.kept_baseline_mean,
            d.standardized_difference
        );
        labelled(&mut s, "", format_args!("{}", wrap(&text, 75, 11)));
    }
    for (i, w) in r.warnings.iter().enumerate() {
        labelled(
            &mut s,
            if i == 0 { "Warning" } else { "" },
            format_args!("{}", wrap(&w.message, 75, 11)),
        );
    }
    means_block(&mut s, r);
    table_block(&mut s, r);
    sphericity_block(&mut s, r);
    simple_block(&mut s, r);
    mixed_block(&mut s, r);
    reading_block(&mut s, r);
    let _ = writeln!(s);
    labelled(
        &mut s,
        "Caution",
        format_args!("{}", wrap(crate::report::CAUTIONS[0], 75, 11)),
    );
    labelled(&mut s, "", format_args!("{}", crate::report::CAUTIONS[2]));
    s
}

/// Cohort × wave means with their mean ages.
fn means_block(s: &mut String, r: &AnovaReport) {
    let mut labels = vec!["Means".to_string(), String::new()];
    let mut widths = vec![-11, -10];
    for w in &r.waves {
        labels.push(format!("wave {w} (age)"));
        widths.push(15);
    }
    let refs: Vec<&str> = labels.iter().map(String::as_str).collect();
    header(s, &refs, &widths);
    for (g, c) in r.cohorts.iter().enumerate() {
        let _ = write!(s, "  {:<9}{:<10}", c, format!("n {}", r.cohort_sizes[g]));
        for j in 0..r.waves.len() {
            let _ = write!(s, "{:>15}", format!("{:.2} ({:.1})", r.means[g][j], r.mean_ages[g][j]));
        }
        let _ = writeln!(s);
    }
}

/// The split-plot table, then the within effects' corrections.
fn table_block(s: &mut String, r: &AnovaReport) {
    header(
        s,
        &["Table", "SS", "df", "MS", "F", "p", "partial η²"],
        &[-29, 12, 8, 12, 9, 8, 12],
    );
    let err = |i: usize| &r.analysis.errors[i];
    let effect_row = |s: &mut String, i: usize| {
        let e = &r.analysis.effects[i];
        let _ = writeln!(
            s,
            "  {:<27}{:>12.3}{:>8}{:>12.3}{:>9.3}{:>8}{:>12.3}",
            e.effect,
            e.ss,
            e.df1,
            e.ms,
            e.f,
            pval(e.p),
            e.partial_eta2
        );
    };
    let error_row = |s: &mut String, i: usize| {
        let e = err(i);
        let _ = writeln!(s, "  {:<27}{:>12.3}{:>8}{:>12.3}", e.term, e.ss, e.df, e.ms);
    };
    effect_row(s, 0);
    error_row(s, 0);
    effect_row(s, 1);
    effect_row(s, 2);
    error_row(s, 1);
    header(
        s,
        &[
            "Corrections, effect sizes",
            "ε GG",
            "p GG",
            "ε HF",
            "p HF",
            "generalized η²",
        ],
        &[-29, 9, 9, 9, 9, 16],
    );
    for e in &r.analysis.effects {
        let fmt_p = |p: Option<f64>| p.map_or("—".into(), pval);
        let fmt_e = |x: Option<f64>| x.map_or("—".into(), |v| format!("{v:.3}"));
        let _ = writeln!(
            s,
            "  {:<27}{:>9}{:>9}{:>9}{:>9}{:>16.3}",
            e.effect,
            fmt_e(e.epsilon_gg),
            fmt_p(e.p_gg),
            fmt_e(e.epsilon_hf),
            fmt_p(e.p_hf),
            e.generalized_eta2
        );
    }
    labelled(
        s,
        "",
        format_args!(
            "{}",
            wrap(
                "HF with Lecoutre's (1991) correction; generalized η² after Olejnik & Algina (2003), cohort a measured factor",
                75,
                11
            )
        ),
    );
}

/// Mauchly's test, the recommendation, and Box's M.
fn sphericity_block(s: &mut String, r: &AnovaReport) {
    let _ = writeln!(s);
    match &r.analysis.sphericity {
        Some(m) => labelled(
            s,
            "Sphericity",
            format_args!(
                "{}",
                wrap(
                    &format!(
                        "Mauchly's W = {:.4}, χ² = {:.3} on {} df, {} (the pooled within-cohort covariance of orthonormal wave contrasts)",
                        m.w,
                        m.chi2,
                        m.df,
                        p_is(m.p)
                    ),
                    75,
                    11
                )
            ),
        ),
        None => labelled(s, "Sphericity", format_args!("two waves: nothing to test")),
    }
    labelled(s, "", format_args!("{}", wrap(&r.analysis.recommendation, 75, 11)));
    match &r.analysis.box_m {
        Some(b) => {
            let text = format!(
                "M = {:.3}, χ² = {:.3} on {} df, {}: equal covariance matrices across cohorts {} at 5% (the test is \
                 sensitive to non-normal errors)",
                b.m,
                b.chi2,
                b.df,
                p_is(b.p),
                if b.p < 0.05 { "rejected" } else { "not rejected" }
            );
            labelled(s, "Box's M", format_args!("{}", wrap(&text, 75, 11)));
        }
        None => labelled(
            s,
            "Box's M",
            format_args!("not computed: a cohort has no more participants than waves"),
        ),
    }
}

/// Wave within each cohort.
fn simple_block(s: &mut String, r: &AnovaReport) {
    header(
        s,
        &["Simple effects of wave", "F", "df", "p", "ε GG", "p GG", "Holm"],
        &[-29, 10, 14, 8, 9, 8, 8],
    );
    for e in &r.analysis.simple_effects {
        let _ = writeln!(
            s,
            "  {:<27}{:>10.3}{:>14}{:>8}{:>9.3}{:>8}{:>8}",
            format!("within cohort {}", e.cohort),
            e.f,
            format!("{}, {}", e.df1, e.df2),
            pval(e.p),
            e.epsilon_gg,
            pval(e.p_gg),
            pval(e.p_holm)
        );
    }
}

/// The compound-symmetry mixed model on the same complete cases.
fn mixed_block(s: &mut String, r: &AnovaReport) {
    let m = &r.analysis.mixed_model_comparison;
    header(s, &["Mixed model", "F", "df", "p", "ANOVA F"], &[-29, 10, 18, 8, 12]);
    for t in &m.tests {
        let _ = writeln!(
            s,
            "  {:<27}{:>10.3}{:>18}{:>8}{:>12.3}",
            t.effect,
            t.f,
            format!("{}, {:.1}", t.df1, t.df2),
            pval(t.p),
            t.anova_f
        );
    }
    let text = format!(
        "{}: SD participant {:.3}, SD residual {:.3}. With equal cohort sizes it gives the ANOVA's within-effect F \
         exactly; with unequal sizes its wave effect weights cohorts equally where the ANOVA weights them by size, so \
         the wave F differs. Both rest on sphericity (equal correlations between waves).",
        m.model, m.sd_participant, m.sd_residual
    );
    labelled(s, "", format_args!("{}", wrap(&text, 75, 11)));
}

/// What the ANOVA's factors mean in a cohort-sequential design, and what
/// the mixed model adds.
fn reading_block(s: &mut String, r: &AnovaReport) {
    let u = &r.stitched_uses;
    let uses = format!(
        "On this file the table uses {} rows of {} participants; braid fit would use {} rows of {}.",
        thousands(u.anova_rows),
        thousands(u.anova_participants),
        thousands(u.stitched_rows),
        thousands(u.stitched_participants)
    );
    let lines = [
        (
            "Reading",
            "In a cohort-sequential design \"wave\" mixes age and period within each cohort (each wave is one year older \
             and one year later), and \"cohort\" mixes birth cohort and age (each cohort is observed at other ages).",
        ),
        (
            "Beside",
            "braid fit keeps the participants this table leaves out (REML uses every observed wave under missing at \
             random), replaces wave labels by exact ages, and stitches one age curve across cohorts instead of separate \
             wave means per cohort; braid converge tests whether cohorts agree where their ages overlap, which this \
             table cannot.",
        ),
    ];
    for (label, text) in lines {
        let _ = writeln!(s);
        labelled(s, label, format_args!("{}", wrap(text, 75, 11)));
    }
    labelled(s, "", format_args!("{}", wrap(&uses, 75, 11)));
}
