//! The page's sections, in the order of a researcher's reasoning: the
//! study, whether the cohorts converge, the stitched trajectory, what age,
//! period and cohort can be told apart, the classical analysis and the
//! scale when asked for, the assumptions and cautions, a methods paragraph
//! and what it takes to reproduce the page.

use std::fmt::Write;

use super::{Page, esc, num, pval, text};
use crate::error::Result;
use crate::study::StudyReport;

/// The section headings, in order (the browser test checks each is shown).
pub const HEADINGS: [&str; 9] = [
    "The study",
    "Do the cohorts converge?",
    "The stitched trajectory",
    "What age, period and cohort can be told apart",
    "The cohort × wave mixed ANOVA",
    "Reliability of the scale",
    "Assumptions and cautions",
    "Methods paragraph",
    "Reproducibility",
];

const IDS: [&str; 9] = [
    "study",
    "converge",
    "trajectory",
    "apc",
    "anova",
    "reliability",
    "cautions",
    "methods",
    "reproducibility",
];

/// One table row per item of the JSON array at `list`: `row` gets the item
/// and a maker of its fields' pointers (`p("se")` is `list/k/se`).
fn rows_of<T>(items: &[T], list: &str, row: impl Fn(&T, &dyn Fn(&str) -> String) -> Vec<String>) -> Vec<Vec<String>> {
    items
        .iter()
        .enumerate()
        .map(|(k, x)| row(x, &|field: &str| format!("{list}/{k}/{field}")))
        .collect()
}

fn open(page: &mut Page<'_>, k: usize) {
    let _ = write!(
        page.html,
        "<section id=\"{}\">\n<h2>{}</h2>\n",
        IDS[k],
        esc(HEADINGS[k])
    );
}

fn close(page: &mut Page<'_>) {
    page.push("</section>\n");
}

/// Which sections the page holds.
fn present(r: &StudyReport) -> [bool; 9] {
    [
        true,
        true,
        true,
        true,
        r.anova.is_some(),
        r.score.is_some(),
        true,
        true,
        true,
    ]
}

/// The number of cohorts in words: the file's cohort column, or as many as
/// the design report's cohort rule derived ("5 cohorts", "1 cohort (derived)").
fn cohorts_in_words(r: &StudyReport) -> String {
    let (shown, k, derived) = match r.data.n_cohorts {
        Some(k) => (num("design.json", "data/n_cohorts", k as f64, 0), k, ""),
        None => (r.design.cohorts.len().to_string(), r.design.cohorts.len(), " (derived)"),
    };
    format!("{shown} cohort{}{derived}", if k == 1 { "" } else { "s" })
}

/// The title, the one-line answer and the contents.
pub(super) fn header(page: &mut Page<'_>, r: &StudyReport) {
    let d = &r.data;
    let _ = write!(
        page.html,
        "<header><h1>{} by age: a cohort-sequential study</h1>\n<p class=\"lede\">{} · {} observations of {} participants in {}, ages {} to {}</p>\n<nav aria-label=\"Contents\"><ol>",
        esc(&d.outcome),
        esc(&d.file),
        num("design.json", "data/n_obs", d.n_obs as f64, 0),
        num(
            "design.json",
            "data/n_participants",
            d.n_participants.unwrap_or(0) as f64,
            0
        ),
        cohorts_in_words(r),
        num("design.json", "data/age_min", d.age_min, 1),
        num("design.json", "data/age_max", d.age_max, 1),
    );
    for (k, shown) in present(r).iter().enumerate() {
        if *shown {
            let _ = write!(page.html, "<li><a href=\"#{}\">{}</a></li>", IDS[k], esc(HEADINGS[k]));
        }
    }
    page.push("</ol></nav>\n");
    glance(page, r);
    page.push("</header>\n");
}

