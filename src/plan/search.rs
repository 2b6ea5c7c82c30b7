//! Per design: the smallest n per cohort that meets every target (by
//! bisection on expected-information power, then on simulated power with
//! common random numbers), or the n given; then the ranking by cost and the
//! recommendation.

use std::collections::BTreeMap;

use super::information::{Covariance, Expected, wald_power};
use super::simulation::{self, Outcome, Source};
use super::{
    AGE_TERM, CONVERGENCE, Candidate, DesignResult, Plan, PlanReport, Population, PowerResult, PrecisionResult, Probe,
    RATE_DIFFERENCE,
};
use crate::error::Result;
use crate::stats::{plain_number, thousands};
use crate::warning::{Warning, WarningCode};

/// The normal quantile of a 95% interval.
const Z_95: f64 = 1.959_963_984_540_054;

/// Ages at which the expected half-width curve is drawn.
const CURVE_POINTS: usize = 41;

/// Expected-information answers at one n.
struct InfoAt {
    se: BTreeMap<String, f64>,
    /// Power per target key: (effect, power).
    power: BTreeMap<String, (f64, f64)>,
    half_widths: Vec<f64>,
}

/// One design under the plan: its expectations and the targets.
struct Assessor<'a> {
    plan: &'a Plan,
    population: &'a Population,
    design: &'a Candidate,
    expected: Expected,
}

impl Assessor<'_> {
    fn cov(&self, n: usize) -> Option<Covariance> {
        self.expected.covariance(n, self.design.n_clusters(n), false)
    }

    /// The cohort offsets under the convergence alternative.
    fn offsets(&self, offset: f64) -> Vec<f64> {
        let k = self.design.entry_ages.len();
        let mut d: Vec<f64> = (0..k)
            .map(|c| self.population.cohort_offsets.get(c).copied().unwrap_or(0.0))
            .collect();
        d[k / 2] += offset;
        d
    }

    fn info(&self, n: usize) -> InfoAt {
        let t = &self.plan.targets;
        let mut out = InfoAt {
            se: BTreeMap::new(),
            power: BTreeMap::new(),
            half_widths: Vec::new(),
        };
        let Some(cov) = self.cov(n) else {
            for (key, _) in t.powers() {
                out.power.insert(key.into(), (f64::NAN, f64::NAN));
            }
            out.half_widths = vec![f64::INFINITY; t.precision_ages().len()];
            return out;
        };
        for (k, name) in self.expected.names.iter().enumerate() {
            out.se.insert(name.clone(), cov.se_of(k));
        }
        if let Some(c) = t.convergence {
            let power = self
                .expected
                .level_power(n, self.design.n_clusters(n), &self.offsets(c.offset), t.alpha)
                .unwrap_or(f64::NAN);
            out.power.insert(CONVERGENCE.into(), (c.offset, power));
        }
        if t.age_term.is_some() {
            let effect = self.population.linear();
            out.power
                .insert(AGE_TERM.into(), (effect, wald_power(effect, cov.se_of(1), t.alpha)));
        }
        if let Some(r) = t.rate_difference {
            let effect = self.population.rate_at(r.ages[1]) - self.population.rate_at(r.ages[0]);
            let c: Vec<f64> = self
                .expected
                .rate_row(r.ages[1])
                .iter()
                .zip(self.expected.rate_row(r.ages[0]))
                .map(|(a, b)| a - b)
                .collect();
            out.power.insert(
                RATE_DIFFERENCE.into(),
                (effect, wald_power(effect, cov.se(&c), t.alpha)),
            );
        }
        out.half_widths = t
            .precision_ages()
            .iter()
            .map(|&a| Z_95 * cov.se(&self.expected.mean_row(a)))
            .collect();
        out
    }

    fn info_meets(&self, n: usize) -> bool {
        let at = self.info(n);
        let t = &self.plan.targets;
        t.powers().iter().all(|(key, required)| at.power[*key].1 >= *required)
            && t.half_width
                .as_ref()
                .is_none_or(|h| at.half_widths.iter().all(|w| *w <= h.at_most))
    }

    fn simulated_meets(&self, outcomes: &[Outcome]) -> bool {
        let t = &self.plan.targets;
        t.powers()
            .iter()
            .all(|(key, required)| simulation::power(outcomes, key, t.alpha).0 >= *required)
            && t.half_width.as_ref().is_none_or(|h| {
                (0..h.ages.len()).all(|k| mean_sd(outcomes, |o| o.half_widths.get(k).copied()).0 <= h.at_most)
            })
    }
}

