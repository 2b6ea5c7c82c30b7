//! The validated panel and its parts: coded labels, covariates, the rows
//! dropped, and calendar time.

use std::path::PathBuf;

use serde::Serialize;

use super::{FastMap, Roles};

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
    /// The distinct labels, in level order.
    pub levels: Vec<String>,
    /// The level of each row.
    pub codes: Vec<u32>,
}

impl Codes {
    /// Code labels; levels are sorted (numerically when all labels are
    /// numbers), or in order of first appearance when `sort` is false.
    pub fn new(labels: &[String], sort: bool) -> Codes {
        Codes::from_strs(labels.iter().map(String::as_str), sort)
    }

    /// Code borrowed labels (see [`Codes::new`]).
    pub fn from_strs<'a>(labels: impl Iterator<Item = &'a str>, sort: bool) -> Codes {
        let mut index: FastMap<&str, u32> = FastMap::default();
        let mut levels: Vec<String> = Vec::new();
        let mut codes = Vec::with_capacity(labels.size_hint().0);
        for l in labels {
            let next = levels.len() as u32;
            let c = *index.entry(l).or_insert_with(|| {
                levels.push(l.to_string());
                next
            });
            codes.push(c);
        }
        if sort {
            let mut order: Vec<usize> = (0..levels.len()).collect();
            order.sort_by(|&a, &b| label_order(&levels[a], &levels[b]));
            let mut remap = vec![0u32; levels.len()];
            for (new, &old) in order.iter().enumerate() {
                remap[old] = new as u32;
            }
            codes.iter_mut().for_each(|c| *c = remap[*c as usize]);
            levels = order.into_iter().map(|i| levels[i].clone()).collect();
        }
        Codes { levels, codes }
    }

    /// Number of levels.
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
    /// Numbers.
    Numeric(Vec<f64>),
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
#[derive(Debug, Clone)]
pub struct Panel {
    /// The file it came from.
    pub source: PathBuf,
    /// The column roles.
    pub roles: Roles,
    /// Data rows in the file.
    pub n_rows_read: usize,
    /// Rows left out and why.
    pub dropped: DropReport,
    /// For each kept row, its 1-based data-row number in the file.
    pub row: Vec<usize>,
    /// Participants (levels in order of first appearance).
    pub id: Codes,
    /// Exact age in years.
    pub age: Vec<f64>,
    /// Outcome.
    pub outcome: Vec<f64>,
    /// Cohort, if given.
    pub cohort: Option<Codes>,
    /// Wave, if given.
    pub wave: Option<Codes>,
    /// Cluster, if given.
    pub cluster: Option<Codes>,
    /// Covariates, in the order given.
    pub covariates: Vec<Covariate>,
    /// With ages from dates: the assessment date and the birth date of each
    /// row as decimal calendar years (year + elapsed share of that year).
    pub calendar: Option<Calendar>,
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
