//! What a cohort-sequential design covers, before any model is fitted:
//! each cohort's waves and ages, the age overlap of neighbouring cohorts
//! (which is what links their segments), retention by wave, counts by cohort
//! and age band, and the age span bought against the calendar time spent.
//!
//! Conventions (common practice, notes/decisions.md): cohorts are ordered by
//! their youngest observed age; two neighbouring cohorts overlap on the
//! interval where both have observations, [max of the youngest ages, min of
//! the oldest ages]; retention at a wave is the number of participants seen at
//! that wave over the number seen at the cohort's first wave.

pub mod lexis;

use std::collections::{BTreeMap, BTreeSet};

use serde::Serialize;

use crate::data::derive::{self, CohortRule, WaveRule};
use crate::data::{CalendarSource, DataSummary, Panel};
use crate::error::{Error, Result};
use crate::spec::basis::quantile_sorted;

/// Settings of the design report, validated by [`DesignOptions::new`].
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct DesignOptions {
    /// Width of the age bands of the cohort × age table, in years.
    pub band_width: f64,
    /// An overlap with fewer observations than this in either cohort is
    /// flagged as thin (common practice: about 30 per cohort for a stable
    /// mean at the shared ages).
    pub thin_overlap: usize,
    /// How cohorts are found when the file has no cohort column.
    pub cohort_rule: CohortRule,
    /// How waves are found when the file has no wave column.
    pub wave_rule: WaveRule,
}

impl DesignOptions {
    /// Validated settings.
    ///
    /// # Errors
    /// [`Error::Spec`] for a band width that is not a positive number of years.
    pub fn new(band_width: f64, thin_overlap: usize, cohort_rule: CohortRule, wave_rule: WaveRule) -> Result<Self> {
        let options = DesignOptions {
            band_width,
            thin_overlap,
            cohort_rule,
            wave_rule,
        };
        options.validate()?;
        Ok(options)
    }

    fn validate(&self) -> Result<()> {
        if !(self.band_width.is_finite() && self.band_width > 0.0) {
            return Err(Error::Spec {
                parameter: "band".into(),
                message: format!("band width {} is not a positive number of years", self.band_width),
            });
        }
        Ok(())
    }
}

impl Default for DesignOptions {
    fn default() -> Self {
        DesignOptions {
            band_width: 1.0,
            cohort_rule: CohortRule::Auto,
            wave_rule: WaveRule::Auto,
            thin_overlap: 30,
        }
    }
}

/// One wave of one cohort.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct WaveCoverage {
    /// Wave label.
    pub wave: String,
    /// Observations.
    pub n: usize,
    /// Youngest age.
    pub age_min: f64,
    /// Median age.
    pub age_median: f64,
    /// Oldest age.
    pub age_max: f64,
}

/// One cohort's coverage.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct CohortCoverage {
    /// Cohort label.
    pub cohort: String,
    /// Participants.
    pub n_participants: usize,
    /// Observations.
    pub n_obs: usize,
    /// Per wave, in wave order.
    pub waves: Vec<WaveCoverage>,
    /// Youngest age.
    pub age_min: f64,
    /// Median age.
    pub age_median: f64,
    /// Oldest age.
    pub age_max: f64,
}

/// The shared ages of two neighbouring cohorts.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct Overlap {
    /// The younger cohort.
    pub cohort_a: String,
    /// The older cohort.
    pub cohort_b: String,
    /// Start of the shared age interval (NaN when there is none).
    pub age_from: f64,
    /// End of the shared age interval (NaN when there is none).
    pub age_to: f64,
    /// Observations of cohort a inside the interval.
    pub n_a: usize,
    /// Observations of cohort b inside the interval.
    pub n_b: usize,
    /// Whether the two segments share ages at all.
    pub linked: bool,
    /// Whether either cohort has fewer observations there than the threshold.
    pub thin: bool,
}

/// Retention of one cohort at one wave.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct Retention {
    /// Cohort label.
    pub cohort: String,
    /// Wave label.
    pub wave: String,
    /// Participants observed at this wave.
    pub n: usize,
    /// Share of the participants observed at the cohort's first wave.
    pub share: f64,
}

/// Observations of one cohort in one age band.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct BandCount {
    /// Cohort label.
    pub cohort: String,
    /// Start of the band (inclusive), years.
    pub age_from: f64,
    /// End of the band (exclusive), years.
    pub age_to: f64,
    /// Observations.
    pub n: usize,
}