/// The answers in three lines, each pointing to its section.
fn glance(page: &mut Page<'_>, r: &StudyReport) {
    let mut lines = Vec::new();
    if let Some(c) = &r.converge {
        let p_of = |k: usize| {
            c.tests
                .get(k)
                .map_or(String::new(), |t| pval("converge.json", &format!("tests/{k}/p"), t.p))
        };
        lines.push(format!(
            "<a href=\"#converge\">Convergence</a>: cohorts differ in level, p = {}; in age trend, p = {}.",
            p_of(0),
            p_of(1)
        ));
    }
    let t = &r.fit.trajectory;
    if let Some((k, e)) = t.extrema.iter().enumerate().next() {
        let p = |field: &str| format!("trajectory/extrema/{k}/{field}");
        lines.push(format!(
            "<a href=\"#trajectory\">The stitched curve</a> has a {} at age {} (95% interval {} to {}).",
            esc(e.kind),
            num("fit.json", &p("age"), e.age, 2),
            num("fit.json", &p("lower"), e.lower, 2),
            num("fit.json", &p("upper"), e.upper, 2)
        ));
    } else if let Some(e) = r.fit.fixed.get(1) {
        lines.push(format!(
            "<a href=\"#trajectory\">The stitched curve</a> changes by {} per year at the centre age.",
            num("fit.json", "fixed/1/estimate", e.estimate, 3)
        ));
    }
    if let Some(q) = r
        .apc
        .as_ref()
        .and_then(|a| a.exact.as_ref())
        .and_then(|e| e.identified.first())
    {
        let (name, detail) = q.quantity.split_once(": ").unwrap_or((q.quantity.as_str(), ""));
        let named = if detail.is_empty() {
            esc(name)
        } else {
            format!("{} ({})", esc(name), esc(detail))
        };
        lines.push(format!(
            "<a href=\"#apc\">Age, period and cohort</a>: the identified {named} is {} (SE {}); any further split of it rests on an untestable assumption.",
            num("apc.json", "exact/identified/0/estimate", q.estimate, 4),
            num("apc.json", "exact/identified/0/se", q.se, 4)
        ));
    }
    if !lines.is_empty() {
        let _ = writeln!(page.html, "<div class=\"verdict\"><p>{}</p></div>", lines.join("<br>"));
    }
}

/// The study: data, coverage and Lexis diagram, retention, dropout.
pub(super) fn study(page: &mut Page<'_>, r: &StudyReport) -> Result<()> {
    open(page, 0);
    let (d, f) = (&r.design.data, "design.json");
    let rows = vec![
        vec!["data file".into(), esc(&d.file)],
        vec!["rows read".into(), num(f, "data/n_rows_read", d.n_rows_read as f64, 0)],
        vec!["rows used".into(), num(f, "data/n_obs", d.n_obs as f64, 0)],
        vec![
            "rows without an outcome".into(),
            num(f, "data/dropped/missing_outcome", d.dropped.missing_outcome as f64, 0),
        ],
        vec![
            "rows without an age".into(),
            num(f, "data/dropped/missing_age", d.dropped.missing_age as f64, 0),
        ],
        vec![
            "participants".into(),
            num(f, "data/n_participants", d.n_participants.unwrap_or(0) as f64, 0),
        ],
        vec!["cohorts".into(), cohorts_in_words(r)],
        vec![
            "clusters".into(),
            d.n_clusters
                .map_or("none named".to_string(), |k| num(f, "data/n_clusters", k as f64, 0)),
        ],
        vec![
            "ages (years)".into(),
            format!(
                "{} to {}",
                num(f, "data/age_min", d.age_min, 2),
                num(f, "data/age_max", d.age_max, 2)
            ),
        ],
    ];
    page.table("What was read and used", &["", "#value"], &rows);
    page.figure(
        "coverage.svg",
        "Coverage chart: one row per cohort, youngest at the bottom, and one tile per age band shaded by the number of observations; bars between rows span the ages that neighbouring cohorts share.",
    )?;
    page.figure(
        "lexis.svg",
        "Lexis diagram: calendar time across, age up; each participant a lifeline in the cohort's colour with a dot at each assessment, over diagonals of constant birth year.",
    )?;
    retention(page, r);
    dropout(page, r);
    for (k, w) in r.design.warnings.iter().enumerate() {
        let _ = writeln!(
            page.html,
            "<p class=\"warning\">{}</p>",
            text(f, &format!("warnings/{k}"), &w.message)
        );
    }
    close(page);
    Ok(())
}

