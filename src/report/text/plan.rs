//! The screen of `braid plan`.

use std::fmt::Write;

use super::{RULE_WIDTH, header, labelled, thousands, wrap};
use crate::plan::{DesignResult, PlanReport, Population, Route};

/// A number to at most three decimals, without needless ones.
fn num(v: f64) -> String {
    crate::stats::plain_number((v * 1000.0).round() / 1000.0)
}

/// The mean polynomial in words: 50 + 1.6·(age − 16) − 0.12·(age − 16)².
fn curve(p: &Population) -> String {
    let mut s = num(p.mean[0]);
    for (k, b) in p.mean.iter().enumerate().skip(1) {
        let power = match k {
            1 => String::new(),
            2 => "²".into(),
            3 => "³".into(),
            _ => format!("^{k}"),
        };
        let sign = if *b < 0.0 { "−" } else { "+" };
        let _ = write!(s, " {sign} {}·(age − {}){power}", num(b.abs()), num(p.center));
    }
    s
}

/// Render the plan's report.
pub fn plan_summary(r: &PlanReport) -> String {
    let mut s = String::new();
    let _ = writeln!(
        s,
        "braid plan · {} candidate design{}",
        r.designs.len(),
        if r.designs.len() == 1 { "" } else { "s" }
    );
    let _ = writeln!(s, "{}", "─".repeat(RULE_WIDTH));
    if let Some(p) = &r.plan.population {
        let sds = format!(
            "{}; SDs: intercept {}, slope {} (correlation {}), cluster {}, residual {}{}",
            curve(p),
            num(p.sd_intercept),
            num(p.sd_slope),
            num(p.correlation),
            num(p.sd_cluster),
            num(p.sd_residual),
            if p.retest != 0.0 {
                format!("; retest {}", num(p.retest))
            } else {
                String::new()
            }
        );
        labelled(&mut s, "Population", format_args!("{}", wrap(&sds, 75, 11)));
        labelled(&mut s, "", format_args!("{}", r.population_source));
    }
    labelled(&mut s, "Targets", format_args!("{}", wrap(&targets(r), 75, 11)));
    let sim = &r.plan.simulation;
    let route = match sim.route {
        Route::Information => "expected information only".to_string(),
        _ => format!(
            "expected information and simulation: up to {} replicates per n, stopped when every power's Monte Carlo SE ≤ {}; seed {}",
            thousands(sim.replicates),
            num(sim.precision),
            sim.seed
        ),
    };
    labelled(&mut s, "Route", format_args!("{}", wrap(&route, 75, 11)));
    designs_table(&mut s, r);
    power_table(&mut s, r);
    precision_table(&mut s, r);
    let _ = writeln!(s);
    labelled(&mut s, "Verdict", format_args!("{}", wrap(&r.verdict, 75, 11)));
    let _ = writeln!(s);
    for (i, d) in r.designs.iter().enumerate() {
        let mut line = format!("\"{}\": n = {} per cohort, {}", d.name, d.n_per_cohort, d.n_rule);
        if !d.limits.is_empty() {
            let _ = write!(line, "; falls short: {}", d.limits.join("; "));
        }
        labelled(
            &mut s,
            if i == 0 { "n chosen" } else { "" },
            format_args!("{}", wrap(&line, 75, 11)),
        );
    }
    if !r.warnings.is_empty() {
        let _ = writeln!(s);
    }
    for (i, w) in r.warnings.iter().enumerate() {
        labelled(
            &mut s,
            if i == 0 { "Warning" } else { "" },
            format_args!("{}", wrap(&w.message, 75, 11)),
        );
    }
    let _ = writeln!(s);
    for (i, a) in r.assumptions.iter().enumerate() {
        labelled(
            &mut s,
            if i == 0 { "Assumes" } else { "" },
            format_args!("{}", wrap(a, 75, 11)),
        );
    }
    s
}

fn targets(r: &PlanReport) -> String {
    let t = &r.plan.targets;
    let mut v = Vec::new();
    if let Some(c) = t.convergence {
        v.push(format!(
            "convergence test power ≥ {} for the middle cohort offset by {}",
            num(c.power),
            num(c.offset)
        ));
    }
    if let Some(a) = t.age_term {
        v.push(format!("age term power ≥ {}", num(a.power)));
    }
    if let Some(d) = t.rate_difference {
        v.push(format!(
            "power ≥ {} for the difference in rate between ages {} and {}",
            num(d.power),
            num(d.ages[0]),
            num(d.ages[1])
        ));
    }
    if let Some(h) = &t.half_width {
        let ages: Vec<String> = h.ages.iter().map(|a| num(*a)).collect();
        v.push(format!(
            "95% half-width ≤ {} at ages {}",
            num(h.at_most),
            ages.join(", ")
        ));
    }
    if let Some(y) = t.max_years {
        v.push(format!("fieldwork ≤ {} years", num(y)));
    }
    if let Some(b) = t.max_budget {
        v.push(format!("budget ≤ {}", thousands(b.round() as usize)));
    }
    if v.is_empty() {
        return "none: each design is evaluated at its n".into();
    }
    format!("{}; tests at level {}", v.join("; "), num(t.alpha))
}

