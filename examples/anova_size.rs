//! Size of every test `braid anova` prints, by seeded simulation of complete
//! cohort × wave data with no cohort, wave or interaction effect.
//!
//! ```text
//! cargo run --release --example anova_size -- [REPS] [ERRORS] [SIZES] [WAVES] [SEED]
//! ```
//!
//! ERRORS is `cs` (compound symmetry: sphericity holds, every test is at its
//! nominal size) or `ar1` (an autoregressive correlation of 0.8 between
//! neighbouring waves: sphericity fails, so the uncorrected within-effect
//! tests are expected to be too liberal and the corrections to repair them;
//! Mauchly's test is then not under its null). SIZES lists the cohort sizes
//! (default 12,18,30), WAVES the number of waves (default 4), SEED the first
//! seed (default 50,000). Errors are normal with variance 4 at each wave.

use braid::anova::analyse;
use braid::simulate::complete_waves;

fn main() {
    let mut args = std::env::args().skip(1);
    let reps: usize = args.next().and_then(|v| v.parse().ok()).unwrap_or(1000);
    let errors = args.next().unwrap_or_else(|| "cs".into());
    let sizes: Vec<usize> = args
        .next()
        .unwrap_or_else(|| "12,18,30".into())
        .split(',')
        .filter_map(|v| v.parse().ok())
        .collect();
    let k: usize = args.next().and_then(|v| v.parse().ok()).unwrap_or(4);
    let seed: u64 = args.next().and_then(|v| v.parse().ok()).unwrap_or(50_000);
    // The error covariance.
    let cov: Vec<f64> = (0..k * k)
        .map(|ij| {
            let (i, j) = (ij / k, ij % k);
            4.0 * match errors.as_str() {
                "ar1" => 0.8f64.powi((i as i32 - j as i32).abs()),
                _ if i == j => 1.0,
                _ => 0.5,
            }
        })
        .collect();
    // Rejections and tests per name (the simple effects count each cohort),
    // and how often Holm's adjustment rejects for any cohort.
    let mut tally: Vec<(&str, usize, usize)> = Vec::new();
    let mut holm_any = 0usize;
    let cohorts: Vec<String> = (0..sizes.len()).map(|g| g.to_string()).collect();
    let t0 = std::time::Instant::now();
    for r in 0..reps {
        let c = complete_waves(&sizes, k, &cov, seed + r as u64);
        let a = analyse(&c, &cohorts, 0.05).expect("analysis");
        for (name, p) in a.p_values() {
            let i = tally.iter().position(|t| t.0 == name).unwrap_or_else(|| {
                tally.push((name, 0, 0));
                tally.len() - 1
            });
            tally[i].1 += usize::from(p < 0.05);
            tally[i].2 += 1;
        }
        holm_any += usize::from(a.simple_effects.iter().any(|s| s.p_holm < 0.05));
    }
    tally.push(("simple effects (Holm, any cohort)", holm_any, reps));
    println!(
        "anova tests, errors {errors}, cohorts {sizes:?}, {k} waves: {reps} replicates from seed {seed}, {:.0} s",
        t0.elapsed().as_secs_f64()
    );
    for (name, rejected, tests) in &tally {
        println!(
            "  {name:<36} rejects at 5% in {:>5.1}% ({rejected} of {tests})",
            100.0 * *rejected as f64 / *tests as f64
        );
    }
}
