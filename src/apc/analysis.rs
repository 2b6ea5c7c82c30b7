//! The identification report: the fits, the line of solutions, what is
//! identified, the constrained solutions and the bounds.

use serde::Serialize;

pub use super::bounds::{Bounds, SlopeBound};
pub use super::constraints::{Assumption, Constraint, Solution};
use super::glm::{self, Cell, Family, GlmFit};
use super::identified::dot;
pub use super::identified::{CurvatureTest, Effects, Identified};
use super::{Dimension, Shape, complement_basis, null_vector};
use super::{bounds, constraints, identified};
use crate::error::{Error, Result};

pub(super) const DIMENSIONS: [Dimension; 3] = [Dimension::Age, Dimension::Period, Dimension::Cohort];

/// Group labels of each dimension.
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct Labels {
    /// Age groups.
    pub age: Vec<String>,
    /// Periods.
    pub period: Vec<String>,
    /// Cohorts (birth years: period − age).
    pub cohort: Vec<String>,
}

impl Labels {
    /// The labels of a dimension.
    pub fn of(&self, d: Dimension) -> &Vec<String> {
        match d {
            Dimension::Age => &self.age,
            Dimension::Period => &self.period,
            Dimension::Cohort => &self.cohort,
        }
    }
}

/// The data of an APC analysis: cells of an age × period table.
#[derive(Debug, Clone, PartialEq)]
pub struct ApcData {
    /// Table shape.
    pub shape: Shape,
    /// Cells with their totals.
    pub cells: Vec<Cell>,
    /// Counts (Poisson) or a continuous outcome (Gaussian).
    pub family: Family,
    /// Labels.
    pub labels: Labels,
    /// Observations: records, or cells of a table.
    pub n_obs: usize,
    /// Group width in years.
    pub width: f64,
    /// First year of the youngest age group and of the earliest period.
    pub origin: (f64, f64),
    /// Panels: the participant of each cell (then every cell is one record),
    /// for a random intercept per participant.
    pub ids: Option<Vec<u32>>,
}

/// Fit one model: a GLM on cell totals, or for panels a linear mixed model
/// with a random intercept per participant (ML, so that deviances compare).
fn fit_model(data: &ApcData, rows: &CellRows) -> Result<GlmFit> {
    match &data.ids {
        None => glm::fit(&data.cells, &rows.expand(&data.cells), data.family),
        Some(ids) => glm::fit_mixed(&data.cells, rows.q, rows.flat(&data.cells), ids),
    }
}

/// A model's design rows, one per cell of the age × period table: every
/// record of a cell shares its row, so a panel of a million records needs
/// only the table's few dozen rows until a fit flattens them.
struct CellRows {
    /// Columns.
    q: usize,
    /// Periods (the table's second index runs 1..=periods).
    periods: usize,
    /// Row of cell (i, j) at `((i − 1) · periods + j − 1) · q`.
    rows: Vec<f64>,
}

impl CellRows {
    /// The rows of the cells that occur in `cells` (a corner cell of a
    /// sparse design may have no cohort column, and is never asked for).
    fn new(s: Shape, cells: &[Cell], q: usize, row: impl Fn(usize, usize) -> Vec<f64>) -> CellRows {
        let mut out = CellRows {
            q,
            periods: s.p,
            rows: vec![0.0; s.a * s.p * q],
        };
        let mut done = vec![false; s.a * s.p];
        for c in cells {
            let k = (c.i - 1) * s.p + c.j - 1;
            if !done[k] {
                done[k] = true;
                out.rows[k * q..(k + 1) * q].copy_from_slice(&row(c.i, c.j));
            }
        }
        out
    }

    fn of(&self, c: &Cell) -> &[f64] {
        let at = ((c.i - 1) * self.periods + c.j - 1) * self.q;
        &self.rows[at..at + self.q]
    }

