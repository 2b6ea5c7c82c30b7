//! Variance-component tests of the convergence sequence.
//!
//! - **M3**, cohort-specific random-effect covariance and residual variance.
//!   When M2's fixed part is fully cohort-specific (no covariates shared
//!   across cohorts) and participants are the only grouping factor, each
//!   participant belongs to one cohort and M3's parameters are disjoint by
//!   cohort, so its REML log-likelihood is the sum of separate REML fits per
//!   cohort (the REML criterion is additive over independent blocks with a
//!   block-diagonal X). It is compared with M2 by REML (same fixed effects).
//!   The null (one covariance for all cohorts) is an interior point unless the
//!   common covariance is itself on its boundary.
//! - **Random slope**: do participants differ in their rate of change? M0
//!   against M0 with a random intercept only, by REML. The null puts a
//!   variance on its boundary (zero), so the statistic is referred to the
//!   ½χ²(1) + ½χ²(2) mixture (Self & Liang 1987; Stram & Lee 1994).

use crate::error::Result;
use crate::infer::tests::{TestResult, likelihood_ratio};
use crate::lmm::{Fit, Method, MixedProblem, RandomTermData};

/// The rows of `problem` in `rows`, with the X columns in `cols` and each
/// random term's levels renumbered over the levels present.
fn subset(problem: &MixedProblem, rows: &[usize], cols: &[usize]) -> MixedProblem {
    let p = problem.p();
    let terms = problem
        .terms
        .iter()
        .map(|t| {
            let mut map = vec![u32::MAX; t.n_levels()];
            let mut names = Vec::new();
            let level = rows
                .iter()
                .map(|&r| {
                    let l = t.level[r] as usize;
                    if map[l] == u32::MAX {
                        map[l] = names.len() as u32;
                        names.push(t.level_names[l].clone());
                    }
                    map[l]
                })
                .collect();
            RandomTermData {
                factor: t.factor.clone(),
                level_names: names,
                level,
                columns: t.columns.clone(),
                z: t.z.iter().map(|z| rows.iter().map(|&r| z[r]).collect()).collect(),
            }
        })
        .collect();
    MixedProblem {
        y: rows.iter().map(|&r| problem.y[r]).collect(),
        x_names: cols.iter().map(|&c| problem.x_names[c].clone()).collect(),
        x: rows
            .iter()
            .flat_map(|&r| cols.iter().map(move |&c| problem.x[r * p + c]))
            .collect(),
        terms,
    }
}

/// M3 against M2 (REML), when M2 is fully cohort-specific; `None` with the
/// reason otherwise. `cohort_of` gives each row's cohort position (0 =
/// reference), `base_cols` the intercept and age-basis columns of M0.
pub fn m3_test(
    m0_problem: &MixedProblem,
    m2_reml: &Fit,
    cohort_of: &[usize],
    n_cohorts: usize,
    base_cols: usize,
) -> Result<std::result::Result<(TestResult, f64, bool), String>> {
    if m0_problem.p() != base_cols {
        return Ok(Err(
            "M3 needs a fixed part of age terms only (covariates are shared across cohorts)".into(),
        ));
    }
    if m0_problem.terms.len() != 1 {
        return Ok(Err(
            "M3 needs participants as the only grouping factor (a cluster term is shared across cohorts)".into(),
        ));
    }
    let cols: Vec<usize> = (0..base_cols).collect();
    let mut loglik = 0.0;
    let mut converged = true;
    for k in 0..n_cohorts {
        let rows: Vec<usize> = (0..cohort_of.len()).filter(|&r| cohort_of[r] == k).collect();
        let f = super::fit_with(&subset(m0_problem, &rows, &cols), Method::Reml)?;
        loglik += f.loglik;
        converged &= f.info.converged;
    }
    let per = m0_problem.n_theta() + 1;
    let test = likelihood_ratio(
        "M3 vs M2: cohorts differ in covariances (REML)",
        m2_reml.loglik,
        loglik,
        (n_cohorts - 1) * per,
        false,
    );
    Ok(Ok((test, loglik, converged)))
}

/// The random-slope test (REML, χ̄² mixture), when M0 has a random slope.
pub fn random_slope_test(m0_problem: &MixedProblem, m0_reml: &Fit) -> Result<Option<TestResult>> {
    let Some(t) = m0_problem.terms.first() else {
        return Ok(None);
    };
    if t.q() != 2 {
        return Ok(None);
    }
    let mut reduced = m0_problem.clone();
    reduced.terms[0].columns.truncate(1);
    reduced.terms[0].z.truncate(1);
    let f = super::fit_with(&reduced, Method::Reml)?;
    let mut test = likelihood_ratio(
        &format!("participants differ in their {} slope (REML)", t.columns[1]),
        f.loglik,
        m0_reml.loglik,
        2,
        true,
    );
    test.method
        .push_str(": the null puts the slope variance on its boundary (Self & Liang 1987; Stram & Lee 1994)");
    Ok(Some(test))
}
