//! Simulated power: seeded replicates of a design, each analysed by the
//! real fit (REML, Satterthwaite) and the real M1-vs-M0 convergence test,
//! run in parallel in blocks, and stopped once every power is settled to
//! the stated Monte Carlo precision.
//!
//! Replicate r of design d uses the seed `stream_seed(stream_seed(seed,
//! d + 1), r + 1)` whatever the sample size and whatever shard runs it, and
//! the simulator draws each cohort from its own stream: the first n
//! participants of a cohort are the same at every n (common random numbers),
//! and shards reproduce a single run exactly.

use std::collections::BTreeMap;

use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use super::{Candidate, Plan, Population, Targets};
use crate::data::{Covariate, CovariateValues, Panel};
use crate::error::{Error, Result};
use crate::infer;
use crate::linkage::{self, ConvergeOptions, retest};
use crate::lmm::{self, Method};
use crate::simulate::{self, stream_seed};
use crate::spec::{self, AgeSpec, ModelSpec};

/// Replicates run between two checks of the stopping rule.
pub const BLOCK: usize = 100;

/// What one replicate found. A `None` is a fit or test that failed (or was
/// not asked for); a failure counts as not rejecting.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Outcome {
    /// p-value of M1 vs M0 with the target's cohort offset added.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub level_p: Option<f64>,
    /// p-value of M1 vs M0 on the population as stated.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub level_null_p: Option<f64>,
    /// p-value of the linear age term.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub age_p: Option<f64>,
    /// p-value of the rate difference.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub rate_p: Option<f64>,
    /// Estimate of the linear age term.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub slope: Option<f64>,
    /// Fitted 95% half-widths of the mean at the precision ages.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub half_widths: Vec<f64>,
    /// Estimated minus true mean at the precision ages.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub mean_errors: Vec<f64>,
}

/// The model every replicate is analysed with: the population's polynomial
/// degree at its centre, a random intercept and age slope per participant,
/// and a cluster intercept when there are clusters.
pub fn analysis_model(population: &Population) -> ModelSpec {
    ModelSpec {
        method: Method::Reml,
        age: AgeSpec::Polynomial {
            degree: population.degree(),
        },
        center: Some(population.center),
        random: None,
    }
}

/// The seed of replicate `r` of design `d`.
pub fn replicate_seed(seed: u64, d: usize, r: usize) -> u64 {
    stream_seed(stream_seed(seed, d as u64 + 1), r as u64 + 1)
}

/// Simulate and analyse one replicate.
pub fn replicate(plan: &Plan, population: &Population, design: &Candidate, d: usize, n: usize, r: usize) -> Outcome {
    let seed = replicate_seed(plan.simulation.seed, d, r);
    let sim = simulate::simulate(&design.simulated(population, n, seed));
    let clustered = design.n_clusters(n) > 0;
    let targets = &plan.targets;
    let model = analysis_model(population);
    let panel = with_retest(sim.panel(clustered), population);
    let mut outcome = fitted(&panel, &model, population, targets);
    if let Some(c) = targets.convergence {
        let options = ConvergeOptions::default();
        let p_of = |panel: &Panel| linkage::level_test(panel, &model, &options).ok().map(|t| t.p);
        outcome.level_null_p = p_of(&panel);
        // The same replicate with the middle cohort offset: the panel's rows
        // are the simulated rows in order, so only the outcome changes.
        let middle = format!("{}", design.entry_ages[design.entry_ages.len() / 2]);
        let mut shifted = panel.clone();
        shifted.outcome = panel
            .outcome
            .iter()
            .zip(&sim.rows)
            .map(|(&y, row)| if row.cohort == middle { y + c.offset } else { y })
            .collect();
        outcome.level_p = p_of(&shifted);
    }
    outcome
}

/// The panel with a retest column when the population has a retest effect.
fn with_retest(mut panel: Panel, population: &Population) -> Panel {
    if population.retest != 0.0 {
        let column = retest::column(&panel, retest::RetestForm::Later);
        if column.iter().any(|&v| v != 0.0) {
            panel.roles.covariates.push("retest".into());
            panel.covariates.push(Covariate {
                name: "retest".into(),
                values: CovariateValues::Numeric(column.into()),
            });
        }
    }
    panel
}

/// The REML fit's tests and intervals.
fn fitted(panel: &Panel, model: &ModelSpec, population: &Population, targets: &Targets) -> Outcome {
    let mut outcome = Outcome {
        level_p: None,
        level_null_p: None,
        age_p: None,
        rate_p: None,
        slope: None,
        half_widths: Vec::new(),
        mean_errors: Vec::new(),
    };
    let Ok(frame) = spec::build_frame(panel, model) else {
        return outcome;
    };
    let Ok(fit) = lmm::fit(&frame.problem, lmm::FitOptions::estimates()) else {
        return outcome;
    };
    let mut unit = vec![0.0; fit.p()];
    unit[1] = 1.0;
    let slope = infer::contrast(&fit, &unit);
    outcome.slope = Some(slope.estimate);
    outcome.age_p = Some(slope.p_value()).filter(|p| p.is_finite());
    if let Some(r) = targets.rate_difference {
        let c: Vec<f64> = frame
            .rate_row(r.ages[1])
            .iter()
            .zip(frame.rate_row(r.ages[0]))
            .map(|(a, b)| a - b)
            .collect();
        outcome.rate_p = Some(infer::contrast(&fit, &c).p_value()).filter(|p| p.is_finite());
    }
    let retest_reference = frame.covariate_reference.first().copied().unwrap_or(0.0);
    for &age in targets.precision_ages() {
        let m = infer::contrast(&fit, &frame.mean_row(age));
        let (lower, upper) = m.interval();
        outcome.half_widths.push((upper - lower) / 2.0);
        outcome
            .mean_errors
            .push(m.estimate - population.mean_at(age) - population.retest * retest_reference);
    }
    outcome
}