    /// One row per cell, as the GLM of a table takes them.
    fn expand(&self, cells: &[Cell]) -> Vec<Vec<f64>> {
        cells.iter().map(|c| self.of(c).to_vec()).collect()
    }

    /// One row per cell, row-major in one vector.
    fn flat(&self, cells: &[Cell]) -> Vec<f64> {
        let mut x = Vec::with_capacity(cells.len() * self.q);
        for c in cells {
            x.extend_from_slice(self.of(c));
        }
        x
    }
}

/// A named value.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Term {
    /// Name.
    pub term: String,
    /// Value.
    pub value: f64,
}

/// One row of the deviance table.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct DevianceRow {
    /// A, A+P, A+C, P+C, A+drift or APC.
    pub model: String,
    /// Poisson deviance, or the residual sum of squares.
    pub deviance: f64,
    /// Residual df.
    pub df: usize,
}

/// The kind of outcome an APC analysis models.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum OutcomeKind {
    /// Event counts with exposure (a Poisson log-linear model).
    Counts,
    /// A continuous outcome (least squares, or a mixed model for panels).
    Continuous,
}

/// The report, with stable JSON keys.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ApcReport {
    /// What was read and used.
    pub data: crate::data::DataSummary,
    /// Warnings in plain words.
    pub warnings: Vec<crate::warning::Warning>,
    /// The code of each warning, in the same order.
    pub warning_codes: Vec<crate::warning::WarningCode>,
    /// The settings that produced the report.
    pub options: super::ApcOptions,
    /// Counts with exposure, or a continuous outcome.
    pub outcome: OutcomeKind,
    /// Age groups, periods and cohorts.
    pub shape: Shape,
    /// Group labels.
    pub labels: Labels,
    /// Observations used.
    pub n_obs: usize,
    /// Rank deficiency of the APC design, found numerically.
    pub rank_deficiency: usize,
    /// Kupper's closed-form null vector in this coding.
    pub null_vector: Vec<Term>,
    /// max |X v| over cells: the numerical check of the null vector.
    pub null_vector_residual: f64,
    /// The deviance table.
    pub deviance_table: Vec<DevianceRow>,
    /// What is identified, with SEs.
    pub identified: Vec<Identified>,
    /// Wald tests of no curvature.
    pub curvature_tests: Vec<CurvatureTest>,
    /// The minimum-norm solution b₀ (the line's origin).
    pub line_origin: Vec<Term>,
    /// The constrained solutions.
    pub solutions: Vec<Solution>,
    /// Largest difference between the fitted values of any two solutions.
    pub fitted_max_difference: f64,
    /// Bounds, when assumptions were given.
    pub bounds: Option<Bounds>,
    /// What every number rests on.
    pub assumptions: Vec<String>,
    /// The hierarchical APC fit, when asked for (records only).
    pub hierarchical: Option<super::hierarchical::Hierarchical>,
    /// Panels: how the identification problem appears in a cohort-sequential
    /// design, and what the linkage assumption buys.
    pub panel: Option<PanelView>,
    /// A given birth-year column, checked against period − age.
    pub cohort_check: Option<CohortCheck>,
    /// Records: the exact-value model (splines in exact age, period and
    /// birth time), whose tests hold their level.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub exact: Option<super::exact::ExactApc>,
}

/// A birth-year column checked against period − age.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CohortCheck {
    /// The column.
    pub column: String,
    /// Largest |birth year − (period − age)| in years.
    pub max_gap: f64,
    /// In words.
    pub note: String,
}

