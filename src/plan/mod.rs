//! Plan a cohort-sequential study before collecting it: power, precision
//! and cost of candidate designs, by expected information and by simulation.
//!
//! A plan ([`Plan`], read from a TOML plan file) states candidate designs,
//! the assumed population, costs and targets. [`run`] answers each design by
//! two routes:
//! - **expected information** ([`information`]): the Fisher information of
//!   the design given the assumed variance components and dropout gives the
//!   SEs of the fixed effects, of the curve and its rate at any age, and
//!   Wald power, in microseconds;
//! - **simulation** ([`simulation`]): seeded replicates of the design, each
//!   analysed by the real fit and the real M1-vs-M0 convergence test, give
//!   power with its Monte Carlo SE.
//!
//! It then finds, per design, the smallest number per cohort that meets
//! every target ([`search`]), ranks the designs by cost and names the
//! cheapest that meets all targets within the duration and budget.
//! Replicates can be split into shards and merged ([`shard`]) with the same
//! result as one run. Derivations are in notes/plan.md.

pub mod candidate;
pub mod information;
pub mod search;
pub mod shard;
pub mod simulation;

use std::collections::BTreeMap;
use std::path::Path;

use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};
use crate::warning::Warning;
pub use candidate::{Candidate, CandidateSpec};
pub use simulation::Outcome;

/// The plan file: candidate designs, the assumed population, costs, targets
/// and how to compute.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Plan {
    /// Candidate designs (`[[design]]` tables).
    #[serde(rename = "design")]
    pub designs: Vec<CandidateSpec>,
    /// The assumed population (may come from a pilot's fit instead).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub population: Option<Population>,
    /// Costs.
    #[serde(default)]
    pub costs: Costs,
    /// Targets.
    #[serde(default)]
    pub targets: Targets,
    /// Simulation settings.
    #[serde(default)]
    pub simulation: SimulationSettings,
    /// The range of participants per cohort searched.
    #[serde(default)]
    pub search: SearchRange,
}

/// The assumed population: mean curve, variance components and optional
/// effects that the analysis does not model.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Population {
    /// Centre age of the mean polynomial.
    pub center: f64,
    /// Polynomial coefficients of the mean in (age − centre): intercept,
    /// linear, quadratic, ... The analysis fits a polynomial of the same degree.
    pub mean: Vec<f64>,
    /// SD of participants' intercepts at the centre age.
    pub sd_intercept: f64,
    /// SD of participants' age slopes, per year.
    pub sd_slope: f64,
    /// Correlation of intercept and slope.
    #[serde(default)]
    pub correlation: f64,
    /// SD of cluster intercepts (used when a design has clusters).
    #[serde(default)]
    pub sd_cluster: f64,
    /// Residual SD.
    pub sd_residual: f64,
    /// A retest effect added to every assessment after a participant's
    /// first; when not 0, the analysis includes a retest term.
    #[serde(default)]
    pub retest: f64,
    /// True level offsets per cohort, in entry-age order (empty: none).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub cohort_offsets: Vec<f64>,
    /// A period shock that the analysis does not model (simulation only).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub period_shock: Option<crate::simulate::PeriodShock>,
}

impl Population {
    /// Degree of the mean polynomial fitted (at least 1).
    pub fn degree(&self) -> usize {
        self.mean.len().saturating_sub(1).max(1)
    }

    /// The true mean at `age`.
    pub fn mean_at(&self, age: f64) -> f64 {
        let a = age - self.center;
        self.mean.iter().enumerate().map(|(k, b)| b * a.powi(k as i32)).sum()
    }

    /// The true rate of change at `age`.
    pub fn rate_at(&self, age: f64) -> f64 {
        let a = age - self.center;
        self.mean
            .iter()
            .enumerate()
            .skip(1)
            .map(|(k, b)| k as f64 * b * a.powi(k as i32 - 1))
            .sum()
    }

    /// The true linear term at the centre.
    pub fn linear(&self) -> f64 {
        self.mean.get(1).copied().unwrap_or(0.0)
    }