fn designs_table(s: &mut String, r: &PlanReport) {
    header(
        s,
        &[
            "Designs", "cohorts", "waves", "years", "ages", "overlap", "n/cohort", "cost", "meets",
        ],
        &[-26, 8, 6, 6, 12, 8, 9, 11, 6],
    );
    for d in &r.designs {
        let overlap = d.overlap_years.iter().copied().fold(f64::INFINITY, f64::min);
        let _ = writeln!(
            s,
            "  {:<24}{:>8}{:>6}{:>6}{:>12}{:>8}{:>9}{:>11}{:>6}",
            short(&d.name, 23),
            d.entry_ages.len(),
            d.wave_times.len(),
            num(d.duration_years),
            format!("{}–{}", num(d.age_span[0]), num(d.age_span[1])),
            if overlap.is_finite() {
                format!("{overlap:.1}")
            } else {
                "—".into()
            },
            d.n_per_cohort,
            thousands(d.cost.round() as usize),
            if d.meets_targets { "yes" } else { "no" }
        );
    }
    let _ = writeln!(
        s,
        "  overlap: the fewest years of age shared by neighbouring cohorts (negative: a gap)"
    );
}

/// A note under a table, indented two spaces and wrapped.
fn note(s: &mut String, text: &str) {
    let _ = writeln!(s, "  {}", wrap(text, 82, 2));
}

fn short(name: &str, width: usize) -> String {
    if name.chars().count() <= width {
        name.to_string()
    } else {
        let mut t: String = name.chars().take(width - 1).collect();
        t.push('…');
        t
    }
}

fn power_table(s: &mut String, r: &PlanReport) {
    if r.plan.targets.powers().is_empty() {
        return;
    }
    header(
        s,
        &["Power", "target", "effect", "needed", "expected", "simulated", "MC SE"],
        &[-26, -16, 9, 8, 9, 10, 8],
    );
    for d in &r.designs {
        for (k, (key, p)) in d.power.iter().enumerate() {
            let _ = writeln!(
                s,
                "  {:<24}{:<16}{:>9}{:>8.2}{:>9.3}{:>10}{:>8}",
                if k == 0 { short(&d.name, 23) } else { String::new() },
                key.replace('_', " "),
                format!("{:.3}", p.effect),
                p.required,
                p.information,
                p.simulated.map_or("—".into(), |v| format!("{v:.3}")),
                p.mc_se.map_or("—".into(), |v| format!("{v:.3}"))
            );
            if let (Some(size), Some(se)) = (p.size, p.size_mc_se) {
                let _ = writeln!(
                    s,
                    "  {:<24}{:<16}{:>9}{:>8}{:>9}{:>10.3}{:>8.3}",
                    "", "  without offset", "0", "", "", size, se
                );
            }
        }
        replicate_line(s, d);
    }
    note(
        s,
        "expected: Wald power from the expected information; simulated: the share of replicates rejecting, with its Monte Carlo SE",
    );
}

fn replicate_line(s: &mut String, d: &DesignResult) {
    if d.replicates > 0 {
        let sd = d.slope_sd.map_or(String::new(), |sd| {
            format!(
                "; SD of the age term {:.4} against an expected SE of {:.4}",
                sd,
                d.se.get("age").copied().unwrap_or(f64::NAN)
            )
        });
        let _ = writeln!(
            s,
            "  {:<24}{} replicates at n = {}{}{sd}",
            "",
            thousands(d.replicates),
            d.n_per_cohort,
            if d.failed > 0 {
                format!(" ({} failed)", d.failed)
            } else {
                String::new()
            }
        );
    }
}

fn precision_table(s: &mut String, r: &PlanReport) {
    if r.plan.targets.half_width.is_none() {
        return;
    }
    header(
        s,
        &["Precision", "age", "at most", "expected", "simulated", "MC SE", "bias"],
        &[-26, 6, 9, 10, 11, 8, 9],
    );
    for d in &r.designs {
        for (k, p) in d.precision.iter().enumerate() {
            let _ = writeln!(
                s,
                "  {:<24}{:>6}{:>9}{:>10.3}{:>11}{:>8}{:>9}",
                if k == 0 { short(&d.name, 23) } else { String::new() },
                num(p.age),
                num(p.at_most),
                p.information,
                p.simulated.map_or("—".into(), |v| format!("{v:.3}")),
                p.mc_se.map_or("—".into(), |v| format!("{v:.3}")),
                p.bias.map_or("—".into(), |v| format!("{v:.3}"))
            );
        }
    }
    note(s, "half-width of the mean's 95% interval, in outcome units");
}
