//! Hypothesis tests built on a fit: likelihood ratios (with the χ̄² mixture
//! when a variance is tested on its boundary), the multi-degree-of-freedom
//! Wald F with Satterthwaite-type denominator df, and Holm's step-down
//! adjustment.

use faer::Mat;
use serde::Serialize;
use statrs::distribution::{ChiSquared, ContinuousCDF};

use super::contrast;
use crate::lmm::Fit;

/// What a test asks, so that a verdict finds its tests by kind, never by
/// name or position.
#[derive(Debug, Clone, Copy, Default, Serialize, PartialEq, Eq)]
#[serde(rename_all = "snake_case")]
pub enum TestKind {
    /// Cohorts differ in level (M1 against M0).
    CohortLevel,
    /// Cohorts differ in age trend (M2 against M1).
    CohortTrend,
    /// Cohort level differences, Wald F under M2.
    CohortLevelWald,
    /// Cohort differences in the age terms, Wald F under M2.
    CohortTrendWald,
    /// Cohorts differ in covariances and residual variance (M3 against M2).
    CohortCovariance,
    /// Participants differ in their age slope.
    RandomSlope,
    /// Period effects beyond age and cohort (APC against A+C).
    PeriodBeyondCohort,
    /// Any other test.
    #[default]
    Other,
}

/// How a test's p-value was computed: its reference distribution.
#[derive(Debug, Clone, PartialEq)]
pub enum TestMethod {
    /// Likelihood ratio against χ²(df).
    LikelihoodRatio {
        /// Degrees of freedom.
        df: f64,
    },
    /// Likelihood ratio against ½χ²(df − 1) + ½χ²(df), a variance on its boundary.
    BoundaryLikelihoodRatio {
        /// Degrees of freedom of the larger component.
        df: f64,
        /// Why the null is on the boundary, in words.
        because: Option<&'static str>,
    },
    /// Wald F with Satterthwaite-type denominator df.
    WaldF {
        /// Numerator df.
        df: f64,
        /// Denominator df.
        df_denominator: f64,
        /// The criterion of the fit (REML or ML).
        fit: &'static str,
    },
    /// A Wald F that could not be computed.
    NotEstimable,
}

impl TestMethod {
    /// The reference distribution, short, for a table row ("χ²(4)", "F(4, 2460.3)").
    pub fn reference(&self) -> String {
        match self {
            TestMethod::LikelihoodRatio { df } => format!("χ²({df})"),
            TestMethod::BoundaryLikelihoodRatio { df, .. } => format!("½χ²({}) + ½χ²({df})", df - 1.0),
            TestMethod::WaldF { df, df_denominator, .. } => format!("F({df}, {df_denominator:.1})"),
            TestMethod::NotEstimable => "—".into(),
        }
    }
}

impl std::fmt::Display for TestMethod {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            TestMethod::LikelihoodRatio { df } => write!(f, "likelihood ratio, χ²({df})"),
            TestMethod::BoundaryLikelihoodRatio { df, because } => {
                write!(
                    f,
                    "likelihood ratio, ½χ²({}) + ½χ²({df}) mixture (boundary null)",
                    df - 1.0
                )?;
                match because {
                    Some(b) => write!(f, ": {b}"),
                    None => Ok(()),
                }
            }
            TestMethod::WaldF {
                df,
                df_denominator,
                fit,
            } => write!(
                f,
                "Wald F({df}, {df_denominator:.1}) from the {fit} fit, denominator df by Satterthwaite (Fai & Cornelius 1996)"
            ),
            TestMethod::NotEstimable => write!(f, "Wald F (not computable: the contrasts are not estimable)"),
        }
    }
}

impl Serialize for TestMethod {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.collect_str(self)
    }
}

/// One row of a test table, with stable JSON keys.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct TestResult {
    /// What is tested.
    pub kind: TestKind,
    /// What is tested, in words.
    pub name: String,
    /// The statistic (χ² or F).
    pub statistic: f64,
    /// Degrees of freedom (numerator df for F).
    pub df: f64,
    /// Denominator df (F tests only).
    pub df_denominator: Option<f64>,
    /// p-value.
    pub p: f64,
    /// How it was computed (serialised in words).
    pub method: TestMethod,
    /// Why the p-value is withheld (then `p` is NaN): its reference
    /// distribution was measured off its nominal level in this setting.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub withheld: Option<String>,
}