/// The age span covered against the calendar time it took.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct Span {
    /// Youngest age observed.
    pub age_from: f64,
    /// Oldest age observed.
    pub age_to: f64,
    /// Years of age covered.
    pub age_years: f64,
    /// Calendar years of follow-up: the longest age range within one
    /// participant, a lower bound on the study's duration when no assessment
    /// dates are given.
    pub calendar_years: f64,
    /// Age years covered per calendar year of follow-up.
    pub acceleration: f64,
}

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

/// Exact collinearities that limit what a model can separate.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct Collinear {
    /// Whether age, period and birth cohort are exactly collinear; `None`
    /// when the file has no dates to check it with.
    pub age_period_cohort: Option<bool>,
    /// With dates: the largest |age − (period − cohort)| in years, where period
    /// and cohort are the assessment and birth dates as decimal years.
    pub age_period_cohort_gap: Option<f64>,
    /// R² of age on period and cohort; below 1 only when years are rounded.
    pub age_period_cohort_r2: Option<f64>,
    /// Where the period and cohort times came from.
    pub calendar_source: Option<CalendarSource>,
    /// Whether time in study (age minus age at the first assessment) is an
    /// exact linear function of the number of prior assessments.
    pub time_retest: bool,
    /// R² of time in study on the number of prior assessments.
    pub time_retest_r2: f64,
    /// What follows, in words.
    pub notes: Vec<String>,
}

/// The design report of `braid inspect`, with stable JSON keys.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct DesignReport {
    /// What was read and used.
    pub data: DataSummary,
    /// The settings that produced the report.
    pub options: DesignOptions,
    /// How cohorts were defined.
    pub cohort_rule: String,
    /// How waves were defined.
    pub wave_rule: String,
    /// Coverage per cohort.
    pub cohorts: Vec<CohortCoverage>,
    /// Overlap of each pair of neighbouring cohorts.
    pub overlap: Vec<Overlap>,
    /// Retention by cohort and wave.
    pub retention: Vec<Retention>,
    /// Cohort × age-band counts.
    pub bands: Vec<BandCount>,
    /// Age span and calendar time.
    pub span: Span,
    /// Missingness patterns and the stayers–leavers comparison.
    pub attrition: Attrition,
    /// Collinearity checks.
    pub collinear: Collinear,
    /// Warnings in plain words.
    pub warnings: Vec<String>,
    /// The Lexis diagram's sampled lifelines (for the figure; not in the JSON).
    #[serde(skip)]
    pub lexis: lexis::LexisData,
}

/// Numeric-aware ordering of labels.
fn label_key(s: &str) -> (f64, String) {
    (s.trim().parse::<f64>().unwrap_or(f64::INFINITY), s.to_string())
}

/// Rows grouped by their label, groups in numeric-aware label order.
fn group_by_label(labels: &[String], rows: impl Iterator<Item = usize>) -> BTreeMap<(OrderedAge, String), Vec<usize>> {
    let mut groups: BTreeMap<(OrderedAge, String), Vec<usize>> = BTreeMap::new();
    for r in rows {
        let (k, s) = label_key(&labels[r]);
        groups.entry((OrderedAge(k), s)).or_default().push(r);
    }
    groups
}

/// The sorted ages of some rows and the number of distinct participants among them.
fn sorted_ages_and_people(panel: &Panel, rows: &[usize]) -> (Vec<f64>, usize) {
    let mut ages: Vec<f64> = rows.iter().map(|&r| panel.age[r]).collect();
    ages.sort_by(f64::total_cmp);
    let mut ids: Vec<u32> = rows.iter().map(|&r| panel.id.codes[r]).collect();
    ids.sort_unstable();
    ids.dedup();
    (ages, ids.len())
}

