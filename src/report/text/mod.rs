//! The text screens, in braid's own layout: blocks headed by a word in the
//! left margin, numbers right-aligned in fixed columns. One file per report;
//! the formatters every screen shares are here.

mod anova;
mod apc;
mod converge;
mod design;
mod fit;
mod plan;
mod score;
mod study;

use std::fmt::Write;

pub use anova::anova_summary;
pub use apc::apc_summary;
pub use converge::converge_summary;
pub use design::design_summary;
pub use fit::fit_summary;
pub use plan::plan_summary;
pub use score::score_summary;
pub use study::study_summary;

use crate::data::DataSummary;
use crate::stats::{p_cell as pval, p_words as p_is, thousands};

/// Width of the left margin that holds each block's heading word.
const MARGIN: usize = 11;

/// One line of a block: `label` in the left margin, then the text.
fn labelled(s: &mut String, label: &str, text: std::fmt::Arguments<'_>) {
    let _ = writeln!(s, "{label:<MARGIN$}{text}");
}

/// A table's header row after a blank line, the start of every table block.
fn header(s: &mut String, labels: &[&str], widths: &[i32]) {
    let _ = writeln!(s);
    columns(s, labels, widths);
}

/// One row of column labels, each padded to its width: right-aligned, or
/// left-aligned where the width is negative (as in printf's `%-12s`).
fn columns(s: &mut String, labels: &[&str], widths: &[i32]) {
    let mut line = String::new();
    for (label, &w) in labels.iter().zip(widths) {
        let n = w.unsigned_abs() as usize;
        if w < 0 {
            line.push_str(&format!("{label:<n$}"));
        } else {
            line.push_str(&format!("{label:>n$}"));
        }
    }
    let _ = writeln!(s, "{line}");
}

/// The rules that gave cohorts (and waves), under the data lines.
fn rules(s: &mut String, cohort: &crate::data::derive::AppliedRule, wave: Option<&crate::data::derive::AppliedRule>) {
    labelled(s, "Rules", format_args!("cohorts {cohort}"));
    if let Some(w) = wave {
        labelled(s, "", format_args!("waves {w}"));
    }
}

/// Width of the rule under a screen's title.
const RULE_WIDTH: usize = 86;

/// The title line (`braid COMMAND · FILE`) and the rule under it.
fn title(s: &mut String, command: &str, d: &DataSummary) {
    let _ = writeln!(s, "braid {command} · {}", d.file);
    let _ = writeln!(s, "{}", "─".repeat(RULE_WIDTH));
}

/// Participants and rows used of rows read, with the rows dropped and why.
fn data_line(d: &DataSummary) -> String {
    let mut dropped = Vec::new();
    if d.dropped.missing_outcome > 0 {
        dropped.push(format!(
            "{} missing {}",
            thousands(d.dropped.missing_outcome),
            d.outcome
        ));
    }
    if d.dropped.missing_age > 0 {
        dropped.push(format!("{} missing {}", thousands(d.dropped.missing_age), d.age));
    }
    if d.dropped.missing_covariate > 0 {
        dropped.push(format!(
            "{} missing a covariate",
            thousands(d.dropped.missing_covariate)
        ));
    }
    if d.dropped.missing_other > 0 {
        dropped.push(format!("{} missing a value", thousands(d.dropped.missing_other)));
    }
    let dropped = if dropped.is_empty() {
        "none dropped".to_string()
    } else {
        format!("dropped {}", dropped.join(", "))
    };
    let who = match d.n_participants {
        Some(n) => format!("{} participants · ", thousands(n)),
        None => String::new(),
    };
    format!(
        "{who}{} rows used of {} ({dropped})",
        thousands(d.n_obs),
        thousands(d.n_rows_read)
    )
}

fn num(x: f64, width: usize, dec: usize) -> String {
    if x.is_finite() {
        format!("{x:>width$.dec$}")
    } else {
        format!("{:>width$}", "—")
    }
}

/// Wrap text at `width` columns, indenting continuation lines by `indent`.
fn wrap(text: &str, width: usize, indent: usize) -> String {
    let mut out = String::new();
    let mut line = 0;
    // Breaks at ordinary spaces only: a no-break space holds its words together.
    for word in text.split([' ', '\n', '\t']).filter(|w| !w.is_empty()) {
        if line > 0 && line + 1 + word.chars().count() > width {
            out.push('\n');
            out.push_str(&" ".repeat(indent));
            line = 0;
        } else if line > 0 {
            out.push(' ');
            line += 1;
        }
        out.push_str(word);
        line += word.chars().count();
    }
    out
}
