//! `braid plan`: the expected-information SE against the closed form of
//! Raudenbush & Liu (2001), simulated SDs and power against it, the size of
//! the simulated convergence test, agreement with the convergence
//! calibration, reproducibility, shards, and bad plans.

use std::path::Path;

use braid::plan::information::wald_power;
use braid::plan::{Plan, PlanReport, RunContext, run};

use crate::common::{binomial_band, braid, expect_one_line_error, run_ok, temp_dir};
use crate::tolerance::{PLAN_CLOSED_FORM_REL, PLAN_SD_REL};

fn plan(text: &str) -> Plan {
    Plan::from_toml(Path::new("test.toml"), text).unwrap()
}

fn answer(p: &Plan) -> PlanReport {
    let context = RunContext {
        population_source: "from the test".into(),
        progress: &|_| {},
    };
    run(p, &context).unwrap()
}

/// One cohort entering at exactly `entry`, `waves` waves `gap` apart, no
/// dropout or jitter, linear growth with uncorrelated random intercept and
/// slope.
fn one_cohort(waves: usize, gap: f64, n: usize, tau: [f64; 2], sigma: f64, center: f64, slope: f64) -> String {
    format!(
        r#"
[[design]]
name = "one cohort"
entry_ages = [10]
waves = {waves}
interval = {gap}
per_cohort = {n}
jitter = 0
age_spread = 0

[population]
center = {center}
mean = [20, {slope}]
sd_intercept = {}
sd_slope = {}
correlation = 0
sd_residual = {sigma}

[targets]
age_term = {{ power = 0.5 }}
"#,
        tau[0], tau[1]
    )
}

/// √((τ₁₁ + σ²/Σ(tⱼ − t̄)²)/N): the SE of the mean slope in a balanced
/// single-cohort design (Raudenbush & Liu 2001, *Psychological Methods* 6,
/// eq. 5; closed form).
fn raudenbush_liu(waves: usize, gap: f64, n: usize, tau_slope: f64, sigma: f64) -> f64 {
    let t: Vec<f64> = (0..waves).map(|w| w as f64 * gap).collect();
    let mean = t.iter().sum::<f64>() / waves as f64;
    let sst: f64 = t.iter().map(|x| (x - mean).powi(2)).sum();
    ((tau_slope.powi(2) + sigma.powi(2) / sst) / n as f64).sqrt()
}

// Closed form (Raudenbush & Liu 2001): the expected-information SE of the
// slope for designs of several lengths, spacings, sizes and variances; and
// the identity that it does not depend on the centre age.
#[test]
fn expected_slope_se_is_the_closed_form() {
    let cases = [
        (5, 1.0, 200, [2.0, 0.5], 1.5),
        (3, 2.0, 50, [4.0, 1.0], 2.0),
        (4, 0.5, 1000, [1.0, 0.2], 3.0),
        (8, 0.25, 30, [3.0, 0.05], 0.7),
    ];
    for (waves, gap, n, tau, sigma) in cases {
        let want = raudenbush_liu(waves, gap, n, tau[1], sigma);
        for center in [10.0, 12.0, 13.7] {
            let mut p = plan(&one_cohort(waves, gap, n, tau, sigma, center, 0.3));
            p.simulation.route = braid::plan::Route::Information;
            let got = answer(&p).designs[0].se["age"];
            assert!(
                (got / want - 1.0).abs() < PLAN_CLOSED_FORM_REL,
                "{waves} waves, gap {gap}, n {n}, centre {center}: {got} vs {want}"
            );
        }
    }
}

// Simulation recovering a known truth: over 2,000 replicates the SD of the
// fitted slope lies within 3% of the closed-form SE, and the simulated power
// of its test within 3 Monte Carlo SEs of the normal-approximation power.
#[test]
fn simulated_slope_sd_and_power_match_the_closed_form() {
    let (waves, gap, n, tau, sigma) = (5, 1.0, 200, [2.0, 0.5], 1.5);
    let se = raudenbush_liu(waves, gap, n, tau[1], sigma);
    let slope = 2.2 * se;
    let mut p = plan(&one_cohort(waves, gap, n, tau, sigma, 12.0, slope));
    p.simulation.replicates = 2000;
    p.simulation.precision = 0.0;
    let report = answer(&p);
    let d = &report.designs[0];
    assert_eq!(d.replicates, 2000);
    assert_eq!(d.failed, 0);
    let sd = d.slope_sd.unwrap();
    println!("slope SD {sd:.5} against the closed-form SE {se:.5}");
    assert!((sd / se - 1.0).abs() < PLAN_SD_REL, "SD {sd} vs SE {se}");
    let power = &d.power["age_term"];
    let normal = wald_power(slope, se, 0.05);
    let (sim, mc) = (power.simulated.unwrap(), power.mc_se.unwrap());
    println!("power simulated {sim:.4} ± {mc:.4}, normal approximation {normal:.4}");
    assert!((sim - normal).abs() < 3.0 * mc, "simulated {sim} ± {mc} vs {normal}");
    assert!((power.information - normal).abs() < 1e-6);
}