/// Summarise the design of a panel.
///
/// # Errors
/// [`Error::Spec`] for a band width that is not a positive number.
pub fn inspect(panel: &Panel, options: DesignOptions) -> Result<DesignReport> {
    options.validate()?;
    let n = panel.n();
    let n_id = panel.id.n_levels();
    // First age and within-person range per participant.
    let mut first = vec![f64::INFINITY; n_id];
    let mut last = vec![f64::NEG_INFINITY; n_id];
    for r in 0..n {
        let k = panel.id.codes[r] as usize;
        first[k] = first[k].min(panel.age[r]);
        last[k] = last[k].max(panel.age[r]);
    }
    let cohort = derive::cohorts(panel, options.cohort_rule)?;
    let wave = derive::waves(panel, options.wave_rule, &cohort.labels)?;
    let mut warnings: Vec<String> = cohort.warnings.iter().chain(&wave.warnings).cloned().collect();
    let (cohort_of, wave_of) = (&cohort.labels, &wave.labels);
    // Group rows by cohort, then wave.
    let by_cohort = group_by_label(cohort_of, 0..n);
    let mut cohorts = Vec::new();
    let mut retention = Vec::new();
    let mut bands = Vec::new();
    for ((_, label), rows) in &by_cohort {
        let (ages, people) = sorted_ages_and_people(panel, rows);
        let by_wave = group_by_label(wave_of, rows.iter().copied());
        let mut waves = Vec::new();
        let mut base = None;
        for ((_, w), wrows) in &by_wave {
            let (wa, seen) = sorted_ages_and_people(panel, wrows);
            let b = *base.get_or_insert(seen);
            retention.push(Retention {
                cohort: label.clone(),
                wave: w.clone(),
                n: seen,
                share: seen as f64 / b as f64,
            });
            waves.push(WaveCoverage {
                wave: w.clone(),
                n: wrows.len(),
                age_min: wa[0],
                age_median: quantile_sorted(&wa, 0.5),
                age_max: wa[wa.len() - 1],
            });
        }
        let bw = options.band_width;
        let mut counts: BTreeMap<OrderedAge, usize> = BTreeMap::new();
        for &a in &ages {
            *counts.entry(OrderedAge((a / bw).floor())).or_default() += 1;
        }
        for (b, c) in counts {
            bands.push(BandCount {
                cohort: label.clone(),
                age_from: b.0 * bw,
                age_to: (b.0 + 1.0) * bw,
                n: c,
            });
        }
        cohorts.push(CohortCoverage {
            cohort: label.clone(),
            n_participants: people,
            n_obs: rows.len(),
            waves,
            age_min: ages[0],
            age_median: quantile_sorted(&ages, 0.5),
            age_max: ages[ages.len() - 1],
        });
    }
    // Neighbours in order of their youngest age.
    let mut order: Vec<usize> = (0..cohorts.len()).collect();
    order.sort_by(|&a, &b| cohorts[a].age_min.total_cmp(&cohorts[b].age_min));
    let rows_of: Vec<&Vec<usize>> = by_cohort.values().collect();
    let mut overlap = Vec::new();
    for w in order.windows(2) {
        let (a, b) = (&cohorts[w[0]], &cohorts[w[1]]);
        let from = b.age_min.max(a.age_min);
        let to = a.age_max.min(b.age_max);
        let linked = from <= to;
        let inside = |k: usize| {
            rows_of[k]
                .iter()
                .filter(|&&r| linked && panel.age[r] >= from && panel.age[r] <= to)
                .count()
        };
        let (n_a, n_b) = (inside(w[0]), inside(w[1]));
        let thin = linked && (n_a < options.thin_overlap || n_b < options.thin_overlap);
        if !linked {
            warnings.push(format!(
                "cohorts {} and {} share no ages (a gap from {:.2} to {:.2}): their segments cannot be linked, so cohort and age differences are confounded there",
                a.cohort, b.cohort, a.age_max, b.age_min
            ));
        } else if thin {
            warnings.push(format!(
                "cohorts {} and {} overlap thinly ({} and {} observations between {:.2} and {:.2}, fewer than {}): the link between their segments is weak",
                a.cohort, b.cohort, n_a, n_b, from, to, options.thin_overlap
            ));
        }
        overlap.push(Overlap {
            cohort_a: a.cohort.clone(),
            cohort_b: b.cohort.clone(),
            age_from: if linked { from } else { f64::NAN },
            age_to: if linked { to } else { f64::NAN },
            n_a,
            n_b,
            linked,
            thin,
        });
    }
    let (lo, hi) = panel
        .age
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(l, h), &a| (l.min(a), h.max(a)));
    let calendar = (0..n_id).map(|k| last[k] - first[k]).fold(0.0, f64::max);
    let span = Span {
        age_from: lo,
        age_to: hi,
        age_years: hi - lo,
        calendar_years: calendar,
        acceleration: if calendar > 0.0 { (hi - lo) / calendar } else { f64::NAN },
    };
    let (attrition, collinear) = attrition_and_collinearity(panel, cohort_of, wave_of, &mut warnings);
    let mut report = DesignReport {
        data: panel.summary(),
        options,
        cohort_rule: cohort.rule,
        wave_rule: wave.rule,
        cohorts,
        overlap,
        retention,
        bands,
        span,
        attrition,
        collinear,
        warnings,
        lexis: lexis::LexisData::default(),
    };
    report.lexis = lexis::lexis_data(panel, &report, cohort_of);
    Ok(report)
}