fn retention(page: &mut Page<'_>, r: &StudyReport) {
    let mut waves: Vec<&str> = Vec::new();
    for row in &r.design.retention {
        if !waves.contains(&row.wave.as_str()) {
            waves.push(&row.wave);
        }
    }
    let mut head = vec!["cohort".to_string()];
    head.extend(waves.iter().map(|w| format!("#wave {w}")));
    let head: Vec<&str> = head.iter().map(String::as_str).collect();
    let mut rows: Vec<Vec<String>> = Vec::new();
    for c in &r.design.cohorts {
        let mut row = vec![esc(&c.cohort)];
        for w in &waves {
            let cell = r
                .design
                .retention
                .iter()
                .position(|x| x.cohort == c.cohort && x.wave == *w)
                .map_or(String::new(), |k| {
                    let x = &r.design.retention[k];
                    format!(
                        "{} ({})",
                        num("design.json", &format!("retention/{k}/n"), x.n as f64, 0),
                        num("design.json", &format!("retention/{k}/share"), x.share, 2)
                    )
                });
            row.push(cell);
        }
        rows.push(row);
    }
    page.table(
        "Retention: participants assessed at each wave (share of the cohort's first wave)",
        &head,
        &rows,
    );
}

fn dropout(page: &mut Page<'_>, r: &StudyReport) {
    let b = &r.design.attrition.baseline;
    if b.is_empty() {
        return;
    }
    let f = "design.json";
    let rows = rows_of(b, "attrition/baseline", |x, p| {
        vec![
            esc(&x.variable),
            num(f, &p("n_stayers"), x.n_stayers as f64, 0),
            num(f, &p("n_leavers"), x.n_leavers as f64, 0),
            num(f, &p("stayers_mean"), x.stayers_mean, 2),
            num(f, &p("leavers_mean"), x.leavers_mean, 2),
            num(f, &p("difference"), x.difference, 2),
            num(f, &p("se"), x.se, 2),
            num(f, &p("standardized"), x.standardized, 2),
        ]
    });
    page.table(
        "Dropout: those who stayed against those who left, at their first assessment",
        &[
            "at baseline",
            "#stayed",
            "#left",
            "#mean, stayed",
            "#mean, left",
            "#difference",
            "#SE",
            "#standardized",
        ],
        &rows,
    );
}

/// Do the cohorts converge: the tests, the shared-age differences, the verdict.
pub(super) fn converge(page: &mut Page<'_>, r: &StudyReport) -> Result<()> {
    open(page, 1);
    let Some(c) = &r.converge else {
        skipped(page, r, "converge");
        close(page);
        return Ok(());
    };
    let f = "converge.json";
    let _ = writeln!(page.html, "<p class=\"verdict\">{}</p>", text(f, "verdict", &c.verdict));
    let rows = rows_of(&c.tests, "tests", |t, p| {
        vec![
            esc(&t.name),
            num(f, &p("statistic"), t.statistic, 2),
            num(f, &p("df"), t.df, 1),
            if t.withheld.is_some() {
                "withheld".to_string()
            } else {
                pval(f, &p("p"), t.p)
            },
        ]
    });
    page.table(
        "Tests of the linkage assumption (likelihood ratio and Wald)",
        &["test", "#statistic", "#df", "#p"],
        &rows,
    );
    page.figure(
        "shared_ages.svg",
        "Differences between neighbouring cohorts at the ages they share, with pointwise and simultaneous 95% bands and the equivalence margin.",
    )?;
    close(page);
    Ok(())
}

fn skipped(page: &mut Page<'_>, r: &StudyReport, name: &str) {
    if let Some((_, why)) = r.skipped.iter().find(|(n, _)| n == name) {
        let _ = writeln!(page.html, "<p class=\"skipped\">Not run: {}</p>", esc(why));
    }
}