/// Mean and SD of a per-replicate value over the replicates that have it.
fn mean_sd(outcomes: &[Outcome], get: impl Fn(&Outcome) -> Option<f64>) -> (f64, f64, usize) {
    let v: Vec<f64> = outcomes.iter().filter_map(get).collect();
    if v.is_empty() {
        return (f64::NAN, f64::NAN, 0);
    }
    let (m, var) = crate::stats::mean_var(&v);
    (m, var.sqrt(), v.len())
}

/// The smallest n in [lo, hi] for which `meets` holds, assuming it holds
/// from some n on: first outwards from `start` by factors of 1.25 until the
/// answer is bracketed, then by bisection until the bracket is narrower
/// than `resolution` × n (or one participant).
fn smallest(
    lo: usize,
    hi: usize,
    start: usize,
    resolution: f64,
    mut meets: impl FnMut(usize) -> Result<bool>,
) -> Result<Option<usize>> {
    let s = start.clamp(lo, hi);
    let (mut good, mut bad) = (None, None);
    if meets(s)? {
        good = Some(s);
        let mut t = s;
        while t > lo {
            t = ((t as f64 * 0.8) as usize).max(lo);
            if meets(t)? {
                good = Some(t);
            } else {
                bad = Some(t);
                break;
            }
        }
    } else {
        bad = Some(s);
        let mut t = s;
        while good.is_none() {
            if t == hi {
                return Ok(None);
            }
            t = ((t as f64 * 1.25).ceil() as usize).min(hi);
            if meets(t)? {
                good = Some(t);
            } else {
                bad = Some(t);
            }
        }
    }
    let mut good = good.unwrap_or(hi);
    let Some(mut bad) = bad else { return Ok(Some(good)) };
    while good - bad > ((resolution * good as f64) as usize).max(1) {
        let mid = bad + (good - bad) / 2;
        if meets(mid)? {
            good = mid;
        } else {
            bad = mid;
        }
    }
    Ok(Some(good))
}

/// The sample sizes a plan evaluates for a design when it does not search:
/// the design's own n, or the plan's grid (None: search by bisection).
pub fn fixed_points(plan: &Plan, design: &Candidate) -> Option<Vec<usize>> {
    match design.per_cohort {
        Some(n) => Some(vec![n]),
        None if !plan.search.grid.is_empty() => Some(plan.search.grid.clone()),
        None => None,
    }
}

/// Answer the plan from a source of replicates.
///
/// # Errors
/// Errors of the source (a merge missing replicates).
pub fn answer(
    plan: &Plan,
    population: &Population,
    designs: &[Candidate],
    source: &mut dyn Source,
    population_source: &str,
) -> Result<PlanReport> {
    let mut results = Vec::with_capacity(designs.len());
    for (d, design) in designs.iter().enumerate() {
        let assessor = Assessor {
            plan,
            population,
            design,
            expected: Expected::new(design, population),
        };
        results.push(assess(&assessor, d, source)?);
    }
    // Meeting designs first, by cost; then the rest in plan order.
    results.sort_by(|a, b| {
        b.meets_targets.cmp(&a.meets_targets).then(if a.meets_targets {
            a.cost.total_cmp(&b.cost)
        } else {
            std::cmp::Ordering::Equal
        })
    });
    let recommended = results.iter().find(|r| r.meets_targets).map(|r| r.name.clone());
    let verdict = verdict(&results, recommended.as_deref());
    Ok(PlanReport {
        braid_version: env!("CARGO_PKG_VERSION").into(),
        plan: plan.clone(),
        population_source: population_source.into(),
        warnings: warnings(plan, population, &results),
        assumptions: assumptions(plan),
        designs: results,
        recommended,
        verdict,
    })
}

