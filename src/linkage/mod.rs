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

mod columns;
pub mod retest;
mod shared;
mod slopes;
pub mod variance;
mod verdict;

pub use shared::{SIMULTANEOUS_SEED, SharedAge};
pub use slopes::BetweenWithin;

use serde::Serialize;

use crate::data::derive::{self, CohortRule};
use crate::data::{DataSummary, Panel};
use crate::error::{Error, Result};
use crate::infer::hypothesis::{TestKind, TestResult, likelihood_ratio, wald_f};
use crate::lmm::{self, Fit, FitOptions, Method, MixedProblem};
use crate::spec::{self, ModelSpec};
use columns::with_columns;

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
    pub cohort_rule: derive::AppliedRule,
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

/// The number of participants in the smallest cohort (`code` the
/// participant of each row, `k_of` its cohort).
fn smallest_cohort(code: &[u32], n_participants: usize, k_of: &[usize], n_cohorts: usize) -> usize {
    let mut seen = vec![false; n_participants];
    let mut count = vec![0usize; n_cohorts];
    for (&c, &k) in code.iter().zip(k_of) {
        if !std::mem::replace(&mut seen[c as usize], true) {
            count[k] += 1;
        }
    }
    count.into_iter().min().unwrap_or(0)
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

/// The options of a fit that only feeds a likelihood-ratio test
/// ([`lmm::Detail::Likelihood`]). Each model of the sequence starts from
/// the fit of the model it nests in, or of the same design by ML
/// ([`lmm::Prepared::fit_near`]; notes/criterion.md, "Warm starts and
/// shared cross-products").
fn lean(method: Method) -> FitOptions {
    FitOptions {
        method,
        detail: lmm::Detail::Likelihood,
        ..Default::default()
    }
}

/// The cohorts in order of their youngest age, the overlaps that link
/// neighbours, and the reference age.
struct Linkage {
    cohort: derive::Derived,
    cohorts: Vec<String>,
    linked: Vec<crate::design::Overlap>,
    reference_age: f64,
}

impl Linkage {
    fn find(panel: &Panel, options: &ConvergeOptions) -> Result<Linkage> {
        let (cohort, coverage, overlap) = crate::design::cohorts_and_overlaps(panel, options.cohort_rule)?;
        let mut order: Vec<&crate::design::CohortCoverage> = coverage.iter().collect();
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
        let linked: Vec<crate::design::Overlap> = overlap.into_iter().filter(|o| o.linked).collect();
        if linked.is_empty() {
            return Err(Error::Data {
                path: panel.source.clone(),
                message: "no two neighbouring cohorts share any ages: their segments cannot be linked or compared"
                    .into(),
            });
        }
        // Reference age: the median age inside the overlaps.
        let reference_age = options.reference_age.unwrap_or_else(|| {
            let mut inside: Vec<f64> = panel
                .age
                .iter()
                .copied()
                .filter(|&a| linked.iter().any(|o| a >= o.age_from && a <= o.age_to))
                .collect();
            inside.sort_by(f64::total_cmp);
            crate::spec::basis::quantile_sorted(&inside, 0.5)
        });
        Ok(Linkage {
            cohort,
            cohorts,
            linked,
            reference_age,
        })
    }
}

/// The first step of the sequence, shared by [`converge`] and
/// [`level_test`]: the linked cohorts, M0's frame and the ML fits of M0 and
/// M1, and M0 by REML when asked for (from the same cross-products).
struct LevelPair {
    linkage: Linkage,
    k_of: Vec<usize>,
    spec0: ModelSpec,
    frame: spec::ModelFrame,
    columns: columns::CohortColumns,
    m0: Fit,
    m1: Fit,
    m0_reml: Option<Fit>,
}

impl LevelPair {
    fn fit(panel: &Panel, model: &ModelSpec, options: &ConvergeOptions, with_reml: bool) -> Result<LevelPair> {
        options.validate()?;
        let linkage = Linkage::find(panel, options)?;
        let k_of: Vec<usize> = linkage
            .cohort
            .labels
            .iter()
            .map(|l| linkage.cohorts.iter().position(|c| c == l))
            .collect::<Option<_>>()
            .ok_or_else(|| Error::Data {
                path: panel.source.clone(),
                message: "a row's cohort is not among the cohorts of the design".into(),
            })?;
        let spec0 = ModelSpec {
            center: Some(linkage.reference_age),
            ..model.clone()
        };
        let frame = spec::build_frame(panel, &spec0)?;
        let columns = columns::CohortColumns::new(&frame, &linkage.cohorts, &k_of);
        let p1 = with_columns(&frame.problem, &columns.level_names, &columns.level_cols);
        let prepared = lmm::Prepared::new(&frame.problem)?;
        let m0 = prepared.fit(lean(Method::Ml), None)?;
        // M0 by REML feeds the random-slope test (its likelihood) and the
        // retest check (its age slope): no BLUPs or sensitivity needed.
        let m0_reml = with_reml
            .then(|| prepared.fit_near(lean(Method::Reml), &m0))
            .transpose()?;
        drop(prepared);
        let m1 = lmm::fit_near(&p1, lean(Method::Ml), &m0)?;
        Ok(LevelPair {
            linkage,
            k_of,
            spec0,
            frame,
            columns,
            m0,
            m1,
            m0_reml,
        })
    }

    /// The likelihood-ratio test of M1 against M0.
    fn test(&self) -> TestResult {
        let kc = self.linkage.cohorts.len() - 1;
        likelihood_ratio(
            "M1 vs M0: cohorts differ in level",
            self.m0.loglik,
            self.m1.loglik,
            kc,
            false,
        )
        .of_kind(TestKind::CohortLevel)
    }
}

/// The test of cohort level differences alone (M1 against M0, by likelihood
/// ratio): the same fits and test as in [`converge`], without the rest of
/// the sequence. For planning, which repeats it on thousands of replicates.
///
/// # Errors
/// As [`converge`].
pub fn level_test(panel: &Panel, model: &ModelSpec, options: &ConvergeOptions) -> Result<TestResult> {
    Ok(LevelPair::fit(panel, model, options, false)?.test())
}

/// Run the convergence analysis.
///
/// # Errors
/// [`Error::Data`] with fewer than two cohorts, or no overlap between any
/// neighbours; errors of the model frame and the fits.
pub fn converge(panel: &Panel, model: &ModelSpec, options: &ConvergeOptions) -> Result<ConvergeReport> {
    let pair = LevelPair::fit(panel, model, options, true)?;
    let level = pair.test();
    let LevelPair {
        linkage:
            Linkage {
                cohort,
                cohorts,
                linked,
                reference_age,
            },
        k_of,
        spec0,
        frame,
        columns,
        m0,
        m1,
        m0_reml,
    } = pair;
    let nb = frame.basis.n_columns();
    let p0 = frame.problem.p();
    let p2 = columns.full_problem(&frame.problem);
    let prepared = lmm::Prepared::new(&p2)?;
    let m2 = prepared.fit_near(lean(Method::Ml), &m1)?;
    let m2r = prepared.fit_near(FitOptions::default(), &m2)?;
    drop(prepared);
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
        level,
        likelihood_ratio(
            "M2 vs M1: cohorts differ in age trend",
            m1.loglik,
            m2.loglik,
            kc * nb,
            false,
        )
        .of_kind(TestKind::CohortTrend),
        wald_f(&m2r, "cohort level differences (Wald, M2)", &rows(p0, kc)).of_kind(TestKind::CohortLevelWald),
        wald_f(
            &m2r,
            "cohort differences in age terms (Wald, M2)",
            &rows(p0 + kc, kc * nb),
        )
        .of_kind(TestKind::CohortTrendWald),
    ];
    let margin = match options.margin {
        Margin::Outcome(v) => v,
        Margin::Sd(v) => v * crate::stats::mean_var(&panel.outcome).1.sqrt(),
    };
    let (shared_ages, crit) = shared::differences(&m2r, &frame, &cohorts, &linked, options.shared_ages, margin);
    let mut notes = Vec::new();
    let mut cohort_variances = Vec::new();
    match variance::m3_test(&frame.problem, &p2, &m2r, &k_of, &cohorts, 1 + nb)? {
        Ok(m3) => {
            models.push(m3.summary(panel.n()));
            notes.push(format!("M3 fitted as {}.", m3.route));
            let smallest = smallest_cohort(&panel.id.codes, panel.id.n_levels(), &k_of, cohorts.len());
            tests.push(if smallest < variance::M3_CALIBRATED_PER_COHORT {
                m3.test.withhold(&format!(
                    "the χ² reference of M3 against M2 is conservative with small cohorts (the smallest here has \
                     {smallest} participants; with 100 per cohort the test rejected 3.1% of seeded studies without \
                     differences at the 5% level, and with 240, 3.9%), so its p-value is not shown"
                ))
            } else {
                m3.test
            });
            cohort_variances = m3.cohorts;
        }
        Err(why) => notes.push(format!("M3 not fitted: {why}")),
    }
    let m0r = m0_reml.ok_or_else(|| Error::Numerical {
        step: "convergence".into(),
        message: "M0 by REML is missing; please report this".into(),
    })?;
    if let Some(t) = variance::random_slope_test(&frame.problem, &m0r)? {
        tests.push(t);
    }
    for m in [&m0, &m1, &m2, &m2r] {
        if !m.info.converged {
            notes.push("a fit of the sequence did not reach a certified minimum; read its test with care".to_string());
        }
    }
    let between_within = slopes::between_within(panel, &frame, &spec0, &m0r, &mut notes);
    let retest = options
        .retest
        .map(|f| retest::check_with(panel, &frame, &m0r, f))
        .transpose()?;
    let (verdict, assumptions) = verdict::verdict(
        &tests,
        &shared_ages,
        margin,
        reference_age,
        &between_within,
        retest.as_ref(),
    );
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
