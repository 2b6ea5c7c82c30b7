//! The screen of `braid apc`.

use std::fmt::Write;

use crate::apc::analysis::ApcReport;
use crate::apc::exact::{Criterion, ExactApc};

use super::{header, labelled, p_is, pval, thousands, title, wrap};

/// The `braid apc` summary.
pub fn apc_summary(r: &ApcReport) -> String {
    let mut s = String::new();
    title(&mut s, "apc", &r.data);
    let exact_only = r.options.width.is_none();
    match (&r.exact, exact_only) {
        (Some(e), true) => {
            labelled(
                &mut s,
                "Data",
                format_args!("{} records with exact ages and calendar times", thousands(e.n_obs)),
            );
            warnings_block(&mut s, r);
            exact_block(&mut s, e);
        }
        _ => {
            grouped_block(&mut s, r);
            solutions_block(&mut s, r);
            bounds_block(&mut s, r);
            if let Some(e) = &r.exact {
                let _ = writeln!(s);
                exact_block(&mut s, e);
            }
        }
    }
    records_block(&mut s, r);
    let _ = writeln!(s);
    let assumptions = match (&r.exact, exact_only) {
        (Some(e), true) => &e.assumptions,
        _ => &r.assumptions,
    };
    for (i, a) in assumptions.iter().enumerate() {
        let _ = writeln!(s, "{:<11}{}", if i == 0 { "Assumes" } else { "" }, wrap(a, 75, 11));
    }
    let _ = writeln!(s);
    let _ = writeln!(s, "{:<11}{}", "Caution", crate::report::CAUTIONS[2]);
    s
}

/// The grouped factor model: its shape, null vector, deviances, identified
/// quantities and curvature tests.
fn grouped_block(s: &mut String, r: &ApcReport) {
    // The model, and the deviance that its comparisons use.
    let (model, kind) = if r.outcome == crate::apc::analysis::OutcomeKind::Counts {
        (
            "a table of counts with exposure, Poisson log-linear",
            "(Poisson deviance)",
        )
    } else if r.panel.is_some() {
        (
            "panel records, linear mixed model with a random intercept per participant, fitted by ML",
            "(−2 × ML log-likelihood)",
        )
    } else {
        (
            "records with a continuous outcome, least squares",
            "(residual sum of squares)",
        )
    };
    labelled(s, "Data", format_args!("{model} · {} observations", thousands(r.n_obs)));
    let (a, p, kn) = (r.shape.a, r.shape.p, r.shape.kn);
    let possible = a + p - 1;
    let cohorts = if kn == possible {
        format!("{kn} cohorts")
    } else {
        format!("{kn} observed of {possible} possible cohorts")
    };
    labelled(s, "", format_args!("{a} age groups × {p} periods → {cohorts}"));
    let residual = if r.null_vector_residual < 1e-12 {
        "below 1e-12".to_string()
    } else {
        format!("{:.1e}", r.null_vector_residual)
    };
    labelled(
        s,
        "Design",
        format_args!(
            "rank deficiency {} (max |X·v| {residual}); null vector in sum-to-zero coding (Kupper et al. 1985):",
            r.rank_deficiency
        ),
    );
    let line: Vec<String> = r
        .null_vector
        .iter()
        .skip(1)
        // No-break spaces keep each term with its value when the line wraps.
        .map(|t| format!("{}\u{a0}{},", t.term.replace(' ', "\u{a0}"), signed(t.value)))
        .collect();
    let joined = line.join(" ");
    let _ = writeln!(s, "{:<11}{}", "", wrap(joined.trim_end_matches(','), 75, 11));
    let _ = writeln!(s);
    warnings_block(s, r);
    let _ = writeln!(s, "{:<16}{:>14}{:>8}  {kind}", "Deviance", "", "df");
    for d in &r.deviance_table {
        let _ = writeln!(s, "  {:<14}{:>14.4}{:>8}", d.model, d.deviance, d.df);
    }
    header(
        s,
        &["Identified (no constraint needed)", "estimate", "SE"],
        &[-60, 12, 10],
    );
    for q in r.identified.iter().filter(|q| !q.quantity.contains("deviation")) {
        let _ = writeln!(s, "  {:<58}{:>12.4}{:>10.4}", q.quantity, q.estimate, q.se);
    }
    let _ = writeln!(
        s,
        "{:<11}(deviations from linearity of every level are in the JSON)",
        ""
    );
    for t in &r.curvature_tests {
        let (d, p) = (t.dimension.name(), p_is(t.p));
        let stat = match t.df_denominator {
            Some(den) => format!("F = {:.3} on ({}, {}) df", t.statistic, t.df, thousands(den)),
            None => format!("χ² = {:.3} on {} df", t.statistic, t.df),
        };
        match &t.withheld {
            None => labelled(s, "Curvature", format_args!("no curvature in {d}: {stat}, {p}")),
            Some(why) => {
                let text = format!("no curvature in {d}: {stat}; no p-value: {why}");
                labelled(s, "Curvature", format_args!("{}", wrap(&text, 75, 11)));
            }
        }
    }
}