    fn validate(&self) -> Result<()> {
        let sds = [
            ("sd_intercept", self.sd_intercept),
            ("sd_slope", self.sd_slope),
            ("sd_cluster", self.sd_cluster),
            ("sd_residual", self.sd_residual),
        ];
        for (key, v) in sds {
            if !(v.is_finite() && v >= 0.0) {
                return Err(spec_error(
                    &format!("population.{key}"),
                    format!("{v} is not a usable SD; give a number of 0 or more"),
                ));
            }
        }
        if self.sd_residual <= 0.0 {
            return Err(spec_error(
                "population.sd_residual",
                "0 leaves no residual variation; give a positive SD".into(),
            ));
        }
        if !(self.correlation.is_finite() && self.correlation.abs() < 1.0) {
            return Err(spec_error(
                "population.correlation",
                format!(
                    "{} is not a usable correlation; give a value strictly between -1 and 1",
                    self.correlation
                ),
            ));
        }
        if self.mean.is_empty() || self.mean.len() > 5 || self.mean.iter().any(|v| !v.is_finite()) {
            return Err(spec_error(
                "population.mean",
                "give 1 to 5 finite polynomial coefficients (intercept, linear, ...)".into(),
            ));
        }
        let others = [self.center, self.retest]
            .into_iter()
            .chain(self.cohort_offsets.iter().copied());
        if others.clone().any(|v| !v.is_finite()) {
            return Err(spec_error(
                "population",
                "the centre, retest and cohort offsets must be finite numbers".into(),
            ));
        }
        Ok(())
    }

    /// The population of a pilot study's `fit.json`: its polynomial fixed
    /// effects, the participant term's SDs and correlation, the cluster SD
    /// and the residual SD.
    ///
    /// # Errors
    /// [`Error::Parse`] when the file is not a fit report, or its age basis
    /// is not a polynomial.
    pub fn from_fit_json(path: &Path, text: &str) -> Result<Population> {
        let bad = |message: String| Error::Parse {
            path: path.to_path_buf(),
            message,
        };
        let v: serde_json::Value = serde_json::from_str(text)
            .map_err(|e| bad(format!("not a JSON file: {e}; give a fit.json written by braid")))?;
        let basis = &v["basis"];
        if basis["kind"].as_str() != Some("polynomial") {
            return Err(bad(
                "the fit's age basis is not a polynomial; refit the pilot with a polynomial age basis to seed a plan"
                    .into(),
            ));
        }
        let center = basis["center"]
            .as_f64()
            .ok_or_else(|| bad("no `basis.center`; give a fit.json written by braid".into()))?;
        let fixed = v["fixed"]
            .as_array()
            .ok_or_else(|| bad("no `fixed` effects; give a fit.json written by braid".into()))?;
        let degree = basis["degree"].as_u64().unwrap_or(1) as usize;
        let mean: Vec<f64> = fixed
            .iter()
            .take(degree + 1)
            .map(|f| f["estimate"].as_f64())
            .collect::<Option<_>>()
            .ok_or_else(|| bad("a fixed effect has no estimate".into()))?;
        let random = v["random"]
            .as_array()
            .ok_or_else(|| bad("no `random` terms; give a fit.json written by braid".into()))?;
        let first = random
            .first()
            .ok_or_else(|| bad("the fit has no random terms; a plan needs a participant term".into()))?;
        let sd = |term: &serde_json::Value, k: usize| term["sd"].get(k).and_then(serde_json::Value::as_f64);
        let sd_intercept = sd(first, 0).ok_or_else(|| bad("the participant term has no SD".into()))?;
        let sd_slope = sd(first, 1).unwrap_or(0.0);
        let correlation = first["correlation"]
            .get(0)
            .and_then(|r| r.get(1))
            .and_then(serde_json::Value::as_f64)
            .filter(|r| r.is_finite())
            .unwrap_or(0.0);
        let sd_cluster = random.get(1).and_then(|t| sd(t, 0)).unwrap_or(0.0);
        let sd_residual = v["residual_variance"]
            .as_f64()
            .ok_or_else(|| bad("no `residual_variance`".into()))?
            .sqrt();
        let population = Population {
            center,
            mean,
            sd_intercept,
            sd_slope,
            correlation: correlation.clamp(-0.99, 0.99),
            sd_cluster,
            sd_residual,
            retest: 0.0,
            cohort_offsets: Vec::new(),
            period_shock: None,
        };
        population.validate()?;
        Ok(population)
    }
}

/// Costs, in any one currency.
#[derive(Debug, Clone, Copy, Default, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Costs {
    /// Per recruited participant.
    #[serde(default)]
    pub per_participant: f64,
    /// Per assessment made.
    #[serde(default)]
    pub per_assessment: f64,
    /// Per year of fieldwork, from the first wave to the last.
    #[serde(default)]
    pub per_year: f64,
}

