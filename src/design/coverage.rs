//! Coverage of a design: each cohort's ages and waves, retention, the
//! cohort × age-band counts, the overlap of neighbouring cohorts and the span
//! of age and calendar time.

use std::collections::BTreeMap;

use serde::Serialize;

use super::{DesignOptions, OrderedAge, group_by_label, sorted_ages_and_people};
use crate::data::Panel;
use crate::spec::basis::quantile_sorted;
use crate::warning::{Warning, WarningCode};

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

/// Everything [`coverage`] finds.
pub(super) struct Coverage {
    pub cohorts: Vec<CohortCoverage>,
    pub retention: Vec<Retention>,
    pub bands: Vec<BandCount>,
    pub overlap: Vec<Overlap>,
    pub span: Span,
}

/// The coverage of the design whose rows have cohorts `cohort_of` and waves
/// `wave_of`; a gap or a thin overlap between neighbours adds a warning.
pub(super) fn coverage(
    panel: &Panel,
    cohort_of: &[String],
    wave_of: &[String],
    options: &DesignOptions,
    warnings: &mut Vec<Warning>,
) -> Coverage {
    let by_cohort = group_by_label(cohort_of, 0..panel.n());
    let rows_of: Vec<&Vec<usize>> = by_cohort.values().collect();
    let (cohorts, retention, bands) = per_cohort(panel, &by_cohort, wave_of, options);
    let overlap = overlaps(panel, &cohorts, &rows_of, options, warnings);
    Coverage {
        span: span(panel),
        cohorts,
        retention,
        bands,
        overlap,
    }
}

type ByLabel = BTreeMap<(OrderedAge, String), Vec<usize>>;

/// Each cohort's coverage, its retention by wave, and its age-band counts.
fn per_cohort(
    panel: &Panel,
    by_cohort: &ByLabel,
    wave_of: &[String],
    options: &DesignOptions,
) -> (Vec<CohortCoverage>, Vec<Retention>, Vec<BandCount>) {
    let mut cohorts = Vec::new();
    let mut retention = Vec::new();
    let mut bands = Vec::new();
    for ((_, label), rows) in by_cohort {
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
    (cohorts, retention, bands)
}

/// The overlap of each pair of neighbouring cohorts, in order of their youngest age.
fn overlaps(
    panel: &Panel,
    cohorts: &[CohortCoverage],
    rows_of: &[&Vec<usize>],
    options: &DesignOptions,
    warnings: &mut Vec<Warning>,
) -> Vec<Overlap> {
    let mut order: Vec<usize> = (0..cohorts.len()).collect();
    order.sort_by(|&a, &b| cohorts[a].age_min.total_cmp(&cohorts[b].age_min));
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
            warnings.push(Warning::new(WarningCode::CohortGap, format!(
                "cohorts {} and {} share no ages (a gap from {:.2} to {:.2}): their segments cannot be linked, so cohort and age differences are confounded there",
                a.cohort, b.cohort, a.age_max, b.age_min
            )));
        } else if thin {
            warnings.push(Warning::new(WarningCode::ThinOverlap, format!(
                "cohorts {} and {} overlap thinly ({} and {} observations between {:.2} and {:.2}, fewer than {}): the link between their segments is weak",
                a.cohort, b.cohort, n_a, n_b, from, to, options.thin_overlap
            )));
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
    overlap
}

/// The age span and the longest follow-up of any participant.
fn span(panel: &Panel) -> Span {
    let n_id = panel.id.n_levels();
    let first = panel.first_ages();
    let mut last = vec![f64::NEG_INFINITY; n_id];
    for (&k, &a) in panel.id.codes.iter().zip(panel.age.iter()) {
        last[k as usize] = last[k as usize].max(a);
    }
    let (lo, hi) = panel
        .age
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(l, h), &a| (l.min(a), h.max(a)));
    let calendar = (0..n_id).map(|k| last[k] - first[k]).fold(0.0, f64::max);
    Span {
        age_from: lo,
        age_to: hi,
        age_years: hi - lo,
        calendar_years: calendar,
        acceleration: if calendar > 0.0 { (hi - lo) / calendar } else { f64::NAN },
    }
}