/// Check a birth-year column against period − age (up to a year apart when
/// years are whole numbers: the birthday may fall before or after the
/// assessment in that year).
///
/// # Errors
/// [`Error::Data`] when some record is more than a year off.
pub fn check_cohort(
    path: &std::path::Path,
    column: &str,
    rows: &[usize],
    age: &[f64],
    period: &[f64],
    birth: &[f64],
) -> Result<CohortCheck> {
    let mut max_gap: f64 = 0.0;
    let mut worst = 0;
    for k in 0..age.len() {
        let g = (birth[k] - (period[k] - age[k])).abs();
        if g > max_gap {
            max_gap = g;
            worst = k;
        }
    }
    if max_gap > 1.0 + 1e-6 {
        return Err(Error::Data {
            path: path.to_path_buf(),
            message: format!(
                "column '{column}' is not a birth year: in data row {} it is {} but period − age is {:.2}; check the columns",
                rows[worst],
                birth[worst],
                period[worst] - age[worst]
            ),
        });
    }
    Ok(CohortCheck {
        column: column.to_string(),
        max_gap,
        note: format!(
            "the birth years in '{column}' agree with period − age to within {max_gap:.2} years; cohort groups are formed \
             from period − age so that cohort = period − age holds exactly, as the identification analysis assumes"
        ),
    })
}

/// The APC problem in the user's own cohort-sequential panel.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PanelView {
    /// Participants.
    pub n_participants: usize,
    /// The test of period effects beyond age and cohort (APC against A+C):
    /// a likelihood ratio of their ML fits.
    pub period_beyond_cohort: crate::infer::hypothesis::TestResult,
    /// What it means, in words.
    pub text: Vec<String>,
}

/// The rows of a submodel: the full coding's columns `cols`, and a linear
/// drift in period when asked for.
fn submodel_rows(s: Shape, cells: &[Cell], cols: &[usize], drift: bool) -> CellRows {
    let q = cols.len() + usize::from(drift);
    CellRows::new(s, cells, q, |i, j| {
        let full = s.row(i, j);
        let mut r: Vec<f64> = cols.iter().map(|&k| full[k]).collect();
        if drift {
            r.push(j as f64 - (s.p as f64 + 1.0) / 2.0);
        }
        r
    })
}

