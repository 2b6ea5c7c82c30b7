//! The exact-value APC model for records: smooth functions of exact age,
//! calendar time and birth time (= time − age), after Carstensen (2007,
//! *Statistics in Medicine* 26:3018–3045).
//!
//! Each time scale enters as a natural cubic spline split into a linear part
//! and a nonlinear part with no level and no slope over the records
//! (`split.rs`). The three linear parts are exactly collinear (age =
//! period − birth time), so the design is [1, age, period, N_age, N_period,
//! N_cohort] with one null direction of the three slopes, (1, −1, 1) in
//! (age, period, cohort). Identified without any constraint: the three
//! deviations from linearity, the drift (period slope + cohort slope), the
//! longitudinal age slope (age + period) and the cross-sectional one (age −
//! cohort), and every fitted value. Records are fitted by least squares,
//! panels by REML with a correlated random intercept and age slope per
//! participant (and a cluster intercept when given). Each curve and the
//! drift is tested by a Wald F in the fitted model: exact for least squares,
//! with Fai–Cornelius/Satterthwaite denominator df for panels.

use faer::linalg::solvers::{DenseSolveCore, Solve};
use faer::{Mat, Side};
use serde::Serialize;

use super::Dimension;
use super::constraints::Constraint;
use super::split::{EXACT_KNOTS, SplitSpline};
use crate::error::{Error, Result};
use crate::infer::hypothesis::f_sf;

/// Points on each deviation curve.
const CURVE_POINTS: usize = 41;

/// z for a 95% band.
const Z95: f64 = 1.959_963_984_540_054;

/// The exact-value model and what it identifies.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ExactApc {
    /// Records fitted by least squares, or panels by ML with a participant intercept.
    pub fit: &'static str,
    /// Records used.
    pub n_obs: usize,
    /// The spline of each time scale: knots and mean.
    pub splines: Vec<ScaleSpline>,
    /// Residual SD (records) or REML log-likelihood (panels) of the fit.
    pub criterion: Criterion,
    /// Wald tests in the fitted model: the drift and each curve.
    pub tests: Vec<ExactTest>,
    /// What is identified without a constraint.
    pub identified: Vec<super::identified::Identified>,
    /// The deviations from linearity, with 95% pointwise bands.
    pub curves: Vec<Curve>,
    /// The null direction of the (age, period, cohort) slopes.
    pub null_direction: [f64; 3],
    /// The slopes under each constraint.
    pub solutions: Vec<ExactSolution>,
    /// Largest difference between the fitted values of any two solutions.
    pub fitted_max_difference: f64,
    /// What every number rests on.
    pub assumptions: Vec<String>,
}

/// One time scale's spline.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ScaleSpline {
    /// Age, period or cohort (birth time).
    pub dimension: Dimension,
    /// Knots (boundary knots first and last).
    pub knots: Vec<f64>,
    /// Mean over the records (the linear part is the value minus this).
    pub mean: f64,
    /// Nonlinear columns.
    pub nonlinear_df: usize,
}

/// How well the model fits.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Criterion {
    /// Records: the residual sum of squares and its df.
    ResidualSumOfSquares {
        /// Residual sum of squares.
        value: f64,
        /// Residual degrees of freedom.
        df: usize,
    },
    /// Panels: the REML log-likelihood.
    RemlLoglik {
        /// Its value.
        value: f64,
    },
}

/// What an exact-value test tests.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum ExactTestKind {
    /// A linear trend along calendar time at fixed age.
    Drift,
    /// Age effects beyond a straight line.
    AgeNonlinear,
    /// Period effects beyond a straight line.
    PeriodNonlinear,
    /// Cohort effects beyond a straight line.
    CohortNonlinear,
}

/// A Wald F test that some coefficients of the fitted model are zero.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ExactTest {
    /// What it tests.
    pub kind: ExactTestKind,
    /// In words.
    pub name: String,
    /// F.
    pub statistic: f64,
    /// Numerator df.
    pub df: usize,
    /// Denominator df: residual df (records) or Fai–Cornelius/Satterthwaite (panels).
    pub df_denominator: f64,
    /// p-value (null when the data cannot give one).
    pub p: Option<f64>,
    /// The reference distribution, for example "F(4, 2990)".
    pub reference: String,
    /// Why there is no p-value.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub withheld: Option<String>,
}