/// The warnings, each in the left margin's block.
fn warnings_block(s: &mut String, r: &ApcReport) {
    for (i, w) in r.warnings.iter().enumerate() {
        let _ = writeln!(
            s,
            "{:<11}{}",
            if i == 0 { "Warning" } else { "" },
            wrap(&w.message, 75, 11)
        );
    }
    if !r.warnings.is_empty() {
        let _ = writeln!(s);
    }
}

/// The exact-value model: its splines, nested models, tests, identified
/// quantities and the slopes under each constraint.
fn exact_block(s: &mut String, e: &ExactApc) {
    let knots = |d: usize| {
        let k: Vec<String> = e.splines[d].knots.iter().map(|v| format!("{v:.1}")).collect();
        format!("{} ({})", e.splines[d].dimension.name(), k.join(", "))
    };
    labelled(
        s,
        "Exact",
        format_args!(
            "{}",
            wrap(
                &format!(
                    "natural cubic splines in exact age, calendar time and birth time (Carstensen 2007), knots: {}; {}; {}",
                    knots(0),
                    knots(1),
                    knots(2).replace("cohort", "birth time")
                ),
                75,
                11
            )
        ),
    );
    let criterion = match e.criterion {
        Criterion::ResidualSumOfSquares { value, df } => {
            format!("residual sum of squares {value:.3} on {} df", thousands(df))
        }
        Criterion::RemlLoglik { value } => format!("REML log-likelihood {value:.3}"),
    };
    labelled(
        s,
        "",
        format_args!("{}", wrap(&format!("{} · {criterion}", e.fit), 75, 11)),
    );
    header(s, &["Tests", "", "against", "statistic", "p"], &[-12, -46, 18, 12, 8]);
    for t in &e.tests {
        match (&t.p, &t.withheld) {
            (Some(p), _) => {
                let _ = writeln!(
                    s,
                    "  {:<56}{:>18}{:>12.3}{:>8}",
                    t.name,
                    t.reference,
                    t.statistic,
                    pval(*p)
                );
            }
            (None, why) => {
                let text = format!("{}: no test, {}", t.name, why.as_deref().unwrap_or("not computable"));
                let _ = writeln!(s, "  {}", wrap(&text, 86, 2));
            }
        }
    }
    labelled(
        s,
        "",
        format_args!("(Wald F in the fitted model; the drift is tested beside the curves)"),
    );
    header(
        s,
        &["Identified (no constraint needed)", "estimate", "SE"],
        &[-60, 12, 10],
    );
    for q in &e.identified {
        let _ = writeln!(s, "  {:<58}{:>12.4}{:>10.4}", q.quantity, q.estimate, q.se);
    }
    labelled(
        s,
        "",
        format_args!("(the deviation curves with 95% bands are in the JSON and apc_exact.png)"),
    );
    let _ = writeln!(s);
    labelled(
        s,
        "Solutions",
        format_args!("the slopes move together along (age, period, cohort) + t·(1, −1, 1)"),
    );
    let _ = writeln!(
        s,
        "  {:<58}{:>9}{:>9}{:>9}",
        "constraint (slopes per year)", "age", "period", "cohort"
    );
    for sol in &e.solutions {
        let _ = writeln!(
            s,
            "  {:<58}{:>9}{:>9}{:>9}",
            sol.description,
            fixed4(sol.slopes[0]),
            fixed4(sol.slopes[1]),
            fixed4(sol.slopes[2])
        );
    }
    labelled(
        s,
        "",
        format_args!(
            "(fitted values agree to {:.1e} under every constraint)",
            e.fitted_max_difference
        ),
    );
}