/// A totally ordered f64 for map keys.
#[derive(Debug, Clone, Copy, PartialEq)]
struct OrderedAge(f64);

impl Eq for OrderedAge {}

impl PartialOrd for OrderedAge {
    fn partial_cmp(&self, other: &Self) -> Option<std::cmp::Ordering> {
        Some(self.cmp(other))
    }
}

impl Ord for OrderedAge {
    fn cmp(&self, other: &Self) -> std::cmp::Ordering {
        self.0.total_cmp(&other.0)
    }
}

/// Above this R², time in study counts as an exact function of the number of
/// prior assessments (rounding of ages in a file leaves far more).
const EXACT_R2: f64 = 1.0 - 1e-10;

/// Age is period − cohort up to calendar conventions: the anniversary rule
/// and decimal calendar years differ by at most about two days, so with dates a
/// largest gap below this (in years, about 3.7 days) is exact collinearity.
const APC_GAP: f64 = 0.01;

/// With period and birth year in whole years, age departs from period − cohort
/// by less than a year (the birthday may fall before or after the assessment
/// in that year); up to this gap the departure is rounding alone.
const ROUNDING_GAP: f64 = 1.0 + APC_GAP;

/// Above this R², the two count as nearly collinear (common practice).
const NEAR_R2: f64 = 0.99;

/// Above this absolute standardized baseline difference between stayers and
/// leavers, braid warns (common practice: a "small" effect size).
const BASELINE_WARNING: f64 = 0.2;

fn mean_var(v: &[f64]) -> (f64, f64) {
    let n = v.len() as f64;
    let m = v.iter().sum::<f64>() / n;
    let var = if v.len() > 1 {
        v.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (n - 1.0)
    } else {
        f64::NAN
    };
    (m, var)
}

type WaveSet<'a> = BTreeSet<(OrderedAge, &'a str)>;