/// Run the analysis.
///
/// # Errors
/// [`Error::Spec`] for a constraint that does not identify the model or a
/// level out of range; errors of the fits.
pub fn analyse(data: &ApcData, constraints: &[Constraint], assumptions: &[Assumption]) -> Result<ApcReport> {
    let s = data.shape;
    super::check_shape(s)?;
    let q = s.n_params();
    let v = null_vector(s);
    let basis = complement_basis(&v);
    let full = CellRows::new(s, &data.cells, q, |i, j| s.row(i, j));
    let null_vector_residual = data.cells.iter().map(|c| dot(full.of(c), &v).abs()).fold(0.0, f64::max);
    // The APC fit in the coordinates of the complement basis. Rows are
    // mostly zeros (one group of each time scale), so only their non-zero
    // entries are multiplied.
    let reduced = CellRows::new(s, &data.cells, q - 1, |i, j| {
        let mut out = vec![0.0; q - 1];
        for (k, &x) in s.row(i, j).iter().enumerate().filter(|(_, x)| **x != 0.0) {
            for (o, b) in out.iter_mut().zip(&basis[k * (q - 1)..(k + 1) * (q - 1)]) {
                *o += x * b;
            }
        }
        out
    });
    let apc = fit_model(data, &reduced)?;
    let b0: Vec<f64> = (0..q)
        .map(|k| (0..q - 1).map(|c| basis[k * (q - 1) + c] * apc.coef[c]).sum())
        .collect();
    // cov(b₀) = B cov(γ) Bᵀ.
    let mut cov = vec![0.0; q * q];
    for r in 0..q {
        for c in 0..q {
            let mut acc = 0.0;
            for a in 0..q - 1 {
                let bra = basis[r * (q - 1) + a];
                if bra == 0.0 {
                    continue;
                }
                for b in 0..q - 1 {
                    acc += bra * apc.cov[a * (q - 1) + b] * basis[c * (q - 1) + b];
                }
            }
            cov[r * q + c] = acc;
        }
    }
    let rank_deficiency = rank_deficiency(s, &data.cells, &apc, data.family);
    // Deviance table.
    let (age_cols, per_cols, coh_cols): (Vec<usize>, Vec<usize>, Vec<usize>) = (
        (s.offset(Dimension::Age)..s.offset(Dimension::Age) + s.a - 1).collect(),
        (s.offset(Dimension::Period)..s.offset(Dimension::Period) + s.p - 1).collect(),
        (s.offset(Dimension::Cohort)..s.offset(Dimension::Cohort) + s.k() - 1).collect(),
    );
    let cat = |parts: &[&Vec<usize>]| -> Vec<usize> {
        let mut c = vec![0];
        for p in parts {
            c.extend(p.iter().copied());
        }
        c
    };
    let mut deviance_table = Vec::new();
    let mut drift_fit: Option<GlmFit> = None;
    for (name, cols, drift) in [
        ("A", cat(&[&age_cols]), false),
        ("A+P", cat(&[&age_cols, &per_cols]), false),
        ("A+C", cat(&[&age_cols, &coh_cols]), false),
        ("P+C", cat(&[&per_cols, &coh_cols]), false),
        ("A+drift", cat(&[&age_cols]), true),
    ] {
        let f = fit_model(data, &submodel_rows(s, &data.cells, &cols, drift))?;
        deviance_table.push(DevianceRow {
            model: name.into(),
            deviance: f.deviance,
            df: residual_df(data, f.df, f.coef.len()),
        });
        if drift {
            drift_fit = Some(f);
        }
    }
    deviance_table.push(DevianceRow {
        model: "APC".into(),
        deviance: apc.deviance,
        df: residual_df(data, apc.df, q - 1),
    });
    let (identified, curvature_tests) = identified::identified(data, &b0, &cov, drift_fit.as_ref(), apc.df);
    let solutions = constraints::solutions(data, &b0, &v, constraints)?;
    // Fitted values agree across solutions.
    let mut fitted_max_difference: f64 = 0.0;
    let eta = |t: f64| -> Vec<f64> {
        let b: Vec<f64> = b0.iter().zip(&v).map(|(x, y)| x + t * y).collect();
        data.cells.iter().map(|c| dot(full.of(c), &b)).collect()
    };
    let base = eta(0.0);
    for sol in &solutions {
        for (x, y) in eta(sol.t).iter().zip(&base) {
            fitted_max_difference = fitted_max_difference.max((x - y).abs());
        }
    }
    let panel = data.ids.as_ref().map(|ids| panel_view(ids, &deviance_table));
    let bounds = if assumptions.is_empty() {
        None
    } else {
        Some(bounds::bounds(s, &b0, &v, assumptions))
    };
    let notes = assumptions_of(data.family, data.ids.is_some(), bounds.is_some());
    Ok(ApcReport {
        data: crate::data::DataSummary::default(),
        warnings: Vec::new(),
        warning_codes: Vec::new(),
        options: super::ApcOptions::default(),
        outcome: match data.family {
            Family::Poisson => OutcomeKind::Counts,
            Family::Gaussian => OutcomeKind::Continuous,
        },
        shape: s,
        labels: data.labels.clone(),
        n_obs: data.n_obs,
        rank_deficiency,
        null_vector: term_names(s)
            .into_iter()
            .zip(&v)
            .map(|(term, &value)| Term { term, value })
            .collect(),
        null_vector_residual,
        deviance_table,
        identified,
        curvature_tests,
        line_origin: term_names(s)
            .into_iter()
            .zip(&b0)
            .map(|(term, &value)| Term { term, value })
            .collect(),
        solutions,
        fitted_max_difference,
        bounds,
        assumptions: notes,
        hierarchical: None,
        panel,
        cohort_check: None,
        exact: None,
    })
}

