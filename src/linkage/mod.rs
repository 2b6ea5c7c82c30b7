//! Do the cohorts converge? Tests of the linkage assumption behind a stitched
//! curve (Bell 1953; Miyazaki & Raudenbush 2000, *Psychological Methods* 5).
//!
//! On the same rows braid fits a nested sequence:
//! - M0: one common trajectory (the model of `braid fit`);
//! - M1: M0 plus a level difference per cohort (treatment coding against the
//!   youngest cohort), measured at the reference age, which is the centre of
//!   the age basis;
//! - M2: M1 plus cohort differences in every age term.
//!
//! M0–M2 are fitted by ML and compared by likelihood ratio; M2 is refitted by
//! REML for Wald F tests with Satterthwaite-type df, for the cohort
//! differences at shared ages, and for their equivalence tests. A separate
//! fit splits age into baseline age (between persons) and time since
//! baseline (within persons).

pub mod retest;
pub mod variance;

use serde::Serialize;

use crate::data::derive::{self, CohortRule};
use crate::data::{DataSummary, Panel};
use crate::error::{Error, Result};
use crate::infer::tests::{TestResult, holm, likelihood_ratio, wald_f};
use crate::infer::{self, Contrast, LEVEL};
use crate::lmm::{self, Fit, FitOptions, Method, MixedProblem};
use crate::spec::{self, AgeSpec, ModelFrame, ModelSpec};

/// The equivalence margin.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
#[serde(tag = "unit", content = "value", rename_all = "snake_case")]
pub enum Margin {
    /// In outcome units.
    Outcome(f64),
    /// In SDs of the outcome (over all rows used).
    Sd(f64),
}

/// Default margin: a fifth of the outcome's SD, the conventional bound of a
/// "small" standardized difference (Cohen 1988; common practice).
pub const DEFAULT_MARGIN_SD: f64 = 0.2;

/// Shared ages per pair of neighbouring cohorts.
pub const DEFAULT_SHARED_AGES: usize = 5;

/// Draws for the simultaneous critical value (max-|z| over the shared ages).
const SIMULTANEOUS_DRAWS: usize = 20_000;

/// Seed of those draws, fixed so that reports are reproducible.
const SIMULTANEOUS_SEED: u64 = 1953;

/// Settings of the convergence analysis, validated by [`ConvergeOptions::new`].
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ConvergeOptions {
    /// Age at which cohort level differences are measured; default: the
    /// median age of the observations inside the neighbours' overlaps.
    pub reference_age: Option<f64>,
    /// Equivalence margin.
    pub margin: Margin,
    /// Number of shared ages per neighbouring pair.
    pub shared_ages: usize,
    /// How cohorts are found.
    pub cohort_rule: CohortRule,
    /// Add and check a retest term.
    pub retest: Option<retest::RetestForm>,
}

impl ConvergeOptions {
    /// Validated settings.
    ///
    /// # Errors
    /// [`Error::Spec`] for a margin that is not a positive finite number, a
    /// reference age that is not finite, or a number of shared ages outside
    /// 1 to 1,000.
    pub fn new(
        reference_age: Option<f64>,
        margin: Margin,
        shared_ages: usize,
        cohort_rule: CohortRule,
        retest: Option<retest::RetestForm>,
    ) -> Result<Self> {
        let options = ConvergeOptions {
            reference_age,
            margin,
            shared_ages,
            cohort_rule,
            retest,
        };
        options.validate()?;
        Ok(options)
    }

    fn validate(&self) -> Result<()> {
        let (key, m) = match self.margin {
            Margin::Outcome(m) => ("margin", m),
            Margin::Sd(m) => ("margin_sd", m),
        };
        let bad = |key: &str, x: f64, what: &str| Error::Spec {
            parameter: key.into(),
            message: format!("{x} is not a usable value; give {what}"),
        };
        if !(m.is_finite() && m > 0.0) {
            return Err(bad(key, m, "a positive finite number"));
        }
        if let Some(a) = self.reference_age.filter(|a| !a.is_finite()) {
            return Err(bad("reference_age", a, "a finite age"));
        }
        if self.shared_ages == 0 || self.shared_ages > 1000 {
            return Err(Error::Spec {
                parameter: "shared_ages".into(),
                message: format!("{} shared ages; choose between 1 and 1000", self.shared_ages),
            });
        }
        Ok(())
    }
}

