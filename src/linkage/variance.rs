//! Variance-component tests of the convergence sequence.
//!
//! - **M3**, cohort-specific random-effect covariance and residual variance.
//!   When M2's fixed part is fully cohort-specific (no covariates shared
//!   across cohorts) and participants are the only grouping factor, each
//!   participant belongs to one cohort and M3's parameters are disjoint by
//!   cohort, so its REML log-likelihood is the sum of separate REML fits per
//!   cohort (the REML criterion is additive over independent blocks with a
//!   block-diagonal X). Otherwise (shared covariates, a school term crossing
//!   cohorts) M3 is one fit of M2's design with a participant covariance and
//!   a residual variance per cohort ([`crate::lmm::grouped`]); the two routes
//!   agree where both apply (tests/suite/grouped.rs). M3 is compared with M2
//!   by REML (same fixed effects).
//!   The null (one covariance for all cohorts) is an interior point unless the
//!   common covariance is itself on its boundary.
//! - **Random slope**: do participants differ in their rate of change? M0
//!   against M0 with a random intercept only, by REML. The null puts a
//!   variance on its boundary (zero), so the statistic is referred to the
//!   ½χ²(1) + ½χ²(2) mixture (Self & Liang 1987; Stram & Lee 1994).

use crate::error::Result;
use crate::infer::hypothesis::{TestKind, TestMethod, TestResult, likelihood_ratio};
use crate::lmm::grouped::{Grouping, fit_grouped};
use crate::lmm::{Fit, Method, MixedProblem, RandomTermData};

/// Below this many participants in the smallest cohort the M3 test's
/// p-value is withheld: its size was measured at 3.1% with 100 per cohort
/// (outside 3.5–6.5%), 3.9% with 240 and 5.4% with 400
/// (notes/benchmarks.md, "size of every convergence test").
pub const M3_CALIBRATED_PER_COHORT: usize = 240;

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
                level_names: names.into(),
                level,
                columns: t.columns.clone(),
                z: t.z.iter().map(|z| z.pick(rows).into()).collect(),
                covariance: t.covariance,
            }
        })
        .collect();
    MixedProblem {
        y: rows.iter().map(|&r| problem.y[r]).collect(),
        x_names: cols.iter().map(|&c| problem.x_names[c].clone()).collect(),
        x: {
            let mut x_store = vec![0.0; p];
            let mut x = Vec::with_capacity(rows.len() * cols.len());
            for &r in rows {
                let xr = problem.x_row(r, &mut x_store);
                x.extend(cols.iter().map(|&c| xr[c]));
            }
            x.into()
        },
        terms,
    }
}

/// What the M3 step found: the test against M2, M3's REML log-likelihood,
/// its number of parameters, whether it converged, and how it was fitted.
pub struct M3 {
    /// M3 against M2.
    pub test: TestResult,
    /// M3's REML log-likelihood.
    pub loglik: f64,
    /// M3's parameters.
    pub n_params: usize,
    /// Whether every fit behind it converged.
    pub converged: bool,
    /// How it was fitted, in words.
    pub route: String,
    /// Each cohort's random-effect SDs and residual SD under M3.
    pub cohorts: Vec<CohortVariance>,
}

impl M3 {
    /// M3's row of the model table, on `n_obs` rows.
    pub fn summary(&self, n_obs: usize) -> super::ModelSummary {
        super::ModelSummary {
            name: "M3".into(),
            description: "M2 + covariances and residual variance per cohort".into(),
            method: "REML".into(),
            loglik: self.loglik,
            n_params: self.n_params,
            aic: -2.0 * self.loglik + 2.0 * self.n_params as f64,
            bic: -2.0 * self.loglik + self.n_params as f64 * (n_obs as f64).ln(),
            converged: self.converged,
        }
    }
}

/// One cohort's variance components under M3.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct CohortVariance {
    /// The cohort's label.
    pub cohort: String,
    /// The participant term's coefficients.
    pub terms: Vec<String>,
    /// Their SDs in this cohort.
    pub sd: Vec<f64>,
    /// The cohort's residual SD.
    pub residual_sd: f64,
}

