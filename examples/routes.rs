//! The blocked and the sparse route side by side, to place the automatic
//! choice between them (notes/criterion.md, "The sparse route").
//!
//! ```text
//! cargo run --release --example routes -- [PUPILS] [SCHOOLS,...]
//! ```
//!
//! An invented file: PUPILS pupils (default 20,000) over three waves, each
//! moving to another school with probability 0.3 at each wave after the
//! first, so that pupils and schools are crossed; pupil intercepts and age
//! slopes, school intercepts, quadratic age, REML. For each number of
//! schools (default 250, 500, 1000, 2000) both routes fit the same problem
//! and the wall time of each fit, its evaluations and the gap in
//! log-likelihood are printed. Figures are recorded in notes/benchmarks.md.

use std::time::Instant;

use braid::lmm::{FitOptions, MixedProblem, RandomTermData, Route};
use braid::simulate::Rng;

fn movers(pupils: usize, schools: usize, seed: u64) -> MixedProblem {
    let mut rng = Rng::new(seed);
    let school_effect: Vec<f64> = (0..schools).map(|_| rng.normal()).collect();
    let (mut x, mut y, mut age, mut pupil, mut school) = (vec![], vec![], vec![], vec![], vec![]);
    for i in 0..pupils {
        let (b0, b1) = (2.0 * rng.normal(), 0.4 * rng.normal());
        let mut s = i % schools;
        let entry = 10.0 + 2.0 * (i % 3) as f64 + rng.uniform();
        for w in 0..3 {
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
        x_names: vec!["intercept".into(), "age".into(), "age2".into()],
        x: x.into(),
        terms: vec![
            RandomTermData::numbered("pupil", pupils, pupil, &["intercept", "age"], vec![vec![1.0; n], age]),
            RandomTermData::numbered("school", schools, school, &["intercept"], vec![vec![1.0; n]]),
        ],
    }
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let pupils: usize = args.get(1).and_then(|a| a.parse().ok()).unwrap_or(20_000);
    let schools: Vec<usize> = args
        .get(2)
        .map(|a| a.split(',').filter_map(|v| v.parse().ok()).collect())
        .unwrap_or_else(|| vec![250, 500, 1000, 2000]);
    println!("pupils {pupils}, three waves, REML");
    println!("schools   blocked s (evals)   sparse s (evals)   sparse/blocked   ℓ blocked − ℓ sparse   decrements");
    for &k in &schools {
        let problem = movers(pupils, k, 7);
        let run = |route: Route| {
            let t = Instant::now();
            let f = braid::lmm::fit(
                &problem,
                FitOptions {
                    route,
                    ..Default::default()
                },
            )
            .expect("fit");
            (t.elapsed().as_secs_f64(), f)
        };
        let (tb, fb) = run(Route::Blocked);
        let (ts, fs) = run(Route::Sparse);
        println!(
            "{k:>7}   {tb:>9.2} ({:>3})      {ts:>9.2} ({:>3})     {:>10.2}     {:>10.1e}           {:.1e} {:.1e}",
            fb.info.evaluations,
            fs.info.evaluations,
            ts / tb,
            fb.loglik - fs.loglik,
            fb.info.newton_decrement.unwrap_or(f64::NAN),
            fs.info.newton_decrement.unwrap_or(f64::NAN),
        );
    }
}
