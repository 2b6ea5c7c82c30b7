//! The exact-value APC model for records: smooth functions of exact age,
//! calendar time and birth time (= time − age), after Carstensen (2007,
//! *Statistics in Medicine* 26:3018–3045).
//!
//! Each time scale enters as a natural cubic spline split into a linear part
//! and a nonlinear part with no level and no slope over the records
//! ([`SplitSpline`]). The three linear parts are exactly collinear (age =
//! period − birth time), so the design is [1, age, period, N_age, N_period,
//! N_cohort] with one null direction of the three slopes, (1, −1, 1) in
//! (age, period, cohort). Identified without any constraint: the three
//! deviations from linearity, the drift (period slope + cohort slope), the
//! longitudinal age slope (age + period) and the cross-sectional one (age −
//! cohort), and every fitted value. Records are fitted by least squares,
//! panels by ML with a random intercept per participant; nested models are
//! compared by F tests (records) or likelihood ratios (panels).

use faer::linalg::solvers::{DenseSolveCore, Solve};
use faer::{Mat, Side};
use serde::Serialize;

use super::Dimension;
use super::constraints::Constraint;
use super::glm::Cell;
use super::split::{EXACT_KNOTS, SplitSpline};
use crate::error::{Error, Result};
use crate::infer::hypothesis::{chi2_sf, f_sf};

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
    /// The nested models with their deviance and number of mean parameters.
    pub models: Vec<ExactModel>,
    /// Tests between nested models.
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

/// A fitted model of the nested sequence.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ExactModel {
    /// Short name.
    pub model: String,
    /// What it contains, in words.
    pub terms: String,
    /// Residual sum of squares (records) or −2 × ML log-likelihood (panels).
    pub deviance: f64,
    /// Mean parameters.
    pub parameters: usize,
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

/// A comparison of two nested models.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ExactTest {
    /// What it tests.
    pub kind: ExactTestKind,
    /// In words.
    pub name: String,
    /// The larger model against the smaller.
    pub models: String,
    /// F or likelihood-ratio χ².
    pub statistic: f64,
    /// Numerator df.
    pub df: usize,
    /// Denominator df (F tests of records).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub df_denominator: Option<usize>,
    /// p-value (null when the data cannot give one).
    pub p: Option<f64>,
    /// The reference distribution, for example "F(4, 2990)" or "χ²(4)".
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

/// A fit of a column subset.
struct SubFit {
    coef: Vec<f64>,
    cov: Vec<f64>,
    deviance: f64,
    q: usize,
}

/// Sufficient statistics of least squares, for fitting any column subset.
struct Moments {
    xtx: Vec<f64>,
    xty: Vec<f64>,
    yty: f64,
    q: usize,
    n: usize,
}

fn moments(layout: &Layout, input: &ExactInput<'_>, y_mean: f64) -> Moments {
    let q = layout.q();
    let mut xtx = vec![0.0; q * q];
    let mut xty = vec![0.0; q];
    let mut yty = 0.0;
    let mut row = Vec::with_capacity(q);
    for k in 0..input.y.len() {
        layout.row(input.age[k], input.period[k], &mut row);
        let y = input.y[k] - y_mean;
        yty += y * y;
        for i in 0..q {
            xty[i] += row[i] * y;
            let ri = row[i];
            for j in i..q {
                xtx[i * q + j] += ri * row[j];
            }
        }
    }
    for i in 0..q {
        for j in 0..i {
            xtx[i * q + j] = xtx[j * q + i];
        }
    }
    Moments {
        xtx,
        xty,
        yty,
        q,
        n: input.y.len(),
    }
}

fn ols(m: &Moments, cols: &[usize]) -> Result<SubFit> {
    let q = cols.len();
    let a = Mat::from_fn(q, q, |r, c| m.xtx[cols[r] * m.q + cols[c]]);
    let llt = a.llt(Side::Lower).map_err(|_| Error::Numerical {
        step: "exact-value age–period–cohort fit".into(),
        message: "the exact-value APC design is singular: a time scale has too few distinct values".into(),
    })?;
    let b = llt.solve(Mat::from_fn(q, 1, |r, _| m.xty[cols[r]]));
    let coef: Vec<f64> = (0..q).map(|r| b[(r, 0)]).collect();
    let fitted_ss: f64 = coef.iter().zip(cols).map(|(c, &k)| c * m.xty[k]).sum();
    let deviance = (m.yty - fitted_ss).max(0.0);
    let s2 = deviance / (m.n - q) as f64;
    let inv = llt.inverse();
    Ok(SubFit {
        coef,
        cov: (0..q * q).map(|k| inv[(k / q, k % q)] * s2).collect(),
        deviance,
        q,
    })
}

