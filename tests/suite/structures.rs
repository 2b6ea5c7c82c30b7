//! Covariance structures: a diagonal covariance (independent intercept and
//! slopes) and a random age slope per cluster.
//!
//! Outside check: statsmodels MixedLM variance-components fits (version in
//! tests/reference/egsingle.json, made by
//! tests/reference/egsingle_reference.py) on the children-in-schools
//! mathematics panel of Bryk & Raudenbush (2002), *Hierarchical Linear
//! Models*, 2nd ed., ch. 8. Identity: a diagonal term is the same model as
//! its coefficients stated as separate terms of the same factor. Simulation:
//! a seeded file with independent effects recovers their SDs.

use braid::data::Roles;
use braid::lmm::{Covariance, Fit, Method};
use braid::spec::{AgeSpec, ModelSpec, RandomSpec};
use serde_json::Value;

use crate::common::{fit, load, roles};
use crate::tolerance::{
    FIXED_REL, LOGLIK_ABS, RECOVERY_CLUSTER_SD_REL, RECOVERY_LEVEL_SD_REL, RECOVERY_RESIDUAL_SD_REL, REFIT_LOGLIK_ABS,
    REFIT_PARAM_REL, VARIANCE_REL, rel,
};

fn term(factor: &str, intercept: bool, slopes: &[&str], covariance: Covariance) -> RandomSpec {
    RandomSpec {
        factor: factor.into(),
        intercept,
        slopes: slopes.iter().map(|s| (*s).to_string()).collect(),
        covariance,
    }
}

fn linear(method: Method, center: f64, random: Vec<RandomSpec>) -> ModelSpec {
    ModelSpec {
        method,
        age: AgeSpec::Polynomial { degree: 1 },
        center: Some(center),
        random: Some(random),
    }
}

fn nums(v: &Value) -> Vec<f64> {
    v.as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect()
}

fn component<'a>(fit: &'a Fit, factor: &str) -> &'a braid::lmm::RandomComponent {
    fit.random.iter().find(|r| r.factor == factor).unwrap()
}

#[test]
fn diagonal_and_cluster_slope_models_match_statsmodels_on_children_in_schools() {
    let refs = crate::common::reference_json("egsingle.json");
    let version = refs["versions"]["statsmodels"].as_str().unwrap();
    let panel = load(
        "egsingle.csv",
        &Roles {
            cluster: Some("school".into()),
            ..roles("child", "year", "math")
        },
    );
    for (name, school_slopes, n_params) in [("diagonal", &[][..], 6), ("school_slope", &["year"][..], 8)] {
        for method in [Method::Reml, Method::Ml] {
            let label = method.label();
            let r = &refs["models"][name][label];
            let spec = linear(
                method,
                0.0,
                vec![
                    term("child", true, &["year"], Covariance::Diagonal),
                    term("school", true, school_slopes, Covariance::Unstructured),
                ],
            );
            let a = fit(&panel, &spec, &braid::infer::TrajectoryRequest::grid(5)).unwrap();
            let f = &a.fit;
            let ref_ll = r["loglik"].as_f64().unwrap();
            let gap = f.loglik - ref_ll;
            println!(
                "egsingle {name} {label}: braid ℓ = {:.9}, statsmodels {version} ℓ = {ref_ll:.9} (braid − reference = {gap:.2e}), {} evaluations",
                f.loglik, f.info.evaluations
            );
            assert!(f.info.converged, "{name} {label}: {:?}", f.info);
            // At least the reference's optimum, and the same optimum.
            assert!(gap > -LOGLIK_ABS && gap < LOGLIK_ABS, "{name} {label}: gap {gap:.3e}");
            // Fixed, covariance and residual parameters, counted by hand.
            assert_eq!(f.n_params, n_params, "{name} {label}");
            for (k, b) in nums(&r["fe"]).iter().enumerate() {
                assert!(
                    rel(f.beta[k], *b, 1e-3) < FIXED_REL,
                    "{name} {label} β[{k}]: {} vs {b}",
                    f.beta[k]
                );
            }
            let scale = r["scale"].as_f64().unwrap();
            assert!(
                rel(f.sigma2, scale, 0.0) < VARIANCE_REL,
                "{name} {label} σ²: {} vs {scale}",
                f.sigma2
            );
            // The child's two variances (the reference's variance components
            // `child` and `child_year`), their correlation zero by assumption.
            let child = component(f, "child");
            assert_eq!(child.structure, Covariance::Diagonal);
            assert_eq!(child.correlation[0][1], 0.0);
            assert_eq!(child.covariance[0][1], 0.0);
            let vc = nums(&r["vcomp"]);
            for (k, v) in vc.iter().enumerate() {
                let ours = child.covariance[k][k];
                assert!(
                    rel(ours, *v, 0.0) < VARIANCE_REL,
                    "{name} {label} child variance {k}: {ours} vs {v}"
                );
            }
            // The school's covariance, entry by entry (covariances near zero
            // on the scale of the variances).
            let school = component(f, "school");
            let cov: Vec<Vec<f64>> = r["school_cov"].as_array().unwrap().iter().map(nums).collect();
            let floor = cov.iter().flatten().map(|v| v.abs()).fold(0.0, f64::max) * 1e-2;
            for (i, row) in cov.iter().enumerate() {
                for (j, v) in row.iter().enumerate() {
                    let ours = school.covariance[i][j];
                    assert!(
                        rel(ours, *v, floor) < VARIANCE_REL,
                        "{name} {label} school ({i},{j}): {ours} vs {v}"
                    );
                }
            }
        }
    }
}

