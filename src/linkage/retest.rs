//! Retest (practice) effects: a term for the number of prior assessments,
//! whether it is identified in this design, and how the age slope moves when
//! it is added.
//!
//! Within one person, the number of prior assessments rises with time in the
//! study, which rises with age. What separates a retest effect from ageing
//! is people of the same age with different numbers of prior tests, which an
//! accelerated design supplies by its overlapping cohorts. With one cohort on
//! one schedule, prior tests are fixed by age and the term is not identified.
//! braid measures this as the R² of the term on the fixed-effect columns
//! already in the model.

use serde::Serialize;

use crate::data::Panel;
use crate::error::Result;
use crate::infer;
use crate::lmm::{self, Method};
use crate::spec::ModelFrame;

/// The form of the retest term.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum RetestForm {
    /// The number of prior assessments (0, 1, 2, ...).
    Count,
    /// 1 from the second assessment on, 0 at the first.
    Later,
    /// The square root of the number of prior assessments.
    Sqrt,
}

impl RetestForm {
    /// The column name in the model.
    pub fn name(self) -> &'static str {
        match self {
            RetestForm::Count => "prior assessments",
            RetestForm::Later => "later assessment (not the first)",
            RetestForm::Sqrt => "√(prior assessments)",
        }
    }
}

/// Above this R² on the model's other fixed columns the term is not
/// identified (an exact linear function of them, up to rounding of ages).
pub const NOT_IDENTIFIED_R2: f64 = 1.0 - 1e-8;

/// Above this R² (variance inflation above 20) the term is nearly collinear
/// and its estimate is imprecise (common practice: VIF > 10 to 20 is a
/// warning sign).
pub const NEAR_R2: f64 = 0.95;

/// The retest check and, when identified, its estimate.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct RetestReport {
    /// The form of the term.
    pub form: RetestForm,
    /// "identified", "nearly collinear" or "not identified".
    pub status: String,
    /// R² of the term on the model's other fixed columns.
    pub r2: f64,
    /// Variance inflation factor 1 / (1 − R²).
    pub vif: f64,
    /// What follows, in words.
    pub message: String,
    /// The retest effect (REML), when identified.
    pub estimate: Option<f64>,
    /// Its SE.
    pub se: Option<f64>,
    /// Its two-sided p (Satterthwaite df).
    pub p: Option<f64>,
    /// The linear age term (at the reference age) without the retest term.
    pub age_slope_without: f64,
    /// And with it (when identified).
    pub age_slope_with: Option<f64>,
}

/// The retest column for each row: prior assessments counted in age order
/// within each participant.
pub fn column(panel: &Panel, form: RetestForm) -> Vec<f64> {
    crate::data::derive::assessment_order(panel)
        .into_iter()
        .map(|rank| {
            let c = (rank - 1) as f64;
            match form {
                RetestForm::Count => c,
                RetestForm::Later => f64::from(u8::from(c > 0.0)),
                RetestForm::Sqrt => c.sqrt(),
            }
        })
        .collect()
}

/// R² of `y` on the columns of the row-major n×p matrix `x` (its constant
/// column adds nothing: [`crate::stats::r_squared`] fits an intercept).
fn r_squared(x: &[f64], p: usize, y: &[f64]) -> f64 {
    let n = y.len();
    let cols: Vec<Vec<f64>> = (0..p).map(|a| (0..n).map(|r| x[r * p + a]).collect()).collect();
    let refs: Vec<&[f64]> = cols.iter().map(Vec::as_slice).collect();
    crate::stats::r_squared(y, &refs)
}

/// Check and, when identified, fit the retest term added to M0 (REML).
///
/// # Errors
/// Errors of the engine.
pub fn check(panel: &Panel, frame: &ModelFrame, form: RetestForm) -> Result<RetestReport> {
    let base = super::fit_with(&frame.problem, Method::Reml)?;
    check_with(panel, frame, &base, form)
}

/// [`check`] given M0's REML fit (`base`), so a caller that has it does not
/// fit it again.
///
/// # Errors
/// Errors of the engine.
pub fn check_with(panel: &Panel, frame: &ModelFrame, base: &lmm::Fit, form: RetestForm) -> Result<RetestReport> {
    let col = column(panel, form);
    let p = frame.problem.p();
    let r2 = r_squared(&frame.problem.x_rows(), p, &col);
    let vif = 1.0 / (1.0 - r2).max(f64::MIN_POSITIVE);
    let age_slope_without = base.beta[1];
    let why = "the number of prior assessments is fixed by age when everyone of an age has been tested equally often \
               (one cohort on one schedule), so a retest effect cannot be told apart from change with age";
    if r2.is_nan() || r2 >= NOT_IDENTIFIED_R2 {
        return Ok(RetestReport {
            form,
            status: "not identified".into(),
            r2,
            vif,
            message: format!(
                "the retest term is not identified in this design (R² = {r2:.8} on the age terms and covariates): {why}. \
                 Cohorts entering at different ages, or varied schedules, are needed to separate them."
            ),
            estimate: None,
            se: None,
            p: None,
            age_slope_without,
            age_slope_with: None,
        });
    }
    let problem = super::columns::with_columns(&frame.problem, &[form.name().to_string()], &[col]);
    let with = super::fit_with(&problem, Method::Reml)?;
    let mut c = vec![0.0; problem.p()];
    c[problem.p() - 1] = 1.0;
    let k = infer::contrast(&with, &c);
    let near = r2 >= NEAR_R2;
    let message = if near {
        format!(
            "the retest term is nearly collinear with the age terms (R² = {r2:.4}, variance inflation {vif:.0}): it is \
             estimated only through the few people of the same age with different numbers of prior tests, so its \
             estimate and the age slope with it are imprecise; treat both with caution"
        )
    } else {
        format!(
            "the retest term is identified (R² = {r2:.4} on the age terms): people of the same age in different \
             cohorts have taken different numbers of tests. This separation rests on the cohorts converging: a cohort \
             difference at the same age would be read as a retest effect"
        )
    };
    Ok(RetestReport {
        form,
        status: if near { "nearly collinear" } else { "identified" }.into(),
        r2,
        vif,
        message,
        estimate: Some(k.estimate),
        se: Some(k.se),
        p: Some(k.p_value()),
        age_slope_without,
        age_slope_with: Some(with.beta[1]),
    })
}