impl TestResult {
    /// The same test with its p-value withheld, and why.
    #[must_use]
    pub fn withhold(mut self, why: &str) -> TestResult {
        self.p = f64::NAN;
        self.withheld = Some(why.to_string());
        self
    }

    /// The same test, marked as being of `kind`.
    #[must_use]
    pub fn of_kind(mut self, kind: TestKind) -> TestResult {
        self.kind = kind;
        self
    }
}

/// Upper tail of χ²(df) at `x`; df = 0 is a point mass at zero.
pub fn chi2_sf(x: f64, df: f64) -> f64 {
    if df <= 0.0 {
        return if x > 0.0 { 0.0 } else { 1.0 };
    }
    if x.is_nan() {
        return f64::NAN;
    }
    if x <= 0.0 {
        return 1.0;
    }
    if x == f64::INFINITY {
        return 0.0;
    }
    ChiSquared::new(df).map_or(f64::NAN, |c| c.sf(x))
}

/// Upper tail of F(df1, df2) at `x`, as the regularized incomplete beta
/// I_{df2/(df2 + df1·x)}(df2/2, df1/2) (Abramowitz & Stegun 26.6.2), which
/// keeps a tiny p-value instead of rounding 1 − cdf to zero.
pub fn f_sf(x: f64, df1: f64, df2: f64) -> f64 {
    if x.is_nan() || !(df1 > 0.0 && df2 > 0.0) {
        return f64::NAN;
    }
    if x <= 0.0 {
        return 1.0;
    }
    if x == f64::INFINITY {
        return 0.0;
    }
    statrs::function::beta::checked_beta_reg(df2 / 2.0, df1 / 2.0, df2 / (df2 + df1 * x)).unwrap_or(f64::NAN)
}

/// Upper tail of the 50:50 mixture ½χ²(df − 1) + ½χ²(df) at `x`: the null
/// distribution of a likelihood-ratio statistic when one variance is tested
/// on its boundary along with df − 1 unconstrained covariances (Self & Liang
/// 1987, *JASA* 82; Stram & Lee 1994, *Biometrics* 50).
pub fn chibar2_sf(x: f64, df: f64) -> f64 {
    0.5 * chi2_sf(x, df - 1.0) + 0.5 * chi2_sf(x, df)
}

/// Likelihood-ratio test of a smaller model against a larger one, from the
/// two log-likelihoods and the number of added parameters. With `boundary`
/// the χ̄² mixture is used.
pub fn likelihood_ratio(name: &str, loglik_small: f64, loglik_large: f64, df: usize, boundary: bool) -> TestResult {
    let statistic = (2.0 * (loglik_large - loglik_small)).max(0.0);
    let df = df as f64;
    let (p, method) = if boundary {
        (
            chibar2_sf(statistic, df),
            TestMethod::BoundaryLikelihoodRatio { df, because: None },
        )
    } else {
        (chi2_sf(statistic, df), TestMethod::LikelihoodRatio { df })
    };
    TestResult {
        kind: TestKind::Other,
        name: name.to_string(),
        statistic,
        df,
        df_denominator: None,
        p,
        method,
        withheld: None,
    }
}