// Identity: a participant term with a diagonal covariance is the model in
// which its intercept and its age slope are two terms of the same factor.
// The first runs through the block-diagonal primary term, the second puts
// the slope's 250 levels into the dense part; both reach one optimum.
#[test]
fn a_diagonal_term_equals_its_coefficients_as_separate_terms() {
    let panel = load(
        "sim_school.csv",
        &Roles {
            cluster: Some("school".into()),
            ..roles("pupil", "age", "score")
        },
    );
    let school = term("school", true, &[], Covariance::Unstructured);
    for method in [Method::Reml, Method::Ml] {
        let joint = linear(
            method,
            16.0,
            vec![term("pupil", true, &["age"], Covariance::Diagonal), school.clone()],
        );
        let split = linear(
            method,
            16.0,
            vec![
                term("pupil", true, &[], Covariance::Unstructured),
                term("pupil", false, &["age"], Covariance::Unstructured),
                school.clone(),
            ],
        );
        let grid = braid::infer::TrajectoryRequest::grid(5);
        let a = fit(&panel, &joint, &grid).unwrap().fit;
        let b = fit(&panel, &split, &grid).unwrap().fit;
        assert!(a.info.converged && b.info.converged);
        assert!(
            (a.loglik - b.loglik).abs() < REFIT_LOGLIK_ABS,
            "{}: {} vs {}",
            method.label(),
            a.loglik,
            b.loglik
        );
        assert_eq!(a.n_params, b.n_params);
        let pupil = component(&a, "pupil");
        let split_var = |k: usize| b.random[k].covariance[0][0];
        for (k, ours) in [pupil.covariance[0][0], pupil.covariance[1][1]].iter().enumerate() {
            assert!(
                rel(*ours, split_var(k), 1e-3) < REFIT_PARAM_REL,
                "{} variance {k}: {ours} vs {}",
                method.label(),
                split_var(k)
            );
        }
        for (x, y) in a.beta.iter().zip(&b.beta) {
            assert!(rel(*x, *y, 1e-3) < REFIT_PARAM_REL, "β {x} vs {y}");
        }
    }
}