impl Default for ConvergeOptions {
    fn default() -> Self {
        ConvergeOptions {
            reference_age: None,
            margin: Margin::Sd(DEFAULT_MARGIN_SD),
            shared_ages: DEFAULT_SHARED_AGES,
            cohort_rule: CohortRule::Auto,
            retest: None,
        }
    }
}

/// One fitted model of the sequence.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct ModelSummary {
    /// M0, M1, M2, or a named extra fit.
    pub name: String,
    /// The model in words.
    pub description: String,
    /// REML or ML.
    pub method: String,
    /// Log-likelihood.
    pub loglik: f64,
    /// Parameters (fixed effects, covariance parameters, residual variance).
    pub n_params: usize,
    /// AIC.
    pub aic: f64,
    /// BIC.
    pub bic: f64,
    /// Whether the optimiser certified a minimum.
    pub converged: bool,
}

/// The difference between two neighbouring cohorts' predicted means at one
/// shared age (later cohort minus earlier), from the REML fit of M2.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct SharedAge {
    /// The younger cohort of the pair.
    pub cohort_a: String,
    /// The older cohort.
    pub cohort_b: String,
    /// Age.
    pub age: f64,
    /// Mean of cohort b minus mean of cohort a.
    pub difference: f64,
    /// Its standard error.
    pub se: f64,
    /// Satterthwaite df.
    pub df: f64,
    /// Pointwise 95% interval.
    pub lower: f64,
    /// Pointwise 95% interval.
    pub upper: f64,
    /// Simultaneous 95% interval over all shared ages (max-|z| critical value).
    pub lower_simultaneous: f64,
    /// Simultaneous 95% interval over all shared ages.
    pub upper_simultaneous: f64,
    /// Two-sided p of no difference.
    pub p: f64,
    /// Holm-adjusted p over all shared ages.
    pub p_holm: f64,
    /// p of the two one-sided tests against ±margin (the larger of the two).
    pub p_equivalence: f64,
    /// Whether the difference lies within ±margin by the two one-sided tests
    /// at the 5% level (its 90% interval inside the margin).
    pub equivalent: bool,
}

/// Baseline age against time since baseline.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct BetweenWithin {
    /// Slope of baseline age (between persons), per year.
    pub between: f64,
    /// Its SE.
    pub between_se: f64,
    /// Slope of time since baseline (within persons), per year.
    pub within: f64,
    /// Its SE.
    pub within_se: f64,
    /// between − within.
    pub difference: f64,
    /// Its SE.
    pub difference_se: f64,
    /// Satterthwaite df.
    pub df: f64,
    /// Two-sided p of equal slopes.
    pub p: f64,
}

/// The convergence report, with stable JSON keys.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct ConvergeReport {
    /// What was read and used.
    pub data: DataSummary,
    /// The model of M0, as given.
    pub model: ModelSpec,
    /// The settings that produced the report.
    pub options: ConvergeOptions,
    /// How cohorts were found.
    pub cohort_rule: String,
    /// Cohorts in order of their youngest age (the first is the reference).
    pub cohorts: Vec<String>,
    /// Age at which level differences are measured.
    pub reference_age: f64,
    /// The fitted models.
    pub models: Vec<ModelSummary>,
    /// Likelihood-ratio and Wald tests.
    pub tests: Vec<TestResult>,
    /// Margin in outcome units, and how it was set.
    pub margin: f64,
    /// The margin as given.
    pub margin_rule: Margin,
    /// Cohort differences at shared ages.
    pub shared_ages: Vec<SharedAge>,
    /// The simultaneous critical value used.
    pub simultaneous_critical: f64,
    /// Between- and within-person age slopes (linear part).
    pub between_within: Option<BetweenWithin>,
    /// The retest check, when asked for.
    pub retest: Option<retest::RetestReport>,
    /// The verdict in plain words.
    pub verdict: String,
    /// What the verdict rests on.
    pub assumptions: Vec<String>,
    /// Notes (fit problems, skipped parts).
    pub notes: Vec<String>,
    /// Each cohort's random-effect SDs and residual SD under M3 (empty when
    /// M3 was not fitted).
    pub cohort_variances: Vec<variance::CohortVariance>,
}