fn mixed(layout: &Layout, input: &ExactInput<'_>, ids: &[u32], cols: &[usize]) -> Result<SubFit> {
    let mut full = Vec::with_capacity(layout.q());
    let mut rows = Vec::with_capacity(input.y.len());
    let cells: Vec<Cell> = (0..input.y.len())
        .map(|k| {
            layout.row(input.age[k], input.period[k], &mut full);
            rows.push(cols.iter().map(|&c| full[c]).collect::<Vec<f64>>());
            Cell {
                i: 1,
                j: 1,
                y: input.y[k],
                e: 1.0,
                yy: input.y[k] * input.y[k],
            }
        })
        .collect();
    let f = super::glm::fit_mixed(&cells, &rows, ids)?;
    Ok(SubFit {
        coef: f.coef,
        cov: f.cov,
        deviance: f.deviance,
        q: cols.len(),
    })
}

/// The nested models: name, words, and which parts they hold
/// (period slope, age curve, period curve, cohort curve).
const MODELS: [(&str, &str, [bool; 4]); 6] = [
    ("A", "age (line and curve)", [false, true, false, false]),
    ("A+d", "age, and a linear drift in time", [true, true, false, false]),
    ("A+d+C", "age, drift, cohort curve", [true, true, false, true]),
    ("A+d+P", "age, drift, period curve", [true, true, true, false]),
    ("APC", "age, drift, and all three curves", [true, true, true, true]),
    ("APC−a", "as APC without the age curve", [true, false, true, true]),
];

fn columns(layout: &Layout, parts: [bool; 4]) -> Vec<usize> {
    let mut c = vec![0, 1];
    if parts[0] {
        c.push(2);
    }
    for d in 0..3 {
        if parts[d + 1] {
            c.extend(layout.block(d));
        }
    }
    c
}