/// The stitched trajectory: figure, fixed and random effects, rate, turning points.
pub(super) fn trajectory(page: &mut Page<'_>, r: &StudyReport) -> Result<()> {
    open(page, 2);
    let (fit, f) = (&r.fit, "fit.json");
    page.figure(
        "trajectory.svg",
        &format!(
            "The stitched mean trajectory of {} over the observed ages with its 95% band, each cohort's observed wave means with whiskers of 1.96 SE, and a sample of participants' observed paths.",
            fit.data.outcome
        ),
    )?;
    let rows = rows_of(&fit.fixed, "fixed", |e, p| {
        vec![
            esc(&e.term),
            num(f, &p("estimate"), e.estimate, 4),
            num(f, &p("se"), e.se, 4),
            num(f, &p("df"), e.df, 1),
            pval(f, &p("p"), e.p),
            format!(
                "{} to {}",
                num(f, &p("lower"), e.lower, 4),
                num(f, &p("upper"), e.upper, 4)
            ),
        ]
    });
    page.table(
        "Fixed effects (REML; t tests with Satterthwaite df)",
        &["term", "#estimate", "#SE", "#df", "#p", "#95% interval"],
        &rows,
    );
    let mut rows = Vec::new();
    for (k, term) in fit.random.iter().enumerate() {
        for (j, name) in term.terms.iter().enumerate() {
            rows.push(vec![
                format!("{} · {}", esc(&term.factor), esc(name)),
                num(f, &format!("random/{k}/sd/{j}"), term.sd[j], 3),
                if j > 0 && term.structure == crate::lmm::Covariance::Diagonal {
                    "0 (assumed)".into()
                } else if j > 0 {
                    num(
                        f,
                        &format!("random/{k}/correlation/{}/{j}", 0),
                        term.correlation[0][j],
                        2,
                    )
                } else {
                    String::new()
                },
            ]);
        }
    }
    rows.push(vec![
        "residual variance".into(),
        num(f, "residual_variance", fit.residual_variance, 3),
        String::new(),
    ]);
    page.table(
        "Random effects: SDs, and correlations with the intercept",
        &["term", "#SD", "#correlation"],
        &rows,
    );
    // The optimiser's notes (a variance at zero, a fit that did not
    // converge), as the text screen gives them.
    for m in &fit.info.messages {
        let _ = writeln!(page.html, "<p class=\"skipped\">Note: {}</p>", esc(m));
    }
    rates(page, r);
    close(page);
    Ok(())
}

fn rates(page: &mut Page<'_>, r: &StudyReport) {
    let (t, f) = (&r.fit.trajectory, "fit.json");
    let rows = rows_of(&t.at_ages, "trajectory/at_ages", |a, p| {
        vec![
            num(f, &p("age"), a.age, 1),
            num(f, &p("mean"), a.mean, 2),
            format!(
                "{} to {}",
                num(f, &p("lower"), a.lower, 2),
                num(f, &p("upper"), a.upper, 2)
            ),
            num(f, &p("rate"), a.rate, 3),
            format!(
                "{} to {}",
                num(f, &p("rate_lower"), a.rate_lower, 3),
                num(f, &p("rate_upper"), a.rate_upper, 3)
            ),
        ]
    });
    if !rows.is_empty() {
        page.table(
            "The mean and its rate of change (per year) at chosen ages",
            &["age", "#mean", "#95% interval", "#rate", "#95% interval"],
            &rows,
        );
    }
    let rows = rows_of(&t.extrema, "trajectory/extrema", |e, p| {
        vec![
            esc(e.kind),
            num(f, &p("age"), e.age, 2),
            format!(
                "{} to {}",
                num(f, &p("lower"), e.lower, 2),
                num(f, &p("upper"), e.upper, 2)
            ),
            num(f, &p("mean"), e.mean, 2),
        ]
    });
    if rows.is_empty() {
        page.push("<p>The curve has no turning point inside the observed ages.</p>\n");
    } else {
        page.table(
            "Turning points inside the observed ages",
            &["kind", "#age", "#95% interval", "#mean there"],
            &rows,
        );
    }
}

