//! The screen of `braid fit`.

use std::fmt::Write;

use super::{data_line, header, num, pval, thousands, title};
use crate::report::FitReport;

/// Render the fit summary.
pub fn fit_summary(r: &FitReport, truth: Option<&[(String, f64)]>) -> String {
    let mut s = String::new();
    let d = &r.data;
    title(&mut s, "fit", d);
    let _ = writeln!(s, "{:<11}{}", "Data", data_line(d));
    let mut line2 = Vec::new();
    if let Some(c) = d.n_cohorts {
        line2.push(format!("{c} cohorts"));
    }
    if let Some(c) = d.n_clusters {
        line2.push(format!("{c} clusters"));
    }
    line2.push(format!("{} from {:.2} to {:.2} years", d.age, d.age_min, d.age_max));
    let _ = writeln!(s, "{:<11}{}", "", line2.join(" · "));
    for (i, m) in r.model.iter().enumerate() {
        let _ = writeln!(s, "{:<11}{m}", if i == 0 { "Model" } else { "" });
    }
    fixed_block(&mut s, r, truth);
    random_block(&mut s, r, truth);
    trajectory_block(&mut s, r);
    closing_block(&mut s, r);
    s
}

/// The fixed effects, with the truth of a simulation beside them.
fn fixed_block(s: &mut String, r: &FitReport, truth: Option<&[(String, f64)]>) {
    let truth_col = if truth.is_some() { "   truth" } else { "" };
    let labels = [
        "Fixed effects",
        "estimate",
        "SE",
        "df",
        "t",
        "p",
        "   95% interval",
        truth_col,
    ];
    header(s, &labels, &[-24, 11, 10, 9, 9, 8, -25, 0]);
    for f in &r.fixed {
        let t = truth
            .and_then(|tv| tv.iter().find(|(k, _)| *k == f.term))
            .map(|(_, v)| format!("{v:>8.4}"))
            .unwrap_or_default();
        let _ = writeln!(
            s,
            "  {:<22}{}{}{}{}{:>8}   [{}, {}]  {t}",
            f.term,
            num(f.estimate, 11, 4),
            num(f.se, 10, 4),
            num(f.df, 9, 1),
            num(f.t, 9, 2),
            pval(f.p),
            num(f.lower, 9, 4),
            num(f.upper, 9, 4),
        );
    }
    let _ = writeln!(
        s,
        "  SE: generalized least squares at the estimates; df: Satterthwaite; p: two-sided t test"
    );
    let center = r.basis.center();
    let c = if (center - center.round()).abs() < 1e-9 {
        format!("{center:.0}")
    } else {
        format!("{center:.2}")
    };
    let _ = writeln!(
        s,
        "  the {age} terms are in ({age} − {c}): the intercept is the mean at {age} {c}",
        age = r.data.age
    );
}

/// The random effects and the residual, with the truth of a simulation beside them.
fn random_block(s: &mut String, r: &FitReport, truth: Option<&[(String, f64)]>) {
    let find = |key: &str| truth.and_then(|tv| tv.iter().find(|(k, _)| k == key)).map(|(_, v)| *v);
    let truth_col = if truth.is_some() { "   truth SD" } else { "" };
    header(s, &["Random effects", "variance", "SD", truth_col], &[-28, 11, 11, 0]);
    let row = |s: &mut String, head: &str, term: &str, sd: f64, t: Option<f64>| {
        let t = t.map(|v| format!("{v:>11.4}")).unwrap_or_default();
        let _ = writeln!(s, "  {head:<16}{term:<10}{}{}{t}", num(sd * sd, 11, 4), num(sd, 11, 4));
    };
    for comp in &r.random {
        for (i, term) in comp.terms.iter().enumerate() {
            let head = if i == 0 {
                format!("{} ({})", comp.factor, thousands(comp.n_levels))
            } else {
                String::new()
            };
            row(
                s,
                &head,
                term,
                comp.sd[i],
                find(&format!("sd:{}:{}", comp.factor, term)),
            );
        }
        // Each correlation on its own labelled line; a diagonal structure
        // states its assumption once instead.
        if comp.structure == crate::lmm::Covariance::Diagonal && comp.terms.len() > 1 {
            let _ = writeln!(s, "  {:<16}correlations held at 0 (independent coefficients)", "");
            continue;
        }
        for (i, ti) in comp.terms.iter().enumerate() {
            for (j, tj) in comp.terms.iter().enumerate().take(i) {
                let t = find(&format!("cor:{}:{}", comp.factor, ti))
                    .map(|v| format!(" (truth {v:.2})"))
                    .unwrap_or_default();
                let _ = writeln!(
                    s,
                    "  {:<16}{tj}–{ti} correlation {}{t}",
                    "",
                    num(comp.correlation[i][j], 0, 3)
                );
            }
        }
    }
    row(s, "residual", "", r.residual_variance.sqrt(), find("sd:residual"));
    let _ = writeln!(s);
}