/// Fit the exact-value model and its nested models.
///
/// # Errors
/// [`Error::Numerical`] when the design is singular; errors of the engine.
pub fn fit(input: &ExactInput<'_>, constraints: &[Constraint]) -> Result<ExactApc> {
    let n = input.y.len();
    let birth: Vec<f64> = input.period.iter().zip(input.age).map(|(p, a)| p - a).collect();
    let layout = Layout {
        splines: [
            SplitSpline::fit(input.age, EXACT_KNOTS),
            SplitSpline::fit(input.period, EXACT_KNOTS),
            SplitSpline::fit(&birth, EXACT_KNOTS),
        ],
    };
    let y_mean = input.y.iter().sum::<f64>() / n.max(1) as f64;
    let moments = if input.ids.is_none() {
        Some(moments(&layout, input, y_mean))
    } else {
        None
    };
    let fit_cols = |cols: &[usize]| match (input.ids, &moments) {
        (Some(ids), _) => mixed(&layout, input, ids, cols),
        (None, Some(m)) => ols(m, cols),
        (None, None) => unreachable!("moments exist for records"),
    };
    let mut fits = Vec::with_capacity(MODELS.len());
    for (_, _, parts) in MODELS {
        fits.push(fit_cols(&columns(&layout, parts))?);
    }
    let models = MODELS
        .iter()
        .zip(&fits)
        .map(|((m, t, _), f)| ExactModel {
            model: (*m).into(),
            terms: (*t).into(),
            deviance: f.deviance,
            parameters: f.q,
        })
        .collect();
    let tests = tests(&layout, &fits, n, input.ids.is_some());
    let full = &fits[4];
    let full_cols = columns(&layout, MODELS[4].2);
    let identified = identified(full);
    let curves = (0..3).filter_map(|d| curve(&layout, d, full, &full_cols)).collect();
    let (solutions, fitted_max_difference) = solutions(constraints, full, input, &layout);
    Ok(ExactApc {
        fit: if input.ids.is_some() {
            "ML, random intercept per participant"
        } else {
            "least squares"
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
        models,
        tests,
        identified,
        curves,
        null_direction: [1.0, -1.0, 1.0],
        solutions,
        fitted_max_difference,
    })
}

/// The four tests: drift (A+d against A), and each curve (APC against the
/// model without it).
fn tests(layout: &Layout, fits: &[SubFit], n: usize, likelihood: bool) -> Vec<ExactTest> {
    let plan = [
        (ExactTestKind::Drift, "a linear drift in time", 1, 0, None),
        (ExactTestKind::AgeNonlinear, "age beyond a straight line", 4, 5, Some(0)),
        (ExactTestKind::PeriodNonlinear, "period beyond a straight line", 4, 2, Some(1)),
        (ExactTestKind::CohortNonlinear, "cohort beyond a straight line", 4, 3, Some(2)),
    ];
    plan.into_iter()
        .map(|(kind, name, big, small, dim)| {
            let (b, s) = (&fits[big], &fits[small]);
            let df = b.q - s.q;
            let models = format!("{} against {}", MODELS[big].0, MODELS[small].0);
            let mut t = ExactTest {
                kind,
                name: name.into(),
                models,
                statistic: f64::NAN,
                df,
                df_denominator: None,
                p: None,
                reference: "—".into(),
                withheld: None,
            };
            if df == 0 {
                let d = dim.map_or(Dimension::Period, |d| super::analysis::DIMENSIONS[d]);
                t.withheld = Some(format!(
                    "the {} values are too few for a curve (knots {:?}): nothing beyond a straight line can be tested",
                    d.name(),
                    dim.map(|d| layout.splines[d].knots.clone()).unwrap_or_default()
                ));
                return t;
            }
            if likelihood {
                t.statistic = (s.deviance - b.deviance).max(0.0);
                t.p = Some(chi2_sf(t.statistic, df as f64));
                t.reference = format!("χ²({df})");
            } else {
                let den = n - b.q;
                t.statistic = ((s.deviance - b.deviance).max(0.0) / df as f64) / (b.deviance / den as f64);
                t.p = Some(f_sf(t.statistic, df as f64, den as f64));
                t.df_denominator = Some(den);
                t.reference = format!("F({df}, {den})");
            }
            t
        })
        .collect()
}

/// The slope combinations that need no constraint, from the full model
/// (columns 1 and 2 are age and period: α_a = β_a − β_c, α_p = β_p + β_c).
fn identified(full: &SubFit) -> Vec<super::identified::Identified> {
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
fn curve(layout: &Layout, d: usize, full: &SubFit, cols: &[usize]) -> Option<Curve> {
    let s = &layout.splines[d];
    if s.n_nonlinear() == 0 {
        return None;
    }
    let block = layout.block(d);
    let pos: Vec<usize> = block.clone().map(|c| cols.iter().position(|&k| k == c).unwrap_or(0)).collect();
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
    full: &SubFit,
    input: &ExactInput<'_>,
    layout: &Layout,
) -> (Vec<ExactSolution>, f64) {
    let chosen: Vec<Constraint> = if constraints.is_empty() {
        default_constraints()
    } else {
        constraints
            .iter()
            .filter(|c| !matches!(c, Constraint::Equal { .. }))
            .cloned()
            .collect()
    };
    let q = full.q;
    let cov2 = [full.cov[q + 1], full.cov[q + 2], full.cov[2 * q + 1], full.cov[2 * q + 2]];
    let (aa, ap) = (full.coef[1], full.coef[2]);
    let mut out = Vec::new();
    let mut fitted_first: Option<Vec<f64>> = None;
    let mut max_diff: f64 = 0.0;
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
        // The linear part of every record's fitted value under this solution.
        let fitted: Vec<f64> = (0..input.y.len())
            .map(|k| {
                let (a, p) = (input.age[k], input.period[k]);
                let c = p - a;
                slopes[0] * (a - layout.splines[0].mean)
                    + slopes[1] * (p - layout.splines[1].mean)
                    + slopes[2] * (c - (layout.splines[1].mean - layout.splines[0].mean))
            })
            .collect();
        match &fitted_first {
            None => fitted_first = Some(fitted),
            Some(f0) => {
                for (x, y) in f0.iter().zip(&fitted) {
                    max_diff = max_diff.max((x - y).abs());
                }
            }
        }
        out.push(ExactSolution {
            constraint: c,
            description: description.into(),
            slopes,
            se,
        });
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
        let input = ExactInput {
            age: &age,
            period: &period,
            y: &y,
            ids: None,
        };
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