/// The power of the M1-vs-M0 convergence test when one cohort is offset.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ConvergenceTarget {
    /// The level offset of the middle cohort (in entry-age order), in
    /// outcome units, that the test should detect.
    pub offset: f64,
    /// The power required.
    pub power: f64,
}

/// A power required of a test whose effect the assumed mean curve states.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PowerTarget {
    /// The power required.
    pub power: f64,
}

/// The power to detect the difference in rate of change between two ages,
/// as the assumed mean curve has it.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RateTarget {
    /// The two ages.
    pub ages: [f64; 2],
    /// The power required.
    pub power: f64,
}

/// The 95% interval half-width of the mean required at stated ages.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PrecisionTarget {
    /// The ages.
    pub ages: Vec<f64>,
    /// The largest half-width allowed, in outcome units.
    pub at_most: f64,
}

/// What a design must achieve.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Targets {
    /// Two-sided level of every test.
    #[serde(default = "default_alpha")]
    pub alpha: f64,
    /// Power of the convergence level test.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub convergence: Option<ConvergenceTarget>,
    /// Power of the test of the linear age term (at the centre).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub age_term: Option<PowerTarget>,
    /// Power of the test of a difference in rate between two ages.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub rate_difference: Option<RateTarget>,
    /// Precision of the mean at stated ages.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub half_width: Option<PrecisionTarget>,
    /// The longest fieldwork, years from the first wave to the last.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub max_years: Option<f64>,
    /// The largest budget.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub max_budget: Option<f64>,
}

fn default_alpha() -> f64 {
    0.05
}

impl Default for Targets {
    fn default() -> Self {
        Targets {
            alpha: default_alpha(),
            convergence: None,
            age_term: None,
            rate_difference: None,
            half_width: None,
            max_years: None,
            max_budget: None,
        }
    }
}

/// The names of the power targets, as JSON keys.
pub const CONVERGENCE: &str = "convergence";
/// The linear age term.
pub const AGE_TERM: &str = "age_term";
/// The rate difference.
pub const RATE_DIFFERENCE: &str = "rate_difference";

impl Targets {
    /// The power targets in force: key and required power.
    pub fn powers(&self) -> Vec<(&'static str, f64)> {
        let mut v = Vec::new();
        if let Some(t) = self.convergence {
            v.push((CONVERGENCE, t.power));
        }
        if let Some(t) = self.age_term {
            v.push((AGE_TERM, t.power));
        }
        if let Some(t) = self.rate_difference {
            v.push((RATE_DIFFERENCE, t.power));
        }
        v
    }

    /// The ages at which precision is reported.
    pub fn precision_ages(&self) -> &[f64] {
        self.half_width.as_ref().map_or(&[], |h| h.ages.as_slice())
    }
}

/// Which routes answer the plan.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Route {
    /// Expected information only (fast, no simulation).
    Information,
    /// Simulation only (the search also uses expected information to start).
    Simulation,
    /// Both, side by side; the simulation decides.
    #[default]
    Both,
}

impl Route {
    /// Whether replicates are simulated.
    pub fn simulates(self) -> bool {
        self != Route::Information
    }
}

/// How the simulation runs.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SimulationSettings {
    /// Routes.
    #[serde(default)]
    pub route: Route,
    /// The most replicates per design and sample size.
    #[serde(default = "default_replicates")]
    pub replicates: usize,
    /// Stop a design's replicates once every power's Monte Carlo SE is at
    /// most this (0: always run every replicate).
    #[serde(default = "default_precision")]
    pub precision: f64,
    /// Seed of every random step.
    #[serde(default = "default_seed")]
    pub seed: u64,
}

fn default_replicates() -> usize {
    1000
}

fn default_precision() -> f64 {
    0.01
}

fn default_seed() -> u64 {
    20_261_202
}

impl Default for SimulationSettings {
    fn default() -> Self {
        SimulationSettings {
            route: Route::Both,
            replicates: default_replicates(),
            precision: default_precision(),
            seed: default_seed(),
        }
    }
}

/// The numbers of participants per cohort searched.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SearchRange {
    /// Smallest n per cohort.
    #[serde(default = "default_n_min")]
    pub n_min: usize,
    /// Largest n per cohort.
    #[serde(default = "default_n_max")]
    pub n_max: usize,
    /// Bisection stops when the bracket is narrower than this share of n.
    #[serde(default = "default_resolution")]
    pub resolution: f64,
    /// Evaluate these n only, instead of bisection (needed for shards).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub grid: Vec<usize>,
}

