//! `braid converge`: likelihood ratios against statsmodels MixedLM, the size
//! of the cohort tests when cohorts converge, and their power when one cohort
//! is shifted.

use braid::linkage::{ConvergeOptions, converge};
use braid::simulate::{Design, simulate};
use braid::spec::ModelSpec;

use crate::common::{load, roles};
use crate::tolerance::LOGLIK_ABS;

// Source: statsmodels MixedLM (ML), version in tests/reference/converge.json,
// made by tests/reference/converge_reference.py on tests/data/sim_plain.csv.
#[test]
fn likelihood_ratios_are_twice_the_reference_loglik_differences() {
    let reference = crate::common::reference_json("converge.json");
    let ll = |m: &str| reference["models"][m]["loglik"].as_f64().unwrap();
    let mut r = roles("pupil", "age", "score");
    r.cohort = Some("cohort".into());
    let panel = load("sim_plain.csv", &r);
    let report = converge(&panel, &ModelSpec::default(), &ConvergeOptions::default()).unwrap();
    for (k, m) in ["M0", "M1", "M2"].iter().enumerate() {
        let braid = report.models[k].loglik;
        assert_eq!(report.models[k].method, "ML");
        assert!(
            (braid - ll(m)).abs() < LOGLIK_ABS,
            "{m}: braid {braid} vs reference {}",
            ll(m)
        );
    }
    let lrt = [(0, "M0", "M1", 4.0), (1, "M1", "M2", 8.0)];
    for (i, small, large, df) in lrt {
        let t = &report.tests[i];
        let want = 2.0 * (ll(large) - ll(small));
        assert!(
            (t.statistic - want).abs() < 4.0 * LOGLIK_ABS,
            "{}: {} vs {want}",
            t.name,
            t.statistic
        );
        assert_eq!(t.df, df);
    }
    assert_eq!(report.cohorts, ["10", "12", "14", "16", "18"]);
    assert_eq!(report.shared_ages.len(), 4 * 5);
}

/// The demo design without schools, with `per_cohort` pupils per cohort and
/// the middle cohort shifted by `shift_sd` outcome SDs.
fn design(seed: u64, shift_sd: f64, per_cohort: usize) -> Design {
    let mut d = Design::demo();
    d.seed = seed;
    d.per_cohort = per_cohort;
    d.schools = 1;
    d.truth.sd_school = 0.0;
    // 0.3 SD of the outcome at the centre age: √(5² + 3²) for the intercept
    // and residual SDs of the demo truth.
    let sd = (d.truth.sd_intercept.powi(2) + d.truth.sd_residual.powi(2)).sqrt();
    d.truth.cohort_shift = vec![0.0, 0.0, shift_sd * sd, 0.0, 0.0];
    d
}

/// Share of replicates in which the M1-vs-M0 and the M2-vs-M1 tests reject at 5%.
pub fn rejection_rates(reps: usize, first_seed: u64, shift_sd: f64, per_cohort: usize) -> (f64, f64) {
    let (mut level, mut trend) = (0usize, 0usize);
    for i in 0..reps {
        let sim = simulate(&design(first_seed + i as u64, shift_sd, per_cohort));
        let panel = sim.panel(false);
        let report = converge(&panel, &ModelSpec::default(), &ConvergeOptions::default()).unwrap();
        level += usize::from(report.tests[0].p < 0.05);
        trend += usize::from(report.tests[1].p < 0.05);
    }
    (level as f64 / reps as f64, trend as f64 / reps as f64)
}

fn reps() -> usize {
    std::env::var("BRAID_CALIBRATION_REPS")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(100)
}

// Size: cohorts that converge. The issue asks for 3.5%–6.5% over 1,000
// replicates (run with BRAID_CALIBRATION_REPS=1000; the result is recorded in
// notes/benchmarks.md). With fewer replicates the band widens to the
// binomial 99.9% range around 5% (normal approximation, closed form).
#[test]
fn cohort_tests_hold_their_level_when_cohorts_converge() {
    let n = reps();
    let (level, trend) = rejection_rates(n, 70_000, 0.0, 100);
    let (lo, hi) = if n >= 1000 {
        (0.035, 0.065)
    } else {
        let half = 3.29 * (0.05 * 0.95 / n as f64).sqrt();
        ((0.05 - half).max(0.0), 0.05 + half)
    };
    println!("{n} convergent replicates: M1 vs M0 rejects {level:.3}, M2 vs M1 rejects {trend:.3}");
    assert!((lo..=hi).contains(&level), "M1 vs M0 size {level} outside {lo}..{hi}");
    assert!((lo..=hi).contains(&trend), "M2 vs M1 size {trend} outside {lo}..{hi}");
}

// Power: the demo's 240 pupils per cohort (no schools), the middle cohort
// (entering at 16) shifted by 0.3 SD; the level test must reject in at least
// 80% of replicates.
#[test]
fn a_shifted_cohort_is_found() {
    let n = reps().min(200);
    let (level, _) = rejection_rates(n, 90_000, 0.3, 240);
    println!("{n} replicates with a 0.3 SD shift: M1 vs M0 rejects {level:.3}");
    assert!(level >= 0.8, "power {level}");
}