/// A problem with extra fixed-effect columns appended to X.
fn with_columns(problem: &MixedProblem, names: &[String], cols: &[Vec<f64>]) -> MixedProblem {
    let n = problem.n();
    let p = problem.p();
    let k = cols.len();
    let mut x = Vec::with_capacity(n * (p + k));
    for r in 0..n {
        x.extend_from_slice(&problem.x[r * p..(r + 1) * p]);
        x.extend(cols.iter().map(|c| c[r]));
    }
    let mut x_names = problem.x_names.clone();
    x_names.extend(names.iter().cloned());
    MixedProblem {
        y: problem.y.clone(),
        x_names,
        x,
        terms: problem.terms.clone(),
    }
}

fn summary(name: &str, description: &str, fit: &Fit) -> ModelSummary {
    ModelSummary {
        name: name.into(),
        description: description.into(),
        method: fit.method.label().into(),
        loglik: fit.loglik,
        n_params: fit.n_params,
        aic: fit.aic,
        bic: fit.bic,
        converged: fit.info.converged,
    }
}

fn fit_with(problem: &MixedProblem, method: Method) -> Result<Fit> {
    lmm::fit(
        problem,
        FitOptions {
            method,
            ..Default::default()
        },
    )
}

/// Run the convergence analysis.
///
/// # Errors
/// [`Error::Data`] with fewer than two cohorts, or no overlap between any
/// neighbours; errors of the model frame and the fits.
pub fn converge(panel: &Panel, model: &ModelSpec, options: &ConvergeOptions) -> Result<ConvergeReport> {
    options.validate()?;
    let cohort = derive::cohorts(panel, options.cohort_rule)?;
    let design = crate::design::inspect(
        panel,
        crate::design::DesignOptions {
            cohort_rule: options.cohort_rule,
            ..Default::default()
        },
    )?;
    let mut order: Vec<&crate::design::CohortCoverage> = design.cohorts.iter().collect();
    order.sort_by(|a, b| a.age_min.total_cmp(&b.age_min));
    let cohorts: Vec<String> = order.iter().map(|c| c.cohort.clone()).collect();
    if cohorts.len() < 2 {
        return Err(Error::Data {
            path: panel.source.clone(),
            message: format!(
                "one cohort only ({}): convergence compares cohorts; name a `cohort` column or check the cohort rule",
                cohort.rule
            ),
        });
    }
    let linked: Vec<&crate::design::Overlap> = design.overlap.iter().filter(|o| o.linked).collect();
    if linked.is_empty() {
        return Err(Error::Data {
            path: panel.source.clone(),
            message: "no two neighbouring cohorts share any ages: their segments cannot be linked or compared".into(),
        });
    }
    // Reference age: the median age inside the overlaps.
    let reference_age = match options.reference_age {
        Some(a) => a,
        None => {
            let mut inside: Vec<f64> = panel
                .age
                .iter()
                .copied()
                .filter(|&a| linked.iter().any(|o| a >= o.age_from && a <= o.age_to))
                .collect();
            inside.sort_by(f64::total_cmp);
            crate::spec::basis::quantile_sorted(&inside, 0.5)
        }
    };
    let spec0 = ModelSpec {
        center: Some(reference_age),
        ..model.clone()
    };
    let frame = spec::build_frame(panel, &spec0)?;
    let n = panel.n();
    let nb = frame.basis.eval(reference_age).len();
    let k_of: Vec<usize> = cohort
        .labels
        .iter()
        .map(|l| cohorts.iter().position(|c| c == l).unwrap_or(0))
        .collect();
    // Cohort level columns, then cohort × age-term columns.
    let mut level_names = Vec::new();
    let mut level_cols = Vec::new();
    for (k, name) in cohorts.iter().enumerate().skip(1) {
        level_names.push(format!("cohort {name}"));
        level_cols.push(
            (0..n)
                .map(|r| if k_of[r] == k { 1.0 } else { 0.0 })
                .collect::<Vec<f64>>(),
        );
    }
    let p0 = frame.problem.p();
    let mut slope_names = Vec::new();
    let mut slope_cols = Vec::new();
    for (k, name) in cohorts.iter().enumerate().skip(1) {
        for j in 0..nb {
            slope_names.push(format!("cohort {name} × {}", frame.problem.x_names[1 + j]));
            slope_cols.push(
                (0..n)
                    .map(|r| {
                        if k_of[r] == k {
                            frame.problem.x[r * p0 + 1 + j]
                        } else {
                            0.0
                        }
                    })
                    .collect::<Vec<f64>>(),
            );
        }
    }
    let p1 = with_columns(&frame.problem, &level_names, &level_cols);
    let mut all_names = level_names.clone();
    all_names.extend(slope_names.iter().cloned());
    let mut all_cols = level_cols.clone();
    all_cols.extend(slope_cols.iter().cloned());
    let p2 = with_columns(&frame.problem, &all_names, &all_cols);
    let m0 = fit_with(&frame.problem, Method::Ml)?;
    let m1 = fit_with(&p1, Method::Ml)?;
    let m2 = fit_with(&p2, Method::Ml)?;
    let m2r = fit_with(&p2, Method::Reml)?;
    let kc = cohorts.len() - 1;
    let mut models = vec![
        summary("M0", "one common trajectory", &m0),
        summary(
            "M1",
            &format!("M0 + a level difference per cohort at age {reference_age:.2}"),
            &m1,
        ),
        summary("M2", "M1 + cohort differences in every age term", &m2),
        summary("M2 REML", "M2 again, for the Wald tests and shared ages", &m2r),
    ];
    let p_all = p2.p();
    let rows = |start: usize, count: usize| -> Vec<Vec<f64>> {
        (0..count)
            .map(|i| {
                let mut c = vec![0.0; p_all];
                c[start + i] = 1.0;
                c
            })
            .collect()
    };
    let mut tests = vec![
        likelihood_ratio("M1 vs M0: cohorts differ in level", m0.loglik, m1.loglik, kc, false),
        likelihood_ratio(
            "M2 vs M1: cohorts differ in age trend",
            m1.loglik,
            m2.loglik,
            kc * nb,
            false,
        ),
        wald_f(&m2r, "cohort level differences (Wald, M2)", &rows(p0, kc)),
        wald_f(
            &m2r,
            "cohort differences in age terms (Wald, M2)",
            &rows(p0 + kc, kc * nb),
        ),
    ];
    // Margin in outcome units.
    let sd = {
        let m = panel.outcome.iter().sum::<f64>() / n as f64;
        (panel.outcome.iter().map(|y| (y - m).powi(2)).sum::<f64>() / (n as f64 - 1.0)).sqrt()
    };
    let margin = match options.margin {
        Margin::Outcome(v) => v,
        Margin::Sd(v) => v * sd,
    };
    // Cohort-specific mean rows under M2.
    let row_of = |k: usize, age: f64| -> Vec<f64> {
        let mut v = frame.mean_row(age);
        let basis = frame.basis.eval(age);
        v.extend((1..=kc).map(|j| if j == k { 1.0 } else { 0.0 }));
        for j in 1..=kc {
            for b in &basis {
                v.push(if j == k { *b } else { 0.0 });
            }
        }
        v
    };
    let mut diffs: Vec<(String, String, f64, Vec<f64>, Contrast)> = Vec::new();
    for o in &linked {
        let ka = cohorts.iter().position(|c| *c == o.cohort_a).unwrap_or(0);
        let kb = cohorts.iter().position(|c| *c == o.cohort_b).unwrap_or(0);
        let g = options.shared_ages.max(1);
        for i in 0..g {
            let age = if g == 1 {
                (o.age_from + o.age_to) / 2.0
            } else {
                o.age_from + (o.age_to - o.age_from) * i as f64 / (g - 1) as f64
            };
            let c: Vec<f64> = row_of(kb, age)
                .iter()
                .zip(row_of(ka, age))
                .map(|(b, a)| b - a)
                .collect();
            let k = infer::contrast(&m2r, &c);
            diffs.push((o.cohort_a.clone(), o.cohort_b.clone(), age, c, k));
        }
    }
    let crit = simultaneous_critical(&m2r, &diffs.iter().map(|d| d.3.clone()).collect::<Vec<_>>());
    let p_raw: Vec<f64> = diffs.iter().map(|d| d.4.p_value()).collect();
    let p_adj = holm(&p_raw);
    let shared_ages: Vec<SharedAge> = diffs
        .iter()
        .zip(p_raw.iter().zip(&p_adj))
        .map(|((a, b, age, _, k), (&p, &ph))| {
            let (lower, upper) = k.interval();
            let t_lo = (k.estimate + margin) / k.se;
            let t_hi = (margin - k.estimate) / k.se;
            let p_lo = 1.0 - infer::t_cdf(t_lo, k.df);
            let p_hi = 1.0 - infer::t_cdf(t_hi, k.df);
            let p_equivalence = p_lo.max(p_hi);
            SharedAge {
                cohort_a: a.clone(),
                cohort_b: b.clone(),
                age: *age,
                difference: k.estimate,
                se: k.se,
                df: k.df,
                lower,
                upper,
                lower_simultaneous: k.estimate - crit * k.se,
                upper_simultaneous: k.estimate + crit * k.se,
                p,
                p_holm: ph,
                p_equivalence,
                equivalent: p_equivalence < 1.0 - LEVEL,
            }
        })
        .collect();
    let mut notes = Vec::new();
    let mut cohort_variances = Vec::new();
    match variance::m3_test(&frame.problem, &p2, &m2r, &k_of, &cohorts, 1 + nb)? {
        Ok(m3) => {
            models.push(ModelSummary {
                name: "M3".into(),
                description: "M2 + covariances and residual variance per cohort".into(),
                method: "REML".into(),
                loglik: m3.loglik,
                n_params: m3.n_params,
                aic: -2.0 * m3.loglik + 2.0 * m3.n_params as f64,
                bic: -2.0 * m3.loglik + m3.n_params as f64 * (n as f64).ln(),
                converged: m3.converged,
            });
            notes.push(format!("M3 fitted as {}.", m3.route));
            tests.push(m3.test);
            cohort_variances = m3.cohorts;
        }
        Err(why) => notes.push(format!("M3 not fitted: {why}")),
    }
    let m0r = fit_with(&frame.problem, Method::Reml)?;
    if let Some(t) = variance::random_slope_test(&frame.problem, &m0r)? {
        tests.push(t);
    }
    for m in [&m0, &m1, &m2, &m2r] {
        if !m.info.converged {
            notes.push("a fit of the sequence did not reach a certified minimum; read its test with care".to_string());
        }
    }
    let between_within = between_within(panel, &frame, &spec0, &mut notes);
    let retest = options
        .retest
        .map(|f| retest::check_with(panel, &frame, &m0r, f))
        .transpose()?;
    let (mut verdict, assumptions) = verdict(&tests, &shared_ages, margin, reference_age, &between_within);
    if let Some(t) = tests.iter().find(|t| t.name.starts_with("M3")) {
        verdict.push_str(&format!(
            " Cohort-specific covariances and residual variances (M3 against M2): χ² = {:.2} on {} df, p = {:.3}{}.",
            t.statistic,
            t.df,
            t.p,
            if t.p < 1.0 - LEVEL {
                ": the cohorts differ in how much people vary, so one covariance for all is not supported"
            } else {
                ""
            }
        ));
    }
    if let Some(r) = &retest {
        verdict.push_str(&format!(" Retest: {}.", r.message));
        if let (Some(e), Some(w)) = (r.estimate, r.age_slope_with) {
            verdict.push_str(&format!(
                " With the term ({:.3} per unit), the linear age term moves from {:.3} to {:.3}.",
                e, r.age_slope_without, w
            ));
        }
    }
    Ok(ConvergeReport {
        data: panel.summary(),
        model: model.clone(),
        options: options.clone(),
        cohort_rule: cohort.rule,
        cohorts,
        reference_age,
        models,
        tests,
        margin,
        margin_rule: options.margin,
        shared_ages,
        simultaneous_critical: crit,
        between_within,
        retest,
        verdict,
        assumptions,
        notes,
        cohort_variances,
    })
}