/// The sample size for one design, and the probes on the way.
fn choose_n(a: &Assessor<'_>, d: usize, source: &mut dyn Source) -> Result<(usize, String, Vec<usize>)> {
    let plan = a.plan;
    let simulates = plan.simulation.route.simulates();
    let mut probed = Vec::new();
    let has_targets = !plan.targets.powers().is_empty() || plan.targets.half_width.is_some();
    if let Some(points) = fixed_points(plan, a.design) {
        let mut chosen = None;
        for &n in &points {
            let meets = if simulates {
                probed.push(n);
                a.simulated_meets(&source.outcomes(d, n)?)
            } else {
                a.info_meets(n)
            };
            if meets && chosen.is_none() {
                chosen = Some(n);
            }
        }
        let rule = match (a.design.per_cohort, chosen) {
            (Some(_), _) => "given by the plan",
            (None, Some(_)) => "the smallest n of the plan's grid that meets every target",
            (None, None) => "the largest n of the plan's grid (none meets every target)",
        };
        let n = chosen.unwrap_or(points[points.len() - 1]);
        return Ok((n, rule.to_string(), probed));
    }
    let (lo, hi) = (plan.search.n_min, plan.search.n_max);
    if !has_targets {
        return Ok((
            lo,
            "no power or precision target: the smallest n searched".into(),
            probed,
        ));
    }
    let by_info = smallest(lo, hi, (lo * hi).isqrt(), 0.0, |n| Ok(a.info_meets(n)))?;
    if !simulates {
        let rule = match by_info {
            Some(_) => "the smallest n meeting every target by expected information".to_string(),
            None => format!("the largest n searched ({hi}); none meets every target by expected information"),
        };
        return Ok((by_info.unwrap_or(hi), rule, probed));
    }
    let start = by_info.unwrap_or(hi);
    let by_sim = smallest(lo, hi, start, plan.search.resolution, |n| {
        probed.push(n);
        Ok(a.simulated_meets(&source.outcomes(d, n)?))
    })?;
    let rule = match by_sim {
        Some(_) => format!(
            "the smallest n meeting every target by simulated power (bisection with common random numbers, to within {:.0}%)",
            plan.search.resolution * 100.0
        ),
        None => format!("the largest n searched ({hi}); none meets every target by simulated power"),
    };
    Ok((by_sim.unwrap_or(hi), rule, probed))
}