/// What every number of the report rests on, in words.
fn assumptions_of(family: Family, panel: bool, with_bounds: bool) -> Vec<String> {
    let mut notes = vec![
        "Age, period and cohort are exactly collinear (cohort = period − age): the linear trends of the three are not \
         identified, and each constrained solution rests on its constraint, which the data cannot test (Holford 1983)."
            .to_string(),
        "Identified without any constraint: fitted values, second differences, deviations from linearity, the \
         drift, and the sums age + period, period + cohort and the difference age − cohort of the linear slopes."
            .to_string(),
        "The solutions differ only by t·v along one line in parameter space; the report gives each constraint's t."
            .to_string(),
        "The minimum-norm solution (the intrinsic estimator) is a constraint like any other: it depends on the coding \
         and on the numbers of groups, not on the data (Luo 2013, Demography 50)."
            .to_string(),
        "Associations are not causes: age, period and cohort effects describe these data, not mechanisms.".into(),
    ];
    if family == Family::Gaussian && panel {
        notes.push(
            "A continuous outcome is fitted by ML with a random intercept per participant and one residual \
             variance: a participant's records are correlated, participants are independent."
                .into(),
        );
    } else if family == Family::Gaussian {
        notes.push(
            "A continuous outcome is fitted by least squares with one residual variance; records are independent."
                .into(),
        );
    }
    if with_bounds {
        notes.push("The bounds are on the estimates and take the stated assumptions as true; they carry no sampling uncertainty.".into());
    }
    notes
}

fn residual_df(data: &ApcData, _glm_df: usize, q: usize) -> usize {
    match data.family {
        Family::Poisson => data.cells.len().saturating_sub(q),
        Family::Gaussian => data.n_obs.saturating_sub(q),
    }
}

/// Names of the coded parameters.
pub fn term_names(s: Shape) -> Vec<String> {
    let mut v = vec!["intercept".to_string()];
    for d in DIMENSIONS {
        for l in 1..s.levels(d) {
            v.push(format!("{} {l}", d.name()));
        }
    }
    v
}

/// Numerical rank deficiency of the weighted APC design: eigenvalues of XᵀWX
/// below 1e-10 of the largest.
fn rank_deficiency(shape: Shape, cells: &[Cell], fit: &GlmFit, family: Family) -> usize {
    // The weights summed per age × period cell first: panels hold one cell
    // per record, and XᵀWX depends only on the cell totals.
    let mut weight: std::collections::BTreeMap<(usize, usize), f64> = std::collections::BTreeMap::new();
    for (cell, mu) in cells.iter().zip(&fit.fitted) {
        let w = match family {
            Family::Poisson => *mu,
            Family::Gaussian => cell.e,
        };
        *weight.entry((cell.i, cell.j)).or_default() += w;
    }
    let q = shape.n_params();
    let mut m = faer::Mat::<f64>::zeros(q, q);
    for (&(i, j), &w) in &weight {
        let x = shape.row(i, j);
        for r in 0..q {
            if x[r] == 0.0 {
                continue;
            }
            for c in 0..q {
                m[(r, c)] += w * x[r] * x[c];
            }
        }
    }
    let Ok(values) = m.self_adjoint_eigenvalues(faer::Side::Lower) else {
        return usize::MAX;
    };
    let top = values.iter().cloned().fold(0.0, f64::max);
    values.iter().filter(|&&e| e < 1e-10 * top).count()
}

fn panel_view(ids: &[u32], table: &[DevianceRow]) -> PanelView {
    let find = |m: &str| table.iter().find(|r| r.model == m);
    let (ac, apc) = (find("A+C"), find("APC"));
    let test = match (ac, apc) {
        (Some(ac), Some(apc)) => crate::infer::hypothesis::likelihood_ratio(
            "period effects beyond age and cohort (APC vs A+C)",
            -ac.deviance / 2.0,
            -apc.deviance / 2.0,
            ac.df.saturating_sub(apc.df),
            false,
        )
        .of_kind(crate::infer::hypothesis::TestKind::PeriodBeyondCohort),
        _ => crate::infer::hypothesis::likelihood_ratio("period effects beyond age and cohort", 0.0, 0.0, 0, false),
    };
    let sentence = format!(
        "The A+C model is that assumption in factor form. Adding period factors (APC against A+C) changes the \
         deviance by {:.3} on {} df, {}: {}.",
        test.statistic,
        test.df,
        crate::stats::p_words(test.p),
        if test.p < 0.05 {
            "there are period effects that age and cohort do not absorb, so the no-period assumption fails in \
             its nonlinear part and the stitched curve should not be read as an age trajectory alone"
        } else {
            "no evidence of period effects beyond age and cohort; this tests only their nonlinear part"
        }
    );
    PanelView {
        n_participants: count_levels(ids),
        period_beyond_cohort: test,
        text: panel_text(sentence),
    }
}

