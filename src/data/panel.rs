//! The validated panel and its parts: coded labels, covariates, the rows
//! dropped, and calendar time.

use std::path::PathBuf;
use std::sync::Arc;

use serde::Serialize;

use super::{FastMap, Roles};
use crate::error::{Error, Result};

/// The sort key of a label: its value when it reads as a number (numbers
/// first, by value), then the text. One order for every table and figure.
pub fn label_key(s: &str) -> (f64, &str) {
    (s.trim().parse::<f64>().unwrap_or(f64::INFINITY), s)
}

/// Numeric-aware order of two labels (see [`label_key`]).
pub fn label_order(a: &str, b: &str) -> std::cmp::Ordering {
    let (ka, kb) = (label_key(a), label_key(b));
    ka.0.total_cmp(&kb.0).then(ka.1.cmp(kb.1))
}

/// Labels coded as integers.
#[derive(Debug, Clone, PartialEq)]
pub struct Codes {
    /// The distinct labels, in level order (shared with the model frames
    /// built from the panel rather than copied: a label per participant).
    pub(crate) levels: Arc<[String]>,
    /// The level of each row (shared likewise).
    pub(crate) codes: Arc<[u32]>,
}

impl Codes {
    /// Code labels; levels are sorted (numerically when all labels are
    /// numbers), or in order of first appearance when `sort` is false.
    pub fn new(labels: &[String], sort: bool) -> Codes {
        Codes::from_strs(labels.iter().map(String::as_str), sort)
    }

    /// Code borrowed labels (see [`Codes::new`]).
    pub fn from_strs<'a>(labels: impl Iterator<Item = &'a str>, sort: bool) -> Codes {
        Codes::from_strs_expecting(labels, sort, 0)
    }

    /// [`Codes::from_strs`] with room for `levels` distinct labels made at
    /// the start.
    ///
    /// Long files keep a participant's rows together, usually in order of
    /// the id: a label equal to the row before's takes its code at once, and
    /// while each new run's label sorts after the last run's, every run is a
    /// new level, so no map is needed. Two orders serve: the labels' bytes
    /// (`P1`, `P10`, `P2`) and length then bytes (`1`, `2`, `10`, or `P999`,
    /// `P1000`); each is a total order in which only equal labels tie, so
    /// runs rising in either one all the way are distinct. The map of
    /// labels is built only when a run's label breaks both (it may have
    /// been seen). The codes are those of one map from the start: levels in
    /// order of first appearance.
    pub(crate) fn from_strs_expecting<'a>(labels: impl Iterator<Item = &'a str>, sort: bool, levels: usize) -> Codes {
        let mut index: Option<FastMap<&str, u32>> = None;
        let mut firsts: Vec<&'a str> = Vec::with_capacity(levels);
        let mut codes = Vec::with_capacity(labels.size_hint().0);
        let mut last: Option<(&str, u32)> = None;
        // Whether the runs so far rise in byte order, and in length-then-byte order.
        let (mut by_bytes, mut by_length) = (true, true);
        for l in labels {
            let c = match last {
                Some((prev, c)) if prev == l => c,
                _ => {
                    let next = firsts.len() as u32;
                    if index.is_none()
                        && let Some((prev, _)) = last
                    {
                        by_bytes &= prev < l;
                        by_length &= (prev.len(), prev) < (l.len(), l);
                    }
                    if index.is_none() && !by_bytes && !by_length {
                        let mut map: FastMap<&str, u32> =
                            FastMap::with_capacity_and_hasher(levels.max(firsts.len()), Default::default());
                        map.extend(firsts.iter().enumerate().map(|(k, &f)| (f, k as u32)));
                        index = Some(map);
                    }
                    match &mut index {
                        None => {
                            firsts.push(l);
                            next
                        }
                        Some(map) => *map.entry(l).or_insert_with(|| {
                            firsts.push(l);
                            next
                        }),
                    }
                }
            };
            last = Some((l, c));
            codes.push(c);
        }
        let mut levels: Vec<String> = firsts.into_iter().map(str::to_string).collect();
        if sort {
            let mut order: Vec<usize> = (0..levels.len()).collect();
            order.sort_by(|&a, &b| label_order(&levels[a], &levels[b]));
            let mut remap = vec![0u32; levels.len()];
            for (new, &old) in order.iter().enumerate() {
                remap[old] = new as u32;
            }
            codes.iter_mut().for_each(|c| *c = remap[*c as usize]);
            levels = order.into_iter().map(|i| std::mem::take(&mut levels[i])).collect();
        }
        Codes {
            levels: levels.into(),
            codes: codes.into(),
        }
    }

    /// The distinct labels, in level order.
    pub fn levels(&self) -> &[String] {
        &self.levels
    }

    /// The level of each row (each below [`Codes::n_levels`]).
    pub fn codes(&self) -> &[u32] {
        &self.codes
    }

    /// The number of levels.
    pub fn n_levels(&self) -> usize {
        self.levels.len()
    }

    /// The label of row `r`.
    pub fn label(&self, r: usize) -> &str {
        &self.levels[self.codes[r] as usize]
    }
}

