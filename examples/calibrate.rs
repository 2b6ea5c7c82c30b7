//! Size and power of the cohort convergence tests by seeded simulation.
//!
//! ```text
//! cargo run --release --example calibrate -- [REPS] [SHIFT_SD] [PER_COHORT] [SCHOOLS]
//! ```
//!
//! Simulates REPS studies like the demo (five cohorts entering at 12 to 20,
//! PER_COHORT pupils each (default 100), four waves), with the middle
//! cohort's curve shifted by SHIFT_SD outcome SDs (0 = cohorts converge),
//! runs `linkage::converge` on each and prints how often each of its tests
//! rejects at 5%: M1 vs M0, M2 vs M1, the two Wald tests under M2, M3 vs M2
//! and the between- against within-person slope difference. With SCHOOLS
//! above 0 (default 0: no school term) the pupils sit in that many schools
//! with the demo's school SD and the model has a school intercept, so M3
//! is the grouped fit. Seeds run from 70,000 (no shift) or 90,000 (shift),
//! as in tests/suite/linkage.rs.

use braid::infer::hypothesis::TestKind;
use braid::linkage::{ConvergeOptions, converge};
use braid::simulate::{Design, simulate};
use braid::spec::ModelSpec;

fn main() {
    let mut args = std::env::args().skip(1);
    let reps: usize = args.next().and_then(|v| v.parse().ok()).unwrap_or(1000);
    let shift: f64 = args.next().and_then(|v| v.parse().ok()).unwrap_or(0.0);
    let per_cohort: usize = args.next().and_then(|v| v.parse().ok()).unwrap_or(100);
    let schools: usize = args.next().and_then(|v| v.parse().ok()).unwrap_or(0);
    let first_seed = if shift == 0.0 { 70_000 } else { 90_000 };
    let kinds = [
        ("M1 vs M0", Some(TestKind::CohortLevel)),
        ("M2 vs M1", Some(TestKind::CohortTrend)),
        ("Wald level (M2)", Some(TestKind::CohortLevelWald)),
        ("Wald trend (M2)", Some(TestKind::CohortTrendWald)),
        ("M3 vs M2", Some(TestKind::CohortCovariance)),
        ("between - within slope", None),
    ];
    let mut rejects = vec![0usize; kinds.len()];
    let mut counted = vec![0usize; kinds.len()];
    let t0 = std::time::Instant::now();
    for i in 0..reps {
        let mut d = Design::demo();
        d.seed = first_seed + i as u64;
        d.per_cohort = per_cohort;
        if schools == 0 {
            d.schools = 1;
            d.truth.sd_school = 0.0;
        } else {
            d.schools = schools;
        }
        let sd = (d.truth.sd_intercept.powi(2) + d.truth.sd_residual.powi(2)).sqrt();
        d.truth.cohort_shift = vec![0.0, 0.0, shift * sd, 0.0, 0.0];
        let panel = simulate(&d).panel(schools > 0);
        // The default model adds a school intercept when the panel names schools.
        let r = converge(&panel, &ModelSpec::default(), &ConvergeOptions::default()).expect("converge");
        for (k, (_, kind)) in kinds.iter().enumerate() {
            let p = match kind {
                // A withheld p-value (M3 with small cohorts) is computed
                // here from its χ² reference, so that its size is still measured.
                Some(kind) => r.tests.iter().find(|t| t.kind == *kind).map(|t| match t.withheld {
                    Some(_) => chi_square_p(t.statistic, t.df),
                    None => t.p,
                }),
                None => r.between_within.as_ref().map(|b| b.p),
            };
            if let Some(p) = p.filter(|p| p.is_finite()) {
                counted[k] += 1;
                rejects[k] += usize::from(p < 0.05);
            }
        }
    }
    println!(
        "{reps} replicates, shift {shift} SD, {per_cohort} per cohort, {}: {:.1} s",
        if schools > 0 {
            format!("{schools} schools with a school term")
        } else {
            "no school term".to_string()
        },
        t0.elapsed().as_secs_f64()
    );
    for (k, (name, _)) in kinds.iter().enumerate() {
        println!(
            "  {name:<24} rejects {:.4} of {}",
            rejects[k] as f64 / counted[k].max(1) as f64,
            counted[k]
        );
    }
}

/// The upper tail of χ² with `df` degrees of freedom at `x`.
fn chi_square_p(x: f64, df: f64) -> f64 {
    use statrs::distribution::{ChiSquared, ContinuousCDF};
    ChiSquared::new(df).map_or(f64::NAN, |c| c.sf(x))
}