fn default_n_min() -> usize {
    10
}

fn default_n_max() -> usize {
    2000
}

fn default_resolution() -> f64 {
    0.05
}

impl Default for SearchRange {
    fn default() -> Self {
        SearchRange {
            n_min: default_n_min(),
            n_max: default_n_max(),
            resolution: default_resolution(),
            grid: Vec::new(),
        }
    }
}

pub(crate) fn spec_error(key: &str, message: String) -> Error {
    Error::Spec {
        parameter: key.into(),
        message,
    }
}

impl Plan {
    /// Read and validate a plan file.
    ///
    /// # Errors
    /// [`Error::Io`] or [`Error::Parse`] for an unreadable file;
    /// [`Error::Spec`] for a plan that cannot be run.
    pub fn read(path: &Path) -> Result<Plan> {
        let text = std::fs::read_to_string(path).map_err(|e| Error::Io {
            path: path.to_path_buf(),
            message: e.to_string(),
        })?;
        Plan::from_toml(path, &text)
    }

    /// Parse a plan from TOML text (`path` names it in errors). The
    /// population may still be missing; [`Plan::validate`] checks the rest.
    ///
    /// # Errors
    /// [`Error::Parse`] for text that is not a plan.
    pub fn from_toml(path: &Path, text: &str) -> Result<Plan> {
        toml::from_str(text).map_err(|e| Error::Parse {
            path: path.to_path_buf(),
            message: format!("not a valid plan file: {}", e.to_string().replace('\n', " ").trim()),
        })
    }

    /// The plan's population, or an error saying how to give one.
    ///
    /// # Errors
    /// [`Error::Spec`] when there is none.
    pub fn population(&self) -> Result<&Population> {
        self.population.as_ref().ok_or_else(|| {
            spec_error(
                "population",
                "the plan states no population; add a [population] table or take it from a pilot's fit.json".into(),
            )
        })
    }

    /// Check that the plan can be run.
    ///
    /// # Errors
    /// [`Error::Spec`] naming the key at fault: no designs, a design that
    /// cannot be built, dropout outside [0, 1), a negative SD, a budget
    /// below one participant's cost, a target that no design can reach, or
    /// cohorts that do not overlap when convergence power is a target.
    pub fn validate(&self) -> Result<Vec<Candidate>> {
        let population = self.population()?;
        population.validate()?;
        if self.designs.is_empty() {
            return Err(spec_error(
                "design",
                "the plan has no [[design]] tables; add at least one".into(),
            ));
        }
        let designs: Vec<Candidate> = self.designs.iter().map(CandidateSpec::resolve).collect::<Result<_>>()?;
        let mut names = std::collections::BTreeSet::new();
        for d in &designs {
            if !names.insert(d.name.as_str()) {
                return Err(spec_error(
                    "design.name",
                    format!("two designs are named \"{}\"; name each once", d.name),
                ));
            }
        }
        self.validate_settings()?;
        self.targets.validate(population, &designs, &self.costs)?;
        if !population.cohort_offsets.is_empty()
            && let Some(d) = designs
                .iter()
                .find(|d| d.entry_ages.len() != population.cohort_offsets.len())
        {
            return Err(spec_error(
                "population.cohort_offsets",
                format!(
                    "{} offsets for design \"{}\" with {} cohorts; give one offset per cohort",
                    population.cohort_offsets.len(),
                    d.name,
                    d.entry_ages.len()
                ),
            ));
        }
        Ok(designs)
    }

    fn validate_settings(&self) -> Result<()> {
        let s = &self.simulation;
        if s.replicates == 0 || s.replicates > 1_000_000 {
            return Err(spec_error(
                "simulation.replicates",
                format!("{} replicates; choose between 1 and 1000000", s.replicates),
            ));
        }
        if !(s.precision.is_finite() && (0.0..0.5).contains(&s.precision)) {
            return Err(spec_error(
                "simulation.precision",
                format!(
                    "{} is not a usable Monte Carlo SE; give a number in [0, 0.5)",
                    s.precision
                ),
            ));
        }
        let r = &self.search;
        if r.n_min < 2 || r.n_max < r.n_min || r.n_max > 1_000_000 {
            return Err(spec_error(
                "search",
                format!("n from {} to {}; give 2 ≤ n_min ≤ n_max ≤ 1000000", r.n_min, r.n_max),
            ));
        }
        if !(r.resolution > 0.0 && r.resolution < 1.0) {
            return Err(spec_error(
                "search.resolution",
                format!("{} is not a share; give a number in (0, 1)", r.resolution),
            ));
        }
        if r.grid.iter().any(|&n| n < 2) {
            return Err(spec_error(
                "search.grid",
                "every n in the grid must be at least 2".into(),
            ));
        }
        Ok(())
    }
}