/// Wald F test of `L β = 0` for the rows of `l` (each of length p), with the
/// denominator df of Fai & Cornelius (1996, *J. Statist. Comput. Simul.* 54):
/// `LCLᵀ = PDPᵀ`; each eigen-contrast `pₘᵀL` gets its Satterthwaite df νₘ;
/// with `E = Σ νₘ/(νₘ − 2)` over νₘ > 2, the denominator df is `2E/(E − q)`
/// when `E > q`. Rows must be linearly independent.
pub fn wald_f(fit: &Fit, name: &str, l: &[Vec<f64>]) -> TestResult {
    let q = l.len();
    let p = fit.p();
    let lb: Vec<f64> = l
        .iter()
        .map(|r| r.iter().zip(&fit.beta).map(|(a, b)| a * b).sum())
        .collect();
    let lcl = Mat::from_fn(q, q, |i, j| {
        let mut acc = 0.0;
        for a in 0..p {
            for b in 0..p {
                acc += l[i][a] * fit.cov_beta[a * p + b] * l[j][b];
            }
        }
        acc
    });
    let nan = TestResult {
        kind: TestKind::Other,
        name: name.to_string(),
        statistic: f64::NAN,
        df: q as f64,
        df_denominator: None,
        p: f64::NAN,
        method: TestMethod::NotEstimable,
        withheld: None,
    };
    let Ok(eig) = lcl.self_adjoint_eigen(faer::Side::Lower) else {
        return nan;
    };
    let values: Vec<f64> = (0..q).map(|i| eig.S().column_vector()[i]).collect();
    let vectors = eig.U();
    let top = values.iter().cloned().fold(0.0, f64::max);
    if values.iter().any(|&v| v <= 1e-12 * top) || top <= 0.0 {
        return nan;
    }
    let mut f = 0.0;
    let mut e = 0.0;
    for m in 0..q {
        let pm: Vec<f64> = (0..q).map(|i| vectors[(i, m)]).collect();
        let c: Vec<f64> = (0..p).map(|a| (0..q).map(|i| pm[i] * l[i][a]).sum()).collect();
        let proj: f64 = (0..q).map(|i| pm[i] * lb[i]).sum();
        f += proj * proj / values[m];
        let nu = contrast(fit, &c).df;
        if nu > 2.0 {
            e += nu / (nu - 2.0);
        }
    }
    f /= q as f64;
    let qf = q as f64;
    let den = if e > qf {
        2.0 * e / (e - qf)
    } else {
        (fit.n_obs - p) as f64
    };
    let p_value = f_sf(f, qf, den);
    TestResult {
        kind: TestKind::Other,
        name: name.to_string(),
        statistic: f,
        df: qf,
        df_denominator: Some(den),
        p: p_value,
        method: TestMethod::WaldF {
            df: qf,
            df_denominator: den,
            fit: fit.method.label(),
        },
        withheld: None,
    }
}

/// Holm's (1979, *Scand. J. Statist.* 6) step-down adjusted p-values, in the
/// input order.
pub fn holm(p: &[f64]) -> Vec<f64> {
    let m = p.len();
    let mut order: Vec<usize> = (0..m).collect();
    order.sort_by(|&a, &b| p[a].total_cmp(&p[b]));
    let mut out = vec![0.0; m];
    let mut running: f64 = 0.0;
    for (rank, &i) in order.iter().enumerate() {
        let adj = ((m - rank) as f64 * p[i]).min(1.0);
        running = running.max(adj);
        out[i] = running;
    }
    out
}

#[cfg(test)]
mod unit {
    use super::*;

    // Critical values of CHECKS.md: 2.7055 for ½χ²₀ + ½χ²₁ and 5.1384 for
    // ½χ²₁ + ½χ²₂ (closed form from the χ² quantiles).
    #[test]
    fn chibar2_critical_values() {
        // And the F tail against its closed form for df1 = 2: (1 + 2x/df2)^(−df2/2).
        for (x, d2) in [(0.5_f64, 7.0_f64), (3.0, 20.0), (40.0, 100.0)] {
            let exact = (1.0 + 2.0 * x / d2).powf(-d2 / 2.0);
            assert!((f_sf(x, 2.0, d2) / exact - 1.0).abs() < 1e-10, "{x} {d2}");
        }
        assert!((chibar2_sf(2.7055, 1.0) - 0.05).abs() < 1e-5);
        assert!((chibar2_sf(5.1384, 2.0) - 0.05).abs() < 1e-5);
    }

    // Holm (1979): sorted p of 0.01, 0.04, 0.03 against m = 3 → 0.03, 0.06, 0.06.
    #[test]
    fn holm_step_down() {
        let adj = holm(&[0.01, 0.04, 0.03]);
        let want = [0.03, 0.06, 0.06];
        for (a, w) in adj.iter().zip(want) {
            assert!((a - w).abs() < 1e-15, "{adj:?}");
        }
    }
}