/// One cohort on one yearly schedule: entry ages spread by `spread` years
/// around 12, four waves, an outcome with person effects and noise.
fn one_cohort(spread: f64, seed: u64) -> braid::data::Panel {
    let dir = crate::common::temp_dir(&format!("retest-{seed}"));
    let path = dir.join("one_cohort.csv");
    let mut rng = braid::simulate::Rng::new(seed);
    let mut text = String::from("pupil,age,score\n");
    for i in 0..120 {
        let entry = 12.0 + spread * (rng.uniform() - 0.5);
        let person = 4.0 * rng.normal();
        for w in 0..4 {
            let age = entry + w as f64;
            let y = 50.0 + 1.5 * (age - 13.5) + person + 3.0 * rng.normal();
            text.push_str(&format!("P{i},{age:.6},{y:.4}\n"));
        }
    }
    std::fs::write(&path, text).unwrap();
    braid::data::load(&path, &roles("pupil", "age", "score"), Default::default()).unwrap()
}

// The retest check on three constructed designs (closed-form reasoning: with
// one schedule, prior assessments = age − entry age, an exact linear function
// of age when everyone enters at the same age).
#[test]
fn retest_identification_on_three_designs() {
    use braid::linkage::retest::{RetestForm, check};
    let spec = ModelSpec::default();
    // 1. Five overlapping cohorts: identified.
    let panel = simulate(&design(4242, 0.0, 100)).panel(false);
    let frame = braid::spec::build_frame(&panel, &spec).unwrap();
    let r = check(&panel, &frame, RetestForm::Count).unwrap();
    assert_eq!(r.status, "identified", "{}", r.message);
    assert!(r.estimate.is_some() && r.age_slope_with.is_some());
    // The simulation has no retest effect: the estimate is within 3 SE of 0.
    assert!(r.estimate.unwrap().abs() < 3.0 * r.se.unwrap(), "{:?}", r);
    // 2. One cohort, everyone entering at exactly 12: not identified.
    let panel = one_cohort(0.0, 7);
    let frame = braid::spec::build_frame(&panel, &spec).unwrap();
    let r = check(&panel, &frame, RetestForm::Count).unwrap();
    assert_eq!(r.status, "not identified", "{}", r.message);
    assert!(r.message.contains("one cohort on one schedule"));
    assert!(r.estimate.is_none());
    // 3. One cohort with entry ages spread over 0.2 years: nearly collinear.
    let panel = one_cohort(0.2, 8);
    let frame = braid::spec::build_frame(&panel, &spec).unwrap();
    let r = check(&panel, &frame, RetestForm::Count).unwrap();
    assert_eq!(r.status, "nearly collinear", "{}", r.message);
    assert!(r.vif > 20.0);
    // The first-versus-later form is available through converge.
    let opts = ConvergeOptions {
        retest: Some(RetestForm::Later),
        ..Default::default()
    };
    let report = converge(&simulate(&design(4243, 0.0, 100)).panel(false), &spec, &opts).unwrap();
    assert!(report.retest.is_some());
    assert!(report.verdict.contains("Retest"));
}

// M3's REML log-likelihood is the sum of separate per-cohort REML fits
// (closed form: the REML criterion is additive over independent blocks with a
// block-diagonal X). Two cohorts that are copies of each other (disjoint ids)
// give M3 = 2 × one cohort's REML log-likelihood and an M3-vs-M2 statistic of
// zero, since M2's common covariance is then each copy's own.
#[test]
fn m3_of_two_identical_cohorts_is_twice_one_and_adds_nothing() {
    let sim = simulate(&design(515, 0.0, 80));
    let mut text = String::from("pupil,cohort,age,score\n");
    let mut single = String::from("pupil,age,score\n");
    for r in sim.rows.iter().filter(|r| r.cohort == "14") {
        text.push_str(&format!("A{},a,{},{}\n", r.id, r.age, r.score));
        text.push_str(&format!("B{},b,{},{}\n", r.id, r.age, r.score));
        single.push_str(&format!("{},{},{}\n", r.id, r.age, r.score));
    }
    let dir = crate::common::temp_dir("m3");
    std::fs::write(dir.join("twins.csv"), text).unwrap();
    std::fs::write(dir.join("single.csv"), single).unwrap();
    let mut r = roles("pupil", "age", "score");
    r.cohort = Some("cohort".into());
    let twins = braid::data::load(&dir.join("twins.csv"), &r, Default::default()).unwrap();
    let one = braid::data::load(
        &dir.join("single.csv"),
        &roles("pupil", "age", "score"),
        Default::default(),
    )
    .unwrap();
    let report = converge(&twins, &ModelSpec::default(), &ConvergeOptions::default()).unwrap();
    let m3 = report.models.iter().find(|m| m.name == "M3").unwrap();
    // The single cohort's REML fit, centred where converge centres.
    let spec = ModelSpec {
        center: Some(report.reference_age),
        ..Default::default()
    };
    let fit = crate::common::fit(&one, &spec, &braid::infer::TrajectoryRequest::grid(2)).unwrap();
    assert!(
        (m3.loglik - 2.0 * fit.fit.loglik).abs() < crate::tolerance::REFIT_LOGLIK_ABS * 10.0,
        "M3 {} vs 2 × {}",
        m3.loglik,
        fit.fit.loglik
    );
    let t = report.tests.iter().find(|t| t.name.starts_with("M3")).unwrap();
    assert!(t.statistic < 1e-5, "{}", t.statistic);
    // The random-slope test uses the boundary mixture and says so.
    let slope = report.tests.iter().find(|t| t.name.contains("slope")).unwrap();
    assert!(slope.method.to_string().contains("mixture"), "{}", slope.method);
}
