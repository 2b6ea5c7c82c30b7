//! Group-specific covariances and residual variances (the engine behind
//! converge's M3 when cohorts share a school term or covariates).

use crate::common::reml;
use braid::lmm::grouped::{Grouping, fit_grouped};
use braid::lmm::{Method, MixedProblem, RandomTermData};
use braid::simulate::Rng;

use crate::tolerance::{
    RECOVERY_CLUSTER_SD_REL, RECOVERY_LEVEL_SD_REL, RECOVERY_RESIDUAL_SD_REL, REFIT_LOGLIK_ABS,
    SEPARATE_FITS_LOGLIK_ABS, SEPARATE_FITS_PARAM_REL, rel,
};

/// Seeded cohorts × participants × waves, treatment-coded cohort-specific
/// intercept and slope, random intercept and slope per participant with a
/// cohort-specific covariance, a cohort-specific residual SD, and (when
/// `schools` > 0) a school intercept shared by every cohort.
fn panel(seed: u64, per_cohort: usize, sd_int: &[f64], sd_res: &[f64], schools: usize) -> (MixedProblem, Grouping) {
    let k = sd_int.len();
    let mut rng = Rng::new(seed);
    let school_effect: Vec<f64> = (0..schools).map(|_| 1.5 * rng.normal()).collect();
    let (mut x, mut y, mut z1, mut level, mut school, mut group) = (vec![], vec![], vec![], vec![], vec![], vec![]);
    let mut names = Vec::new();
    for c in 0..k {
        for i in 0..per_cohort {
            let id = c * per_cohort + i;
            names.push(format!("P{id}"));
            let b0 = sd_int[c] * rng.normal();
            let b1 = 0.4 * rng.normal();
            let sch = if schools > 0 { id % schools } else { 0 };
            for w in 0..4 {
                let a = 2.0 * c as f64 + w as f64 + 0.3 * rng.uniform() - 4.0;
                let mut row = vec![1.0, a];
                for j in 1..k {
                    row.push(if j == c { 1.0 } else { 0.0 });
                    row.push(if j == c { a } else { 0.0 });
                }
                x.extend(row);
                let shared = if schools > 0 { school_effect[sch] } else { 0.0 };
                y.push(20.0 + 0.8 * a + 0.5 * c as f64 + b0 + b1 * a + shared + sd_res[c] * rng.normal());
                z1.push(a);
                level.push(id as u32);
                school.push(sch as u32);
                group.push(c as u32);
            }
        }
    }
    let n = y.len();
    let mut x_names = vec!["intercept".to_string(), "a".to_string()];
    for j in 1..k {
        x_names.push(format!("c{j}"));
        x_names.push(format!("c{j}:a"));
    }
    let mut terms = vec![RandomTermData {
        factor: "id".into(),
        level_names: names.into(),
        level: level.into(),
        columns: vec!["intercept".into(), "a".into()],
        z: vec![vec![1.0; n].into(), z1.into()],
        covariance: Default::default(),
    }];
    if schools > 0 {
        terms.push(RandomTermData {
            factor: "school".into(),
            level_names: (0..schools).map(|s| format!("S{s}")).collect(),
            level: school.into(),
            columns: vec!["intercept".into()],
            z: vec![vec![1.0; n].into()],
            covariance: Default::default(),
        });
    }
    let grouping = Grouping {
        names: (0..k).map(|c| format!("cohort {c}")).collect(),
        of_row: group,
    };
    (
        MixedProblem {
            y: y.into(),
            x_names,
            x: x.into(),
            terms,
        },
        grouping,
    )
}

/// The rows of one cohort, with its own intercept and slope only.
fn cohort_rows(problem: &MixedProblem, grouping: &Grouping, c: u32) -> MixedProblem {
    let p = problem.p();
    let rows: Vec<usize> = (0..problem.n()).filter(|&r| grouping.of_row[r] == c).collect();
    let t = &problem.terms[0];
    let first = t.level[rows[0]];
    MixedProblem {
        y: rows.iter().map(|&r| problem.y[r]).collect(),
        x_names: problem.x_names[..2].to_vec(),
        x: rows
            .iter()
            .flat_map(|&r| problem.x_rows()[r * p..r * p + 2].to_vec())
            .collect(),
        terms: vec![RandomTermData {
            factor: t.factor.clone(),
            level_names: (0..rows.len() / 4).map(|i| format!("L{i}")).collect(),
            level: rows.iter().map(|&r| t.level[r] - first).collect(),
            columns: t.columns.clone(),
            z: t.z.iter().map(|z| z.pick(&rows).into()).collect(),
            covariance: t.covariance,
        }],
    }
}

