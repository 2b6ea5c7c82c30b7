//! The verdict of the convergence analysis in plain words, and the
//! assumptions it rests on. It is part of the JSON document, so it is
//! written here, beside the results it reads, rather than by a renderer.

use super::retest::RetestReport;
use super::{BetweenWithin, SharedAge};
use crate::infer::LEVEL;
use crate::infer::hypothesis::{TestKind, TestResult};
use crate::stats::p_words;

/// The verdict in plain words, and what it rests on. The tests are found by
/// kind; a missing test reads as not computed.
pub(super) fn verdict(
    tests: &[TestResult],
    shared: &[SharedAge],
    margin: f64,
    reference_age: f64,
    bw: &Option<BetweenWithin>,
    retest: Option<&RetestReport>,
) -> (String, Vec<String>) {
    let alpha = 1.0 - LEVEL;
    let find = |kind: TestKind| tests.iter().find(|t| t.kind == kind);
    let (Some(level), Some(trend)) = (find(TestKind::CohortLevel), find(TestKind::CohortTrend)) else {
        return ("The cohort tests were not computed.".into(), Vec::new());
    };
    let n_eq = shared.iter().filter(|s| s.equivalent).count();
    let n_diff = shared.iter().filter(|s| s.p_holm < alpha).count();
    let mut v = String::new();
    v.push_str(
        "The pooled curve assumes that the cohorts converge: where their ages overlap, they have the same mean, so \
         cohort (and period) differences are absent. ",
    );
    let differs = level.p < alpha || trend.p < alpha;
    v.push_str(&format!(
        "Cohort level differences at age {reference_age:.2}: χ² = {:.2} on {} df, {}. Cohort differences in the age terms: χ² = {:.2} on {} df, {}. ",
        level.statistic,
        level.df,
        p_words(level.p),
        trend.statistic,
        trend.df,
        p_words(trend.p)
    ));
    v.push_str(&format!(
        "At {} shared ages, {} significant after Holm's adjustment, and {} within ±{:.3} by the two one-sided tests. ",
        shared.len(),
        if n_diff == 1 {
            "1 difference is".to_string()
        } else {
            format!("{n_diff} differences are")
        },
        if n_eq == 1 {
            "1 lies".to_string()
        } else {
            format!("{n_eq} lie")
        },
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
            " The between-person age slope ({:.3}) and the within-person slope ({:.3}) differ by {:.3} ({}).",
            b.between,
            b.within,
            b.difference,
            p_words(b.p)
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
    if let Some(t) = find(TestKind::CohortCovariance) {
        v.push_str(&covariance_sentence(t));
    }
    if let Some(r) = retest {
        v.push_str(&retest_sentence(r));
    }
    (v, assumptions)
}

/// What M3 against M2 says, in one sentence.
fn covariance_sentence(t: &TestResult) -> String {
    if let Some(why) = &t.withheld {
        return format!(
            " Cohort-specific covariances and residual variances (M3 against M2): χ² = {:.2} on {} df; {why}.",
            t.statistic, t.df
        );
    }
    format!(
        " Cohort-specific covariances and residual variances (M3 against M2): χ² = {:.2} on {} df, {}{}.",
        t.statistic,
        t.df,
        p_words(t.p),
        if t.p < 1.0 - LEVEL {
            ": the cohorts differ in how much people vary, so one covariance for all is not supported"
        } else {
            ""
        }
    )
}

/// What the retest check says, in one or two sentences.
fn retest_sentence(r: &RetestReport) -> String {
    let mut s = format!(" Retest: {}.", r.message);
    if let (Some(e), Some(w)) = (r.estimate, r.age_slope_with) {
        s.push_str(&format!(
            " With the term ({:.3} per unit), the linear age term moves from {:.3} to {:.3}.",
            e, r.age_slope_without, w
        ));
    }
    s
}
