//! The screen of `braid converge`.

use std::fmt::Write;

use super::{data_line, header, labelled, p_is, pval, rules, title, wrap};

/// The `braid converge` summary.
pub fn converge_summary(r: &crate::linkage::ConvergeReport) -> String {
    let mut s = String::new();
    title(&mut s, "converge", &r.data);
    let _ = writeln!(s, "{:<11}{}", "Data", data_line(&r.data));
    let _ = writeln!(
        s,
        "{:<11}cohorts {} (reference: {})",
        "",
        r.cohorts.join(", "),
        r.cohorts.first().map_or("", String::as_str)
    );
    rules(&mut s, &r.cohort_rule, None);
    labelled(
        &mut s,
        "",
        format_args!("level differences measured at age {:.2}", r.reference_age),
    );
    header(
        &mut s,
        &["Models", "", "loglik", "k", "AIC", "BIC"],
        &[-12, -58, 12, 6, 10, 10],
    );
    for m in &r.models {
        // Information criteria compare fits of one criterion only: the ML
        // fits of the nested sequence.
        let (aic, bic) = if m.method == "ML" {
            (format!("{:.1}", m.aic), format!("{:.1}", m.bic))
        } else {
            ("—".to_string(), "—".to_string())
        };
        let _ = writeln!(
            s,
            "  {:<10}{:<58}{:>12.3}{:>6}{:>10}{:>10}",
            m.name,
            format!("{} ({})", m.description, m.method),
            m.loglik,
            m.n_params,
            aic,
            bic
        );
    }
    let note = "(AIC and BIC compare the ML fits only; a REML log-likelihood compares only models with the same \
                fixed effects)";
    labelled(&mut s, "", format_args!("{}", wrap(note, 75, 11)));
    if let Some(first) = r.cohort_variances.first() {
        let _ = writeln!(s);
        let _ = write!(s, "{:<12}{:<14}", "Under M3", "cohort");
        for t in &first.terms {
            let _ = write!(s, "{:>14}", format!("SD {t}"));
        }
        let _ = writeln!(s, "{:>14}", "residual SD");
        for c in &r.cohort_variances {
            let _ = write!(s, "{:<12}{:<14}", "", c.cohort);
            for v in &c.sd {
                let _ = write!(s, "{v:>14.3}");
            }
            let _ = writeln!(s, "{:>14.3}", c.residual_sd);
        }
    }
    header(
        &mut s,
        &["Tests", "", "against", "statistic", "p"],
        &[-12, -46, 18, 12, 8],
    );
    for t in &r.tests {
        let _ = writeln!(
            s,
            "  {:<56}{:>18}{:>12.3}{:>8}",
            t.name,
            t.method.reference(),
            t.statistic,
            if t.withheld.is_some() {
                " withheld".to_string()
            } else {
                pval(t.p)
            }
        );
    }
    let _ = writeln!(s);
    let _ = writeln!(
        s,
        "{:<14}{:>7}{:>10}{:>8}{:>20}{:>20}{:>9}{:>8}",
        "Shared ages", "age", "b − a", "SE", "95% pointwise", "95% simultaneous", "p Holm", "within"
    );
    let mut pair = String::new();
    for d in &r.shared_ages {
        let this = format!("{} – {}", d.cohort_a, d.cohort_b);
        let label = if this == pair { String::new() } else { this.clone() };
        pair = this;
        let _ = writeln!(
            s,
            "  {:<12}{:>7.2}{:>10.3}{:>8.3}{:>20}{:>20}{:>9}{:>8}",
            label,
            d.age,
            d.difference,
            d.se,
            format!("{:.2} to {:.2}", d.lower, d.upper),
            format!("{:.2} to {:.2}", d.lower_simultaneous, d.upper_simultaneous),
            pval(d.p_holm),
            if d.equivalent { "yes" } else { "no" }
        );
    }
    let _ = writeln!(
        s,
        "{:<11}\"within\": the difference lies inside ±{:.3} by two one-sided tests at the 5% level",
        "", r.margin
    );
    if let Some(b) = &r.between_within {
        let _ = writeln!(s);
        let _ = writeln!(
            s,
            "{:<11}between persons {:.3} (SE {:.3}) · within persons {:.3} (SE {:.3}) · difference {:.3}, {}",
            "Age slopes",
            b.between,
            b.between_se,
            b.within,
            b.within_se,
            b.difference,
            p_is(b.p)
        );
    }
    if let Some(t) = &r.retest {
        let _ = writeln!(s);
        let est = match (t.estimate, t.se, t.p) {
            (Some(e), Some(se), Some(p)) => format!("estimate {e:.3} (SE {se:.3}, {}) · ", p_is(p)),
            _ => String::new(),
        };
        let with = t.age_slope_with.map_or("not fitted".to_string(), |w| format!("{w:.3}"));
        let (form, status, without) = (t.form.name(), &t.status, t.age_slope_without);
        labelled(
            &mut s,
            "Retest",
            format_args!(
                "{form}: {status} · R² on the age terms {:.4} · {est}linear age term {without:.3} without, {with} with",
                t.r2
            ),
        );
    }
    let _ = writeln!(s);
    let _ = writeln!(s, "{:<11}{}", "Verdict", wrap(&r.verdict, 75, 11));
    for (i, a) in r.assumptions.iter().enumerate() {
        let _ = writeln!(s, "{:<11}{}", if i == 0 { "Assumes" } else { "" }, wrap(a, 75, 11));
    }
    for (i, n) in r.notes.iter().enumerate() {
        let _ = writeln!(s, "{:<11}{}", if i == 0 { "Notes" } else { "" }, wrap(n, 75, 11));
    }
    let _ = writeln!(s);
    let _ = writeln!(s, "{:<11}{}", "Caution", crate::report::CAUTIONS[2]);
    s
}