// Simulation: 800 participants in 20 schools, four waves each, with
// independent intercepts (SD 2), age slopes (SD 0.5) and school intercepts
// (SD 1.5), residual SD 1. The diagonal fit recovers each SD.
#[test]
fn a_diagonal_fit_recovers_independent_effects() {
    use braid::simulate::Rng;
    let (people, schools, waves) = (800usize, 20usize, 4usize);
    let (sd0, sd1, sd_school, sd_res) = (2.0, 0.5, 1.5, 1.0);
    let mut rng = Rng::new(2026);
    let school_effect: Vec<f64> = (0..schools).map(|_| sd_school * rng.normal()).collect();
    let mut csv = String::from("pupil,school,age,score\n");
    for i in 0..people {
        let s = i % schools;
        let (b0, b1) = (sd0 * rng.normal(), sd1 * rng.normal());
        let entry = 8.0 + 2.0 * (i % 4) as f64 + rng.uniform();
        for w in 0..waves {
            let age = entry + w as f64;
            let a = age - 12.0;
            let y = 30.0 + 1.5 * a + b0 + b1 * a + school_effect[s] + sd_res * rng.normal();
            csv.push_str(&format!("P{i},S{s},{age:.4},{y:.4}\n"));
        }
    }
    let dir = crate::common::temp_dir("diagonal-recovery");
    let path = dir.join("independent.csv");
    std::fs::write(&path, csv).unwrap();
    let panel = braid::data::load(
        &path,
        &Roles {
            cluster: Some("school".into()),
            ..roles("pupil", "age", "score")
        },
        Default::default(),
    )
    .unwrap();
    let spec = linear(
        Method::Reml,
        12.0,
        vec![
            term("pupil", true, &["age"], Covariance::Diagonal),
            term("school", true, &[], Covariance::Unstructured),
        ],
    );
    let f = fit(&panel, &spec, &braid::infer::TrajectoryRequest::grid(5))
        .unwrap()
        .fit;
    assert!(f.info.converged);
    let pupil = component(&f, "pupil");
    let checks = [
        ("intercept SD", pupil.sd[0], sd0, RECOVERY_LEVEL_SD_REL),
        ("slope SD", pupil.sd[1], sd1, RECOVERY_LEVEL_SD_REL),
        (
            "school SD",
            component(&f, "school").sd[0],
            sd_school,
            RECOVERY_CLUSTER_SD_REL,
        ),
        ("residual SD", f.sigma2.sqrt(), sd_res, RECOVERY_RESIDUAL_SD_REL),
    ];
    for (what, got, truth, tol) in checks {
        assert!(rel(got, truth, 0.0) < tol, "{what}: {got} vs {truth}");
    }
}

// The flags: --uncorrelated holds every term's correlations at zero and
// --cluster-slope gives the cluster an age slope; the screen says both.
#[test]
fn the_structure_flags_are_stated_on_the_screen() {
    use crate::common::{expect_words, run_ok};
    let out = run_ok(crate::cli::on_test_file("fit", "sim_school.csv").args([
        "--cluster",
        "school",
        "--uncorrelated",
        "--cluster-slope",
        "--degree",
        "1",
    ]));
    expect_words(
        &out,
        &[
            "random intercept and slope on age per pupil (250 levels), independent (diagonal covariance)",
            "random intercept and slope on age per school (12 levels), independent (diagonal covariance)",
            "correlations held at 0 (independent coefficients)",
        ],
        "fit --uncorrelated --cluster-slope",
    );
}

// Under a diagonal participant term the convergence tests count the
// parameters the structure estimates: M3 adds two variances and a residual
// variance per cohort beyond the first ((5 − 1) × 3 = 12 df, not 16), and
// dropping the slope removes one variance, so its boundary test is the
// ½χ²(0) + ½χ²(1) mixture (Self & Liang 1987), calibrated in
// notes/benchmarks.md (examples/calibrate_fit.rs: 4.50% at 5%).
#[test]
fn convergence_tests_count_the_parameters_of_a_diagonal_term() {
    use crate::common::{read_json, run_ok, temp_dir};
    let dir = temp_dir("converge-diagonal");
    let json = dir.join("converge.json");
    run_ok(
        crate::cli::on_test_file("converge", "sim_school.csv")
            .args(["--cluster", "school", "--cohort", "cohort", "--wave", "wave"])
            .args(["--uncorrelated", "--quiet", "--force", "--json"])
            .arg(&json),
    );
    let v = read_json(&json);
    let df = |kind: &str| {
        v["tests"]
            .as_array()
            .unwrap()
            .iter()
            .find(|t| t["kind"] == kind)
            .unwrap_or_else(|| panic!("no {kind} test"))["df"]
            .as_f64()
            .unwrap()
    };
    assert_eq!(df("cohort_covariance"), 12.0);
    assert_eq!(df("random_slope"), 1.0);
}
