//! Size and power of the cohort convergence tests by seeded simulation.
//!
//! ```text
//! cargo run --release --example calibrate -- [REPS] [SHIFT_SD] [PER_COHORT]
//! ```
//!
//! Simulates REPS studies like the demo (five cohorts entering at 12 to 20,
//! PER_COHORT pupils each (default 100), four waves, no schools), with the middle cohort's curve
//! shifted by SHIFT_SD outcome SDs (0 = cohorts converge), runs
//! `linkage::converge` on each and prints how often the M1-vs-M0 and M2-vs-M1
//! likelihood-ratio tests reject at 5%. Seeds run from 70,000 (no shift) or
//! 90,000 (shift), as in tests/suite/linkage.rs.

use braid::infer::hypothesis::TestKind;
use braid::linkage::{ConvergeOptions, converge};
use braid::simulate::{Design, simulate};
use braid::spec::ModelSpec;

fn main() {
    let mut args = std::env::args().skip(1);
    let reps: usize = args.next().and_then(|v| v.parse().ok()).unwrap_or(1000);
    let shift: f64 = args.next().and_then(|v| v.parse().ok()).unwrap_or(0.0);
    let per_cohort: usize = args.next().and_then(|v| v.parse().ok()).unwrap_or(100);
    let first_seed = if shift == 0.0 { 70_000 } else { 90_000 };
    let (mut level, mut trend, mut p_level, mut p_trend) = (0usize, 0usize, 0.0, 0.0);
    let t0 = std::time::Instant::now();
    for i in 0..reps {
        let mut d = Design::demo();
        d.seed = first_seed + i as u64;
        d.per_cohort = per_cohort;
        d.schools = 1;
        d.truth.sd_school = 0.0;
        let sd = (d.truth.sd_intercept.powi(2) + d.truth.sd_residual.powi(2)).sqrt();
        d.truth.cohort_shift = vec![0.0, 0.0, shift * sd, 0.0, 0.0];
        let panel = simulate(&d).panel(false);
        let r = converge(&panel, &ModelSpec::default(), &ConvergeOptions::default()).expect("converge");
        let p_of = |kind| r.tests.iter().find(|t| t.kind == kind).map_or(f64::NAN, |t| t.p);
        let (pl, pt) = (p_of(TestKind::CohortLevel), p_of(TestKind::CohortTrend));
        level += usize::from(pl < 0.05);
        trend += usize::from(pt < 0.05);
        p_level += pl;
        p_trend += pt;
    }
    let n = reps as f64;
    println!(
        "{reps} replicates, shift {shift} SD: M1 vs M0 rejects {:.4} (mean p {:.3}), M2 vs M1 rejects {:.4} (mean p {:.3}); {:.1} s",
        level as f64 / n,
        p_level / n,
        trend as f64 / n,
        p_trend / n,
        t0.elapsed().as_secs_f64()
    );
}
