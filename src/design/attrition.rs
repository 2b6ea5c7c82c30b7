//! Attrition: missingness patterns over each cohort's waves, and the
//! baseline of those who left against those who stayed.

use std::collections::{BTreeMap, BTreeSet};

use serde::Serialize;

use super::OrderedAge;
use crate::data::Panel;
use crate::data::label_key;
use crate::stats::mean_var;
use crate::warning::{Warning, WarningCode};

/// Counts of missingness patterns over each cohort's waves.
#[derive(Debug, Clone, Copy, Serialize, PartialEq, Eq, Default)]
pub struct Patterns {
    /// Seen at every wave of their cohort.
    pub complete: usize,
    /// Seen at the first waves only, then never again (dropout).
    pub monotone: usize,
    /// Missed a wave and came back.
    pub intermittent: usize,
}

/// Baseline comparison of those who stayed to the cohort's last wave with
/// those who did not: evidence on whether data are missing completely at random.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct BaselineComparison {
    /// The variable compared (the outcome or a numeric covariate), at each
    /// participant's first assessment.
    pub variable: String,
    /// Participants who stayed.
    pub n_stayers: usize,
    /// Participants who left.
    pub n_leavers: usize,
    /// Mean among stayers.
    pub stayers_mean: f64,
    /// Mean among leavers.
    pub leavers_mean: f64,
    /// Stayers minus leavers.
    pub difference: f64,
    /// Its standard error (unequal variances).
    pub se: f64,
    /// The difference over the root mean of the two variances.
    pub standardized: f64,
}

/// Attrition: patterns and the baseline comparison.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct Attrition {
    /// Missingness patterns.
    pub patterns: Patterns,
    /// Baseline comparisons, outcome first.
    pub baseline: Vec<BaselineComparison>,
}

/// Above this absolute standardized baseline difference between stayers and
/// leavers, braid warns (common practice: a "small" effect size).
const BASELINE_WARNING: f64 = 0.2;

type WaveSet<'a> = BTreeSet<(OrderedAge, &'a str)>;

/// Missingness patterns over each cohort's waves, and the baseline of those
/// who left against those who stayed; a large difference adds a warning.
pub(super) fn attrition(
    panel: &Panel,
    cohort_of: &[String],
    wave_of: &[String],
    warnings: &mut Vec<Warning>,
) -> Attrition {
    let n_id = panel.id.n_levels();
    let key = |r: usize| (OrderedAge(label_key(&wave_of[r]).0), wave_of[r].as_str());
    // Each cohort's wave set, and each participant's.
    let mut cohort_waves: BTreeMap<&str, WaveSet> = BTreeMap::new();
    let mut person_waves: Vec<WaveSet> = vec![BTreeSet::new(); n_id];
    let mut person_cohort: Vec<&str> = vec![""; n_id];
    let first_row = panel.first_rows();
    for (r, cohort) in cohort_of.iter().enumerate() {
        let k = panel.id.codes[r] as usize;
        cohort_waves.entry(cohort.as_str()).or_default().insert(key(r));
        person_waves[k].insert(key(r));
        person_cohort[k] = cohort.as_str();
    }
    let mut patterns = Patterns::default();
    let mut stayer = vec![false; n_id];
    for k in 0..n_id {
        let all: Vec<_> = cohort_waves[person_cohort[k]].iter().collect();
        let seen = &person_waves[k];
        let last_seen = all.iter().rposition(|w| seen.contains(*w)).unwrap_or(0);
        let prefix = all[..=last_seen].iter().all(|w| seen.contains(*w));
        if seen.len() == all.len() {
            patterns.complete += 1;
        } else if prefix {
            patterns.monotone += 1;
        } else {
            patterns.intermittent += 1;
        }
        stayer[k] = last_seen + 1 == all.len();
    }
    let mut variables: Vec<(String, Vec<f64>)> = vec![(panel.roles.outcome.clone(), panel.outcome.to_vec())];
    for c in &panel.covariates {
        if let crate::data::CovariateValues::Numeric(v) = &c.values {
            variables.push((c.name.clone(), v.to_vec()));
        }
    }
    let mut baseline = Vec::new();
    for (name, values) in variables {
        let (mut st, mut lv) = (Vec::new(), Vec::new());
        for k in 0..n_id {
            let v = values[first_row[k]];
            if stayer[k] {
                st.push(v);
            } else {
                lv.push(v);
            }
        }
        if st.len() < 2 || lv.len() < 2 {
            continue;
        }
        let ((ms, vs), (ml, vl)) = (mean_var(&st), mean_var(&lv));
        let difference = ms - ml;
        let se = (vs / st.len() as f64 + vl / lv.len() as f64).sqrt();
        let standardized = difference / ((vs + vl) / 2.0).sqrt();
        if standardized.abs() > BASELINE_WARNING {
            warnings.push(Warning::new(WarningCode::SelectiveDropout, format!(
                "those who left differ from those who stayed at baseline on {name} (standardized difference {standardized:.2}): \
                 the data are not missing completely at random; a likelihood-based fit stays valid if dropout depends only on what was observed"
            )));
        }
        baseline.push(BaselineComparison {
            variable: name,
            n_stayers: st.len(),
            n_leavers: lv.len(),
            stayers_mean: ms,
            leavers_mean: ml,
            difference,
            se,
            standardized,
        });
    }
    Attrition { patterns, baseline }
}