/// A deviation from linearity of one time scale.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Curve {
    /// Which time scale.
    pub dimension: Dimension,
    /// Values of the time scale.
    pub x: Vec<f64>,
    /// The deviation at each value.
    pub deviation: Vec<f64>,
    /// Lower end of the 95% pointwise band.
    pub lower: Vec<f64>,
    /// Upper end.
    pub upper: Vec<f64>,
}

/// The three linear slopes under one constraint.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ExactSolution {
    /// The constraint.
    pub constraint: Constraint,
    /// In words.
    pub description: String,
    /// Age, period and cohort slope per year.
    pub slopes: [f64; 3],
    /// Their standard errors.
    pub se: [f64; 3],
}

/// The records: exact age, calendar time and outcome, with the participant
/// of each record for panels.
pub struct ExactInput<'a> {
    /// Exact ages.
    pub age: &'a [f64],
    /// Calendar times.
    pub period: &'a [f64],
    /// Outcomes.
    pub y: &'a [f64],
    /// Participant codes (panels).
    pub ids: Option<&'a [u32]>,
    /// Cluster codes (panels with a cluster, for example the school).
    pub clusters: Option<&'a [u32]>,
}

impl<'a> ExactInput<'a> {
    /// Records without participants (repeated cross-sections).
    pub fn records(age: &'a [f64], period: &'a [f64], y: &'a [f64]) -> ExactInput<'a> {
        ExactInput {
            age,
            period,
            y,
            ids: None,
            clusters: None,
        }
    }
}

/// Column layout of the full design.
struct Layout {
    splines: [SplitSpline; 3],
}

impl Layout {
    fn q(&self) -> usize {
        3 + self.splines.iter().map(SplitSpline::n_nonlinear).sum::<usize>()
    }
    /// The columns of one time scale's nonlinear part.
    fn block(&self, d: usize) -> std::ops::Range<usize> {
        let start = 3 + self.splines[..d].iter().map(SplitSpline::n_nonlinear).sum::<usize>();
        start..start + self.splines[d].n_nonlinear()
    }
    fn row(&self, a: f64, p: f64, out: &mut Vec<f64>) {
        out.clear();
        out.extend([1.0, a - self.splines[0].mean, p - self.splines[1].mean]);
        self.splines[0].nonlinear(a, out);
        self.splines[1].nonlinear(p, out);
        self.splines[2].nonlinear(p - a, out);
    }
}

/// The full model's fit: coefficients and their covariance, and the
/// mixed-model fit that the panels' tests need.
struct FullFit {
    coef: Vec<f64>,
    cov: Vec<f64>,
    q: usize,
    criterion: Criterion,
    mixed: Option<crate::lmm::Fit>,
}

/// Records: least squares from the sufficient statistics (one pass over the
/// records; the outcome is centred first, so the residual sum of squares
/// loses no digits).
fn least_squares(layout: &Layout, input: &ExactInput<'_>) -> Result<FullFit> {
    let q = layout.q();
    let n = input.y.len();
    let y_mean = input.y.iter().sum::<f64>() / n.max(1) as f64;
    let mut xtx = vec![0.0; q * q];
    let mut xty = vec![0.0; q];
    let mut yty = 0.0;
    let mut row = Vec::with_capacity(q);
    for k in 0..n {
        layout.row(input.age[k], input.period[k], &mut row);
        let y = input.y[k] - y_mean;
        yty += y * y;
        for i in 0..q {
            let ri = row[i];
            xty[i] += ri * y;
            for j in i..q {
                xtx[i * q + j] += ri * row[j];
            }
        }
    }
    let a = Mat::from_fn(q, q, |r, c| xtx[r.min(c) * q + r.max(c)]);
    let llt = a.llt(Side::Lower).map_err(|_| Error::Numerical {
        step: "exact-value age–period–cohort fit".into(),
        message: "the design is singular: a time scale has too few distinct values".into(),
    })?;
    let b = llt.solve(Mat::from_fn(q, 1, |r, _| xty[r]));
    let coef: Vec<f64> = (0..q).map(|r| b[(r, 0)]).collect();
    let rss = (yty - coef.iter().zip(&xty).map(|(c, v)| c * v).sum::<f64>()).max(0.0);
    let df = n.saturating_sub(q);
    let s2 = rss / df.max(1) as f64;
    let inv = llt.inverse();
    let mut coef = coef;
    coef[0] += y_mean;
    Ok(FullFit {
        coef,
        cov: (0..q * q).map(|k| inv[(k / q, k % q)] * s2).collect(),
        q,
        criterion: Criterion::ResidualSumOfSquares { value: rss, df },
        mixed: None,
    })
}

/// Panels: REML with a correlated random intercept and age slope per
/// participant, and a random intercept per cluster when given.
fn mixed(layout: &Layout, input: &ExactInput<'_>, ids: &[u32]) -> Result<FullFit> {
    let q = layout.q();
    let n = input.y.len();
    let mut x = Vec::with_capacity(n * q);
    let mut row = Vec::with_capacity(q);
    for k in 0..n {
        layout.row(input.age[k], input.period[k], &mut row);
        x.extend_from_slice(&row);
    }
    let mut participant = super::glm::intercepts("participant", ids, n);
    participant.columns.push("age".into());
    participant.z.push(
        input
            .age
            .iter()
            .map(|a| a - layout.splines[0].mean)
            .collect::<Vec<f64>>()
            .into(),
    );
    let mut terms = vec![participant];
    if let Some(c) = input.clusters {
        terms.push(super::glm::intercepts("cluster", c, n));
    }
    let problem = crate::lmm::MixedProblem {
        y: input.y.into(),
        x_names: (0..q).map(|k| format!("x{k}")).collect(),
        x: x.into(),
        terms,
    };
    let f = crate::lmm::fit(&problem, crate::lmm::FitOptions::estimates())?;
    Ok(FullFit {
        coef: f.beta.clone(),
        cov: f.cov_beta.clone(),
        q,
        criterion: Criterion::RemlLoglik { value: f.loglik },
        mixed: Some(f),
    })
}

/// The columns of the fitted model, named, one row per record: intercept,
/// centred age and calendar time, then each time scale's nonlinear columns,
/// for checking the fit elsewhere.
pub fn basis(input: &ExactInput<'_>) -> (Vec<String>, Vec<Vec<f64>>) {
    let layout = layout(input);
    let mut names = vec!["intercept".to_string(), "age_linear".into(), "period_linear".into()];
    for (d, dim) in super::analysis::DIMENSIONS.iter().enumerate() {
        names.extend((1..=layout.splines[d].n_nonlinear()).map(|k| format!("{}_curve{k}", dim.name())));
    }
    let rows = (0..input.y.len())
        .map(|k| {
            let mut row = Vec::with_capacity(layout.q());
            layout.row(input.age[k], input.period[k], &mut row);
            row
        })
        .collect();
    (names, rows)
}

fn layout(input: &ExactInput<'_>) -> Layout {
    let birth: Vec<f64> = input.period.iter().zip(input.age).map(|(p, a)| p - a).collect();
    Layout {
        splines: [
            SplitSpline::fit(input.age, EXACT_KNOTS),
            SplitSpline::fit(input.period, EXACT_KNOTS),
            SplitSpline::fit(&birth, EXACT_KNOTS),
        ],
    }
}

/// Fit the exact-value model.
///
/// # Errors
/// [`Error::Numerical`] when the design is singular; errors of the engine.
pub fn fit(input: &ExactInput<'_>, constraints: &[Constraint]) -> Result<ExactApc> {
    let n = input.y.len();
    let layout = layout(input);
    let full = match input.ids {
        Some(ids) => mixed(&layout, input, ids)?,
        None => least_squares(&layout, input)?,
    };
    let tests = tests(&layout, &full, n);
    let identified = identified(&full);
    let curves = (0..3).filter_map(|d| curve(&layout, d, &full)).collect();
    let (solutions, fitted_max_difference) = solutions(constraints, &full, input, &layout);
    Ok(ExactApc {
        fit: match (input.ids, input.clusters) {
            (Some(_), Some(_)) => "REML, random intercept and age slope per participant, random intercept per cluster",
            (Some(_), None) => "REML, random intercept and age slope per participant",
            _ => "least squares",
        },
        n_obs: n,
        splines: layout
            .splines
            .iter()
            .zip(super::analysis::DIMENSIONS)
            .map(|(s, d)| ScaleSpline {
                dimension: d,
                knots: s.knots.clone(),
                mean: s.mean,
                nonlinear_df: s.n_nonlinear(),
            })
            .collect(),
        criterion: full.criterion,
        tests,
        identified,
        curves,
        null_direction: [1.0, -1.0, 1.0],
        solutions,
        fitted_max_difference,
        assumptions: assumptions(input.ids.is_some()),
    })
}

impl ExactApc {
    /// The linkage assumption's testable part in this model, in words: the
    /// period curve beyond age and cohort.
    pub fn linkage_sentence(&self) -> Option<String> {
        let t = self.tests.iter().find(|t| t.kind == ExactTestKind::PeriodNonlinear)?;
        let p = t.p?;
        Some(format!(
            "In the exact-value model that assumption's testable part is the period curve: beyond age, birth time and a \
             straight line in time it gives F = {:.3} on ({}, {:.1}) df, {}: {}.",
            t.statistic,
            t.df,
            t.df_denominator,
            crate::stats::p_words(p),
            if p < 0.05 {
                "there are period effects that age and cohort do not absorb, so the no-period assumption fails in \
                 its nonlinear part and the stitched curve should not be read as an age trajectory alone"
            } else {
                "no evidence of period effects beyond age and cohort; this tests only their nonlinear part"
            }
        ))
    }
}

/// The model's assumptions, for records or panels.
fn assumptions(panel: bool) -> Vec<String> {
    let mut a = vec![
        "age, period and birth time act as smooth curves (natural cubic splines with the knots shown); birth time = \
         calendar time − age exactly"
            .to_string(),
        "the curves, the drift and the two age slopes need no constraint; each solution's three slopes rest on its \
         constraint, which the data cannot test"
            .to_string(),
    ];
    a.push(if panel {
        "participants differ in level and in age slope (correlated, normal), clusters in level; given them, records \
         are independent with one residual variance"
            .to_string()
    } else {
        "records are independent, with one residual variance".to_string()
    });
    a
}

/// Wald F of `coef[cols] = 0`: exact for least squares (residual df);
/// Fai–Cornelius/Satterthwaite denominator df from the REML fit of panels.
fn wald(full: &FullFit, cols: &[usize], n: usize) -> (f64, f64) {
    if let Some(f) = &full.mixed {
        let rows: Vec<Vec<f64>> = cols
            .iter()
            .map(|&c| (0..full.q).map(|k| f64::from(u8::from(k == c))).collect())
            .collect();
        let t = crate::infer::hypothesis::wald_f(f, "", &rows);
        return (t.statistic, t.df_denominator.unwrap_or(f64::NAN));
    }
    let m = cols.len();
    let v = Mat::from_fn(m, m, |i, j| full.cov[cols[i] * full.q + cols[j]]);
    let b = Mat::from_fn(m, 1, |i, _| full.coef[cols[i]]);
    let Ok(llt) = v.llt(Side::Lower) else {
        return (f64::NAN, f64::NAN);
    };
    let z = llt.solve(&b);
    let quad: f64 = (0..m).map(|i| b[(i, 0)] * z[(i, 0)]).sum();
    (quad / m as f64, n.saturating_sub(full.q) as f64)
}

/// The four tests: the drift (the period column of the fitted model, whose
/// coefficient is period slope + cohort slope) and each curve.
fn tests(layout: &Layout, full: &FullFit, n: usize) -> Vec<ExactTest> {
    let plan = [
        (ExactTestKind::Drift, "a linear drift in time", None),
        (ExactTestKind::AgeNonlinear, "age beyond a straight line", Some(0)),
        (ExactTestKind::PeriodNonlinear, "period beyond a straight line", Some(1)),
        (ExactTestKind::CohortNonlinear, "cohort beyond a straight line", Some(2)),
    ];
    plan.into_iter()
        .map(|(kind, name, dim)| {
            let cols: Vec<usize> = match dim {
                None => vec![2],
                Some(d) => layout.block(d).collect(),
            };
            let mut t = ExactTest {
                kind,
                name: name.into(),
                statistic: f64::NAN,
                df: cols.len(),
                df_denominator: f64::NAN,
                p: None,
                reference: "—".into(),
                withheld: None,
            };
            if cols.is_empty() {
                let d = dim.map_or(Dimension::Period, |d| super::analysis::DIMENSIONS[d]);
                let knots: Vec<String> = dim
                    .map(|d| layout.splines[d].knots.iter().map(|k| format!("{k:.2}")).collect())
                    .unwrap_or_default();
                t.withheld = Some(format!(
                    "the {} values are too few for a curve (knots {}): nothing beyond a straight line can be tested",
                    d.name(),
                    knots.join(", ")
                ));
                return t;
            }
            let (f, den) = wald(full, &cols, n);
            t.statistic = f;
            t.df_denominator = den;
            t.p = Some(f_sf(f, cols.len() as f64, den)).filter(|p| p.is_finite());
            t.reference = if den.fract() == 0.0 {
                format!("F({}, {den})", cols.len())
            } else {
                format!("F({}, {den:.1})", cols.len())
            };
            if t.p.is_none() {
                t.withheld = Some("the Wald statistic could not be computed".into());
            }
            t
        })
        .collect()
}

/// The slope combinations that need no constraint, from the full model
/// (columns 1 and 2 are age and period: α_a = β_a − β_c, α_p = β_p + β_c).
fn identified(full: &FullFit) -> Vec<super::identified::Identified> {
    let q = full.q;
    let v = |i: usize, j: usize| full.cov[i * q + j];
    let (aa, ap) = (full.coef[1], full.coef[2]);
    let item = |quantity: &str, estimate: f64, var: f64| super::identified::Identified {
        quantity: quantity.into(),
        estimate,
        se: var.max(0.0).sqrt(),
    };
    vec![
        item("drift: period slope + cohort slope, per year", ap, v(2, 2)),
        item(
            "longitudinal age slope: age slope + period slope",
            aa + ap,
            v(1, 1) + v(2, 2) + 2.0 * v(1, 2),
        ),
        item("cross-sectional age slope: age slope − cohort slope", aa, v(1, 1)),
    ]
}

/// A time scale's deviation from linearity on a grid, with its band.
fn curve(layout: &Layout, d: usize, full: &FullFit) -> Option<Curve> {
    let s = &layout.splines[d];
    if s.n_nonlinear() == 0 {
        return None;
    }
    let block = layout.block(d);
    let pos: Vec<usize> = block.collect();
    let (lo, hi) = (s.knots[0], s.knots[s.knots.len() - 1]);
    let mut out = Curve {
        dimension: super::analysis::DIMENSIONS[d],
        x: Vec::new(),
        deviation: Vec::new(),
        lower: Vec::new(),
        upper: Vec::new(),
    };
    let mut row = Vec::new();
    for g in 0..CURVE_POINTS {
        let x = lo + (hi - lo) * g as f64 / (CURVE_POINTS - 1) as f64;
        row.clear();
        s.nonlinear(x, &mut row);
        let est: f64 = row.iter().zip(&pos).map(|(r, &k)| r * full.coef[k]).sum();
        let mut var = 0.0;
        for (i, &ki) in pos.iter().enumerate() {
            for (j, &kj) in pos.iter().enumerate() {
                var += row[i] * row[j] * full.cov[ki * full.q + kj];
            }
        }
        let se = var.max(0.0).sqrt();
        out.x.push(x);
        out.deviation.push(est);
        out.lower.push(est - Z95 * se);
        out.upper.push(est + Z95 * se);
    }
    Some(out)
}

/// The default constraints of the exact-value model: each slope zero, then
/// the minimum-norm slopes.
fn default_constraints() -> Vec<Constraint> {
    let mut c: Vec<Constraint> = super::analysis::DIMENSIONS
        .iter()
        .map(|&dimension| Constraint::ZeroSlope { dimension })
        .collect();
    c.push(Constraint::MinNorm);
    c
}

/// Each constraint's slopes: on the line (β_a, β_p, β_c) = (t, L − t, t − α_a)
/// with L = α_a + α_p, a constraint fixes t as a combination w·(α_a, α_p).
fn solutions(
    constraints: &[Constraint],
    full: &FullFit,
    input: &ExactInput<'_>,
    layout: &Layout,
) -> (Vec<ExactSolution>, f64) {
    // Equal-level constraints need groups; without any other, the defaults.
    let mut chosen: Vec<Constraint> = constraints
        .iter()
        .filter(|c| !matches!(c, Constraint::Equal { .. }))
        .cloned()
        .collect();
    if chosen.is_empty() {
        chosen = default_constraints();
    }
    let q = full.q;
    let cov2 = [
        full.cov[q + 1],
        full.cov[q + 2],
        full.cov[2 * q + 1],
        full.cov[2 * q + 2],
    ];
    let (aa, ap) = (full.coef[1], full.coef[2]);
    let mut out = Vec::new();
    for c in chosen {
        // t = w[0] α_a + w[1] α_p.
        let (w, description) = match c {
            Constraint::ZeroSlope {
                dimension: Dimension::Age,
            } => ([0.0, 0.0], "the age slope is zero"),
            Constraint::ZeroSlope {
                dimension: Dimension::Period,
            } => ([1.0, 1.0], "the period slope is zero"),
            Constraint::ZeroSlope {
                dimension: Dimension::Cohort,
            } => ([1.0, 0.0], "the cohort slope is zero"),
            // min t² + (L − t)² + (t − α_a)²: t = (L + α_a)/3 = (2α_a + α_p)/3.
            _ => ([2.0 / 3.0, 1.0 / 3.0], "the three slopes have the least sum of squares"),
        };
        // Rows of (β_a, β_p, β_c) as combinations of (α_a, α_p).
        let rows = [[w[0], w[1]], [1.0 - w[0], 1.0 - w[1]], [w[0] - 1.0, w[1]]];
        let slopes = rows.map(|r| r[0] * aa + r[1] * ap);
        let se = rows.map(|r| {
            (r[0] * r[0] * cov2[0] + 2.0 * r[0] * r[1] * cov2[1] + r[1] * r[1] * cov2[3])
                .max(0.0)
                .sqrt()
        });
        out.push(ExactSolution {
            constraint: c,
            description: description.into(),
            slopes,
            se,
        });
    }
    // The linear part of each record's fitted value under every solution,
    // against the first solution's, in one pass.
    let (ma, mp) = (layout.splines[0].mean, layout.splines[1].mean);
    let mut max_diff: f64 = 0.0;
    for k in 0..input.y.len() {
        let (a, p) = (input.age[k], input.period[k]);
        let x = [a - ma, p - mp, (p - a) - (mp - ma)];
        let linear = |s: &ExactSolution| s.slopes.iter().zip(&x).map(|(b, v)| b * v).sum::<f64>();
        let first = out.first().map_or(0.0, linear);
        for sol in out.iter().skip(1) {
            max_diff = max_diff.max((linear(sol) - first).abs());
        }
    }
    (out, max_diff)
}

#[cfg(test)]
mod tests {
    use super::*;