fn attrition_and_collinearity(
    panel: &Panel,
    cohort_of: &[String],
    wave_of: &[String],
    warnings: &mut Vec<String>,
) -> (Attrition, Collinear) {
    let n = panel.n();
    let n_id = panel.id.n_levels();
    let key = |r: usize| (OrderedAge(label_key(&wave_of[r]).0), wave_of[r].as_str());
    // Each cohort's wave set, and each participant's.
    let mut cohort_waves: BTreeMap<&str, WaveSet> = BTreeMap::new();
    let mut person_waves: Vec<WaveSet> = vec![BTreeSet::new(); n_id];
    let mut person_cohort: Vec<&str> = vec![""; n_id];
    let mut first_row: Vec<usize> = vec![usize::MAX; n_id];
    for (r, cohort) in cohort_of.iter().enumerate() {
        let k = panel.id.codes[r] as usize;
        cohort_waves.entry(cohort.as_str()).or_default().insert(key(r));
        person_waves[k].insert(key(r));
        person_cohort[k] = cohort.as_str();
        if first_row[k] == usize::MAX || panel.age[r] < panel.age[first_row[k]] {
            first_row[k] = r;
        }
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
    let mut variables: Vec<(String, Vec<f64>)> = vec![(panel.roles.outcome.clone(), panel.outcome.clone())];
    for c in &panel.covariates {
        if let crate::data::CovariateValues::Numeric(v) = &c.values {
            variables.push((c.name.clone(), v.clone()));
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
            warnings.push(format!(
                "those who left differ from those who stayed at baseline on {name} (standardized difference {standardized:.2}): \
                 the data are not missing completely at random; a likelihood-based fit stays valid if dropout depends only on what was observed"
            ));
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
    // Time in study against the number of prior assessments.
    let mut order: Vec<usize> = (0..n).collect();
    order.sort_by(|&a, &b| {
        panel.id.codes[a]
            .cmp(&panel.id.codes[b])
            .then(panel.age[a].total_cmp(&panel.age[b]))
    });
    let mut time = vec![0.0; n];
    let mut prior = vec![0.0; n];
    let mut prev = u32::MAX;
    let mut count = 0.0;
    for &r in &order {
        let k = panel.id.codes[r];
        if k != prev {
            prev = k;
            count = 0.0;
        } else {
            count += 1.0;
        }
        time[r] = panel.age[r] - panel.age[first_row[k as usize]];
        prior[r] = count;
    }
    let r2 = r_squared(&time, &prior);
    let time_retest = r2 >= EXACT_R2;
    let mut notes = Vec::new();
    let (apc, apc_gap, apc_r2) = match &panel.calendar {
        Some(cal) => {
            let gap = panel
                .age
                .iter()
                .zip(cal.period.iter().zip(&cal.birth))
                .map(|(a, (p, b))| (a - (p - b)).abs())
                .fold(0.0, f64::max);
            let r2 = r_squared_two(&panel.age, &cal.period, &cal.birth);
            (Some(gap <= APC_GAP), Some(gap), Some(r2))
        }
        None => (None, None, None),
    };
    let source = panel.calendar.as_ref().map(|c| c.source);
    let unidentified = "linear age, period and cohort effects cannot be told apart without a constraint; only their \
                        identified combinations and curvatures can be estimated (Holford 1983)";
    match (apc, source) {
        (Some(true), Some(CalendarSource::BirthFromPeriod | CalendarSource::PeriodFromBirth)) => notes.push(format!(
            "age, period and cohort are exactly collinear by construction ({}): {unidentified}",
            source.map_or("", CalendarSource::describe)
        )),
        (Some(true), _) => notes.push(format!(
            "age, period and cohort are exactly collinear (age = period − cohort to within {:.4} years): {unidentified}",
            apc_gap.unwrap_or(f64::NAN)
        )),
        (Some(false), _) if apc_gap.is_some_and(|g| g <= ROUNDING_GAP) => notes.push(format!(
            "age differs from period − cohort by up to {:.2} years (R² of age on period and cohort = {:.4}), as when \
             years are whole numbers: the linear effects are then separated only by that rounding, which carries no \
             information about them; treat them as not identified (Holford 1983)",
            apc_gap.unwrap_or(f64::NAN),
            apc_r2.unwrap_or(f64::NAN)
        )),
        (Some(false), _) => notes.push(format!(
            "age is far from period − cohort (by up to {:.2} years); check the period and birth-year columns",
            apc_gap.unwrap_or(f64::NAN)
        )),
        (None, _) => notes.push(
            "age–period–cohort collinearity needs birth and assessment dates, or a period or birth-year column; not checked"
                .to_string(),
        ),
    }
    if time_retest {
        notes.push(
            "time in study is an exact linear function of the number of prior assessments: a retest effect cannot be separated from within-person change with age"
                .into(),
        );
    } else if r2 >= NEAR_R2 {
        notes.push(format!(
            "time in study and the number of prior assessments are nearly collinear (R² = {r2:.4}): a retest effect would be estimated very imprecisely"
        ));
    }
    (
        Attrition { patterns, baseline },
        Collinear {
            age_period_cohort: apc,
            age_period_cohort_gap: apc_gap,
            age_period_cohort_r2: apc_r2,
            calendar_source: source,
            time_retest,
            time_retest_r2: r2,
            notes,
        },
    )
}

/// R² of the regression of `y` on `a` and `b` (with an intercept).
fn r_squared_two(y: &[f64], a: &[f64], b: &[f64]) -> f64 {
    let n = y.len() as f64;
    let mean = |v: &[f64]| v.iter().sum::<f64>() / n;
    let (my, ma, mb) = (mean(y), mean(a), mean(b));
    let (mut saa, mut sbb, mut sab, mut say, mut sby, mut syy) = (0.0, 0.0, 0.0, 0.0, 0.0, 0.0);
    for i in 0..y.len() {
        let (dy, da, db) = (y[i] - my, a[i] - ma, b[i] - mb);
        saa += da * da;
        sbb += db * db;
        sab += da * db;
        say += da * dy;
        sby += db * dy;
        syy += dy * dy;
    }
    if syy == 0.0 {
        return 1.0;
    }
    let det = saa * sbb - sab * sab;
    if det.abs() <= 1e-12 * (saa * sbb).max(f64::MIN_POSITIVE) {
        // a and b collinear: fall back to the better single regressor.
        return r_squared(y, a).max(r_squared(y, b));
    }
    let (ca, cb) = ((sbb * say - sab * sby) / det, (saa * sby - sab * say) / det);
    ((ca * say + cb * sby) / syy).clamp(0.0, 1.0)
}

/// R² of the simple regression of `y` on `x`.
fn r_squared(y: &[f64], x: &[f64]) -> f64 {
    let n = y.len() as f64;
    let (my, mx) = (y.iter().sum::<f64>() / n, x.iter().sum::<f64>() / n);
    let (mut sxy, mut sxx, mut syy) = (0.0, 0.0, 0.0);
    for (a, b) in y.iter().zip(x) {
        sxy += (a - my) * (b - mx);
        sxx += (b - mx).powi(2);
        syy += (a - my).powi(2);
    }
    if syy == 0.0 {
        return 1.0;
    }
    if sxx == 0.0 {
        return 0.0;
    }
    sxy * sxy / (sxx * syy)
}
