//! Splitting a plan's replicates over machines: shard K of N runs its block
//! of every evaluation's replicates with the seeds a single run would use;
//! [`merge`] joins the shards in replicate order and applies the single
//! run's stopping rule, so the merged report is byte for byte the report of
//! one unsharded run.

use std::collections::BTreeMap;
use std::path::Path;

use serde::{Deserialize, Serialize};

use super::simulation::{BLOCK, Live, Outcome, Stored};
use super::{Plan, PlanReport, RunContext, search, spec_error};
use crate::error::{Error, Result};

/// The file a shard's replicates are written to.
pub const JSON_FILE: &str = "plan-shard.json";

/// Shard `k` of `n` (1-based).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct Shard {
    /// This shard, from 1.
    pub k: usize,
    /// Number of shards.
    pub n: usize,
}

impl Shard {
    /// A shard from "K/N".
    ///
    /// # Errors
    /// [`Error::Spec`] for text that is not K/N with 1 ≤ K ≤ N.
    pub fn parse(text: &str) -> Result<Shard> {
        let bad = || {
            spec_error(
                "shard",
                format!("\"{text}\" is not a shard; write K/N with 1 ≤ K ≤ N, as 2/4"),
            )
        };
        let (k, n) = text.split_once('/').ok_or_else(bad)?;
        let (k, n) = (
            k.trim().parse().map_err(|_| bad())?,
            n.trim().parse().map_err(|_| bad())?,
        );
        if k == 0 || k > n {
            return Err(bad());
        }
        Ok(Shard { k, n })
    }

    /// The replicates this shard runs out of `total`: whole blocks, split
    /// as evenly as they go.
    pub fn replicates(&self, total: usize) -> std::ops::Range<usize> {
        let blocks = total.div_ceil(BLOCK);
        let first = (self.k - 1) * blocks / self.n;
        let last = self.k * blocks / self.n;
        (first * BLOCK).min(total)..(last * BLOCK).min(total)
    }
}

/// One evaluation's replicates from one shard.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ShardEvaluation {
    /// The design's position in the plan (from 0).
    pub design: usize,
    /// Participants per cohort.
    pub n: usize,
    /// Index of the first replicate.
    pub first_replicate: usize,
    /// The replicates, in order.
    pub outcomes: Vec<Outcome>,
}

/// What one shard writes.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ShardOutput {
    /// braid's version.
    pub braid_version: String,
    /// The plan, with its population filled in.
    pub plan: Plan,
    /// Where the population came from.
    pub population_source: String,
    /// Which shard.
    pub shard: Shard,
    /// Its replicates.
    pub evaluations: Vec<ShardEvaluation>,
}

/// Run one shard of a plan whose sample sizes are fixed (per design, or by
/// the plan's grid): every replicate of the shard's block, without stopping
/// early (the merge applies the stopping rule).
///
/// # Errors
/// [`Error::Spec`] for a plan that cannot be run, that searches by
/// bisection, or that does not simulate.
pub fn run_shard(plan: &Plan, shard: Shard, context: &RunContext<'_>) -> Result<ShardOutput> {
    let designs = plan.validate()?;
    let population = plan.population()?;
    if !plan.simulation.route.simulates() {
        return Err(spec_error(
            "simulation.route",
            "shards split simulated replicates; this plan uses expected information only and needs no shards".into(),
        ));
    }
    let live = Live::new(plan, population, &designs, context.progress);
    let range = shard.replicates(plan.simulation.replicates);
    let mut evaluations = Vec::new();
    for (d, design) in designs.iter().enumerate() {
        let points = search::fixed_points(plan, design).ok_or_else(|| {
            spec_error(
                "search.grid",
                format!(
                    "design \"{}\" searches its n by bisection, which cannot be split; give search.grid or per_cohort",
                    design.name
                ),
            )
        })?;
        for n in points {
            let outcomes = live.run(d, n, range.clone());
            (context.progress)(outcomes.len());
            evaluations.push(ShardEvaluation {
                design: d,
                n,
                first_replicate: range.start,
                outcomes,
            });
        }
    }
    Ok(ShardOutput {
        braid_version: env!("CARGO_PKG_VERSION").into(),
        plan: plan.clone(),
        population_source: context.population_source.clone(),
        shard,
        evaluations,
    })
}

/// Read a shard file.
///
/// # Errors
/// [`Error::Io`] or [`Error::Parse`].
pub fn read(path: &Path) -> Result<ShardOutput> {
    let text = std::fs::read_to_string(path).map_err(|e| Error::Io {
        path: path.to_path_buf(),
        message: e.to_string(),
    })?;
    serde_json::from_str(&text).map_err(|e| Error::Parse {
        path: path.to_path_buf(),
        message: format!("not a shard of a plan ({e}); give the files written by a sharded plan run"),
    })
}

/// Join shards of one plan into its report.
///
/// # Errors
/// [`Error::Spec`] when the shards are of different plans, a shard is
/// missing or repeated, or replicates are missing.
pub fn merge(shards: &[ShardOutput]) -> Result<PlanReport> {
    let first = shards
        .first()
        .ok_or_else(|| spec_error("shards", "no shard files given; give every shard of one run".into()))?;
    let n = first.shard.n;
    let mut seen = vec![false; n];
    for s in shards {
        if s.plan != first.plan || s.population_source != first.population_source || s.shard.n != n {
            return Err(spec_error(
                "shards",
                format!(
                    "shard {}/{} is of a different plan or split; merge the shards of one run",
                    s.shard.k, s.shard.n
                ),
            ));
        }
        if std::mem::replace(&mut seen[s.shard.k - 1], true) {
            return Err(spec_error("shards", format!("shard {}/{n} is given twice", s.shard.k)));
        }
    }
    if let Some(k) = seen.iter().position(|s| !s) {
        return Err(spec_error(
            "shards",
            format!("shard {}/{n} is missing; merge every shard", k + 1),
        ));
    }
    // Per (design, n): each shard's first replicate and its replicates.
    type Pieces<'a> = BTreeMap<(usize, usize), Vec<(usize, &'a [Outcome])>>;
    let mut pieces: Pieces<'_> = BTreeMap::new();
    for s in shards {
        for e in &s.evaluations {
            pieces
                .entry((e.design, e.n))
                .or_default()
                .push((e.first_replicate, &e.outcomes));
        }
    }
    let mut outcomes = BTreeMap::new();
    for (key, mut parts) in pieces {
        parts.sort_by_key(|p| p.0);
        outcomes.insert(key, parts.iter().flat_map(|p| p.1.iter().cloned()).collect());
    }
    let plan = first.plan.clone();
    let designs = plan.validate()?;
    let population = plan.population()?.clone();
    let mut stored = Stored {
        outcomes,
        plan: plan.clone(),
    };
    search::answer(&plan, &population, &designs, &mut stored, &first.population_source)
}
