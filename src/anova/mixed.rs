//! The same complete cases as a compound-symmetry mixed model: cohort × wave
//! fixed in sum-to-zero coding, a random intercept per participant, REML;
//! the wave and cohort × wave effects by Wald F with Fai–Cornelius /
//! Satterthwaite denominator df. With sphericity and balanced cohorts it
//! reproduces the ANOVA's within-effect F tests exactly (the REML variance
//! estimates equal the ANOVA's mean-square estimators there).

use serde::Serialize;

use super::table::{Complete, Effect};
use crate::error::Result;
use crate::infer::hypothesis::wald_f;
use crate::lmm::{FitOptions, MixedProblem, RandomTermData};

/// One within effect in both analyses.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct MixedTest {
    /// `wave` or `cohort × wave`.
    pub effect: String,
    /// F of the mixed model.
    pub f: f64,
    /// Numerator df.
    pub df1: f64,
    /// Denominator df (Satterthwaite).
    pub df2: f64,
    /// p.
    pub p: f64,
    /// The ANOVA's F of the same effect.
    pub anova_f: f64,
}

/// The compound-symmetry mixed model beside the ANOVA.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct MixedComparison {
    /// What was fitted.
    pub model: String,
    /// SD of the participant intercepts.
    pub sd_participant: f64,
    /// Residual SD.
    pub sd_residual: f64,
    /// The within effects.
    pub tests: Vec<MixedTest>,
}

/// Sum-to-zero columns of level `l` of `levels` (the last level is −1 in all).
fn sum_to_zero(l: usize, levels: usize) -> Vec<f64> {
    (0..levels - 1)
        .map(|c| {
            if l == levels - 1 {
                -1.0
            } else if l == c {
                1.0
            } else {
                0.0
            }
        })
        .collect()
}

/// Fit the compound-symmetry model to the complete cases.
///
/// # Errors
/// Errors of the engine.
pub fn compare(c: &Complete, effects: &[Effect]) -> Result<MixedComparison> {
    let (n, k, g) = (c.n(), c.k, c.groups);
    let p = 1 + (g - 1) + (k - 1) + (g - 1) * (k - 1);
    let mut x = Vec::with_capacity(n * k * p);
    let mut level = Vec::with_capacity(n * k);
    for i in 0..n {
        let cg = sum_to_zero(c.cohort[i], g);
        for j in 0..k {
            let wj = sum_to_zero(j, k);
            x.push(1.0);
            x.extend(&cg);
            x.extend(&wj);
            for a in &cg {
                for b in &wj {
                    x.push(a * b);
                }
            }
            level.push(i as u32);
        }
    }
    let problem = MixedProblem {
        y: c.y.as_slice().into(),
        x_names: (0..p).map(|j| format!("x{j}")).collect(),
        x: x.into(),
        terms: vec![RandomTermData {
            factor: "participant".into(),
            level_names: (0..n).map(|i| i.to_string()).collect(),
            level: level.into(),
            columns: vec!["intercept".into()],
            z: vec![vec![1.0; n * k].into()],
            covariance: Default::default(),
        }],
    };
    let fit = crate::lmm::fit(&problem, FitOptions::estimates())?;
    let rows = |from: usize, count: usize| -> Vec<Vec<f64>> {
        (from..from + count)
            .map(|c| (0..p).map(|j| f64::from(u8::from(j == c))).collect())
            .collect()
    };
    let plan = [
        ("wave", g, k - 1, 1usize),
        ("cohort × wave", g + k - 1, (g - 1) * (k - 1), 2),
    ];
    let tests = plan
        .iter()
        .map(|&(name, from, count, e)| {
            let t = wald_f(&fit, name, &rows(from, count));
            MixedTest {
                effect: name.into(),
                f: t.statistic,
                df1: t.df,
                df2: t.df_denominator.unwrap_or(f64::NAN),
                p: t.p,
                anova_f: effects[e].f,
            }
        })
        .collect();
    let sd_participant = fit.random.first().map_or(0.0, |r| r.sd.first().copied().unwrap_or(0.0));
    Ok(MixedComparison {
        model: "REML, cohort × wave fixed (sum-to-zero coding), random intercept per participant (compound symmetry)"
            .into(),
        sd_participant,
        sd_residual: fit.sigma2.sqrt(),
        tests,
    })
}