/// Monte Carlo summary of one proportion: estimate and SE.
pub fn proportion(hits: usize, total: usize) -> (f64, f64) {
    if total == 0 {
        return (f64::NAN, f64::NAN);
    }
    let p = hits as f64 / total as f64;
    (p, (p * (1.0 - p) / total as f64).sqrt())
}

/// The p-value a power target reads from an outcome.
pub fn p_of(outcome: &Outcome, key: &str) -> Option<f64> {
    match key {
        super::CONVERGENCE => outcome.level_p,
        super::AGE_TERM => outcome.age_p,
        super::RATE_DIFFERENCE => outcome.rate_p,
        _ => None,
    }
}

/// Simulated power of target `key`: rejections at α over all replicates.
pub fn power(outcomes: &[Outcome], key: &str, alpha: f64) -> (f64, f64) {
    let hits = outcomes
        .iter()
        .filter(|o| p_of(o, key).is_some_and(|p| p < alpha))
        .count();
    proportion(hits, outcomes.len())
}

/// Whether every power is settled: its Monte Carlo SE, with one success and
/// one failure added so that a run of all-rejections is not settled at
/// once, is at most `precision`.
fn settled(outcomes: &[Outcome], targets: &Targets, precision: f64) -> bool {
    if precision <= 0.0 || outcomes.is_empty() {
        return false;
    }
    let r = outcomes.len() as f64;
    targets.powers().iter().all(|(key, _)| {
        let hits = outcomes
            .iter()
            .filter(|o| p_of(o, key).is_some_and(|p| p < targets.alpha))
            .count() as f64;
        let p = (hits + 1.0) / (r + 2.0);
        (p * (1.0 - p) / r).sqrt() <= precision
    })
}

/// The number of replicates a run keeps: after each block, stop once settled.
pub fn kept(outcomes: &[Outcome], plan: &Plan) -> usize {
    let mut end = 0;
    while end < outcomes.len() {
        end = (end + BLOCK).min(outcomes.len());
        if settled(&outcomes[..end], &plan.targets, plan.simulation.precision) {
            return end;
        }
    }
    outcomes.len()
}

/// Where the search gets a design's replicates at a sample size.
pub trait Source {
    /// The replicates of design `d` at `n` per cohort, as many as the
    /// stopping rule keeps.
    ///
    /// # Errors
    /// When they are not available (a merge without them).
    fn outcomes(&mut self, d: usize, n: usize) -> Result<Vec<Outcome>>;
}

/// Replicates simulated on this machine, block by block, in parallel.
pub struct Live<'a> {
    plan: &'a Plan,
    population: &'a Population,
    designs: &'a [Candidate],
    progress: &'a (dyn Fn(usize) + Sync),
    cache: BTreeMap<(usize, usize), Vec<Outcome>>,
}

impl<'a> Live<'a> {
    /// A source for the plan's designs.
    pub fn new(
        plan: &'a Plan,
        population: &'a Population,
        designs: &'a [Candidate],
        progress: &'a (dyn Fn(usize) + Sync),
    ) -> Live<'a> {
        Live {
            plan,
            population,
            designs,
            progress,
            cache: BTreeMap::new(),
        }
    }

    /// Replicates `range` of design `d` at `n`, in order.
    pub fn run(&self, d: usize, n: usize, range: std::ops::Range<usize>) -> Vec<Outcome> {
        let design = &self.designs[d];
        range
            .into_par_iter()
            .map(|r| replicate(self.plan, self.population, design, d, n, r))
            .collect()
    }
}

impl Source for Live<'_> {
    fn outcomes(&mut self, d: usize, n: usize) -> Result<Vec<Outcome>> {
        if let Some(o) = self.cache.get(&(d, n)) {
            return Ok(o.clone());
        }
        let total = self.plan.simulation.replicates;
        let mut all = Vec::with_capacity(total);
        while all.len() < total {
            let start = all.len();
            let end = (start + BLOCK).min(total);
            all.extend(self.run(d, n, start..end));
            (self.progress)(end - start);
            if settled(&all, &self.plan.targets, self.plan.simulation.precision) {
                break;
            }
        }
        self.cache.insert((d, n), all.clone());
        Ok(all)
    }
}

/// Replicates read back from shards.
pub struct Stored {
    /// Outcomes by (design, n), in replicate order.
    pub outcomes: BTreeMap<(usize, usize), Vec<Outcome>>,
    /// The plan (for the stopping rule).
    pub plan: Plan,
}

impl Source for Stored {
    fn outcomes(&mut self, d: usize, n: usize) -> Result<Vec<Outcome>> {
        let all = self.outcomes.get(&(d, n)).ok_or_else(|| Error::Spec {
            parameter: "shards".into(),
            message: format!(
                "the shards hold no replicates of design {} at n = {n}; merge the shards of one plan",
                d + 1
            ),
        })?;
        Ok(all[..kept(all, &self.plan)].to_vec())
    }
}