/// A covariate's values.
#[derive(Debug, Clone, PartialEq)]
pub enum CovariateValues {
    /// Numbers (shared, not copied, with the model frames built on the
    /// panel).
    Numeric(Arc<[f64]>),
    /// Categories (the first level is the reference).
    Categorical(Codes),
}

/// A covariate column.
#[derive(Debug, Clone, PartialEq)]
pub struct Covariate {
    /// Column name.
    pub name: String,
    /// Values.
    pub values: CovariateValues,
}

/// Rows left out, by reason.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize)]
pub struct DropReport {
    /// Rows whose outcome was missing.
    pub missing_outcome: usize,
    /// Rows whose age was missing (and outcome present).
    pub missing_age: usize,
    /// Rows whose covariate was missing (and age and outcome present).
    pub missing_covariate: usize,
    /// Tables: rows missing a value in another named column.
    #[serde(skip_serializing_if = "is_zero")]
    pub missing_other: usize,
}

fn is_zero(n: &usize) -> bool {
    *n == 0
}

impl DropReport {
    /// Total rows dropped.
    pub fn total(&self) -> usize {
        self.missing_outcome + self.missing_age + self.missing_covariate + self.missing_other
    }
}

/// A validated long-format panel: one row per participant per assessment.
///
/// Built only by [`crate::data::load`] (and the seeded simulator), and
/// changed only through the validating transformations below, so that every
/// analysis can rely on its invariants: finite ages and outcomes, every code
/// inside its levels, at least two participants, one row per participant and
/// wave. Its parts are read through the accessors.
#[derive(Debug, Clone)]
pub struct Panel {
    /// The file it came from.
    pub(crate) source: PathBuf,
    /// The column roles.
    pub(crate) roles: Roles,
    /// Data rows in the file.
    pub(crate) n_rows_read: usize,
    /// Rows left out and why.
    pub(crate) dropped: DropReport,
    /// For each kept row, its 1-based data-row number in the file.
    pub(crate) row: Vec<usize>,
    /// Participants (levels in order of first appearance).
    pub(crate) id: Codes,
    /// Exact age in years (shared, not copied, with the model frames built
    /// on the panel).
    pub(crate) age: Arc<[f64]>,
    /// Outcome (shared likewise).
    pub(crate) outcome: Arc<[f64]>,
    /// Cohort, if given.
    pub(crate) cohort: Option<Codes>,
    /// Wave, if given.
    pub(crate) wave: Option<Codes>,
    /// Cluster, if given.
    pub(crate) cluster: Option<Codes>,
    /// Covariates, in the order given.
    pub(crate) covariates: Vec<Covariate>,
    /// With ages from dates: the assessment date and the birth date of each
    /// row as decimal calendar years (year + elapsed share of that year).
    pub(crate) calendar: Option<Calendar>,
}

/// Calendar time of each row: from dates, or from period and birth-year columns.
#[derive(Debug, Clone, PartialEq)]
pub struct Calendar {
    /// Assessment time as a decimal year (the period).
    pub period: Vec<f64>,
    /// Birth time as a decimal year (the cohort).
    pub birth: Vec<f64>,
    /// Where the two came from.
    pub source: CalendarSource,
}

/// Where a panel's calendar times came from.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum CalendarSource {
    /// Birth and assessment dates (ages computed from them).
    Dates,
    /// A period column and a birth-year column, both given.
    Columns,
    /// A period column; birth time derived as period − age.
    BirthFromPeriod,
    /// A birth-year column; period derived as birth year + age.
    PeriodFromBirth,
}

impl CalendarSource {
    /// In words.
    pub fn describe(self) -> &'static str {
        match self {
            CalendarSource::Dates => "birth and assessment dates",
            CalendarSource::Columns => "the period and birth-year columns",
            CalendarSource::BirthFromPeriod => "the period column, with birth time derived as period − age",
            CalendarSource::PeriodFromBirth => "the birth-year column, with period derived as birth year + age",
        }
    }
}

impl Panel {
    /// Number of rows kept.
    pub fn n(&self) -> usize {
        self.age.len()
    }
}

impl Panel {
    /// The file it came from.
    pub fn source(&self) -> &std::path::Path {
        &self.source
    }

    /// The column roles.
    pub fn roles(&self) -> &Roles {
        &self.roles
    }

    /// Data rows in the file.
    pub fn n_rows_read(&self) -> usize {
        self.n_rows_read
    }

    /// Rows left out and why.
    pub fn dropped(&self) -> DropReport {
        self.dropped
    }