/// What age, period and cohort can be told apart.
pub(super) fn apc(page: &mut Page<'_>, r: &StudyReport, figures: &[String]) -> Result<()> {
    open(page, 3);
    let Some(a) = &r.apc else {
        skipped(page, r, "apc");
        close(page);
        return Ok(());
    };
    let f = "apc.json";
    page.push(
        "<p>Age = period − birth time exactly, so only some combinations of the three are identified. Every constrained split shown rests on an untestable assumption.</p>\n",
    );
    if let Some(e) = &a.exact {
        let rows = rows_of(&e.identified, "exact/identified", |q, p| {
            vec![
                esc(&q.quantity),
                num(f, &p("estimate"), q.estimate, 4),
                num(f, &p("se"), q.se, 4),
            ]
        });
        page.table(
            "Identified in the exact-value model",
            &["quantity", "#estimate", "#SE"],
            &rows,
        );
        let rows = rows_of(&e.tests, "exact/tests", |t, p| {
            vec![
                esc(&t.name),
                num(f, &p("statistic"), t.statistic, 3),
                format!(
                    "{}, {}",
                    num(f, &p("df"), t.df as f64, 0),
                    num(f, &p("df_denominator"), t.df_denominator, 1)
                ),
                t.p.map_or_else(
                    || t.withheld.as_deref().map_or("—".into(), esc),
                    |v| pval(f, &p("p"), v),
                ),
            ]
        });
        page.table(
            "Tests of the curves (F, Satterthwaite df)",
            &["test", "#F", "#df", "#p"],
            &rows,
        );
    }
    // On records the exact-value model is the one to read; its figure alone
    // is shown, and the grouped model's figures stay in the folder.
    let exact = figures.iter().any(|n| n == "apc_exact.svg");
    for name in figures.iter().filter(|n| !exact || *n == "apc_exact.svg") {
        page.figure(name, apc_alt(name))?;
    }
    for (k, w) in a.assumptions.iter().enumerate() {
        let _ = writeln!(page.html, "<p>{}</p>", text(f, &format!("assumptions/{k}"), w));
    }
    close(page);
    Ok(())
}

/// The text alternative of an APC figure.
fn apc_alt(name: &str) -> &'static str {
    match name {
        "apc_exact.svg" => {
            "Age, period and cohort curves in exact time, each beyond its straight line (the part the data identify), with 95% bands."
        }
        "apc_effects.svg" => {
            "Age, period and cohort effects under each constraint: every line is one untestable assumption, and all fit the data equally."
        }
        "apc_curvature.svg" => "The identified curvature of age, period and cohort effects, with 95% intervals.",
        "apc_line.svg" => "The line of solutions: the slopes each constraint gives, all fitting the data equally.",
        _ => "A figure of the age–period–cohort analysis.",
    }
}

/// The classical mixed ANOVA, when asked for.
pub(super) fn anova(page: &mut Page<'_>, r: &StudyReport) -> Result<()> {
    let Some(a) = &r.anova else { return Ok(()) };
    open(page, 4);
    let f = "anova.json";
    let rows = rows_of(&a.analysis.effects, "effects", |e, p| {
        vec![
            esc(&e.effect),
            num(f, &p("f"), e.f, 3),
            format!("{}, {}", num(f, &p("df1"), e.df1, 0), num(f, &p("df2"), e.df2, 0)),
            pval(f, &p("p"), e.p),
            e.p_gg.map_or("—".into(), |v| pval(f, &p("p_gg"), v)),
            num(f, &p("partial_eta2"), e.partial_eta2, 3),
        ]
    });
    page.table(
        &format!(
            "Split-plot ANOVA on {} complete cases",
            num(f, "n_complete", a.n_complete as f64, 0)
        ),
        &["effect", "#F", "#df", "#p", "#p (Greenhouse–Geisser)", "#partial η²"],
        &rows,
    );
    let _ = writeln!(
        page.html,
        "<p class=\"verdict\">{}</p>",
        text(f, "recommendation", &a.analysis.recommendation)
    );
    page.figure(
        "anova_means.svg",
        "Cohort × wave means of the complete cases on an age axis, one line per cohort.",
    )?;
    close(page);
    Ok(())
}

/// The scale's reliability, when the study scores one.
pub(super) fn reliability(page: &mut Page<'_>, r: &StudyReport) -> Result<()> {
    let Some(s) = &r.score else { return Ok(()) };
    open(page, 5);
    let f = "score.json";
    let rows = rows_of(&s.per_wave, "per_wave", |w, p| {
        vec![
            esc(w.wave.as_deref().unwrap_or("all")),
            num(f, &p("n"), w.n as f64, 0),
            num(f, &p("alpha"), w.alpha, 3),
            format!(
                "{} to {}",
                num(f, &p("alpha_lower"), w.alpha_lower, 3),
                num(f, &p("alpha_upper"), w.alpha_upper, 3)
            ),
            w.omega.map_or("—".into(), |o| num(f, &p("omega"), o, 3)),
        ]
    });
    page.table(
        "Cronbach's α per wave with Feldt's 95% interval, and ω",
        &["wave", "#n", "#α", "#95% interval", "#ω"],
        &rows,
    );
    page.figure(
        "reliability.svg",
        "Cronbach's α at each wave with Feldt's 95% interval, and ω, for all respondents and each cohort.",
    )?;
    close(page);
    Ok(())
}

