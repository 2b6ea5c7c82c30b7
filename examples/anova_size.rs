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
    let names = [
        "cohort",
        "wave",
        "wave GG",
        "wave HF",
        "cohort × wave",
        "cohort × wave GG",
        "cohort × wave HF",
        "Mauchly",
        "Box's M",
        "simple effects (GG, each cohort)",
        "simple effects (Holm, any cohort)",
        "mixed model wave",
        "mixed model cohort × wave",
    ];
    let mut rejected = vec![0usize; names.len()];
    let mut simple_tests = 0usize;
    let cohorts: Vec<String> = (0..sizes.len()).map(|g| g.to_string()).collect();
    let t0 = std::time::Instant::now();
    for r in 0..reps {
        let c = complete_waves(&sizes, k, &cov, seed + r as u64);
        let a = analyse(&c, &cohorts, 0.05).expect("analysis");
        let e = &a.effects;
        let ps = [
            e[0].p,
            e[1].p,
            e[1].p_gg.unwrap(),
            e[1].p_hf.unwrap(),
            e[2].p,
            e[2].p_gg.unwrap(),
            e[2].p_hf.unwrap(),
            a.sphericity.as_ref().map_or(f64::NAN, |s| s.p),
            a.box_m.as_ref().map_or(f64::NAN, |b| b.p),
        ];
        for (i, p) in ps.iter().enumerate() {
            rejected[i] += usize::from(*p < 0.05);
        }
        for s in &a.simple_effects {
            rejected[9] += usize::from(s.p_gg < 0.05);
            simple_tests += 1;
        }
        rejected[10] += usize::from(a.simple_effects.iter().any(|s| s.p_holm < 0.05));
        rejected[11] += usize::from(a.mixed_model_comparison.tests[0].p < 0.05);
        rejected[12] += usize::from(a.mixed_model_comparison.tests[1].p < 0.05);
    }
    println!(
        "anova tests, errors {errors}, cohorts {sizes:?}, {k} waves: {reps} replicates from seed {seed}, {:.0} s",
        t0.elapsed().as_secs_f64()
    );
    for (i, name) in names.iter().enumerate() {
        let denominator = if i == 9 { simple_tests } else { reps };
        println!(
            "  {name:<36} rejects at 5% in {:>5.1}% ({} of {denominator})",
            100.0 * rejected[i] as f64 / denominator as f64,
            rejected[i]
        );
    }
}
