//! What the data identify without any constraint: the combinations of the
//! linear slopes, second differences, deviations from linearity, and the
//! Wald tests of no curvature.

use faer::linalg::solvers::Solve;
use serde::Serialize;

use crate::infer::hypothesis::{chi2_sf, f_sf};

use super::analysis::{ApcData, DIMENSIONS};
use super::glm::{Family, GlmFit};
use super::{Dimension, Shape};

/// An identified quantity.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Identified {
    /// What it is.
    pub quantity: String,
    /// Estimate.
    pub estimate: f64,
    /// Standard error.
    pub se: f64,
}

/// A Wald test of no curvature in one dimension.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CurvatureTest {
    /// Dimension.
    pub dimension: Dimension,
    /// χ² (counts) or F (continuous).
    pub statistic: f64,
    /// Numerator df: levels − 2.
    pub df: usize,
    /// Denominator df of the F test (continuous outcomes); absent for χ².
    #[serde(skip_serializing_if = "Option::is_none")]
    pub df_denominator: Option<usize>,
    /// p-value (null when withheld).
    pub p: f64,
    /// Why no p-value is given, when the test cannot hold its level here.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub withheld: Option<String>,
}

/// Level effects of each dimension (sum to zero within a dimension).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Effects {
    /// Age effects.
    pub age: Vec<f64>,
    /// Period effects.
    pub period: Vec<f64>,
    /// Cohort effects.
    pub cohort: Vec<f64>,
}

/// The identified quantities and the curvature tests, from the minimum-norm
/// solution `b0` and its covariance `cov`.
pub(super) fn identified(
    data: &ApcData,
    b0: &[f64],
    cov: &[f64],
    drift_fit: Option<&GlmFit>,
    apc_df: usize,
) -> (Vec<Identified>, Vec<CurvatureTest>) {
    let s = data.shape;
    let q = s.n_params();
    let mut identified = Vec::new();
    let push = |id: &mut Vec<Identified>, name: String, c: &[f64]| {
        id.push(Identified {
            quantity: name,
            estimate: dot(c, b0),
            se: quad(c, cov).max(0.0).sqrt(),
        });
    };
    let sl = |d| slope_functional(s, d);
    let comb = |a: &[f64], b: &[f64], sign: f64| -> Vec<f64> { a.iter().zip(b).map(|(x, y)| x + sign * y).collect() };
    let (sa, sp, sc) = (sl(Dimension::Age), sl(Dimension::Period), sl(Dimension::Cohort));
    push(
        &mut identified,
        "age slope + period slope (change within a cohort)".into(),
        &comb(&sa, &sp, 1.0),
    );
    push(
        &mut identified,
        "age slope − cohort slope (cross-sectional age gradient)".into(),
        &comb(&sa, &sc, -1.0),
    );
    push(
        &mut identified,
        "period slope + cohort slope (the drift)".into(),
        &comb(&sp, &sc, 1.0),
    );
    if let Some(f) = drift_fit {
        let k = f.coef.len() - 1;
        identified.push(Identified {
            quantity: "drift per period step in the A+drift model".into(),
            estimate: f.coef[k],
            se: f.cov[k * (k + 1) + k].max(0.0).sqrt(),
        });
    }
    let mut curvature_tests = Vec::new();
    for d in DIMENSIONS {
        let rows = s.effect_rows(d);
        let labels = data.labels.of(d);
        let mut second: Vec<Vec<f64>> = Vec::new();
        for l in 1..rows.len() - 1 {
            let c: Vec<f64> = (0..q)
                .map(|k| rows[l - 1][k] - 2.0 * rows[l][k] + rows[l + 1][k])
                .collect();
            push(
                &mut identified,
                format!("{} second difference at {}", d.name(), labels[l]),
                &c,
            );
            second.push(c);
        }
        let slope = sl(d);
        let mean = (rows.len() as f64 + 1.0) / 2.0;
        for (l, r) in rows.iter().enumerate() {
            let c: Vec<f64> = (0..q).map(|k| r[k] - (l as f64 + 1.0 - mean) * slope[k]).collect();
            push(
                &mut identified,
                format!("{} deviation from linearity at {}", d.name(), labels[l]),
                &c,
            );
        }
        curvature_tests.push(curvature_test(d, &second, b0, cov, data.family, apc_df));
    }
    (identified, curvature_tests)
}

pub(super) fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}
fn quad(c: &[f64], cov: &[f64]) -> f64 {
    let q = c.len();
    let mut acc = 0.0;
    for i in 0..q {
        if c[i] == 0.0 {
            continue;
        }
        acc += c[i] * dot(&cov[i * q..(i + 1) * q], c);
    }
    acc
}
/// Coefficients of the least-squares slope of a dimension's level effects on
/// the level index, as a functional of the coded parameters.
pub(super) fn slope_functional(shape: Shape, d: Dimension) -> Vec<f64> {
    let rows = shape.effect_rows(d);
    let l = rows.len() as f64;
    let mean = (l + 1.0) / 2.0;
    let sxx: f64 = (1..=rows.len()).map(|i| (i as f64 - mean).powi(2)).sum();
    let mut c = vec![0.0; shape.n_params()];
    for (i, r) in rows.iter().enumerate() {
        let w = (i as f64 + 1.0 - mean) / sxx;
        for (ck, rk) in c.iter_mut().zip(r) {
            *ck += w * rk;
        }
    }
    c
}
pub(super) fn effects(shape: Shape, b: &[f64]) -> Effects {
    let of = |d| shape.effect_rows(d).iter().map(|r| dot(r, b)).collect();
    Effects {
        age: of(Dimension::Age),
        period: of(Dimension::Period),
        cohort: of(Dimension::Cohort),
    }
}
fn curvature_test(
    d: Dimension,
    rows: &[Vec<f64>],
    b: &[f64],
    cov: &[f64],
    family: Family,
    df_resid: usize,
) -> CurvatureTest {
    let m = rows.len();
    let est: Vec<f64> = rows.iter().map(|r| dot(r, b)).collect();
    let q = b.len();
    let lcl = faer::Mat::from_fn(m, m, |i, j| {
        let mut acc = 0.0;
        for a in 0..q {
            if rows[i][a] == 0.0 {
                continue;
            }
            acc += rows[i][a] * dot(&cov[a * q..(a + 1) * q], &rows[j]);
        }
        acc
    });
    let stat = match lcl.llt(faer::Side::Lower) {
        Ok(llt) => {
            let rhs = faer::Mat::from_fn(m, 1, |i, _| est[i]);
            let sol = llt.solve(&rhs);
            (0..m).map(|i| est[i] * sol[(i, 0)]).sum::<f64>()
        }
        Err(_) => f64::NAN,
    };
    let (statistic, p) = match family {
        Family::Poisson => (stat, chi2_sf(stat, m as f64)),
        Family::Gaussian => {
            let f = stat / m as f64;
            (f, f_sf(f, m as f64, df_resid.max(1) as f64))
        }
    };
    CurvatureTest {
        dimension: d,
        statistic,
        df: m,
        df_denominator: (family == Family::Gaussian).then_some(df_resid.max(1)),
        p,
        withheld: None,
    }
}
