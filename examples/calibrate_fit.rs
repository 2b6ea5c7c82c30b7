//! Size of the fixed-effect t tests (Satterthwaite df) under the covariance
//! structures, by seeded simulation.
//!
//! ```text
//! cargo run --release --example calibrate_fit -- [REPS] [PER_COHORT] [SCHOOLS]
//! ```
//!
//! Simulates REPS studies like the demo (five cohorts, four waves, PER_COHORT
//! pupils each, default 30, in SCHOOLS schools, default 10) with the
//! participants' intercept and age slope independent (correlation 0), and
//! fits two models, each to data it describes: a participant term with a
//! diagonal covariance and a school intercept; and the same with a
//! correlated age slope per school, on data whose schools differ in slope
//! (SD 0.3 per year) as well; the second model is also fitted to data
//! without school slopes (a random part larger than the truth). For each fixed effect it
//! counts how often the 95% interval misses the true value, which is the
//! rejection rate of the two-sided t test of the truth at 5%. Last, the
//! random-slope test under a diagonal participant term on data without slope
//! variance (its rejection rate at 5%). Seeds run from 40,000. Figures are recorded in notes/benchmarks.md.

use braid::lmm::Covariance;
use braid::simulate::{Design, simulate};
use braid::spec::{ModelSpec, RandomSpec};

fn main() {
    let mut args = std::env::args().skip(1);
    let reps: usize = args.next().and_then(|v| v.parse().ok()).unwrap_or(2000);
    let per_cohort: usize = args.next().and_then(|v| v.parse().ok()).unwrap_or(30);
    let schools: usize = args.next().and_then(|v| v.parse().ok()).unwrap_or(10);
    let term = |factor: &str, slopes: &[&str], covariance: Covariance| RandomSpec {
        factor: factor.into(),
        intercept: true,
        slopes: slopes.iter().map(|s| (*s).to_string()).collect(),
        covariance,
    };
    let models = [
        ("diagonal participant term, school intercept", &[][..], 0.0),
        (
            "diagonal participant term, school intercept and slope (true slope SD 0.3)",
            &["age"][..],
            0.3,
        ),
        (
            "diagonal participant term, school intercept and slope (no true slope)",
            &["age"][..],
            0.0,
        ),
    ];
    // Replicate i's design: the demo's, with its own seed and this run's size.
    let design = |i: usize| {
        let mut d = Design::demo();
        d.seed = 40_000 + i as u64;
        d.per_cohort = per_cohort;
        d.schools = schools;
        d
    };
    let t0 = std::time::Instant::now();
    for (label, school_slopes, sd_school_slope) in models {
        let mut misses = [0usize; 3];
        let mut fitted = 0usize;
        for i in 0..reps {
            let mut d = design(i);
            d.truth.correlation = 0.0;
            d.truth.sd_school_slope = sd_school_slope;
            let sim = simulate(&d);
            let panel = sim.panel(true);
            let spec = ModelSpec {
                center: Some(d.truth.center),
                random: Some(vec![
                    term(&panel.roles().id, &[panel.roles().age.as_str()], Covariance::Diagonal),
                    term(
                        panel.roles().cluster.as_deref().unwrap_or("school"),
                        school_slopes,
                        Covariance::Unstructured,
                    ),
                ]),
                ..Default::default()
            };
            let request = braid::FitRequest::new(spec, braid::infer::TrajectoryRequest::grid(2)).expect("request");
            let Ok(a) = braid::fit_panel(&panel, &request) else {
                continue;
            };
            fitted += 1;
            for (k, f) in a.report.fixed.iter().take(3).enumerate() {
                if !(f.lower..=f.upper).contains(&d.truth.mean[k]) {
                    misses[k] += 1;
                }
            }
        }
        println!("{label}: {fitted} of {reps} replicates fitted");
        for (k, name) in ["intercept", "age", "age²"].iter().enumerate() {
            println!(
                "  t test of the true {name}: rejects {} = {:.2}%",
                misses[k],
                100.0 * misses[k] as f64 / fitted.max(1) as f64
            );
        }
    }
    // The random-slope test under a diagonal participant term, on data
    // whose participants share one slope (SD 0): its χ̄² mixture
    // ½χ²(0) + ½χ²(1) should reject 5% at 5%.
    let mut rejects = 0;
    let mut tested = 0;
    for i in 0..reps {
        let mut d = design(i);
        d.truth.sd_slope = 0.0;
        let panel = simulate(&d).panel(true);
        let spec = ModelSpec {
            center: Some(d.truth.center),
            random: Some(vec![
                term(&panel.roles().id, &[panel.roles().age.as_str()], Covariance::Diagonal),
                term("school", &[], Covariance::Unstructured),
            ]),
            ..Default::default()
        };
        let Ok(frame) = braid::spec::build_frame(&panel, &spec) else {
            continue;
        };
        let Ok(m0) = braid::lmm::fit(&frame.problem, Default::default()) else {
            continue;
        };
        if let Ok(Some(t)) = braid::linkage::variance::random_slope_test(&frame.problem, &m0) {
            tested += 1;
            if t.p < 0.05 {
                rejects += 1;
            }
        }
    }
    println!(
        "random-slope test, diagonal participant term, no true slope variance: {tested} tested, rejects {rejects} = {:.2}%",
        100.0 * rejects as f64 / tested.max(1) as f64
    );
    println!("({:.0} s)", t0.elapsed().as_secs_f64());
}