/// Distinct codes.
fn count_levels(ids: &[u32]) -> usize {
    let mut n: Vec<u32> = ids.to_vec();
    n.sort_unstable();
    n.dedup();
    n.len()
}

/// The panel view's words around the sentence of its linkage test.
fn panel_text(test_sentence: String) -> Vec<String> {
    vec![
        "In a cohort-sequential panel each participant's age rises one for one with the period, and cohort = period − \
         age, so the linear trends of age, period and cohort cannot be separated here either."
            .to_string(),
        "The stitched trajectory of braid fit assumes that there are no period effects: the linkage (convergence) \
         assumption. Under it, cohort differences are identified through the ages that neighbouring cohorts share; \
         braid converge tests them (M1, M2) at those ages."
            .to_string(),
        test_sentence,
        "A linear period trend is invisible to every test: it is exactly a combination of linear age and cohort \
         trends, so the linkage assumption about it stays an assumption."
            .to_string(),
    ]
}

impl PanelView {
    /// The panel view of the exact-value model, whose period-curve test is
    /// the linkage test.
    pub fn exact(ids: &[u32], exact: &super::exact::ExactApc) -> Option<PanelView> {
        let t = exact
            .tests
            .iter()
            .find(|t| t.kind == super::exact::ExactTestKind::PeriodNonlinear)?;
        let test = crate::infer::hypothesis::TestResult {
            kind: crate::infer::hypothesis::TestKind::PeriodBeyondCohort,
            name: "period effects beyond age and cohort (the period curve of the exact-value model)".into(),
            statistic: t.statistic,
            df: t.df as f64,
            df_denominator: Some(t.df_denominator),
            p: t.p.unwrap_or(f64::NAN),
            method: crate::infer::hypothesis::TestMethod::WaldF {
                df: t.df as f64,
                df_denominator: t.df_denominator,
                fit: "REML",
            },
            withheld: None,
        };
        Some(PanelView {
            n_participants: count_levels(ids),
            period_beyond_cohort: test,
            text: panel_text(exact.linkage_sentence()?),
        })
    }
}

impl ApcReport {
    /// A report of the exact-value model alone, for records that could not
    /// be grouped and where no grouping was asked for: the grouped parts are
    /// empty.
    pub fn exact_only(exact: super::exact::ExactApc, panel: Option<PanelView>) -> ApcReport {
        ApcReport {
            data: crate::data::DataSummary::default(),
            warnings: Vec::new(),
            warning_codes: Vec::new(),
            options: super::ApcOptions::default(),
            outcome: OutcomeKind::Continuous,
            shape: Shape::default(),
            labels: Labels::default(),
            n_obs: exact.n_obs,
            rank_deficiency: 1,
            null_vector: Vec::new(),
            null_vector_residual: f64::NAN,
            deviance_table: Vec::new(),
            identified: Vec::new(),
            curvature_tests: Vec::new(),
            line_origin: Vec::new(),
            solutions: Vec::new(),
            fitted_max_difference: exact.fitted_max_difference,
            bounds: None,
            assumptions: exact.assumptions.clone(),
            hierarchical: None,
            panel,
            cohort_check: None,
            exact: Some(exact),
        }
    }
}
