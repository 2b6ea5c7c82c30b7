//! Hierarchical APC (Yang & Land 2006, *Sociological Methodology* 36): a
//! fixed polynomial in exact age, with period groups and cohort groups as
//! crossed random intercepts, fitted by REML with the engine. For panels a
//! random intercept per participant is added.
//!
//! Treating period and cohort as random draws with mean zero sets their
//! linear trends to zero unless age absorbs them: that is a constraint like
//! any other, hidden in the distributional assumption (Luo & Hodges 2020,
//! *Sociological Methodology* 50; Bell & Jones 2018, *Quality & Quantity* 52).

use serde::Serialize;

use super::analysis::{ApcData, Term};
use crate::data::NumericTable;
use crate::error::Result;
use crate::infer::{self, FixedEffect};
use crate::lmm::{self, FitOptions, Method, MixedProblem, RandomTermData};

/// The caution printed with every hierarchical APC fit.
pub const CAUTION: &str = "Treating period and cohort as random effects imposes a hidden constraint: their linear \
     trends are taken to be zero, so any linear trend goes to age; the split of linear change among age, period and \
     cohort is assumed, not estimated (Luo & Hodges 2020; Bell & Jones 2018).";

/// The hierarchical APC fit.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct Hierarchical {
    /// Age is centred here (the mean age).
    pub center: f64,
    /// Intercept, age, age² with SE, Satterthwaite df, p and interval.
    pub fixed: Vec<FixedEffect>,
    /// SD of the period intercepts.
    pub sd_period: f64,
    /// SD of the cohort intercepts.
    pub sd_cohort: f64,
    /// Residual SD.
    pub sd_residual: f64,
    /// Panels: SD of the participant intercepts.
    pub sd_participant: Option<f64>,
    /// Predicted period effects (BLUPs), by period group.
    pub period_effects: Vec<Term>,
    /// Predicted cohort effects (BLUPs), by cohort group.
    pub cohort_effects: Vec<Term>,
    /// REML log-likelihood.
    pub loglik: f64,
    /// Whether the optimiser certified a minimum.
    pub converged: bool,
    /// Parameters on their boundary.
    pub boundary: Vec<String>,
    /// The hidden-constraint caution.
    pub caution: String,
}

/// Fit the hierarchical model to the records of `t` (columns age, period,
/// outcome), grouped as in `data`.
///
/// # Errors
/// Errors of the engine.
pub fn fit(t: &NumericTable, data: &ApcData) -> Result<Hierarchical> {
    let (age, period, y) = (&t.columns[0], &t.columns[1], &t.columns[2]);
    let n = age.len();
    let s = data.shape;
    let center = age.iter().sum::<f64>() / n as f64;
    let mut x = Vec::with_capacity(3 * n);
    let mut per = Vec::with_capacity(n);
    let mut coh = Vec::with_capacity(n);
    for r in 0..n {
        let a = age[r] - center;
        x.extend([1.0, a, a * a]);
        let i = ((age[r] - data.origin.0) / data.width).floor() as usize + 1;
        let j = ((period[r] - data.origin.1) / data.width).floor() as usize + 1;
        per.push((j - 1) as u32);
        coh.push((s.cohort(i.min(s.a), j.min(s.p)) - 1) as u32);
    }
    let term = |factor: &str, level: Vec<u32>, names: &[String]| RandomTermData {
        factor: factor.into(),
        level_names: names.to_vec().into(),
        level: level.into(),
        columns: vec!["intercept".into()],
        z: vec![vec![1.0; n].into()],
        covariance: Default::default(),
    };
    let mut terms = vec![
        term("period", per, &data.labels.period),
        term("cohort", coh, &data.labels.cohort),
    ];
    // Panels: participants are seen repeatedly, so they get an intercept too.
    if let Some(ids) = &data.ids {
        let mut levels: Vec<u32> = ids.clone();
        levels.sort_unstable();
        levels.dedup();
        let index: std::collections::HashMap<u32, u32> =
            levels.iter().enumerate().map(|(k, &l)| (l, k as u32)).collect();
        let names: Vec<String> = levels.iter().map(|l| l.to_string()).collect();
        terms.push(term("participant", ids.iter().map(|l| index[l]).collect(), &names));
    }
    let problem = MixedProblem {
        y: y.as_slice().into(),
        x_names: vec!["intercept".into(), "age".into(), "age^2".into()],
        x: x.into(),
        terms,
    };
    let f = lmm::fit(
        &problem,
        FitOptions {
            method: Method::Reml,
            ..Default::default()
        },
    )?;
    let effects = |k: usize, labels: &[String]| -> Vec<Term> {
        labels
            .iter()
            .zip(&f.blups[k])
            .map(|(l, b)| Term {
                term: l.clone(),
                value: b[0],
            })
            .collect()
    };
    Ok(Hierarchical {
        center,
        fixed: infer::fixed_effects(&f),
        sd_period: f.random[0].sd[0],
        sd_cohort: f.random[1].sd[0],
        sd_residual: f.sigma2.sqrt(),
        sd_participant: f.random.get(2).map(|r| r.sd[0]),
        period_effects: effects(0, &data.labels.period),
        cohort_effects: effects(1, &data.labels.cohort),
        loglik: f.loglik,
        converged: f.info.converged,
        boundary: f.info.boundary.clone(),
        caution: CAUTION.into(),
    })
}