/// The demo's design without schools, the middle cohort offset by 0.3
/// outcome SD (examples/plans/demo-convergence.toml, which notes/plan.md runs
/// with 2,000 replicates).
fn demo_plan() -> Plan {
    let file = Path::new(env!("CARGO_MANIFEST_DIR")).join("examples/plans/demo-convergence.toml");
    Plan::read(&file).unwrap()
}

// Size: with no cohort offsets the simulated M1-vs-M0 test rejects within
// the 98% binomial band around 5% (notes/plan.md records 2,000 replicates).
// Agreement: its power at the offset of examples/calibrate.rs (0.3 SD, the
// middle cohort) agrees with converge's own calibration (tests/suite/
// linkage.rs, other seeds) within Monte Carlo error, and with the
// expected-information power.
#[test]
fn simulated_convergence_test_holds_its_level_and_agrees_with_the_calibration() {
    let plan = demo_plan();
    let reps = plan.simulation.replicates;
    assert_eq!(plan.designs[0].per_cohort, Some(100));
    let report = answer(&plan);
    let c = &report.designs[0].power["convergence"];
    let rejected = (c.size.unwrap() * reps as f64).round() as u64;
    let (lo, hi) = binomial_band(reps as u64);
    println!(
        "size {rejected}/{reps}; power {:.3} ± {:.3}; expected {:.3}",
        c.simulated.unwrap(),
        c.mc_se.unwrap(),
        c.information
    );
    assert!(
        (lo..=hi).contains(&rejected),
        "size {rejected}/{reps} outside {lo}..{hi}"
    );
    let calibration_reps = 150;
    let (calibrated, _) = crate::linkage::rejection_rates(calibration_reps, 90_000, 0.3, 100);
    let se = (c.mc_se.unwrap().powi(2) + calibrated * (1.0 - calibrated) / calibration_reps as f64).sqrt();
    println!("calibration {calibrated:.3}");
    assert!((c.simulated.unwrap() - calibrated).abs() < 3.0 * se);
    assert!((c.simulated.unwrap() - c.information).abs() < 3.0 * c.mc_se.unwrap() + 0.05);
}

const SMALL_PLAN: &str = r#"
[[design]]
name = "three cohorts"
entry_ages = [8, 10, 12]
waves = 3
interval = 1
dropout = 0.1
clusters = 6

[[design]]
name = "two cohorts"
entry_ages = [8, 10.5]
waves = 4
interval = 1

[population]
center = 10
mean = [30, 2, -0.1]
sd_intercept = 3
sd_slope = 0.4
sd_cluster = 1
sd_residual = 2

[costs]
per_participant = 50
per_assessment = 20

[targets]
convergence = { offset = 1.5, power = 0.7 }
age_term = { power = 0.9 }

[simulation]
replicates = 200
precision = 0.04
seed = 3

[search]
grid = [20, 40]
"#;

// Reproducibility: the same seed gives byte-identical JSON; four shards
// merged give byte-identical JSON to one unsharded run (whose stopping rule
// cut some evaluations short).
#[test]
fn plans_are_reproducible_and_shards_merge_to_the_single_run() {
    let dir = temp_dir("plan-shards");
    let file = dir.join("plan.toml");
    std::fs::write(&file, SMALL_PLAN).unwrap();
    let whole = |name: &str| {
        let json = dir.join(name);
        run_ok(braid().arg("plan").arg(&file).arg("--quiet").arg("--json").arg(&json));
        std::fs::read(&json).unwrap()
    };
    let (a, b) = (whole("a.json"), whole("b.json"));
    assert_eq!(a, b, "two runs with one seed differ");
    let mut shards = Vec::new();
    for k in 1..=4 {
        let out = dir.join(format!("shard{k}"));
        run_ok(
            braid()
                .arg("plan")
                .arg(&file)
                .args(["--quiet", "--shard", &format!("{k}/4"), "--out"])
                .arg(&out),
        );
        shards.push(out.join("plan-shard.json"));
    }
    let merged = dir.join("merged.json");
    run_ok(
        braid()
            .args(["plan", "merge"])
            .args(&shards)
            .arg("--quiet")
            .arg("--json")
            .arg(&merged),
    );
    assert_eq!(std::fs::read(&merged).unwrap(), a, "merged shards differ from one run");
    let report: serde_json::Value = serde_json::from_slice(&a).unwrap();
    crate::common::expect_keys(&report, &["designs", "recommended"], "plan.json");
    let d = &report["designs"][0];
    crate::common::expect_keys(
        d,
        &["n_per_cohort", "cost", "duration_years", "se", "power", "meets_targets"],
        "design",
    );
    assert!(d["power"]["convergence"]["mc_se"].is_number());
    // A merge missing a shard is refused.
    let out = braid()
        .args(["plan", "merge"])
        .args(&shards[..3])
        .arg("--quiet")
        .output()
        .unwrap();
    expect_one_line_error(&out, "shard 4/4 is missing", "a missing shard");
}

