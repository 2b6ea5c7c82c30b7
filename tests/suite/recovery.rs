//! Recovery of a known truth from seeded simulations of invented studies.

use braid::simulate::{Design, simulate};
use braid::spec::ModelSpec;

#[test]
fn large_study_recovers_the_true_curve_inside_its_band() {
    let mut d = Design::demo();
    d.per_cohort = 400; // 2,000 participants
    d.seed = 2026;
    let sim = simulate(&d);
    let spec = ModelSpec {
        center: Some(d.truth.center),
        ..Default::default()
    };
    let a = crate::common::fit(&sim.panel(true), &spec, &braid::infer::TrajectoryRequest::grid(101)).unwrap();
    assert!(a.fit.info.converged);
    let outside: Vec<f64> = a
        .report
        .trajectory
        .points
        .iter()
        .filter(|p| !(p.lower..=p.upper).contains(&d.truth.mean_at(p.age)))
        .map(|p| p.age)
        .collect();
    assert!(outside.is_empty(), "true mean outside the 95% band at ages {outside:?}");
}

#[test]
fn linear_age_interval_covers_the_truth_at_its_nominal_rate() {
    let replicates = 200;
    let mut covered = 0;
    for r in 0..replicates {
        let mut d = Design::demo();
        d.per_cohort = 30;
        d.schools = 10;
        d.seed = 10_000 + r as u64;
        let sim = simulate(&d);
        let spec = ModelSpec {
            center: Some(d.truth.center),
            ..Default::default()
        };
        let a = crate::common::fit(&sim.panel(true), &spec, &braid::infer::TrajectoryRequest::grid(2)).unwrap();
        let f = &a.report.fixed[1];
        assert_eq!(f.term, "age");
        if (f.lower..=f.upper).contains(&d.truth.mean[1]) {
            covered += 1;
        }
    }
    let rate = covered as f64 / replicates as f64;
    println!("coverage of the 95% interval of the linear age term: {covered}/{replicates} = {rate:.3}");
    assert!((0.92..=0.98).contains(&rate), "coverage {rate}");
}
