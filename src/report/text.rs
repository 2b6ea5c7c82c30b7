//! The human-readable summary of a fit, in braid's own layout: blocks headed
//! by a word in the left margin, numbers right-aligned in fixed columns.

use std::fmt::Write;

use super::FitReport;

fn thousands(n: usize) -> String {
    let s = n.to_string();
    let mut out = String::new();
    for (i, ch) in s.chars().enumerate() {
        if i > 0 && (s.len() - i).is_multiple_of(3) {
            out.push(',');
        }
        out.push(ch);
    }
    out
}

fn pval(p: f64) -> String {
    if !p.is_finite() {
        "—".into()
    } else if p < 0.0001 {
        "<.0001".into()
    } else {
        format!("{p:.4}").trim_start_matches('0').to_string()
    }
}

fn num(x: f64, width: usize, dec: usize) -> String {
    if x.is_finite() {
        format!("{x:>width$.dec$}")
    } else {
        format!("{:>width$}", "—")
    }
}

/// Render the fit summary.
pub fn fit_summary(r: &FitReport, truth: Option<&[(String, f64)]>) -> String {
    let mut s = String::new();
    let rule = "─".repeat(86);
    let _ = writeln!(s, "braid fit · {}", r.data.file);
    let _ = writeln!(s, "{rule}");
    let d = &r.data;
    let mut dropped = Vec::new();
    if d.dropped.missing_outcome > 0 {
        dropped.push(format!("{} missing {}", d.dropped.missing_outcome, d.outcome));
    }
    if d.dropped.missing_age > 0 {
        dropped.push(format!("{} missing {}", d.dropped.missing_age, d.age));
    }
    if d.dropped.missing_covariate > 0 {
        dropped.push(format!("{} missing a covariate", d.dropped.missing_covariate));
    }
    let dropped = if dropped.is_empty() {
        "none dropped".to_string()
    } else {
        format!("dropped {}", dropped.join(", "))
    };
    let _ = writeln!(
        s,
        "{:<11}{} participants · {} rows used of {} ({dropped})",
        "Data",
        thousands(d.n_participants.unwrap_or(0)),
        thousands(d.n_obs),
        thousands(d.n_rows_read)
    );
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
    let _ = writeln!(s);
    let _ = writeln!(
        s,
        "{:<24}{:>11}{:>10}{:>9}{:>9}{:>8}   {:<22}{}",
        "Fixed effects",
        "estimate",
        "SE",
        "df",
        "t",
        "p",
        "95% interval",
        if truth.is_some() { "   truth" } else { "" }
    );
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
    let _ = writeln!(s);
    let _ = writeln!(
        s,
        "{:<28}{:>11}   correlations{}",
        "Random effects",
        "SD",
        if truth.is_some() { "            truth SD" } else { "" }
    );
    for comp in &r.random {
        for (i, term) in comp.terms.iter().enumerate() {
            let head = if i == 0 {
                format!("{} ({})", comp.factor, thousands(comp.n_levels))
            } else {
                String::new()
            };
            let cors: Vec<String> = (0..i).map(|j| num(comp.correlation[i][j], 6, 3)).collect();
            let key = format!("sd:{}:{}", comp.factor, term);
            let mut t = truth
                .and_then(|tv| tv.iter().find(|(k, _)| *k == key))
                .map(|(_, v)| format!("{v:>8.4}"))
                .unwrap_or_default();
            let cor_key = format!("cor:{}:{}", comp.factor, term);
            if let Some((_, v)) = truth.and_then(|tv| tv.iter().find(|(k, _)| *k == cor_key)) {
                t.push_str(&format!("  (correlation {v:.2})"));
            }
            let _ = writeln!(
                s,
                "  {:<16}{:<10}{}   {:<22}{t}",
                head,
                term,
                num(comp.sd[i], 11, 4),
                cors.join(" ")
            );
        }
    }
    let t = truth
        .and_then(|tv| tv.iter().find(|(k, _)| k == "sd:residual"))
        .map(|(_, v)| format!("{v:>8.4}"))
        .unwrap_or_default();
    let _ = writeln!(
        s,
        "  {:<26}{}   {:<22}{t}",
        "residual",
        num(r.residual_variance.sqrt(), 11, 4),
        ""
    );
    let _ = writeln!(s);
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
        let _ = writeln!(s);
        let _ = writeln!(
            s,
            "{:<13}{:>11}   {:<24}{:>10}   {:<22}",
            format!("At {}", r.data.age),
            "mean",
            "95% interval",
            "rate/year",
            "95% interval"
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
    for m in &info.messages {
        let _ = writeln!(s, "{:<11}note: {m}", "");
    }
    let _ = writeln!(s);
    for (i, c) in r.cautions.iter().enumerate() {
        let _ = writeln!(s, "{:<11}{c}", if i == 0 { "Cautions" } else { "" });
    }
    s
}

/// Render the design report of `braid inspect`.
pub fn design_summary(r: &crate::design::DesignReport) -> String {
    let mut s = String::new();
    let rule = "─".repeat(86);
    let _ = writeln!(s, "braid inspect · {}", r.data.file);
    let _ = writeln!(s, "{rule}");
    let _ = writeln!(
        s,
        "{:<11}{} participants · {} rows used of {}",
        "Data",
        thousands(r.data.n_participants.unwrap_or(0)),
        thousands(r.data.n_obs),
        thousands(r.data.n_rows_read),
    );
    let _ = writeln!(s, "{:<11}cohorts {}", "Rules", r.cohort_rule);
    let _ = writeln!(s, "{:<11}waves {}", "", r.wave_rule);
    let sp = &r.span;
    let _ = writeln!(
        s,
        "{:<11}ages {:.2} to {:.2} ({:.1} years of age) covered in {:.1} years of follow-up: {:.1} years of age per year",
        "Span", sp.age_from, sp.age_to, sp.age_years, sp.calendar_years, sp.acceleration
    );
    let _ = writeln!(s);
    let _ = writeln!(
        s,
        "{:<12}{:<8}{:>8}{:>10}{:>10}{:>10}",
        "Coverage", "wave", "n", "youngest", "median", "oldest"
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
    let _ = writeln!(s);
    let _ = writeln!(
        s,
        "{:<24}{:>20}{:>10}{:>10}   link",
        "Overlap of neighbours", "shared ages", "n (a)", "n (b)"
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
    let _ = writeln!(s, "{:<12}{:<8}{:>8}{:>10}", "Retention", "wave", "n", "share");
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
        "{:<11}time in study on prior assessments: R² = {:.4}",
        "Collinear", r.collinear.time_retest_r2
    );
    for n in &r.collinear.notes {
        let _ = writeln!(s, "{:<11}{n}", "");
    }
    for (i, w) in r.warnings.iter().enumerate() {
        let _ = writeln!(s, "{:<11}{w}", if i == 0 { "\nWarnings" } else { "" });
    }
    let _ = writeln!(s);
    let _ = writeln!(s, "{:<11}{}", "Caution", super::CAUTIONS[2]);
    s
}

/// Wrap text at `width` columns, indenting continuation lines by `indent`.
fn wrap(text: &str, width: usize, indent: usize) -> String {
    let mut out = String::new();
    let mut line = 0;
    for word in text.split_whitespace() {
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

/// The `braid converge` summary.
pub fn converge_summary(r: &crate::linkage::ConvergeReport) -> String {
    let mut s = String::new();
    let rule = "─".repeat(86);
    let _ = writeln!(s, "braid converge · {}", r.data.file);
    let _ = writeln!(s, "{rule}");
    let _ = writeln!(
        s,
        "{:<11}{} participants · {} rows · cohorts {} (reference: {})",
        "Data",
        thousands(r.data.n_participants.unwrap_or(0)),
        thousands(r.data.n_obs),
        r.cohorts.join(", "),
        r.cohorts[0]
    );
    let _ = writeln!(s, "{:<11}cohorts {}", "Rules", r.cohort_rule);
    let _ = writeln!(s, "{:<11}level differences measured at age {:.2}", "", r.reference_age);
    let _ = writeln!(s);
    let _ = writeln!(
        s,
        "{:<12}{:<58}{:>12}{:>6}{:>10}{:>10}",
        "Models", "", "loglik", "k", "AIC", "BIC"
    );
    for m in &r.models {
        let _ = writeln!(
            s,
            "  {:<10}{:<58}{:>12.3}{:>6}{:>10.1}{:>10.1}",
            m.name,
            format!("{} ({})", m.description, m.method),
            m.loglik,
            m.n_params,
            m.aic,
            m.bic
        );
    }
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
    let _ = writeln!(s);
    let _ = writeln!(s, "{:<12}{:<50}{:>10}{:>12}{:>10}", "Tests", "", "statistic", "df", "p");
    for t in &r.tests {
        let df = match t.df_denominator {
            Some(d) => format!("{}, {:.1}", t.df, d),
            None => format!("{}", t.df),
        };
        let _ = writeln!(s, "  {:<58}{:>10.3}{:>12}{:>10.4}", t.name, t.statistic, df, t.p);
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
            "  {:<12}{:>7.2}{:>10.3}{:>8.3}{:>20}{:>20}{:>9.4}{:>8}",
            label,
            d.age,
            d.difference,
            d.se,
            format!("{:.2} to {:.2}", d.lower, d.upper),
            format!("{:.2} to {:.2}", d.lower_simultaneous, d.upper_simultaneous),
            d.p_holm,
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
            "{:<11}between persons {:.3} (SE {:.3}) · within persons {:.3} (SE {:.3}) · difference {:.3}, p = {:.4}",
            "Age slopes", b.between, b.between_se, b.within, b.within_se, b.difference, b.p
        );
    }
    if let Some(t) = &r.retest {
        let _ = writeln!(s);
        let est = match (t.estimate, t.se, t.p) {
            (Some(e), Some(se), Some(p)) => format!("estimate {e:.3} (SE {se:.3}, p = {p:.4}) · "),
            _ => String::new(),
        };
        let with = t.age_slope_with.map_or("not fitted".to_string(), |w| format!("{w:.3}"));
        let _ = writeln!(
            s,
            "{:<11}{}: {} · R² on the age terms {:.4} · {}linear age term {:.3} without, {} with",
            "Retest",
            t.form.name(),
            t.status,
            t.r2,
            est,
            t.age_slope_without,
            with
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
    let _ = writeln!(s, "{:<11}{}", "Caution", super::CAUTIONS[2]);
    s
}

/// The `braid apc` summary.
pub fn apc_summary(r: &crate::apc::analysis::ApcReport) -> String {
    let mut s = String::new();
    let rule = "─".repeat(86);
    let _ = writeln!(s, "braid apc · {}", r.data.file);
    let _ = writeln!(s, "{rule}");
    let _ = writeln!(
        s,
        "{:<11}{} ({} observations) · {} age groups × {} periods → {} cohorts",
        "Data",
        if r.outcome == "counts" {
            "a table of counts with exposure, Poisson log-linear"
        } else if r.panel.is_some() {
            "panel records, linear mixed model with a random intercept per participant (ML)"
        } else {
            "records with a continuous outcome, least squares"
        },
        thousands(r.n_obs),
        r.shape.a,
        r.shape.p,
        r.shape.a + r.shape.p - 1
    );
    let _ = writeln!(
        s,
        "{:<11}rank deficiency {} (max |X·v| = {:.1e}); null vector in sum-to-zero coding (Kupper et al. 1985):",
        "Design", r.rank_deficiency, r.null_vector_residual
    );
    let line: Vec<String> = r
        .null_vector
        .iter()
        .skip(1)
        .map(|t| format!("{:+.1}", t.value))
        .collect();
    let _ = writeln!(s, "{:<11}{}", "", wrap(&line.join(" "), 75, 11));
    let _ = writeln!(s);
    let kind = if r.outcome == "counts" {
        "(Poisson deviance)"
    } else if r.panel.is_some() {
        "(−2 × ML log-likelihood)"
    } else {
        "(residual sum of squares)"
    };
    let _ = writeln!(s, "{:<16}{:>14}{:>8}  {kind}", "Deviance", "", "df");
    for d in &r.deviance_table {
        let _ = writeln!(s, "  {:<14}{:>14.4}{:>8}", d.model, d.deviance, d.df);
    }
    let _ = writeln!(s);
    let _ = writeln!(
        s,
        "{:<60}{:>12}{:>10}",
        "Identified (no constraint needed)", "estimate", "SE"
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
        let _ = writeln!(
            s,
            "{:<11}no curvature in {}: statistic {:.3} on {} df, p = {:.4}",
            "Curvature",
            t.dimension.name(),
            t.statistic,
            t.df,
            t.p
        );
    }
    let _ = writeln!(s);
    let _ = writeln!(
        s,
        "{:<11}every solution is b₀ + t·v; b₀ is the minimum-norm solution",
        "Solutions"
    );
    let _ = writeln!(
        s,
        "  {:<58}{:>9}{:>9}{:>9}{:>9}",
        "constraint", "t", "age", "period", "cohort"
    );
    for sol in &r.solutions {
        let slope = |d: &str| sol.slopes.iter().find(|x| x.term == d).map_or(f64::NAN, |x| x.value);
        let _ = writeln!(
            s,
            "  {:<58}{:>9.4}{:>9.4}{:>9.4}{:>9.4}",
            sol.constraint,
            sol.t,
            slope("age"),
            slope("period"),
            slope("cohort")
        );
    }
    let _ = writeln!(
        s,
        "{:<11}(slopes per group step; the level effects of each solution are in the JSON; fitted values agree to {:.1e})",
        "", r.fitted_max_difference
    );
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
                "{:<11}{:<12}{:>12.5}  SE {:>9.5}  df {:>8.1}  p {:.4}",
                "", fe.term, fe.estimate, fe.se, fe.df, fe.p
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
    let _ = writeln!(s);
    for (i, a) in r.assumptions.iter().enumerate() {
        let _ = writeln!(s, "{:<11}{}", if i == 0 { "Assumes" } else { "" }, wrap(a, 75, 11));
    }
    let _ = writeln!(s);
    let _ = writeln!(s, "{:<11}{}", "Caution", super::CAUTIONS[2]);
    s
}