/// The 95% critical value of max |zᵢ| for the standardized differences,
/// z ~ N(0, R) with R their correlation under cov(β̂), by seeded simulation.
/// Falls back to Bonferroni when R cannot be decomposed.
fn simultaneous_critical(fit: &Fit, rows: &[Vec<f64>]) -> f64 {
    let m = rows.len();
    let p = fit.p();
    if m == 0 {
        return f64::NAN;
    }
    let cov = |a: &[f64], b: &[f64]| -> f64 {
        let mut acc = 0.0;
        for (i, ai) in a.iter().enumerate().filter(|(_, ai)| **ai != 0.0) {
            let row = &fit.cov_beta[i * p..(i + 1) * p];
            acc += ai * row.iter().zip(b).map(|(c, bj)| c * bj).sum::<f64>();
        }
        acc
    };
    let sd: Vec<f64> = rows.iter().map(|r| cov(r, r).max(0.0).sqrt()).collect();
    let corr = faer::Mat::from_fn(m, m, |i, j| cov(&rows[i], &rows[j]) / (sd[i] * sd[j]));
    let bonferroni = infer::t_quantile(1.0 - (1.0 - LEVEL) / (2.0 * m as f64), f64::INFINITY);
    let Ok(eig) = corr.self_adjoint_eigen(faer::Side::Lower) else {
        return bonferroni;
    };
    let s = eig.S().column_vector();
    let u = eig.U();
    let roots: Vec<f64> = (0..m).map(|k| s[k].max(0.0).sqrt()).collect();
    let mut rng = crate::simulate::Rng::new(SIMULTANEOUS_SEED);
    let mut maxima = Vec::with_capacity(SIMULTANEOUS_DRAWS);
    let mut e = vec![0.0; m];
    for _ in 0..SIMULTANEOUS_DRAWS {
        for (k, ek) in e.iter_mut().enumerate() {
            *ek = roots[k] * rng.normal();
        }
        let mut top: f64 = 0.0;
        for i in 0..m {
            let z: f64 = (0..m).map(|k| u[(i, k)] * e[k]).sum();
            top = top.max(z.abs());
        }
        maxima.push(top);
    }
    maxima.sort_by(f64::total_cmp);
    crate::spec::basis::quantile_sorted(&maxima, LEVEL)
}