/// Evaluate one design.
fn assess(a: &Assessor<'_>, d: usize, source: &mut dyn Source) -> Result<DesignResult> {
    let plan = a.plan;
    let t = &plan.targets;
    let (n, n_rule, mut probed) = choose_n(a, d, source)?;
    let simulates = plan.simulation.route.simulates();
    let outcomes = if simulates { source.outcomes(d, n)? } else { Vec::new() };
    let info = a.info(n);
    let mut power = BTreeMap::new();
    for (key, required) in t.powers() {
        let (effect, information) = info.power[key];
        let (simulated, mc_se) = if simulates {
            let (p, se) = simulation::power(&outcomes, key, t.alpha);
            (Some(p), Some(se))
        } else {
            (None, None)
        };
        let (size, size_mc_se) = if simulates && key == CONVERGENCE {
            let hits = outcomes
                .iter()
                .filter(|o| o.level_null_p.is_some_and(|p| p < t.alpha))
                .count();
            let (p, se) = simulation::proportion(hits, outcomes.len());
            (Some(p), Some(se))
        } else {
            (None, None)
        };
        power.insert(
            key.to_string(),
            PowerResult {
                required,
                effect,
                information,
                simulated,
                mc_se,
                size,
                size_mc_se,
            },
        );
    }
    let precision = t
        .precision_ages()
        .iter()
        .enumerate()
        .map(|(k, &age)| {
            let (w, sd, count) = mean_sd(&outcomes, |o| o.half_widths.get(k).copied());
            let bias = mean_sd(&outcomes, |o| o.mean_errors.get(k).copied()).0;
            PrecisionResult {
                age,
                at_most: t.half_width.as_ref().map_or(f64::NAN, |h| h.at_most),
                information: info.half_widths[k],
                simulated: simulates.then_some(w),
                mc_se: simulates.then(|| sd / (count.max(1) as f64).sqrt()),
                bias: simulates.then_some(bias),
            }
        })
        .collect();
    let meets_n = if simulates {
        a.simulated_meets(&outcomes)
    } else {
        a.info_meets(n)
    };
    let cost = a.design.cost(&plan.costs, n);
    let limits = limits(a, n, meets_n, cost, &power);
    probed.sort_unstable();
    probed.dedup();
    let probes = probes(a, &probed, n, source, d)?;
    Ok(DesignResult {
        name: a.design.name.clone(),
        entry_ages: a.design.entry_ages.clone(),
        wave_times: a.design.wave_times.clone(),
        duration_years: a.design.duration(),
        age_span: a.design.age_span(),
        overlap_years: a.design.overlaps(),
        n_per_cohort: n,
        n_rule,
        clusters: a.design.n_clusters(n),
        assessments: a.design.expected_assessments(n),
        cost,
        se: info.se,
        power,
        precision,
        replicates: outcomes.len(),
        failed: outcomes.iter().filter(|o| o.slope.is_none()).count(),
        slope_sd: simulates.then(|| mean_sd(&outcomes, |o| o.slope).1),
        meets_targets: limits.is_empty(),
        limits,
        probes,
        half_width_curve: half_width_curve(a, n),
    })
}

/// What keeps a design from meeting the targets at n.
fn limits(a: &Assessor<'_>, n: usize, meets_n: bool, cost: f64, power: &BTreeMap<String, PowerResult>) -> Vec<String> {
    let t = &a.plan.targets;
    let mut out = Vec::new();
    if let Some(max) = t.max_years.filter(|m| a.design.duration() > *m) {
        out.push(format!(
            "its fieldwork lasts {} years, longer than the {} allowed",
            plain_number(a.design.duration()),
            plain_number(max)
        ));
    }
    if !meets_n {
        for (key, p) in power {
            let got = p.simulated.unwrap_or(p.information);
            if got < p.required {
                out.push(format!(
                    "at n = {n} per cohort the {} power is {got:.2}, short of {:.2}",
                    key.replace('_', " "),
                    p.required
                ));
            }
        }
        if out.is_empty() || (t.half_width.is_some() && !a.info_meets(n)) {
            out.push(format!(
                "at n = {n} per cohort the mean is not as precise as required{}",
                cluster_floor(a)
            ));
        }
    }
    if let Some(max) = t.max_budget.filter(|m| cost > *m) {
        out.push(format!(
            "at n = {n} per cohort it costs {}, above the budget of {}",
            thousands(cost.round() as usize),
            thousands(max.round() as usize)
        ));
    }
    out
}

/// When a fixed number of clusters bounds the precision of the mean: the
/// cluster intercepts alone give it an SE of at least τ/√K, whatever n.
fn cluster_floor(a: &Assessor<'_>) -> String {
    let (crate::plan::candidate::Clustering::Count(k), Some(h)) = (a.design.clustering, &a.plan.targets.half_width)
    else {
        return String::new();
    };
    let floor = Z_95 * a.population.sd_cluster / (k as f64).sqrt();
    if floor > 0.8 * h.at_most {
        format!(" (the {k} clusters alone set a floor of about {floor:.2} on the half-width, whatever n: add clusters)")
    } else {
        String::new()
    }
}

