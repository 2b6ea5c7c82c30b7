//! Cohort and wave when a file does not give them: the rules, and the labels
//! they give each row. Every rule is reported in words beside the results it
//! shapes, because a different rule gives a different design.

use serde::{Deserialize, Serialize};

use super::{CalendarSource, Codes, Panel};
use crate::error::{Error, Result};

/// How each row's cohort is found.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize, Default)]
#[serde(rename_all = "snake_case")]
pub enum CohortRule {
    /// The cohort column when one is given; otherwise birth year when the
    /// file has calendar times, otherwise age at the first assessment.
    #[default]
    Auto,
    /// Whole-year age at the participant's first assessment, in groups of
    /// `width` years.
    FirstAge {
        /// Group width in years.
        width: f64,
    },
    /// Calendar year of birth, in groups of `width` years.
    BirthYear {
        /// Group width in years.
        width: f64,
    },
}

/// How each row's wave is found.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize, Default)]
#[serde(rename_all = "snake_case")]
pub enum WaveRule {
    /// The wave column when one is given; otherwise calendar rounds when the
    /// file has calendar times, otherwise the order of assessments.
    #[default]
    Auto,
    /// The k-th assessment of a participant, in order of age.
    Order,
    /// Rounds of `length` years counted from the cohort's earliest assessment:
    /// wave = round((period − cohort start) / length) + 1, so fieldwork that
    /// drifts by less than half a round from year to year stays in its round.
    Calendar {
        /// Round length in years.
        length: f64,
    },
}

/// The rule that gave each row its cohort or wave, as applied to a file.
#[derive(Debug, Clone, PartialEq)]
pub enum AppliedRule {
    /// Taken from a column of the file.
    Column {
        /// The column.
        column: String,
    },
    /// Year of birth, in groups of `width` years.
    BirthYear {
        /// Group width in years.
        width: f64,
        /// Where the birth times came from.
        source: CalendarSource,
    },
    /// Whole-year age at the first assessment, in groups of `width` years.
    FirstAge {
        /// Group width in years.
        width: f64,
    },
    /// The order of each participant's assessments by age.
    Order,
    /// Calendar rounds of `length` years from each cohort's first assessment.
    Calendar {
        /// Round length in years.
        length: f64,
        /// Where the assessment times came from.
        source: CalendarSource,
    },
}

impl std::fmt::Display for AppliedRule {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            AppliedRule::Column { column } => write!(f, "from column '{column}'"),
            AppliedRule::BirthYear { width, source } => {
                write!(
                    f,
                    "derived: year of birth (from {}, averaged over each participant's rows), in {}",
                    source.describe(),
                    years(*width)
                )
            }
            AppliedRule::FirstAge { width } => {
                write!(
                    f,
                    "derived: whole-year age at the first assessment, in {}",
                    years(*width)
                )
            }
            AppliedRule::Order => write!(f, "derived: the order of each participant's assessments by age"),
            AppliedRule::Calendar { length, source } => write!(
                f,
                "derived: rounds of {length} year{} from each cohort's first assessment, to the nearest round (from {})",
                if *length == 1.0 { "" } else { "s" },
                source.describe()
            ),
        }
    }
}

/// Serialised as its words, as the reports have always shown it.
impl Serialize for AppliedRule {
    fn serialize<S: serde::Serializer>(&self, s: S) -> std::result::Result<S::Ok, S::Error> {
        s.collect_str(self)
    }
}

/// Labels for every row, and the rule that made them.
#[derive(Debug, Clone, PartialEq)]
pub struct Derived {
    /// One label per row of the panel.
    pub labels: Vec<String>,
    /// The rule applied.
    pub rule: AppliedRule,
    /// Problems the rule met.
    pub warnings: Vec<crate::warning::Warning>,
}

/// Guards floor() against values a rounding error below a group boundary.
const FLOOR_GUARD: f64 = 1e-9;

/// The first value of `x`'s group of `width`.
fn group_of(x: f64, width: f64) -> f64 {
    ((x / width) + FLOOR_GUARD).floor() * width
}

/// A group's label from its first value.
fn group_name(g: f64) -> String {
    if (g - g.round()).abs() < 1e-9 {
        format!("{}", g.round() as i64)
    } else {
        format!("{g:.2}")
    }
}