impl Targets {
    fn validate(&self, population: &Population, designs: &[Candidate], costs: &Costs) -> Result<()> {
        if !(self.alpha > 0.0 && self.alpha < 0.5) {
            return Err(spec_error(
                "targets.alpha",
                format!("{} is not a usable level; give a number in (0, 0.5)", self.alpha),
            ));
        }
        for (key, power) in self.powers() {
            if !(power > self.alpha && power < 1.0) {
                return Err(spec_error(
                    &format!("targets.{key}.power"),
                    format!(
                        "power {power} is unreachable; give a power above the level {} and below 1",
                        self.alpha
                    ),
                ));
            }
        }
        if let Some(c) = self.convergence {
            if !(c.offset.is_finite() && c.offset != 0.0) {
                return Err(spec_error(
                    "targets.convergence.offset",
                    format!(
                        "{} is unreachable: no n detects an offset of 0; give the offset to detect",
                        c.offset
                    ),
                ));
            }
            for d in designs {
                if d.entry_ages.len() < 2 {
                    return Err(spec_error(
                        "targets.convergence",
                        format!("design \"{}\" has one cohort: convergence compares cohorts", d.name),
                    ));
                }
                if let Some((k, gap)) = d.overlaps().iter().enumerate().find(|(_, o)| **o < 0.0) {
                    return Err(spec_error(
                        "targets.convergence",
                        format!(
                            "in design \"{}\" the cohorts entering at {} and {} do not overlap (a gap of {:.2} years): convergence cannot be tested; add waves or bring the cohorts closer",
                            d.name,
                            d.entry_ages[k],
                            d.entry_ages[k + 1],
                            -gap
                        ),
                    ));
                }
            }
        }
        if self.age_term.is_some() && population.linear() == 0.0 {
            return Err(spec_error(
                "targets.age_term",
                "unreachable: the assumed mean curve has a linear term of 0, so no n gives power above the level"
                    .into(),
            ));
        }
        if let Some(r) = self.rate_difference {
            let difference = population.rate_at(r.ages[1]) - population.rate_at(r.ages[0]);
            if !r.ages.iter().all(|a| a.is_finite()) || difference.abs() < 1e-12 {
                return Err(spec_error(
                    "targets.rate_difference",
                    format!(
                        "unreachable: the assumed mean curve has the same rate at ages {} and {}; state a curved mean (a quadratic term) or other ages",
                        r.ages[0], r.ages[1]
                    ),
                ));
            }
        }
        if let Some(h) = &self.half_width
            && (!(h.at_most.is_finite() && h.at_most > 0.0)
                || h.ages.is_empty()
                || h.ages.iter().any(|a| !a.is_finite()))
        {
            return Err(spec_error(
                "targets.half_width",
                format!(
                    "a half-width of {} at {} ages is unreachable; give ages and a positive half-width",
                    h.at_most,
                    h.ages.len()
                ),
            ));
        }
        if let Some(y) = self.max_years.filter(|y| !(y.is_finite() && *y >= 0.0)) {
            return Err(spec_error(
                "targets.max_years",
                format!("{y} is not a duration; give years ≥ 0"),
            ));
        }
        if let Some(b) = self.max_budget {
            let one = costs.per_participant + costs.per_assessment;
            if !(b.is_finite() && b >= one) {
                return Err(spec_error(
                    "targets.max_budget",
                    format!(
                        "a budget of {b} is below one participant's cost ({one}: recruitment and one assessment); raise it or lower the costs"
                    ),
                ));
            }
        }
        let money = [costs.per_participant, costs.per_assessment, costs.per_year];
        if money.iter().any(|c| !(c.is_finite() && *c >= 0.0)) {
            return Err(spec_error("costs", "every cost must be a number of 0 or more".into()));
        }
        Ok(())
    }
}

