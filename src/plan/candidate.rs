//! A candidate design: cohorts, waves, participants, dropout and clusters;
//! what it covers, what it costs, and the simulator's design for it.

use serde::{Deserialize, Serialize};

use super::{Costs, Population, spec_error};
use crate::error::Result;
use crate::simulate::{Design, Streams, Truth};

/// A design as written in a plan file: cohorts by entry ages or by a count,
/// a first age and a spacing; waves by times or by a count and an interval.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct CandidateSpec {
    /// A name for the design.
    pub name: String,
    /// Each cohort's age at its first wave.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub entry_ages: Vec<f64>,
    /// Or: the number of cohorts ...
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub cohorts: Option<usize>,
    /// ... the first cohort's entry age ...
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub first_age: Option<f64>,
    /// ... and the years between cohorts' entry ages.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub spacing: Option<f64>,
    /// Wave times in years since the first wave (the first is 0).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub wave_times: Vec<f64>,
    /// Or: the number of waves ...
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub waves: Option<usize>,
    /// ... and the years between them.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub interval: Option<f64>,
    /// Participants per cohort; when absent, the search finds the smallest
    /// number that meets every target.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub per_cohort: Option<usize>,
    /// Probability of leaving after each wave (monotone dropout).
    #[serde(default)]
    pub dropout: f64,
    /// Probability of missing a later wave while staying in the study.
    #[serde(default)]
    pub missed: f64,
    /// Number of clusters (schools, clinics), participants spread at random.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub clusters: Option<usize>,
    /// Or: participants per cluster.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub per_cluster: Option<usize>,
    /// Width of the uniform jitter of assessment times around each wave, years.
    #[serde(default = "default_jitter")]
    pub jitter: f64,
    /// Width of the uniform spread of entry ages within a cohort, years.
    #[serde(default = "default_spread")]
    pub age_spread: f64,
}

fn default_jitter() -> f64 {
    0.2
}

fn default_spread() -> f64 {
    1.0
}

/// How participants are clustered.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Clustering {
    /// No clusters.
    None,
    /// A fixed number of clusters.
    Count(usize),
    /// A fixed number of participants per cluster.
    PerCluster(usize),
}

/// A validated candidate design.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Candidate {
    /// Name.
    pub name: String,
    /// Entry ages, ascending.
    pub entry_ages: Vec<f64>,
    /// Wave times since the first wave, ascending, the first 0.
    pub wave_times: Vec<f64>,
    /// Fixed participants per cohort, if stated.
    pub per_cohort: Option<usize>,
    /// Dropout per wave.
    pub dropout: f64,
    /// Intermittent missingness per later wave.
    pub missed: f64,
    /// Clusters.
    pub clustering: Clustering,
    /// Timing jitter width.
    pub jitter: f64,
    /// Entry-age spread width.
    pub age_spread: f64,
}

impl CandidateSpec {
    /// Validate and resolve the design.
    ///
    /// # Errors
    /// [`crate::Error::Spec`] naming the key at fault.
    pub fn resolve(&self) -> Result<Candidate> {
        let key = |k: &str| format!("design.{k} (design \"{}\")", self.name);
        let entry_ages = match (&self.entry_ages[..], self.cohorts, self.first_age, self.spacing) {
            ([_, ..], None, None, None) => self.entry_ages.clone(),
            ([], Some(k), Some(first), Some(gap)) if k >= 1 && gap > 0.0 => {
                (0..k).map(|i| first + i as f64 * gap).collect()
            }
            _ => {
                return Err(spec_error(
                    &key("entry_ages"),
                    "give either entry_ages, or cohorts (at least 1), first_age and a positive spacing".into(),
                ));
            }
        };
        let wave_times = match (&self.wave_times[..], self.waves, self.interval) {
            ([_, ..], None, None) => self.wave_times.clone(),
            ([], Some(w), Some(gap)) if w >= 1 && gap > 0.0 => (0..w).map(|i| i as f64 * gap).collect(),
            _ => {
                return Err(spec_error(
                    &key("wave_times"),
                    "give either wave_times, or waves (at least 1) and a positive interval".into(),
                ));
            }
        };
        let ascending = |v: &[f64]| v.iter().all(|a| a.is_finite()) && v.windows(2).all(|w| w[0] < w[1]);
        if !ascending(&entry_ages) {
            return Err(spec_error(
                &key("entry_ages"),
                "entry ages must be finite and strictly increasing".into(),
            ));
        }
        if !ascending(&wave_times) || wave_times[0] != 0.0 || wave_times.len() > 12 {
            return Err(spec_error(
                &key("wave_times"),
                "wave times must start at 0, increase strictly, and number at most 12".into(),
            ));
        }
        for (k, v) in [("dropout", self.dropout), ("missed", self.missed)] {
            if !(v.is_finite() && (0.0..1.0).contains(&v)) {
                return Err(spec_error(
                    &key(k),
                    format!("{v} is not a probability below 1; give a number in [0, 1)"),
                ));
            }
        }
        for (k, v) in [("jitter", self.jitter), ("age_spread", self.age_spread)] {
            if !(v.is_finite() && v >= 0.0) {
                return Err(spec_error(&key(k), format!("{v} is not a width; give years ≥ 0")));
            }
        }
        let clustering = match (self.clusters, self.per_cluster) {
            (None, None) => Clustering::None,
            (Some(k), None) if k >= 2 => Clustering::Count(k),
            (None, Some(m)) if m >= 1 => Clustering::PerCluster(m),
            _ => {
                return Err(spec_error(
                    &key("clusters"),
                    "give either clusters (at least 2) or per_cluster (at least 1), not both".into(),
                ));
            }
        };
        if self.per_cohort.is_some_and(|n| n < 2) {
            return Err(spec_error(
                &key("per_cohort"),
                "give at least 2 participants per cohort".into(),
            ));
        }
        Ok(Candidate {
            name: self.name.clone(),
            entry_ages,
            wave_times,
            per_cohort: self.per_cohort,
            dropout: self.dropout,
            missed: self.missed,
            clustering,
            jitter: self.jitter,
            age_spread: self.age_spread,
        })
    }
}