/// M3 against M2 (REML). `cohort_of` gives each row's cohort position (0 =
/// reference), `base_cols` the intercept and age-basis columns of M0,
/// `m2_problem` and `m2_reml` M2's design and REML fit. When M2 is fully
/// cohort-specific and participants are the only grouping factor, M3 is the
/// sum of separate REML fits per cohort; otherwise (covariates or a cluster
/// term shared across cohorts) it is one fit with cohort-specific
/// participant covariance and residual variance ([`crate::lmm::grouped`]).
/// `Err` holds the reason when M3 cannot be fitted.
pub fn m3_test(
    m0_problem: &MixedProblem,
    m2_problem: &MixedProblem,
    m2_reml: &Fit,
    cohort_of: &[usize],
    cohort_names: &[String],
    base_cols: usize,
) -> Result<std::result::Result<M3, String>> {
    let n_cohorts = cohort_names.len();
    let Some(first) = m0_problem.terms.first() else {
        return Ok(Err("M3 needs a participant term".into()));
    };
    // Per cohort beyond the first: the participant term's estimated
    // covariance parameters (its variances alone when diagonal) and a
    // residual variance.
    let per = first.estimated().iter().filter(|&&e| e).count() + 1;
    let df = (n_cohorts - 1) * per;
    let name = "M3 vs M2: cohorts differ in covariances (REML)";
    let separable = m0_problem.p() == base_cols && m0_problem.terms.len() == 1;
    let mut cohorts = Vec::with_capacity(n_cohorts);
    let (loglik, converged, route) = if separable {
        let cols: Vec<usize> = (0..base_cols).collect();
        let mut loglik = 0.0;
        let mut converged = true;
        for (k, name) in cohort_names.iter().enumerate() {
            let rows: Vec<usize> = (0..cohort_of.len()).filter(|&r| cohort_of[r] == k).collect();
            let f = super::fit_with(&subset(m0_problem, &rows, &cols), Method::Reml)?;
            loglik += f.loglik;
            converged &= f.info.converged;
            cohorts.push(CohortVariance {
                cohort: name.clone(),
                terms: first.columns.clone(),
                sd: f.random.first().map(|c| c.sd.clone()).unwrap_or_default(),
                residual_sd: f.sigma2.sqrt(),
            });
        }
        (
            loglik,
            converged,
            "the sum of separate REML fits per cohort (the model separates by cohort)".to_string(),
        )
    } else {
        let grouping = Grouping {
            names: cohort_names.to_vec(),
            of_row: cohort_of.iter().map(|&k| k as u32).collect(),
        };
        match fit_grouped(m2_problem, &grouping, Method::Reml, Some(&m2_reml.theta)) {
            Ok(g) => (
                {
                    cohorts.extend(g.groups.iter().map(|c| CohortVariance {
                        cohort: c.group.clone(),
                        terms: g.terms.clone(),
                        sd: c.sd.clone(),
                        residual_sd: c.residual_variance.sqrt(),
                    }));
                    g.loglik
                },
                g.converged,
                format!(
                    "one REML fit with a {} covariance and a residual variance per cohort{}",
                    first.factor,
                    if m2_problem.terms.len() > 1 {
                        " and the other random terms shared"
                    } else {
                        ""
                    }
                ),
            ),
            Err(e) => return Ok(Err(e.to_string())),
        }
    };
    let test = likelihood_ratio(name, m2_reml.loglik, loglik, df, false).of_kind(TestKind::CohortCovariance);
    Ok(Ok(M3 {
        test,
        loglik,
        n_params: m2_reml.n_params + df,
        converged,
        route,
        cohorts,
    }))
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
    // M0's θ without the slope's two entries (its first term's are the
    // intercept, the covariance and the slope) is a close start.
    let start: Vec<f64> = m0_reml
        .theta
        .iter()
        .enumerate()
        .filter(|(k, _)| !(1..3).contains(k))
        .map(|(_, v)| *v)
        .collect();
    let f = crate::lmm::fit_from(&reduced, super::lean(Method::Reml), &start)?;
    // The slope's variance, and its covariance with the intercept unless the
    // structure holds that at zero: under the null the variance is on its
    // boundary, so the statistic is a 50:50 mixture of χ² with one fewer
    // and as many df as parameters removed (Self & Liang 1987; Stram & Lee
    // 1994).
    let removed = if t.covariance == crate::lmm::Covariance::Diagonal {
        1
    } else {
        2
    };
    let mut test = likelihood_ratio(
        &format!("participants differ in their {} slope (REML)", t.columns[1]),
        f.loglik,
        m0_reml.loglik,
        removed,
        true,
    );
    test.method = TestMethod::BoundaryLikelihoodRatio {
        df: removed as f64,
        because: Some("the null puts the slope variance on its boundary (Self & Liang 1987; Stram & Lee 1994)"),
    };
    test.kind = TestKind::RandomSlope;
    Ok(Some(test))
}