/// One power figure: required, expected by information, simulated.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PowerResult {
    /// The power required.
    pub required: f64,
    /// The effect tested, in outcome units (per year for rates).
    pub effect: f64,
    /// Wald power from the expected information.
    pub information: f64,
    /// Simulated power (null without simulation).
    pub simulated: Option<f64>,
    /// Its Monte Carlo SE.
    pub mc_se: Option<f64>,
    /// For convergence: the simulated rejection rate without the offset,
    /// which is the size of the test when the population has no cohort offsets.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub size: Option<f64>,
    /// Its Monte Carlo SE.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub size_mc_se: Option<f64>,
}

/// The precision of the mean at one age.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PrecisionResult {
    /// Age.
    pub age: f64,
    /// The largest half-width allowed.
    pub at_most: f64,
    /// 95% half-width from the expected information (1.96 SE).
    pub information: f64,
    /// Mean of the fitted 95% half-widths over the replicates.
    pub simulated: Option<f64>,
    /// Its Monte Carlo SE.
    pub mc_se: Option<f64>,
    /// Mean estimate minus the true mean over the replicates.
    pub bias: Option<f64>,
}

/// One evaluated sample size of a design (for the power figure).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Probe {
    /// Participants per cohort.
    pub n: usize,
    /// Power per target: (information, simulated, Monte Carlo SE).
    pub power: BTreeMap<String, [Option<f64>; 3]>,
}

/// The answer for one candidate design.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct DesignResult {
    /// The design's name.
    pub name: String,
    /// Cohorts' entry ages.
    pub entry_ages: Vec<f64>,
    /// Wave times, years since the first wave.
    pub wave_times: Vec<f64>,
    /// Years from the first wave to the last.
    pub duration_years: f64,
    /// Youngest and oldest age covered.
    pub age_span: [f64; 2],
    /// Years of age shared by each neighbouring pair of cohorts (negative: a gap).
    pub overlap_years: Vec<f64>,
    /// Participants per cohort: the smallest found to meet every target,
    /// or the one evaluated.
    pub n_per_cohort: usize,
    /// How n was chosen.
    pub n_rule: String,
    /// Clusters at that n (0: none).
    pub clusters: usize,
    /// Expected assessments at that n.
    pub assessments: f64,
    /// Cost at that n.
    pub cost: f64,
    /// Expected-information SE per fixed term at that n.
    pub se: BTreeMap<String, f64>,
    /// Power per target.
    pub power: BTreeMap<String, PowerResult>,
    /// Precision per stated age.
    pub precision: Vec<PrecisionResult>,
    /// Replicates run at that n (0 without simulation).
    pub replicates: usize,
    /// Replicates whose fit or test failed (counted as not rejecting).
    pub failed: usize,
    /// Simulated SD of the linear age term's estimate, beside its expected SE.
    pub slope_sd: Option<f64>,
    /// Whether every target is met.
    pub meets_targets: bool,
    /// What keeps the design from meeting them.
    pub limits: Vec<String>,
    /// Every sample size evaluated, for the power figure.
    pub probes: Vec<Probe>,
    /// Expected 95% half-width of the mean across the covered ages, at n.
    pub half_width_curve: Vec<[f64; 2]>,
}

/// The plan's answer.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PlanReport {
    /// braid's version.
    pub braid_version: String,
    /// The plan as run.
    pub plan: Plan,
    /// Where the population came from.
    pub population_source: String,
    /// Designs ranked: those meeting every target by cost, then the rest.
    pub designs: Vec<DesignResult>,
    /// The cheapest design that meets every target, if any.
    pub recommended: Option<String>,
    /// The answer in words.
    pub verdict: String,
    /// Cautions.
    pub warnings: Vec<Warning>,
    /// What the numbers rest on.
    pub assumptions: Vec<String>,
}

/// How the plan is run: the population's source, and progress.
pub struct RunContext<'a> {
    /// Where the population came from, in words.
    pub population_source: String,
    /// Told the number of replicates done after each block (for a progress bar).
    pub progress: &'a (dyn Fn(usize) + Sync),
}

/// Answer a plan.
///
/// # Errors
/// [`Error::Spec`] for a plan that cannot be run (see [`Plan::validate`]).
pub fn run(plan: &Plan, context: &RunContext<'_>) -> Result<PlanReport> {
    let designs = plan.validate()?;
    let population = plan.population()?;
    let mut source = simulation::Live::new(plan, population, &designs, context.progress);
    search::answer(plan, population, &designs, &mut source, &context.population_source)
}

/// The file a plan's report is written to.
pub const JSON_FILE: &str = "plan.json";