impl Candidate {
    /// Years from the first wave to the last.
    pub fn duration(&self) -> f64 {
        self.wave_times.last().copied().unwrap_or(0.0)
    }

    /// The youngest and oldest ages covered (entry spread included).
    pub fn age_span(&self) -> [f64; 2] {
        let half = self.age_spread / 2.0;
        [
            self.entry_ages[0] - half,
            self.entry_ages[self.entry_ages.len() - 1] + self.duration() + half,
        ]
    }

    /// Years of nominal age shared by each neighbouring pair of cohorts:
    /// the older cohort's entry age subtracted from the younger cohort's
    /// age at its last wave (negative: a gap).
    pub fn overlaps(&self) -> Vec<f64> {
        self.entry_ages
            .windows(2)
            .map(|w| w[0] + self.duration() - w[1])
            .collect()
    }

    /// The number of clusters with `n` participants per cohort (0: none).
    pub fn n_clusters(&self, n: usize) -> usize {
        let total = n * self.entry_ages.len();
        match self.clustering {
            Clustering::None => 0,
            Clustering::Count(k) => k,
            Clustering::PerCluster(m) => total.div_ceil(m).max(2),
        }
    }

    /// The probability that a participant is assessed at each wave:
    /// present through it (monotone dropout) and not missing it.
    pub fn wave_probabilities(&self) -> Vec<f64> {
        (0..self.wave_times.len())
            .map(|w| {
                if w == 0 {
                    1.0
                } else {
                    (1.0 - self.dropout).powi(w as i32) * (1.0 - self.missed)
                }
            })
            .collect()
    }

    /// Expected assessments with `n` participants per cohort.
    pub fn expected_assessments(&self, n: usize) -> f64 {
        (n * self.entry_ages.len()) as f64 * self.wave_probabilities().iter().sum::<f64>()
    }

    /// Cost with `n` participants per cohort.
    pub fn cost(&self, costs: &Costs, n: usize) -> f64 {
        (n * self.entry_ages.len()) as f64 * costs.per_participant
            + self.expected_assessments(n) * costs.per_assessment
            + self.duration() * costs.per_year
    }

    /// The simulator's design for `n` participants per cohort, with common
    /// random numbers across n.
    pub fn simulated(&self, population: &Population, n: usize, seed: u64) -> Design {
        let clusters = self.n_clusters(n);
        Design {
            seed,
            entry_ages: self.entry_ages.clone(),
            per_cohort: n,
            waves: self.wave_times.len(),
            wave_gap: 1.0,
            first_year: 2040,
            schools: clusters.max(1),
            dropout: self.dropout,
            skip: self.missed,
            truth: Truth {
                center: population.center,
                mean: population.mean.clone(),
                sd_intercept: population.sd_intercept,
                sd_slope: population.sd_slope,
                correlation: population.correlation,
                sd_school: if clusters > 0 { population.sd_cluster } else { 0.0 },
                sd_school_slope: 0.0,
                sd_residual: population.sd_residual,
                cohort_shift: population.cohort_offsets.clone(),
                retest: population.retest,
                period_shock: population.period_shock,
            },
            wave_times: self.wave_times.clone(),
            age_spread: self.age_spread,
            jitter: self.jitter,
            streams: Streams::PerCohort,
        }
    }
}
