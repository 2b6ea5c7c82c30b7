//! Collinearity that limits what a model can separate: time in study
//! against the number of prior assessments, and age against period and
//! birth cohort.

use serde::Serialize;

use crate::data::{CalendarSource, Panel};
use crate::stats::r_squared;

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

/// The collinearity checks of a panel.
pub(super) fn collinearity(panel: &Panel) -> Collinear {
    let n = panel.n();
    let first_row = panel.first_rows();
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
    let r2 = r_squared(&time, &[&prior]);
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
            let r2 = r_squared(&panel.age, &[&cal.period, &cal.birth]);
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
    Collinear {
        age_period_cohort: apc,
        age_period_cohort_gap: apc_gap,
        age_period_cohort_r2: apc_r2,
        calendar_source: source,
        time_retest,
        time_retest_r2: r2,
        notes,
    }
}
