//! Size and power of `braid apc`'s tests on simulated cohort-sequential
//! panels, by seeded simulation: the measuring stick for the APC tests on
//! records.
//!
//! ```text
//! cargo run --release --example apc_size -- [REPS] [DESIGN] [PER_COHORT] [MODEL] [SHOCK] [SEED]
//! ```
//!
//! DESIGN is `demo` (five cohorts entering at 12 to 20, two years apart, four
//! annual waves) or `four` (four cohorts entering at 10 to 19, three years
//! apart, four annual waves); `four6` is `four` with six waves. Each
//! replicate simulates the design with the demo's quadratic age curve,
//! participant intercepts and slopes, school intercepts, light dropout and no
//! period or cohort effect.
//!
//! MODEL is `exact` (default: the exact-value model, with every test braid
//! prints) or a group width in years (the grouped factor model, whose period
//! and cohort p-values braid withholds on records; they are recomputed here).
//!
//! SHOCK adds an effect that is there: `period` adds 0.5 residual SD to every
//! record of the second calendar year of fieldwork, `cohort` adds it to
//! every record of the middle entry cohort (born within one year: a
//! birth-year group), `none` (default) adds nothing. `linear-age` takes away
//! the age curve instead (a straight line in age), for the size of the age
//! test. Seeds run from SEED (default 120,000).

use braid::apc::exact::{ExactInput, ExactTestKind, fit};
use braid::apc::{ApcInput, ApcOptions, identify};
use braid::infer::hypothesis::f_sf;
use braid::simulate::{Design, simulate};

/// Per cent of replicates that reject, per test, at 1%, 5% and 10%.
struct Tally {
    names: Vec<String>,
    rejected: Vec<[usize; 3]>,
    reps: usize,
}

impl Tally {
    fn add(&mut self, name: &str, p: f64) {
        let k = match self.names.iter().position(|n| n == name) {
            Some(k) => k,
            None => {
                self.names.push(name.into());
                self.rejected.push([0; 3]);
                self.names.len() - 1
            }
        };
        for (j, alpha) in [0.01, 0.05, 0.10].into_iter().enumerate() {
            self.rejected[k][j] += usize::from(p < alpha);
        }
    }
}

fn design(name: &str, per_cohort: usize, seed: u64) -> Design {
    let mut d = Design::demo();
    d.seed = seed;
    d.per_cohort = per_cohort;
    if name.starts_with("four") {
        d.entry_ages = vec![10.0, 13.0, 16.0, 19.0];
    }
    if name.starts_with("four6") {
        d.waves = 6;
    }
    if name.ends_with("-noschool") {
        d.schools = 1;
        d.truth.sd_school = 0.0;
    }
    d
}

fn shocked(panel: &braid::data::Panel, period: &[f64], shock: &str, size: f64) -> Vec<f64> {
    let first = period.iter().copied().fold(f64::INFINITY, f64::min).floor();
    let middle = panel.cohort().map(|c| (c.codes(), (c.n_levels() / 2) as u32));
    (0..panel.n())
        .map(|k| {
            let hit = match (shock, middle) {
                ("period", _) => period[k].floor() == first + 1.0,
                ("cohort", Some((codes, m))) => codes[k] == m,
                _ => false,
            };
            panel.outcome()[k] + if hit { size } else { 0.0 }
        })
        .collect()
}

fn main() {
    let mut args = std::env::args().skip(1);
    let reps: usize = args.next().and_then(|v| v.parse().ok()).unwrap_or(200);
    let name = args.next().unwrap_or_else(|| "demo".into());
    let per_cohort: usize = args.next().and_then(|v| v.parse().ok()).unwrap_or(100);
    let model = args.next().unwrap_or_else(|| "exact".into());
    let shock = args.next().unwrap_or_else(|| "none".into());
    let width: Option<f64> = model.parse().ok();
    let first_seed: u64 = std::env::args().nth(6).and_then(|v| v.parse().ok()).unwrap_or(120_000);
    let mut tally = Tally {
        names: Vec::new(),
        rejected: Vec::new(),
        reps: 0,
    };
    let mut failed = 0usize;
    let t0 = std::time::Instant::now();
    for i in 0..reps {
        let mut d = design(&name, per_cohort, first_seed + i as u64);
        if shock == "linear-age" {
            d.truth.mean.truncate(2);
        }
        // The school column is given, as the study's analysts would.
        let panel = simulate(&d).panel(d.schools > 1);
        let outcome = match width {
            None => exact_tests(&panel, &shock, d.truth.sd_residual * 0.5, &mut tally),
            Some(w) => grouped_tests(panel, w, &mut tally),
        };
        match outcome {
            Ok(()) => tally.reps += 1,
            Err(e) => {
                if failed == 0 {
                    eprintln!("replicate {i}: {e}");
                }
                failed += 1;
            }
        }
    }
    println!(
        "apc tests, design {name}, {per_cohort} per cohort, model {model}, shock {shock}: {} replicates ({failed} failed), {:.0} s",
        tally.reps,
        t0.elapsed().as_secs_f64()
    );
    let pct = |r: usize| 100.0 * r as f64 / tally.reps as f64;
    for (n, r) in tally.names.iter().zip(&tally.rejected) {
        println!(
            "  {n:<34} rejects at 5% in {:>5.1}% ({} of {}); at 1% {:.1}%, at 10% {:.1}%",
            pct(r[1]),
            r[1],
            tally.reps,
            pct(r[0]),
            pct(r[2])
        );
    }
}

fn exact_tests(panel: &braid::data::Panel, shock: &str, size: f64, tally: &mut Tally) -> braid::Result<()> {
    let Some(cal) = panel.calendar() else {
        return Err(braid::Error::Numerical {
            step: "simulation".into(),
            message: "no calendar".into(),
        });
    };
    let y = shocked(panel, &cal.period, shock, size);
    let input = ExactInput {
        age: panel.age(),
        period: &cal.period,
        y: &y,
        ids: Some(panel.id().codes()),
        clusters: panel.cluster().map(braid::data::Codes::codes),
    };
    let r = fit(&input, &[])?;
    for t in &r.tests {
        let name = match t.kind {
            ExactTestKind::Drift => "drift",
            ExactTestKind::AgeNonlinear if shock == "linear-age" => "age nonlinear",
            ExactTestKind::AgeNonlinear => "age nonlinear (effect present)",
            ExactTestKind::PeriodNonlinear => "period nonlinear",
            ExactTestKind::CohortNonlinear => "cohort nonlinear",
        };
        tally.add(name, t.p.unwrap_or(f64::NAN));
    }
    Ok(())
}

fn grouped_tests(panel: braid::data::Panel, width: f64, tally: &mut Tally) -> braid::Result<()> {
    let options = ApcOptions::new(Some(width), Vec::new(), Vec::new(), false)?;
    let report = identify(&ApcInput::from_panel(panel)?, &options)?;
    for t in &report.curvature_tests {
        // braid withholds the period and cohort p-values on grouped records
        // (this measurement is why); the test's own p is recomputed here.
        let p = match t.df_denominator {
            Some(den) if t.p.is_nan() => f_sf(t.statistic, t.df as f64, den as f64),
            _ => t.p,
        };
        tally.add(&format!("grouped {} curvature", t.dimension.name()), p);
    }
    if let Some(view) = &report.panel {
        tally.add("grouped APC against A+C", view.period_beyond_cohort.p);
    }
    Ok(())
}
