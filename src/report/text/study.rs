//! The screen of `braid report`: what ran, the verdicts, and what was skipped.

use super::{labelled, thousands, title, wrap};
use crate::study::StudyReport;

/// Render the study report's screen.
pub fn study_summary(r: &StudyReport) -> String {
    let mut s = String::new();
    title(&mut s, "report", &r.data);
    let d = &r.data;
    labelled(
        &mut s,
        "Data",
        format_args!(
            "{} rows used of {} · {} participants · {} cohorts",
            thousands(d.n_obs),
            thousands(d.n_rows_read),
            thousands(d.n_participants.unwrap_or(0)),
            d.n_cohorts.unwrap_or(0)
        ),
    );
    let mut ran = vec!["design"];
    if r.converge.is_some() {
        ran.push("convergence");
    }
    ran.push("fit");
    if r.apc.is_some() {
        ran.push("age–period–cohort");
    }
    if r.anova.is_some() {
        ran.push("mixed ANOVA");
    }
    if r.score.is_some() {
        ran.push("reliability");
    }
    labelled(&mut s, "Ran", format_args!("{}", ran.join(", ")));
    for (name, why) in &r.skipped {
        labelled(
            &mut s,
            "Skipped",
            format_args!("{}", wrap(&format!("{name}: {why}"), 75, 11)),
        );
    }
    if let Some(c) = &r.converge {
        labelled(&mut s, "Converge", format_args!("{}", wrap(&c.verdict, 75, 11)));
    }
    let fit = &r.fit;
    labelled(
        &mut s,
        "Fit",
        format_args!(
            "{} ({}), {}",
            fit.method,
            if fit.converged {
                "converged"
            } else {
                "not certified: read with care"
            },
            fit.model.join("; ")
        ),
    );
    labelled(
        &mut s,
        "Page",
        format_args!("report.html: one self-contained file with every section, figure and table"),
    );
    s
}