    /// For each kept row, its 1-based data-row number in the file.
    pub fn rows(&self) -> &[usize] {
        &self.row
    }

    /// Participants.
    pub fn id(&self) -> &Codes {
        &self.id
    }

    /// Exact age in years, per row.
    pub fn age(&self) -> &[f64] {
        &self.age
    }

    /// The outcome, per row.
    pub fn outcome(&self) -> &[f64] {
        &self.outcome
    }

    /// Cohort, if given.
    pub fn cohort(&self) -> Option<&Codes> {
        self.cohort.as_ref()
    }

    /// Wave, if given.
    pub fn wave(&self) -> Option<&Codes> {
        self.wave.as_ref()
    }

    /// Cluster, if given.
    pub fn cluster(&self) -> Option<&Codes> {
        self.cluster.as_ref()
    }

    /// Covariates, in the order given.
    pub fn covariates(&self) -> &[Covariate] {
        &self.covariates
    }

    /// Calendar times, when the file gives them.
    pub fn calendar(&self) -> Option<&Calendar> {
        self.calendar.as_ref()
    }

    /// The same panel with its rows in the order `order` (a permutation of
    /// the rows), participants coded in their new order of first appearance.
    ///
    /// # Errors
    /// [`Error::Spec`] when `order` is not a permutation of the rows.
    pub fn reordered(&self, order: &[usize]) -> Result<Panel> {
        let n = self.n();
        let mut seen = vec![false; n];
        if order.len() != n || order.iter().any(|&r| r >= n || std::mem::replace(&mut seen[r], true)) {
            return Err(Error::Spec {
                parameter: "order".into(),
                message: format!("not a permutation of the {n} rows"),
            });
        }
        let pick = |c: &Codes, sort: bool| {
            Codes::from_strs(order.iter().map(|&r| c.levels[c.codes[r] as usize].as_str()), sort)
        };
        let pick_f = |v: &[f64]| order.iter().map(|&r| v[r]).collect::<Vec<f64>>();
        Ok(Panel {
            row: order.iter().map(|&r| self.row[r]).collect(),
            id: pick(&self.id, false),
            age: pick_f(&self.age).into(),
            outcome: pick_f(&self.outcome).into(),
            cohort: self.cohort.as_ref().map(|c| pick(c, true)),
            wave: self.wave.as_ref().map(|c| pick(c, true)),
            cluster: self.cluster.as_ref().map(|c| pick(c, true)),
            covariates: self
                .covariates
                .iter()
                .map(|c| Covariate {
                    name: c.name.clone(),
                    values: match &c.values {
                        CovariateValues::Numeric(v) => CovariateValues::Numeric(pick_f(v).into()),
                        CovariateValues::Categorical(k) => CovariateValues::Categorical(pick(k, true)),
                    },
                })
                .collect(),
            calendar: self.calendar.as_ref().map(|c| Calendar {
                period: pick_f(&c.period),
                birth: pick_f(&c.birth),
                source: c.source,
            }),
            ..self.clone()
        })
    }

    /// The same panel with new ages, one per row (for example in months).
    /// With calendar times, the period of each row is kept and the birth time
    /// follows as period − age.
    ///
    /// # Errors
    /// [`Error::Spec`] when there is not one age per row, a new age is not
    /// finite, or all are equal.
    pub fn with_ages(&self, age: Vec<f64>) -> Result<Panel> {
        if age.len() != self.n() {
            return Err(Error::Spec {
                parameter: "age".into(),
                message: format!("{} ages for {} rows; give one per row", age.len(), self.n()),
            });
        }
        if let Some(a) = age.iter().find(|a| !a.is_finite()) {
            return Err(Error::Spec {
                parameter: "age".into(),
                message: format!("a new age {a} is not finite"),
            });
        }
        if age.iter().all(|&a| a == age[0]) {
            return Err(Error::Spec {
                parameter: "age".into(),
                message: "every new age is the same; a trajectory needs ages that differ".into(),
            });
        }
        let calendar = self.calendar.as_ref().map(|c| Calendar {
            birth: c.period.iter().zip(&age).map(|(p, a)| p - a).collect(),
            period: c.period.clone(),
            source: c.source,
        });
        Ok(Panel {
            age: age.into(),
            calendar,
            ..self.clone()
        })
    }

    /// The same panel as if the file gave no calendar times.
    pub fn without_calendar(&self) -> Panel {
        Panel {
            calendar: None,
            ..self.clone()
        }
    }