/// Baseline age and time since baseline as separate linear slopes (the rest
/// of the age basis kept), refitted by REML; needs a polynomial basis.
fn between_within(
    panel: &Panel,
    frame: &ModelFrame,
    spec0: &ModelSpec,
    notes: &mut Vec<String>,
) -> Option<BetweenWithin> {
    if !matches!(spec0.age, AgeSpec::Polynomial { .. }) {
        notes.push("between- and within-person slopes need a polynomial age basis; not computed".into());
        return None;
    }
    let n = panel.n();
    let p = frame.problem.p();
    let center = frame.basis.center();
    let first = panel.first_ages();
    let mut problem = frame.problem.clone();
    // Column 1 is the linear term (age − centre): replace it by the baseline
    // age, and append time since baseline.
    let mut within = Vec::with_capacity(n);
    for r in 0..n {
        let a0 = first[panel.id.codes[r] as usize];
        problem.x[r * p + 1] = a0 - center;
        within.push(panel.age[r] - a0);
    }
    problem.x_names[1] = "baseline age".into();
    let problem = with_columns(&problem, &["time since baseline".to_string()], &[within]);
    let fit = match fit_with(&problem, Method::Reml) {
        Ok(f) => f,
        Err(e) => {
            notes.push(format!("the between/within fit failed: {e}"));
            return None;
        }
    };
    let q = problem.p();
    let unit = |i: usize| {
        let mut c = vec![0.0; q];
        c[i] = 1.0;
        c
    };
    let b = infer::contrast(&fit, &unit(1));
    let w = infer::contrast(&fit, &unit(q - 1));
    let mut c = vec![0.0; q];
    c[1] = 1.0;
    c[q - 1] = -1.0;
    let d = infer::contrast(&fit, &c);
    Some(BetweenWithin {
        between: b.estimate,
        between_se: b.se,
        within: w.estimate,
        within_se: w.se,
        difference: d.estimate,
        difference_se: d.se,
        df: d.df,
        p: d.p_value(),
    })
}