// Closed-form identity: with cohort-specific fixed effects, participants as
// the only random term and participants nested in cohorts, the model
// separates by cohort, so its REML log-likelihood is the sum of the cohorts'
// own REML fits (treatment coding maps to the block-diagonal design with a
// unit-determinant matrix, so no constant enters). Each separate fit is the
// engine checked against statsmodels elsewhere.
#[test]
fn separable_case_equals_the_sum_of_per_cohort_fits() {
    let (problem, grouping) = panel(41, 60, &[1.0, 2.0, 1.5], &[1.0, 2.0, 0.7], 0);
    let shared = reml(&problem);
    let grouped = fit_grouped(&problem, &grouping, Method::Reml, Some(&shared.theta)).unwrap();
    let separate: f64 = (0..3).map(|c| reml(&cohort_rows(&problem, &grouping, c)).loglik).sum();
    println!("grouped {} vs sum of cohorts {separate}", grouped.loglik);
    assert!(
        (grouped.loglik - separate).abs() < SEPARATE_FITS_LOGLIK_ABS,
        "grouped {} vs separate {separate}",
        grouped.loglik
    );
    assert!(grouped.converged);
    // Each group's residual variance equals its cohort's own fit.
    for c in 0..3u32 {
        let f = reml(&cohort_rows(&problem, &grouping, c));
        let g = &grouped.groups[c as usize];
        assert!(
            rel(g.residual_variance, f.sigma2, 1e-8) < SEPARATE_FITS_PARAM_REL,
            "{c}: {} vs {}",
            g.residual_variance,
            f.sigma2
        );
        assert!(
            rel(g.covariance[0][0], f.random[0].covariance[0][0], 1e-2) < SEPARATE_FITS_PARAM_REL,
            "{c}: {:?} vs {:?}",
            g.covariance,
            f.random[0].covariance
        );
    }
}

// Closed-form identity: one group is the shared model itself, also with a
// school term crossing the groups.
#[test]
fn one_group_is_the_plain_model() {
    let (problem, mut grouping) = panel(42, 50, &[1.0, 1.0], &[1.0, 1.0], 8);
    grouping.names.truncate(1);
    grouping.of_row.iter_mut().for_each(|g| *g = 0);
    let plain = reml(&problem);
    // From the plain fit's optimum, and from a cold start (the grouped fit's
    // own start values), the one-group fit reaches the plain optimum.
    for start in [Some(plain.theta.as_slice()), None] {
        let grouped = fit_grouped(&problem, &grouping, Method::Reml, start).unwrap();
        assert!(
            (grouped.loglik - plain.loglik).abs() < 100.0 * REFIT_LOGLIK_ABS,
            "start {}: {} vs {}",
            if start.is_some() {
                "at the plain optimum"
            } else {
                "cold"
            },
            grouped.loglik,
            plain.loglik
        );
    }
}

// Simulation: with a school term shared across cohorts, the group-specific
// residual SDs and intercept SDs are recovered, and the shared school SD too.
#[test]
fn recovers_group_specific_variances_with_a_shared_school_term() {
    let (sd_int, sd_res) = ([1.0, 2.5, 1.5], [1.0, 2.0, 0.6]);
    let (problem, grouping) = panel(43, 400, &sd_int, &sd_res, 20);
    let plain = reml(&problem);
    let grouped = fit_grouped(&problem, &grouping, Method::Reml, Some(&plain.theta)).unwrap();
    assert!(grouped.converged);
    for (c, g) in grouped.groups.iter().enumerate() {
        let res = g.residual_variance.sqrt();
        println!(
            "cohort {c}: residual SD {res:.3} (truth {}), intercept SD {:.3} (truth {})",
            sd_res[c], g.sd[0], sd_int[c]
        );
        assert!(
            rel(res, sd_res[c], 1.0) < RECOVERY_RESIDUAL_SD_REL,
            "cohort {c} residual SD {res}"
        );
        assert!(
            rel(g.sd[0], sd_int[c], 1.0) < RECOVERY_LEVEL_SD_REL,
            "cohort {c} intercept SD {}",
            g.sd[0]
        );
    }
    let school = grouped.others[0].sd[0];
    println!("school SD {school:.3} (truth 1.5)");
    assert!(rel(school, 1.5, 1.0) < RECOVERY_CLUSTER_SD_REL, "school SD {school}");
    // The grouped model fits at least as well as the shared one.
    assert!(grouped.loglik > plain.loglik);
}