    /// The same panel with participant `k` renamed `labels[k]` (one new,
    /// distinct label per participant), coded anew with sorted levels.
    ///
    /// # Errors
    /// [`Error::Spec`] when the labels are not one distinct label per participant.
    pub fn with_id_labels(&self, labels: &[String]) -> Result<Panel> {
        let distinct: std::collections::HashSet<&String> = labels.iter().collect();
        if labels.len() != self.id.n_levels() || distinct.len() != labels.len() {
            return Err(Error::Spec {
                parameter: "id".into(),
                message: format!("give {} distinct labels, one per participant", self.id.n_levels()),
            });
        }
        let id = Codes::from_strs(self.id.codes.iter().map(|&k| labels[k as usize].as_str()), true);
        Ok(Panel { id, ..self.clone() })
    }
}

#[cfg(test)]
mod transform_tests {
    use crate::simulate::{Design, simulate};

    // The transformations refuse what would break a panel's invariants.
    #[test]
    fn transformations_refuse_what_breaks_a_panel() {
        let mut design = Design::demo();
        design.per_cohort = 4;
        let p = simulate(&design).panel(true);
        let n = p.n();
        assert!(p.reordered(&vec![0; n]).is_err(), "a repeated row is not a permutation");
        assert!(p.reordered(&[0, 1]).is_err());
        let back: Vec<usize> = (0..n).rev().collect();
        let r = p.reordered(&back).unwrap();
        assert_eq!(r.age()[0], p.age()[n - 1]);
        assert_eq!(r.id().n_levels(), p.id().n_levels());
        let mut ages = p.age().to_vec();
        ages[0] = f64::NAN;
        assert!(p.with_ages(ages).is_err());
        assert!(p.with_ages(vec![12.0; n]).is_err(), "ages that never differ");
        assert!(p.with_ages(vec![12.0; n - 1]).is_err());
        let months = p.with_ages(p.age().iter().map(|a| a * 12.0).collect()).unwrap();
        let cal = months.calendar().unwrap();
        assert!((cal.period[0] - cal.birth[0] - months.age()[0]).abs() < 1e-9);
        assert!(p.with_id_labels(&["a".into()]).is_err());
        let same = vec!["x".to_string(); p.id().n_levels()];
        assert!(p.with_id_labels(&same).is_err(), "labels must be distinct");
        assert!(p.without_calendar().calendar().is_none());
    }
}

#[cfg(test)]
mod codes_tests {
    use super::Codes;

    /// Codes by one map from the start (the definition: levels in order of
    /// first appearance, then sorted when asked).
    fn by_map(labels: &[&str], sort: bool) -> (Vec<String>, Vec<u32>) {
        let mut levels: Vec<String> = Vec::new();
        let codes: Vec<u32> = labels
            .iter()
            .map(|l| match levels.iter().position(|v| v == l) {
                Some(k) => k as u32,
                None => {
                    levels.push(l.to_string());
                    (levels.len() - 1) as u32
                }
            })
            .collect();
        if !sort {
            return (levels, codes);
        }
        let mut sorted = levels.clone();
        sorted.sort_by(|a, b| super::label_order(a, b));
        let codes = codes
            .iter()
            .map(|&c| sorted.iter().position(|v| *v == levels[c as usize]).unwrap() as u32)
            .collect();
        (sorted, codes)
    }

    // Runs in order, runs out of order, a label that comes back after
    // others, and labels that sort before the first: the codes equal those
    // of one map from the start, with and without sorting.
    #[test]
    fn codes_are_those_of_one_map_whatever_the_order_of_the_rows() {
        let mut rng = crate::simulate::Rng::new(4);
        let pool = ["a", "b", "c", "d", "e", "f", "10", "9", "b2", "aa", "P999", "P1000"];
        let mut cases: Vec<Vec<&str>> = vec![
            vec![],
            vec!["a", "a", "b", "b", "c"],
            vec!["b", "b", "a", "c", "b", "a"],
            vec!["a", "b", "c", "a"],
            vec!["c", "c", "d", "a", "d", "e", "c"],
            // Rising by length then bytes, then a label seen before.
            vec!["9", "10", "10", "9"],
            vec!["1", "2", "10", "11", "2"],
            vec!["P999", "P1000", "P999"],
            // Each order broken once, by different runs.
            vec!["b", "aa", "c", "b"],
            vec!["P1", "P10", "P2", "P1"],
        ];
        for _ in 0..300 {
            let n = (rng.uniform() * 12.0) as usize;
            cases.push(
                (0..n)
                    .map(|_| pool[(rng.uniform() * pool.len() as f64) as usize])
                    .collect(),
            );
        }
        for labels in &cases {
            for sort in [false, true] {
                for expect in [0, 3] {
                    let c = Codes::from_strs_expecting(labels.iter().copied(), sort, expect);
                    let (levels, codes) = by_map(labels, sort);
                    assert_eq!(
                        (c.levels.to_vec(), c.codes.to_vec()),
                        (levels, codes),
                        "{labels:?} sort {sort}"
                    );
                }
            }
        }
    }
}