fn check_width(width: f64, flag: &str) -> Result<()> {
    if width.is_finite() && width > 0.0 {
        Ok(())
    } else {
        Err(Error::Spec {
            parameter: flag.into(),
            message: format!("{width} is not a positive number of years"),
        })
    }
}

fn years(width: f64) -> String {
    if width == 1.0 {
        "single years".into()
    } else {
        format!("groups of {width} years, each labelled by its first year")
    }
}

/// Each row's cohort under a rule.
///
/// # Errors
/// As [`cohort_codes`].
pub fn cohorts(panel: &Panel, rule: CohortRule) -> Result<Derived> {
    let (codes, rule) = cohort_codes(panel, rule)?;
    Ok(Derived {
        labels: (0..panel.n()).map(|r| codes.label(r).to_string()).collect(),
        rule,
        warnings: Vec::new(),
    })
}

/// Each row's cohort under a rule, coded: the labels of [`cohorts`] as
/// levels in label order, without a label per row.
///
/// # Errors
/// [`Error::Spec`] for a width that is not positive, or a birth-year rule on
/// a file with no calendar times.
pub fn cohort_codes(panel: &Panel, rule: CohortRule) -> Result<(Codes, AppliedRule)> {
    let rule = match (rule, &panel.cohort, &panel.calendar) {
        (CohortRule::Auto, Some(c), _) => {
            let column = panel.roles.cohort.clone().unwrap_or_default();
            return Ok((c.clone(), AppliedRule::Column { column }));
        }
        (CohortRule::Auto, None, Some(_)) => CohortRule::BirthYear { width: 1.0 },
        (CohortRule::Auto, None, None) => CohortRule::FirstAge { width: 1.0 },
        (r, _, _) => r,
    };
    match rule {
        CohortRule::BirthYear { width } => {
            check_width(width, "cohort_width")?;
            let Some(cal) = &panel.calendar else {
                return Err(Error::Spec {
                    parameter: "cohort_from".into(),
                    message: "birth-year cohorts need birth dates, a `birth_year` column or a `period` column".into(),
                });
            };
            // A cohort belongs to the participant: birth times derived row by
            // row (period − age) differ by rounding, and one that crosses a
            // year boundary would put a participant in two cohorts. Each
            // participant is grouped by the mean of their rows' birth times.
            let k = panel.id.n_levels();
            let mut sum = vec![0.0; k];
            let mut count = vec![0usize; k];
            for (r, &b) in cal.birth.iter().enumerate() {
                let i = panel.id.codes[r] as usize;
                sum[i] += b;
                count[i] += 1;
            }
            let mean: Vec<f64> = (0..k).map(|i| sum[i] / count[i].max(1) as f64).collect();
            let source = cal.source;
            Ok((
                grouped_codes(panel, &mean, width),
                AppliedRule::BirthYear { width, source },
            ))
        }
        CohortRule::FirstAge { width } => {
            check_width(width, "cohort_width")?;
            let first = panel.first_ages();
            Ok((grouped_codes(panel, &first, width), AppliedRule::FirstAge { width }))
        }
        CohortRule::Auto => unreachable!("resolved above"),
    }
}

/// Each row coded by its participant's value in `per_participant`, grouped
/// by [`group_of`] and labelled by [`group_name`]: one label per distinct group rather than
/// per row, levels in label order (as [`Codes::new`] orders them).
fn grouped_codes(panel: &Panel, per_participant: &[f64], width: f64) -> Codes {
    let mut by_label: crate::data::FastMap<String, u32> = Default::default();
    let mut by_group: crate::data::FastMap<u64, u32> = Default::default();
    let mut levels: Vec<String> = Vec::new();
    let of_participant: Vec<u32> = per_participant
        .iter()
        .map(|&x| {
            let g = group_of(x, width);
            *by_group.entry(g.to_bits()).or_insert_with(|| {
                let label = group_name(g);
                let next = levels.len() as u32;
                *by_label.entry(label.clone()).or_insert_with(|| {
                    levels.push(label);
                    next
                })
            })
        })
        .collect();
    let mut order: Vec<usize> = (0..levels.len()).collect();
    order.sort_by(|&a, &b| super::label_order(&levels[a], &levels[b]));
    let mut remap = vec![0u32; levels.len()];
    for (new, &old) in order.iter().enumerate() {
        remap[old] = new as u32;
    }
    let codes: Vec<u32> = panel
        .id
        .codes
        .iter()
        .map(|&i| remap[of_participant[i as usize] as usize])
        .collect();
    let levels: Vec<String> = order.into_iter().map(|i| std::mem::take(&mut levels[i])).collect();
    Codes {
        levels: levels.into(),
        codes: codes.into(),
    }
}

