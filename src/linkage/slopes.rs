//! Between- and within-person age slopes: baseline age and time since
//! baseline as separate linear terms, refitted by REML.

use serde::Serialize;

use super::columns::with_columns;
use crate::data::Panel;
use crate::infer;
use crate::spec::{AgeSpec, ModelFrame, ModelSpec};

/// Baseline age against time since baseline.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct BetweenWithin {
    /// Slope of baseline age (between persons), per year.
    pub between: f64,
    /// Its SE.
    pub between_se: f64,
    /// Slope of time since baseline (within persons), per year.
    pub within: f64,
    /// Its SE.
    pub within_se: f64,
    /// between − within.
    pub difference: f64,
    /// Its SE.
    pub difference_se: f64,
    /// Satterthwaite df.
    pub df: f64,
    /// Two-sided p of equal slopes.
    pub p: f64,
}

/// Baseline age and time since baseline as separate linear slopes (the rest
/// of the age basis kept), refitted by REML; needs a polynomial basis.
pub(super) fn between_within(
    panel: &Panel,
    frame: &ModelFrame,
    spec0: &ModelSpec,
    m0_reml: &crate::lmm::Fit,
    notes: &mut Vec<String>,
) -> Option<BetweenWithin> {
    if !matches!(spec0.age, AgeSpec::Polynomial { .. }) {
        notes.push("between- and within-person slopes need a polynomial age basis; not computed".into());
        return None;
    }
    let n = panel.n();
    let p = frame.problem.p();
    let center = frame.basis.center();
    let first = panel.first_ages();
    let mut problem = frame.problem.clone();
    // Column 1 is the linear term (age − centre): replace it by the baseline
    // age, and append time since baseline.
    let mut within = Vec::with_capacity(n);
    let x = problem.x.stored_mut(n, p);
    for r in 0..n {
        let a0 = first[panel.id.codes[r] as usize];
        x[r * p + 1] = a0 - center;
        within.push(panel.age[r] - a0);
    }
    problem.x_names[1] = "baseline age".into();
    let problem = with_columns(&problem, &["time since baseline".to_string()], &[within]);
    // The random terms are M0's: its REML fit is a close start.
    let fit = match crate::lmm::fit_near(&problem, crate::lmm::FitOptions::estimates(), m0_reml) {
        Ok(f) => f,
        Err(e) => {
            notes.push(format!("the between/within fit failed: {e}"));
            return None;
        }
    };
    let q = problem.p();
    let unit = |i: usize| {
        let mut c = vec![0.0; q];
        c[i] = 1.0;
        c
    };
    let b = infer::contrast(&fit, &unit(1));
    let w = infer::contrast(&fit, &unit(q - 1));
    let mut c = vec![0.0; q];
    c[1] = 1.0;
    c[q - 1] = -1.0;
    let d = infer::contrast(&fit, &c);
    Some(BetweenWithin {
        between: b.estimate,
        between_se: b.se,
        within: w.estimate,
        within_se: w.se,
        difference: d.estimate,
        difference_se: d.se,
        df: d.df,
        p: d.p_value(),
    })
}
