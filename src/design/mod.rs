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

mod attrition;
mod collinearity;
mod coverage;
pub mod lexis;

pub use attrition::{Attrition, BaselineComparison, Patterns};
pub use collinearity::Collinear;
pub use coverage::{BandCount, CohortCoverage, Overlap, Retention, Span, WaveCoverage};

use std::collections::BTreeMap;

use serde::Serialize;

use crate::data::derive::{self, CohortRule, WaveRule};
use crate::data::{DataSummary, Panel};
use crate::error::{Error, Result};
use crate::warning::{Warning, WarningCode};

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

/// The design report of `braid inspect`, with stable JSON keys.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct DesignReport {
    /// What was read and used.
    pub data: DataSummary,
    /// The settings that produced the report.
    pub options: DesignOptions,
    /// How cohorts were defined.
    pub cohort_rule: derive::AppliedRule,
    /// How waves were defined.
    pub wave_rule: derive::AppliedRule,
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
    pub warnings: Vec<Warning>,
    /// The code of each warning, in the same order.
    pub warning_codes: Vec<WarningCode>,
    /// The Lexis diagram's sampled lifelines (for the figure; not in the JSON).
    #[serde(skip)]
    pub lexis: lexis::LexisData,
}

/// Rows grouped by their label, groups in numeric-aware label order.
fn group_by_label(labels: &[String], rows: impl Iterator<Item = usize>) -> BTreeMap<(OrderedAge, String), Vec<usize>> {
    let mut groups: BTreeMap<(OrderedAge, String), Vec<usize>> = BTreeMap::new();
    for r in rows {
        let (k, s) = crate::data::label_key(&labels[r]);
        groups.entry((OrderedAge(k), s.to_string())).or_default().push(r);
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
    let cohort = derive::cohorts(panel, options.cohort_rule)?;
    let wave = derive::waves(panel, options.wave_rule, &cohort.labels)?;
    let mut warnings: Vec<Warning> = cohort.warnings.iter().chain(&wave.warnings).cloned().collect();
    let (cohort_of, wave_of) = (&cohort.labels, &wave.labels);
    let coverage = coverage::coverage(panel, cohort_of, wave_of, &options, &mut warnings);
    let attrition = attrition::attrition(panel, cohort_of, wave_of, &mut warnings);
    let collinear = collinearity::collinearity(panel);
    let mut report = DesignReport {
        data: panel.summary(),
        options,
        cohort_rule: cohort.rule,
        wave_rule: wave.rule,
        cohorts: coverage.cohorts,
        overlap: coverage.overlap,
        retention: coverage.retention,
        bands: coverage.bands,
        span: coverage.span,
        attrition,
        collinear,
        warning_codes: crate::warning::codes(&warnings),
        warnings,
        lexis: lexis::LexisData::default(),
    };
    report.lexis = lexis::lexis_data(panel, &report, cohort_of);
    Ok(report)
}

/// Each cohort's coverage and the overlap of neighbouring cohorts, without
/// the rest of the design report (attrition, collinearity, the Lexis
/// lifelines): what the convergence analysis needs to order and link cohorts.
///
/// # Errors
/// Errors of the cohort and wave rules.
pub(crate) fn cohorts_and_overlaps(
    panel: &Panel,
    cohort_rule: CohortRule,
) -> Result<(derive::Derived, Vec<CohortCoverage>, Vec<Overlap>)> {
    let options = DesignOptions {
        cohort_rule,
        ..Default::default()
    };
    let cohort = derive::cohorts(panel, cohort_rule)?;
    let wave = derive::waves(panel, options.wave_rule, &cohort.labels)?;
    let mut warnings = Vec::new();
    let c = coverage::coverage(panel, &cohort.labels, &wave.labels, &options, &mut warnings);
    Ok((cohort, c.cohorts, c.overlap))
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