fn verdict(
    tests: &[TestResult],
    shared: &[SharedAge],
    margin: f64,
    reference_age: f64,
    bw: &Option<BetweenWithin>,
) -> (String, Vec<String>) {
    let alpha = 1.0 - LEVEL;
    let (level, trend) = (&tests[0], &tests[1]);
    let n_eq = shared.iter().filter(|s| s.equivalent).count();
    let n_diff = shared.iter().filter(|s| s.p_holm < alpha).count();
    let mut v = String::new();
    v.push_str(
        "The pooled curve assumes that the cohorts converge: where their ages overlap, they have the same mean, so \
         cohort (and period) differences are absent. ",
    );
    let differs = level.p < alpha || trend.p < alpha;
    v.push_str(&format!(
        "Cohort level differences at age {reference_age:.2}: χ² = {:.2} on {} df, p = {:.3}. Cohort differences in the age terms: χ² = {:.2} on {} df, p = {:.3}. ",
        level.statistic, level.df, level.p, trend.statistic, trend.df, trend.p
    ));
    v.push_str(&format!(
        "At {} shared ages, {} differences are significant after Holm's adjustment, and {} lie within ±{:.3} by the two one-sided tests. ",
        shared.len(),
        n_diff,
        n_eq,
        margin
    ));
    if differs || n_diff > 0 {
        v.push_str(
            "The cohorts differ, so do not pool them into one curve as if they were one population: model the cohort \
             differences (cohort-specific curves, or cohort terms in the model), and consider period effects or \
             retest effects as explanations.",
        );
    } else if n_eq == shared.len() {
        v.push_str(
            "No test found a difference and every shared-age difference lies within the margin, so the data support \
             pooling the cohorts into one trajectory (within that margin).",
        );
    } else {
        v.push_str(
            "No test found a difference, but that is not evidence that the cohorts agree: the differences could not \
             be shown to lie within the margin at every shared age. Pooling rests on the convergence assumption; \
             collect more overlap between cohorts, or justify a wider margin on substantive grounds.",
        );
    }
    if let Some(b) = bw {
        v.push_str(&format!(
            " The between-person age slope ({:.3}) and the within-person slope ({:.3}) differ by {:.3} (p = {:.3}).",
            b.between, b.within, b.difference, b.p
        ));
    }
    let assumptions = vec![
        "The pooled trajectory assumes convergence: no cohort or period differences where cohorts overlap (Bell 1953).".into(),
        format!("Cohort level differences are measured at age {reference_age:.2}, the reference age."),
        "Likelihood-ratio tests compare ML fits of nested models on the same rows; Wald F tests use the REML fit with Satterthwaite-type df.".into(),
        format!(
            "Equivalence uses two one-sided tests at the 5% level against ±{margin:.3}; \"no evidence of a difference\" is not \"equivalent\"."
        ),
        "Missing waves are missing at random given the model; random effects and residuals are normal.".into(),
        "Associations are not causes: a cohort difference describes these samples, not its cause.".into(),
    ];
    (v, assumptions)
}