/// The criteria, turning points and the mean and rate at the asked ages.
fn trajectory_block(s: &mut String, r: &FitReport) {
    let _ = writeln!(
        s,
        "{:<11}{} log-likelihood {:.3} · AIC {:.2} · BIC {:.2} · {} parameters",
        "Criteria", r.method, r.loglik, r.aic, r.bic, r.n_params
    );
    if r.method == "REML" {
        let _ = writeln!(
            s,
            "{:<11}(REML criteria compare models with the same fixed effects only)",
            ""
        );
    }
    if r.trajectory.extrema.is_empty() {
        let first = r.trajectory.points.first();
        let last = r.trajectory.points.last();
        if let (Some(a), Some(b)) = (first, last) {
            let _ = writeln!(
                s,
                "{:<11}no peak or trough inside the observed ages; rate of change {:.3} per year at {:.2}, {:.3} at {:.2}",
                "Trajectory", a.rate, a.age, b.rate, b.age
            );
        }
    }
    for (i, x) in r.trajectory.extrema.iter().enumerate() {
        let _ = writeln!(
            s,
            "{:<11}{} at {} {:.2} years (95% interval {:.2} to {:.2}, delta method), mean {:.3}",
            if i == 0 { "Trajectory" } else { "" },
            x.kind,
            r.data.age,
            x.age,
            x.lower,
            x.upper,
            x.mean
        );
    }
    if !r.trajectory.at_ages.is_empty() {
        let first = format!("At {}", r.data.age);
        header(
            s,
            &[&first, "mean", "   95% interval", "rate/year", "   95% interval"],
            &[-13, 11, -27, 10, -25],
        );
        for a in &r.trajectory.at_ages {
            let _ = writeln!(
                s,
                "  {:<11}{}   [{}, {}]  {}   [{}, {}]{}",
                format!("{:.2}", a.age),
                num(a.mean, 11, 3),
                num(a.lower, 9, 3),
                num(a.upper, 9, 3),
                num(a.rate, 10, 3),
                num(a.rate_lower, 8, 3),
                num(a.rate_upper, 8, 3),
                if a.extrapolated {
                    "  (outside the observed ages: extrapolation)"
                } else {
                    ""
                }
            );
        }
        let _ = writeln!(s);
    }
}

/// The optimiser's record and the cautions.
fn closing_block(s: &mut String, r: &FitReport) {
    let info = &r.info;
    let _ = writeln!(
        s,
        "{:<11}{} after {} iterations ({} evaluations{}); largest gradient {:.1e}",
        "Optimiser",
        if info.converged { "converged" } else { "NOT converged" },
        info.iterations,
        info.evaluations,
        if info.restarts > 0 {
            format!(", {} restart", info.restarts)
        } else {
            String::new()
        },
        info.gradient_norm
    );
    if info.route == crate::lmm::Route::Sparse {
        let _ = writeln!(
            s,
            "{:<11}sparse route: the crossed terms were too large for one dense block",
            ""
        );
    }
    for m in &info.messages {
        let _ = writeln!(s, "{:<11}note: {m}", "");
    }
    let _ = writeln!(s);
    for (i, c) in r.cautions.iter().enumerate() {
        let _ = writeln!(s, "{:<11}{c}", if i == 0 { "Cautions" } else { "" });
    }
}
