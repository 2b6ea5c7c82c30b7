//! Balanced one-way random effects: with a groups of n and a positive
//! variance estimate, REML equals the ANOVA estimators
//! σ̂² = MSE, σ̂²_group = (MSB − MSE)/n, SE(μ̂) = √(MSB/(a·n)), and the
//! Satterthwaite df of μ̂ is a − 1 (Searle, Casella & McCulloch 1992,
//! *Variance Components*, ch. 3–4). The data are invented; the identity is
//! what is checked.

use crate::common::reml;
use braid::infer;
use braid::lmm::{MixedProblem, RandomTermData};
use braid::simulate::Rng;

use crate::tolerance::{CLOSED_FORM_REL, SATTERTHWAITE_REL, rel};

fn balanced(a: usize, n: usize, seed: u64) -> (MixedProblem, Vec<Vec<f64>>) {
    let mut rng = Rng::new(seed);
    let mut y = Vec::new();
    let mut level = Vec::new();
    let mut groups = Vec::new();
    for g in 0..a {
        let u = 2.0 * rng.normal();
        let mut v = Vec::new();
        for _ in 0..n {
            let val = 10.0 + u + rng.normal();
            y.push(val);
            v.push(val);
            level.push(g as u32);
        }
        groups.push(v);
    }
    let rows = y.len();
    let problem = MixedProblem {
        y: y.into(),
        x_names: vec!["intercept".into()],
        x: vec![1.0; rows].into(),
        terms: vec![RandomTermData {
            factor: "group".into(),
            level_names: (0..a).map(|g| format!("g{g}")).collect(),
            level: level.into(),
            columns: vec!["intercept".into()],
            z: vec![vec![1.0; rows].into()],
            covariance: Default::default(),
        }],
    };
    (problem, groups)
}

fn anova(groups: &[Vec<f64>]) -> (f64, f64, f64) {
    let a = groups.len() as f64;
    let n = groups[0].len() as f64;
    let grand: f64 = groups.iter().flatten().sum::<f64>() / (a * n);
    let means: Vec<f64> = groups.iter().map(|g| g.iter().sum::<f64>() / n).collect();
    let ssb: f64 = means.iter().map(|m| n * (m - grand).powi(2)).sum();
    let sse: f64 = groups
        .iter()
        .zip(&means)
        .map(|(g, m)| g.iter().map(|v| (v - m).powi(2)).sum::<f64>())
        .sum();
    (ssb / (a - 1.0), sse / (a * (n - 1.0)), grand)
}

#[test]
fn reml_equals_anova_estimators_in_balanced_one_way_design() {
    for (a, n, seed) in [(8, 5, 1), (12, 3, 2), (30, 4, 3)] {
        let (problem, groups) = balanced(a, n, seed);
        let (msb, mse, grand) = anova(&groups);
        assert!(msb > mse, "the identity needs a positive variance estimate");
        let fit = reml(&problem);
        let var_group = fit.random[0].covariance[0][0];
        assert!(
            rel(fit.sigma2, mse, 1e-12) < CLOSED_FORM_REL,
            "σ² {} vs MSE {mse}",
            fit.sigma2
        );
        let want = (msb - mse) / n as f64;
        assert!(
            rel(var_group, want, 1e-12) < CLOSED_FORM_REL,
            "σ²_g {var_group} vs {want}: {:?}, θ {:?}",
            fit.info,
            fit.theta
        );
        assert!(rel(fit.beta[0], grand, 1e-12) < CLOSED_FORM_REL);
        let se = fit.se()[0];
        let want_se = (msb / (a * n) as f64).sqrt();
        assert!(rel(se, want_se, 1e-12) < CLOSED_FORM_REL, "SE {se} vs {want_se}");
        let fe = infer::fixed_effects(&fit);
        let df = fe[0].df;
        println!("a = {a}: Satterthwaite df {df:.10} (closed form {})", a - 1);
        assert!(rel(df, (a - 1) as f64, 1.0) < SATTERTHWAITE_REL, "df {df} vs {}", a - 1);
        // The Wald F of the same single contrast (converge's multi-df test)
        // has denominator df 2E/(E − 1) with E = ν/(ν − 2), which is ν again:
        // a − 1 (closed form), and F = t².
        let f = braid::infer::hypothesis::wald_f(&fit, "mean", &[vec![1.0]]);
        let den = f.df_denominator.unwrap();
        assert!(
            rel(den, (a - 1) as f64, 1.0) < SATTERTHWAITE_REL,
            "F df {den} vs {}",
            a - 1
        );
        assert!(rel(f.statistic, fe[0].t * fe[0].t, 1e-12) < CLOSED_FORM_REL);
    }
}

/// When every group has the same mean, MSB = 0 < MSE: the REML estimate of
/// the group variance is on the boundary (zero) and σ̂² is the REML estimate
/// of the model without groups, SST/(N − 1) (closed form).
#[test]
fn zero_between_group_variation_is_a_reported_boundary_estimate() {
    let (mut problem, _) = balanced(10, 4, 7);
    // Centre each group on the grand mean 10, so all group means are equal.
    let mut y = problem.y.to_vec();
    for g in 0..10 {
        let rows = g * 4..(g + 1) * 4;
        let m: f64 = y[rows.clone()].iter().sum::<f64>() / 4.0;
        for r in rows {
            y[r] += 10.0 - m;
        }
    }
    problem.y = y.into();
    let n = problem.y.len() as f64;
    let mean = problem.y.iter().sum::<f64>() / n;
    let sst: f64 = problem.y.iter().map(|v| (v - mean).powi(2)).sum();
    let fit = reml(&problem);
    assert_eq!(
        fit.info.boundary,
        vec!["group:intercept".to_string()],
        "θ = {:?}, {:?}",
        fit.theta,
        fit.info
    );
    assert_eq!(fit.random[0].covariance[0][0], 0.0);
    assert!(
        rel(fit.sigma2, sst / (n - 1.0), 1e-12) < CLOSED_FORM_REL,
        "{} vs {}",
        fit.sigma2,
        sst / (n - 1.0)
    );
    assert!(fit.info.converged, "{:?}", fit.info);
    assert!(fit.info.messages.iter().any(|m| m.contains("boundary")));
}
