//! The blocked and the sparse route fit the same model to the same optimum.
//!
//! Identity (closed form: both routes evaluate the same determinants and
//! residual sum of squares): pupils who change school between waves, so
//! that pupils and schools are crossed, fitted through both routes, by REML
//! and ML. Outside check: the sparse route on the crossed period and cohort
//! file against statsmodels MixedLM (tests/reference/mixedlm.json, made by
//! tests/reference/mixedlm_reference.py).

use braid::lmm::{Fit, FitOptions, Method, MixedProblem, RandomTermData, Route};
use braid::simulate::Rng;

use crate::tolerance::{LOGLIK_ABS, ROUTES_LOGLIK_ABS, ROUTES_PARAM_REL, rel};

/// 400 pupils in 25 schools over three waves; at each wave after the
/// first a pupil moves to another school with probability 0.3. Pupil
/// intercepts and age slopes (SD 2 and 0.4), school intercepts (SD 1).
fn movers() -> MixedProblem {
    let mut rng = Rng::new(31);
    let (pupils, schools, waves) = (400usize, 25usize, 3usize);
    let school_effect: Vec<f64> = (0..schools).map(|_| rng.normal()).collect();
    let (mut x, mut y, mut age, mut pupil, mut school) = (vec![], vec![], vec![], vec![], vec![]);
    for i in 0..pupils {
        let (b0, b1) = (2.0 * rng.normal(), 0.4 * rng.normal());
        let mut s = i % schools;
        let entry = 10.0 + 2.0 * (i % 3) as f64 + rng.uniform();
        for w in 0..waves {
            if w > 0 && rng.uniform() < 0.3 {
                s = (s + 1 + (rng.uniform() * (schools - 1) as f64) as usize) % schools;
            }
            let a = entry + w as f64 - 12.0;
            x.extend([1.0, a, a * a]);
            y.push(50.0 + 1.5 * a - 0.1 * a * a + b0 + b1 * a + school_effect[s] + rng.normal());
            age.push(a);
            pupil.push(i as u32);
            school.push(s as u32);
        }
    }
    let n = y.len();
    MixedProblem {
        y: y.into(),
        x_names: vec!["intercept".into(), "age".into(), "age²".into()],
        x: x.into(),
        terms: vec![
            RandomTermData::numbered("pupil", pupils, pupil, &["intercept", "age"], vec![vec![1.0; n], age]),
            RandomTermData::numbered("school", schools, school, &["intercept"], vec![vec![1.0; n]]),
        ],
    }
}

fn fit_on(problem: &MixedProblem, method: Method, route: Route) -> Fit {
    braid::lmm::fit(
        problem,
        FitOptions {
            method,
            route,
            ..Default::default()
        },
    )
    .unwrap()
}

fn agree(a: &Fit, b: &Fit, what: &str) {
    assert!(
        a.info.converged && b.info.converged,
        "{what}: {:?} {:?}",
        a.info,
        b.info
    );
    let gap = (a.loglik - b.loglik).abs();
    println!(
        "{what}: blocked ℓ = {:.10}, sparse ℓ = {:.10} (|gap| {gap:.1e}); evaluations {} and {}",
        a.loglik, b.loglik, a.info.evaluations, b.info.evaluations
    );
    assert!(gap < ROUTES_LOGLIK_ABS, "{what}: ℓ {} vs {}", a.loglik, b.loglik);
    assert_eq!(a.n_params, b.n_params);
    let se = (a.se(), b.se());
    for k in 0..a.beta.len() {
        assert!(rel(a.beta[k], b.beta[k], 1e-3) < ROUTES_PARAM_REL, "{what} β[{k}]");
        assert!(rel(se.0[k], se.1[k], 0.0) < ROUTES_PARAM_REL, "{what} SE[{k}]");
    }
    assert!(rel(a.sigma2, b.sigma2, 0.0) < ROUTES_PARAM_REL, "{what} σ²");
    for (ca, cb) in a.random.iter().zip(&b.random) {
        for (ra, rb) in ca.covariance.iter().zip(&cb.covariance) {
            for (x, y) in ra.iter().zip(rb) {
                let floor = ca.covariance[0][0].abs() * 1e-2;
                assert!(
                    rel(*x, *y, floor) < ROUTES_PARAM_REL,
                    "{what} {}: {x} vs {y}",
                    ca.factor
                );
            }
        }
    }
    // The conditional fitted values hold the BLUPs of both terms.
    for (x, y) in a.fitted.iter().zip(&b.fitted) {
        assert!((x - y).abs() < ROUTES_PARAM_REL * (1.0 + y.abs()));
    }
}

#[test]
fn pupils_who_change_school_give_the_same_fit_through_both_routes() {
    let problem = movers();
    for method in [Method::Reml, Method::Ml] {
        let blocked = fit_on(&problem, method, Route::Blocked);
        let sparse = fit_on(&problem, method, Route::Sparse);
        assert_eq!((blocked.info.route, sparse.info.route), (Route::Blocked, Route::Sparse));
        agree(&blocked, &sparse, &format!("movers {}", method.label()));
    }
}

#[test]
fn the_sparse_route_matches_statsmodels_on_crossed_period_and_cohort_intercepts() {
    use braid::data::Roles;
    use braid::lmm::Covariance;
    use braid::spec::{AgeSpec, ModelSpec, RandomSpec};
    let refs = crate::common::reference_json("mixedlm.json");
    let panel = crate::common::load(
        "sim_crossed.csv",
        &Roles {
            cohort: Some("cohort".into()),
            wave: Some("period".into()),
            ..crate::common::roles("person", "age", "score")
        },
    );
    let intercept = |f: &str| RandomSpec {
        factor: f.into(),
        intercept: true,
        slopes: vec![],
        covariance: Covariance::Unstructured,
    };
    for method in [Method::Reml, Method::Ml] {
        let spec = ModelSpec {
            method,
            age: AgeSpec::Polynomial { degree: 2 },
            center: Some(16.0),
            random: Some(vec![intercept("cohort"), intercept("period")]),
        };
        let frame = braid::spec::build_frame(&panel, &spec).unwrap();
        let blocked = fit_on(&frame.problem, method, Route::Blocked);
        let sparse = fit_on(&frame.problem, method, Route::Sparse);
        let reference = refs["cases"]["sim_crossed"][method.label()]["loglik"].as_f64().unwrap();
        assert!(
            sparse.loglik - reference > -LOGLIK_ABS,
            "{}: sparse ℓ {} below the reference {reference}",
            method.label(),
            sparse.loglik
        );
        agree(&blocked, &sparse, &format!("crossed {}", method.label()));
    }
}