/// The power at every probed n, and along a grid for the figure's lines.
fn probes(a: &Assessor<'_>, probed: &[usize], n: usize, source: &mut dyn Source, d: usize) -> Result<Vec<Probe>> {
    let plan = a.plan;
    let (lo, hi) = (plan.search.n_min.min(n), plan.search.n_max.max(n));
    let mut ns: Vec<usize> = (0..=20)
        .map(|k| (lo as f64 * (hi as f64 / lo as f64).powf(k as f64 / 20.0)).round() as usize)
        .chain(probed.iter().copied())
        .chain([n])
        .collect();
    ns.sort_unstable();
    ns.dedup();
    let mut out = Vec::with_capacity(ns.len());
    for m in ns {
        let info = a.info(m);
        let outcomes = if probed.contains(&m) {
            Some(source.outcomes(d, m)?)
        } else {
            None
        };
        let power = plan
            .targets
            .powers()
            .iter()
            .map(|(key, _)| {
                let sim = outcomes.as_ref().map(|o| simulation::power(o, key, plan.targets.alpha));
                (
                    key.to_string(),
                    [Some(info.power[*key].1), sim.map(|s| s.0), sim.map(|s| s.1)],
                )
            })
            .collect();
        out.push(Probe { n: m, power });
    }
    Ok(out)
}

/// Expected 95% half-width of the mean across the ages covered, at n.
fn half_width_curve(a: &Assessor<'_>, n: usize) -> Vec<[f64; 2]> {
    let Some(cov) = a.cov(n) else { return Vec::new() };
    let [lo, hi] = a.design.age_span();
    (0..CURVE_POINTS)
        .map(|k| {
            let age = lo + (hi - lo) * k as f64 / (CURVE_POINTS - 1) as f64;
            [age, Z_95 * cov.se(&a.expected.mean_row(age))]
        })
        .collect()
}

fn verdict(results: &[DesignResult], recommended: Option<&str>) -> String {
    let meeting = results.iter().filter(|r| r.meets_targets).count();
    match recommended.and_then(|name| results.iter().find(|r| r.name == name)) {
        Some(r) => format!(
            "Design \"{}\" meets every target with {} participants per cohort ({} recruited, cost {}); it is the cheapest of the {meeting} design{} that do.",
            r.name,
            r.n_per_cohort,
            thousands(r.n_per_cohort * r.entry_ages.len()),
            thousands(r.cost.round() as usize),
            if meeting == 1 { "" } else { "s" }
        ),
        None => {
            let why: Vec<String> = results
                .iter()
                .map(|r| format!("\"{}\": {}", r.name, r.limits.join("; ")))
                .collect();
            format!("No design meets every target. {}.", why.join(". "))
        }
    }
}

fn warnings(plan: &Plan, population: &Population, results: &[DesignResult]) -> Vec<Warning> {
    let mut out = Vec::new();
    if let Some(shock) = population.period_shock {
        out.push(Warning::new(
            WarningCode::UnmodelledEffect,
            format!(
                "the population has a period shock of {} from year {} that the analysis does not model; the simulated bias of the mean shows what it does to the curve",
                shock.size, shock.from_year
            ),
        ));
    }
    for r in results.iter().filter(|r| r.failed > 0) {
        out.push(Warning::new(
            WarningCode::FailedReplicates,
            format!(
                "design \"{}\": {} of {} replicates could not be fitted and count as not rejecting; power may be understated",
                r.name, r.failed, r.replicates
            ),
        ));
    }
    if !plan.simulation.route.simulates() {
        out.push(Warning::new(
            WarningCode::UnmodelledEffect,
            "power comes from expected information alone (Wald, large samples); confirm the chosen design by simulation",
        ));
    }
    out
}

fn assumptions(plan: &Plan) -> Vec<String> {
    let mut v = vec![
        "Power and precision hold for the assumed population; they are only as good as its mean curve and variance components (from a pilot or the literature)."
            .to_string(),
        "Dropout is monotone and unrelated to the outcome (missing at random); selective dropout would bias the curve and is not in these figures."
            .to_string(),
        "Expected information averages a cluster's participants (exact when all have the same pattern of waves); the simulation has no such approximation."
            .to_string(),
    ];
    if plan.targets.convergence.is_some() {
        v.push(
            "Convergence power is for the middle cohort offset by the stated amount; other patterns of cohort differences give other power."
                .into(),
        );
    }
    v.push("These are planning figures about an invented population, not evidence about people.".into());
    v
}