    // Closed form: when the outcome is an exact linear function of age,
    // period and birth time plus curves, least squares recovers every
    // identified quantity exactly, and each solution's slopes lie on the line
    // b + t·(1, −1, 1).
    #[test]
    fn a_noiseless_outcome_is_recovered_exactly() {
        let n = 600;
        let mut age = Vec::new();
        let mut period = Vec::new();
        for i in 0..n {
            let cohort = 2000.0 + (i % 6) as f64 * 2.0 + (i as f64 * 0.37).fract();
            let p = 2015.0 + (i / 6 % 5) as f64 + (i as f64 * 0.13).fract() * 0.5;
            age.push(p - cohort);
            period.push(p);
        }
        let (ba, bp, bc) = (0.8, 0.1, -0.3);
        let y: Vec<f64> = (0..n)
            .map(|k| 5.0 + ba * age[k] + bp * period[k] + bc * (period[k] - age[k]))
            .collect();
        let input = ExactInput::records(&age, &period, &y);
        let r = fit(&input, &[]).unwrap();
        let tol = 1e-8;
        assert!((r.identified[0].estimate - (bp + bc)).abs() < tol, "{:?}", r.identified);
        assert!((r.identified[1].estimate - (ba + bp)).abs() < tol);
        assert!((r.identified[2].estimate - (ba - bc)).abs() < tol);
        for s in &r.solutions {
            let t = s.slopes[0] - ba;
            assert!((s.slopes[1] - (bp - t)).abs() < tol && (s.slopes[2] - (bc + t)).abs() < tol);
        }
        assert!(r.fitted_max_difference < 1e-8);
        for c in &r.curves {
            assert!(c.deviation.iter().all(|d| d.abs() < 1e-6), "{:?}", c.dimension);
        }
    }
}