/// The assumptions and cautions.
pub(super) fn cautions(page: &mut Page<'_>, r: &StudyReport) {
    open(page, 6);
    page.push("<ul>\n");
    for (k, c) in r.fit.cautions.iter().enumerate() {
        let _ = writeln!(page.html, "<li>{}</li>", text("fit.json", &format!("cautions/{k}"), c));
    }
    page.push("<li>Constraints that split age, period and cohort effects apart are untestable assumptions: report the identified quantities, and the constraint behind any split.</li>\n");
    if let Some(c) = &r.converge {
        for (k, a) in c.assumptions.iter().enumerate() {
            let _ = writeln!(
                page.html,
                "<li>{}</li>",
                text("converge.json", &format!("assumptions/{k}"), a)
            );
        }
    }
    page.push("</ul>\n");
    close(page);
}

/// A paragraph to adapt for a paper, naming each method with its source.
pub(super) fn methods(page: &mut Page<'_>, r: &StudyReport) {
    open(page, 7);
    let fit = &r.fit;
    let model = fit.model.join("; ");
    let mut p = format!(
        "The cohorts' overlapping segments were stitched into one trajectory of {} (Bell 1953, <i>Child Development</i> 24) with a linear mixed model ({}), fitted by restricted maximum likelihood (REML; Patterson &amp; Thompson 1971, <i>Biometrika</i> 58) in its penalized least squares form (Bates, Mächler, Bolker &amp; Walker 2015, <i>Journal of Statistical Software</i> 67(1)). Fixed effects were tested with t statistics on Satterthwaite's (1946, <i>Biometrics Bulletin</i> 2) approximate df. ",
        esc(&fit.data.outcome),
        esc(&model)
    );
    if r.converge.is_some() {
        p.push_str("Before pooling, convergence of the cohorts was tested by nested models with cohort-specific levels and age terms compared by likelihood ratio, and cohort differences at shared ages were checked against an equivalence margin (Miyazaki &amp; Raudenbush 2000, <i>Psychological Methods</i> 5). ");
    }
    if r.apc.is_some() {
        p.push_str("What the data identify about age, period and cohort was reported as the identified quantities (Holford 1983, <i>Biometrics</i> 39), with each constrained solution named by its constraint. ");
    }
    if r.anova.is_some() {
        p.push_str("The planned cohort × wave mixed ANOVA was run on complete cases with the Greenhouse–Geisser (1959, <i>Psychometrika</i> 24) correction and Mauchly's (1940, <i>Annals of Mathematical Statistics</i> 11) test. ");
    }
    if r.score.is_some() {
        p.push_str("Reliability was Cronbach's (1951, <i>Psychometrika</i> 16) α with Feldt's (1965, <i>Psychometrika</i> 30) interval. ");
    }
    let _ = write!(p, "Analyses used braid {}.", esc(&r.provenance.braid_version));
    let _ = writeln!(page.html, "<p>{p}</p>");
    close(page);
}

/// The study file, the command, the seeds and the input's checksum.
pub(super) fn reproducibility(page: &mut Page<'_>, r: &StudyReport) {
    open(page, 8);
    let v = &r.provenance;
    let mut rows = vec![
        vec!["braid version".into(), esc(&v.braid_version)],
        vec!["command".into(), format!("<code>{}</code>", esc(&v.command))],
        vec!["data file".into(), esc(&v.data_file)],
        vec![
            "SHA-256 of the data file".into(),
            format!("<code>{}</code>", esc(&v.data_sha256)),
        ],
    ];
    for (k, (name, seed)) in v.seeds.iter().enumerate() {
        rows.push(vec![
            format!("seed: {}", esc(name)),
            num("report.json", &format!("provenance/seeds/{k}/1"), *seed as f64, 0),
        ]);
    }
    page.table("What it takes to make this page again", &["", "value"], &rows);
    if let Some(study) = &v.study_file {
        let _ = writeln!(page.html, "<h3>The study file</h3>\n<pre>{}</pre>", esc(study));
    }
    close(page);
}