/// The constrained solutions and their slopes.
fn solutions_block(s: &mut String, r: &ApcReport) {
    let _ = writeln!(s);
    let _ = writeln!(
        s,
        "{:<11}every solution is b₀ + t·v; b₀ is the minimum-norm solution",
        "Solutions"
    );
    let _ = writeln!(s, "  {:<58}{:>9}{:>27}", "", "", "slope per group step");
    let _ = writeln!(
        s,
        "  {:<58}{:>9}{:>9}{:>9}{:>9}",
        "constraint", "t", "age", "period", "cohort"
    );
    for sol in &r.solutions {
        let slope = |d: &str| sol.slopes.iter().find(|x| x.term == d).map_or(f64::NAN, |x| x.value);
        let _ = writeln!(
            s,
            "  {:<58}{:>9}{:>9}{:>9}{:>9}",
            sol.constraint,
            fixed4(sol.t),
            fixed4(slope("age")),
            fixed4(slope("period")),
            fixed4(slope("cohort"))
        );
    }
    let _ = writeln!(
        s,
        "{:<11}(the level effects of each solution are in the JSON; fitted values agree to {:.1e})",
        "", r.fitted_max_difference
    );
}

/// The bounds under the stated assumptions.
fn bounds_block(s: &mut String, r: &ApcReport) {
    if let Some(b) = &r.bounds {
        let _ = writeln!(s);
        let _ = writeln!(s, "{:<11}assuming {}", "Bounds", b.assumptions.join("; "));
        if b.contradiction {
            let _ = writeln!(
                s,
                "{:<11}these assumptions contradict the data: no solution satisfies them all",
                ""
            );
        } else {
            let end = |x: Option<f64>, inf: &str| x.map_or(inf.to_string(), |v| format!("{v:.4}"));
            let _ = writeln!(s, "{:<11}t from {} to {}", "", end(b.t_from, "−∞"), end(b.t_to, "+∞"));
            for sb in &b.slopes {
                let _ = writeln!(
                    s,
                    "{:<11}{} slope from {} to {}",
                    "",
                    sb.dimension.name(),
                    end(sb.from, "−∞"),
                    end(sb.to, "+∞")
                );
            }
        }
    }
}

/// Records: the birth-year check, the panel's view and the hierarchical fit.
fn records_block(s: &mut String, r: &ApcReport) {
    if let Some(c) = &r.cohort_check {
        let _ = writeln!(s);
        let _ = writeln!(s, "{:<11}{}", "Cohorts", wrap(&c.note, 75, 11));
    }
    if let Some(pv) = &r.panel {
        let _ = writeln!(s);
        for (i, t) in pv.text.iter().enumerate() {
            let _ = writeln!(s, "{:<11}{}", if i == 0 { "Your panel" } else { "" }, wrap(t, 75, 11));
        }
    }
    if let Some(h) = &r.hierarchical {
        let _ = writeln!(s);
        let _ = writeln!(
            s,
            "{:<11}age polynomial centred at {:.2}, crossed random period and cohort intercepts{} (REML, Yang & Land 2006)",
            "HAPC",
            h.center,
            if h.sd_participant.is_some() {
                " and a participant intercept"
            } else {
                ""
            }
        );
        for fe in &h.fixed {
            let _ = writeln!(
                s,
                "{:<11}{:<12}{:>12.5}  SE {:>9.5}  df {:>8.1}  {}",
                "",
                fe.term,
                fe.estimate,
                fe.se,
                fe.df,
                p_is(fe.p)
            );
        }
        let _ = writeln!(
            s,
            "{:<11}SD period {:.4} · SD cohort {:.4}{} · SD residual {:.4} · REML loglik {:.3}",
            "",
            h.sd_period,
            h.sd_cohort,
            h.sd_participant
                .map_or(String::new(), |v| format!(" · SD participant {v:.4}")),
            h.sd_residual,
            h.loglik
        );
        let _ = writeln!(s, "{:<11}{}", "", wrap(&h.caution, 75, 11));
    }
}

/// A signed value with one decimal and no negative zero.
fn signed(v: f64) -> String {
    let v = if v.abs() < 0.05 { 0.0 } else { v };
    format!("{v:+.1}")
}

/// Four decimals, with no negative zero.
fn fixed4(v: f64) -> String {
    let text = format!("{v:.4}");
    if text == "-0.0000" { "0.0000".into() } else { text }
}
