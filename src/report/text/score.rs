//! The screen of `braid score`.

use std::fmt::Write;

use super::{header, labelled, thousands, title, wrap};
use crate::score::{ALPHA_FLAG, LOADING_SHIFT_FLAG, Reliability, ScoreReport, ScoreRule};

/// Render the scoring report of `braid score`.
pub fn score_summary(r: &ScoreReport) -> String {
    let mut s = String::new();
    title(&mut s, "score", &r.data);
    let o = &r.options;
    labelled(
        &mut s,
        "Data",
        format_args!(
            "{} rows · {} participants",
            thousands(r.data.n_rows_read),
            thousands(r.data.n_participants.unwrap_or(0))
        ),
    );
    let reversed = if o.reverse.is_empty() {
        "none reversed".to_string()
    } else {
        format!("reversed: {}", o.reverse.join(", "))
    };
    let items = format!(
        "{} items ({}), {reversed}; responses from {} to {}",
        r.items.len(),
        r.items.join(", "),
        o.scale_min,
        o.scale_max
    );
    labelled(&mut s, "Items", format_args!("{}", wrap(&items, 75, 11)));
    let rule = match o.rule {
        ScoreRule::Mean => "the mean of the answered items".to_string(),
        ScoreRule::Sum => format!("the prorated sum (the mean of the answered items × {})", r.items.len()),
    };
    let scores = format!(
        "{rule}, when at least {} items are answered: {} rows scored, {} left without a score",
        o.min_answered,
        thousands(r.n_scored),
        thousands(r.n_unscored)
    );
    labelled(&mut s, "Score", format_args!("{}", wrap(&scores, 75, 11)));
    for (i, w) in r.warnings.iter().enumerate() {
        labelled(
            &mut s,
            if i == 0 { "Warning" } else { "" },
            format_args!("{}", wrap(&w.message, 75, 11)),
        );
    }
    table(&mut s, "By wave", &r.per_wave);
    if !r.per_cohort.is_empty() {
        table(&mut s, "By cohort", &r.per_cohort);
        table(&mut s, "By cohort × wave", &r.per_cohort_wave);
    }
    equating_block(&mut s, r);
    loadings_block(&mut s, r);
    items_block(&mut s, &r.overall);
    let _ = writeln!(s);
    let note = format!(
        "α uses the respondents who answered every item (listwise); its interval is Feldt's (1965). ω is \
         McDonald's ω_total of the unit-weighted sum, from a one-factor maximum-likelihood model of the keyed items \
         (its χ² and RMSEA are in the JSON). \"low\" marks α below {ALPHA_FLAG:.2}, a common rule of thumb, not a \
         law."
    );
    labelled(&mut s, "", format_args!("{}", wrap(&note, 75, 11)));
    labelled(&mut s, "Caution", format_args!("{}", crate::report::CAUTIONS[2]));
    s
}

/// One reliability table: a row per group.
fn table(s: &mut String, head: &str, rows: &[Reliability]) {
    header(
        s,
        &[head, "n", "α", "95% interval", "std α", "ω", "RMSEA"],
        &[-24, 9, 9, 20, 9, 8, 8],
    );
    for r in rows {
        let label = match (&r.cohort, &r.wave) {
            (Some(c), Some(w)) => format!("cohort {c}, wave {w}"),
            (Some(c), None) => format!("cohort {c}"),
            (None, Some(w)) => format!("wave {w}"),
            (None, None) => "all".into(),
        };
        let _ = writeln!(
            s,
            "  {label:<22}{:>9}{:>9.3}{:>20}{:>9.3}{:>8}{:>8}{}",
            thousands(r.n),
            r.alpha,
            format!("[{:.3}, {:.3}]", r.alpha_lower, r.alpha_upper),
            r.alpha_standardized,
            r.omega.map_or("—".into(), |o| format!("{o:.3}")),
            r.one_factor.as_ref().map_or("—".into(), |f| format!("{:.3}", f.rmsea)),
            if r.alpha < ALPHA_FLAG { "   low" } else { "" }
        );
    }
}

/// Each form on the reference form's scale.
fn equating_block(s: &mut String, r: &ScoreReport) {
    if r.equating.is_empty() {
        return;
    }
    header(
        s,
        &["Forms", "wave", "n", "slope", "SE", "intercept", "SE"],
        &[-24, 8, 14, 9, 8, 11, 8],
    );
    for e in &r.equating {
        let _ = writeln!(
            s,
            "  {:<22}{:>8}{:>14}{:>9.4}{:>8.4}{:>11.4}{:>8.4}",
            format!("{} onto {}", e.form, e.reference),
            e.wave,
            format!("{} / {}", e.n_form, e.n_reference),
            e.slope,
            e.slope_se,
            e.intercept,
            e.intercept_se
        );
    }
    let note = format!(
        "linear equating (Kolen & Brennan 2014): mean–sigma under random groups at one wave, or chained linear through \
         the anchor items (common items, wave \"all\"); equated = intercept + slope × score, applied in scores.csv; SEs \
         from {} seeded bootstrap replicates (seed {}).",
        crate::score::equate::BOOTSTRAP_REPLICATES,
        r.options.seed
    );
    labelled(s, "", format_args!("{}", wrap(&note, 75, 11)));
}

/// The one-factor loadings per wave side by side, and the items that move.
fn loadings_block(s: &mut String, r: &ScoreReport) {
    let waves: Vec<&Reliability> = r.per_wave.iter().filter(|w| w.one_factor.is_some()).collect();
    if waves.len() < 2 {
        return;
    }
    let mut labels = vec!["Loadings by wave".to_string()];
    let mut widths = vec![-24];
    for w in &waves {
        labels.push(format!("wave {}", w.wave.as_deref().unwrap_or("")));
        widths.push(9);
    }
    let refs: Vec<&str> = labels.iter().map(String::as_str).collect();
    header(s, &refs, &widths);
    for (j, item) in r.items.iter().enumerate() {
        let _ = write!(s, "  {item:<22}");
        for w in &waves {
            let l = w
                .one_factor
                .as_ref()
                .and_then(|f| f.loadings.get(j))
                .copied()
                .unwrap_or(f64::NAN);
            let _ = write!(s, "{:>9}", if l.is_finite() { format!("{l:.3}") } else { "—".into() });
        }
        let moved = r.loading_shifts.iter().any(|m| &m.item == item);
        let _ = writeln!(s, "{}", if moved { "   moves" } else { "" });
    }
    let note = format!(
        "standardized loadings of one-factor ML models fitted at each wave; \"moves\" marks a range over the \
         waves above {LOADING_SHIFT_FLAG:.2}. A screen, not a test of measurement invariance."
    );
    labelled(s, "", format_args!("{}", wrap(&note, 75, 11)));
}

/// The items over every row.
fn items_block(s: &mut String, r: &Reliability) {
    header(
        s,
        &["Items (all rows)", "mean", "SD", "missing", "item-rest", "α if deleted"],
        &[-24, 9, 9, 10, 11, 14],
    );
    for i in &r.items {
        let _ = writeln!(
            s,
            "  {:<22}{:>9.3}{:>9.3}{:>9.1}%{:>11.3}{:>14.3}",
            i.item,
            i.mean,
            i.sd,
            100.0 * i.missing,
            i.item_rest,
            i.alpha_if_deleted
        );
    }
}