// Bad plans get one-line errors naming what is wrong.
#[test]
fn bad_plans_get_one_line_errors() {
    let dir = temp_dir("plan-bad");
    let cases = [
        (
            "entry_ages = [8, 10, 12]",
            "entry_ages = [8, 12, 16]",
            "do not overlap",
            "no overlap",
        ),
        (
            "dropout = 0.1",
            "dropout = 1.2",
            "not a probability below 1",
            "dropout above 1",
        ),
        ("sd_slope = 0.4", "sd_slope = -0.4", "not a usable SD", "a negative SD"),
        (
            "per_assessment = 20",
            "per_assessment = 20\n[targets.never]",
            "not a valid plan file",
            "an unknown table",
        ),
        (
            "[targets]",
            "[targets]\nmax_budget = 10",
            "below one participant's cost",
            "a tiny budget",
        ),
        (
            "age_term = { power = 0.9 }",
            "age_term = { power = 1.0 }",
            "unreachable",
            "power of 1",
        ),
        ("mean = [30, 2, -0.1]", "mean = [30, 0]", "unreachable", "no age effect"),
    ];
    for (k, (from, to, expected, what)) in cases.iter().enumerate() {
        let text = SMALL_PLAN.replacen(from, to, 1);
        assert_ne!(text, SMALL_PLAN, "{what}: the edit did not apply");
        let file = dir.join(format!("bad{k}.toml"));
        std::fs::write(&file, text).unwrap();
        let out = braid().arg("plan").arg(&file).arg("--quiet").output().unwrap();
        expect_one_line_error(&out, expected, what);
    }
}

// A pilot's fit seeds the population: the plan takes the fit's polynomial
// fixed effects, SDs and correlation as they are in fit.json.
#[test]
fn a_pilot_fit_seeds_the_population() {
    let dir = temp_dir("plan-from");
    let demo = dir.join("demo");
    run_ok(braid().args(["demo", "--quiet", "--out"]).arg(&demo));
    let fit: serde_json::Value = crate::common::read_json(&demo.join("fit.json"));
    let file = dir.join("plan.toml");
    let design = SMALL_PLAN.split("[population]").next().unwrap();
    std::fs::write(&file, format!("{design}\n[targets]\nage_term = {{ power = 0.9 }}\n")).unwrap();
    let json = dir.join("plan.json");
    run_ok(
        braid()
            .arg("plan")
            .arg(&file)
            .arg("--from")
            .arg(demo.join("fit.json"))
            .args(["--route", "information", "--quiet", "--json"])
            .arg(&json),
    );
    let report = crate::common::read_json(&json);
    let population = &report["plan"]["population"];
    for k in 0..3 {
        assert_eq!(population["mean"][k], fit["fixed"][k]["estimate"]);
    }
    assert_eq!(population["sd_intercept"], fit["random"][0]["sd"][0]);
    assert_eq!(population["sd_cluster"], fit["random"][1]["sd"][0]);
    assert!(report["population_source"].as_str().unwrap().contains("pilot fit"));
}

// Simulation recovering a known truth with a retest effect: the analysis
// adds a retest term, so the mean at the stated ages is unbiased (within
// 3 Monte Carlo SEs) and the expected and simulated half-widths agree.
#[test]
fn a_retest_effect_is_modelled_and_the_mean_is_unbiased() {
    let mut p = plan(
        r#"
[[design]]
name = "retest"
entry_ages = [8, 10, 12]
waves = 4
interval = 1
per_cohort = 150
dropout = 0.1

[population]
center = 10
mean = [30, 2, -0.15]
sd_intercept = 3
sd_slope = 0.4
sd_residual = 2
retest = 1.0

[targets]
half_width = { ages = [9, 13], at_most = 1 }
"#,
    );
    p.simulation.replicates = 150;
    p.simulation.precision = 0.0;
    let d = &answer(&p).designs[0];
    assert!(d.se.contains_key("retest"));
    for q in &d.precision {
        let (bias, w) = (q.bias.unwrap(), q.simulated.unwrap());
        // The SE of the mean bias: the estimate's SE (half-width / 1.96) over √R.
        let mc = w / 1.96 / (d.replicates as f64).sqrt();
        assert!(bias.abs() < 3.0 * mc, "age {}: bias {bias} (MC SE {mc})", q.age);
        assert!(
            (w / q.information - 1.0).abs() < 0.05,
            "age {}: {w} vs {}",
            q.age,
            q.information
        );
    }
}