/// Each row's rank (1, 2, ...) among its participant's assessments, in
/// order of age.
pub fn assessment_order(panel: &Panel) -> Vec<usize> {
    let n = panel.n();
    let mut order: Vec<usize> = (0..n).collect();
    order.sort_by(|&a, &b| {
        panel.id.codes[a]
            .cmp(&panel.id.codes[b])
            .then(panel.age[a].total_cmp(&panel.age[b]))
    });
    let mut rank = vec![0usize; n];
    let mut prev = u32::MAX;
    let mut k = 0;
    for &r in &order {
        if panel.id.codes[r] != prev {
            prev = panel.id.codes[r];
            k = 0;
        }
        k += 1;
        rank[r] = k;
    }
    rank
}

/// Each row's wave under a rule, given each row's cohort.
///
/// # Errors
/// [`Error::Spec`] for a round length that is not positive, or a calendar
/// rule on a file with no calendar times.
pub fn waves(panel: &Panel, rule: WaveRule, cohort_of: &[String]) -> Result<Derived> {
    let n = panel.n();
    let rule = match (rule, &panel.wave, &panel.calendar) {
        (WaveRule::Auto, Some(w), _) => {
            return Ok(Derived {
                labels: (0..n).map(|r| w.label(r).to_string()).collect(),
                rule: AppliedRule::Column {
                    column: panel.roles.wave.clone().unwrap_or_default(),
                },
                warnings: Vec::new(),
            });
        }
        (WaveRule::Auto, None, Some(_)) => WaveRule::Calendar { length: 1.0 },
        (WaveRule::Auto, None, None) => WaveRule::Order,
        (r, _, _) => r,
    };
    match rule {
        WaveRule::Order => Ok(Derived {
            labels: assessment_order(panel).iter().map(|k| k.to_string()).collect(),
            rule: AppliedRule::Order,
            warnings: Vec::new(),
        }),
        WaveRule::Calendar { length } => {
            check_width(length, "wave_length")?;
            let Some(cal) = &panel.calendar else {
                return Err(Error::Spec {
                    parameter: "wave_from".into(),
                    message: "calendar waves need assessment dates or a `period` column".into(),
                });
            };
            let mut start: std::collections::HashMap<&str, f64> = std::collections::HashMap::new();
            for (c, &p) in cohort_of.iter().zip(&cal.period) {
                let s = start.entry(c.as_str()).or_insert(p);
                *s = s.min(p);
            }
            let labels: Vec<String> = (0..n)
                .map(|r| {
                    let k = ((cal.period[r] - start[cohort_of[r].as_str()]) / length).round();
                    format!("{}", k as i64 + 1)
                })
                .collect();
            let mut seen = std::collections::HashSet::with_capacity(n);
            let mut clashes = 0usize;
            let mut example = None;
            for (r, label) in labels.iter().enumerate() {
                if !seen.insert((panel.id.codes[r], label.as_str())) {
                    clashes += 1;
                    example.get_or_insert(r);
                }
            }
            let mut warnings = Vec::new();
            if let Some(r) = example {
                warnings.push(crate::warning::Warning::new(crate::warning::WarningCode::WaveClash, format!(
                    "{clashes} assessments share a derived wave with an earlier one of the same participant (first: '{}' in wave {}); \
                     give a shorter `wave_length` or a `wave` column",
                    panel.id.label(r),
                    labels[r]
                )));
            }
            Ok(Derived {
                labels,
                rule: AppliedRule::Calendar {
                    length,
                    source: cal.source,
                },
                warnings,
            })
        }
        WaveRule::Auto => unreachable!("resolved above"),
    }
}
