//! Data intake: reading a long-format file and validating its columns into a
//! [`Panel`].
//!
//! Rules (notes/decisions.md):
//! - missing cells are empty, `NA` or `.`; rows with a missing outcome, age or
//!   covariate are dropped and counted in [`DropReport`], never silently;
//! - `NaN`, `inf` and text in a numeric column are errors naming the row;
//! - a participant id is required on every row;
//! - with a wave column, two rows for one participant and wave are an error.

pub mod dates;
pub mod derive;
pub mod paths;
pub mod read;
pub mod summary;

pub use summary::DataSummary;

use std::collections::HashMap;

/// A hash map with a fast, fixed (hence reproducible) hasher, for the
/// label and key lookups done once per row (foldhash, already a dependency
/// of the table reader; notes/decisions.md).
pub type FastMap<K, V> = HashMap<K, V, foldhash::fast::FixedState>;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};
use read::RawColumn;

/// Which column plays which part.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Roles {
    /// Participant identifier.
    pub id: String,
    /// Exact age at assessment, in years (may be left out of a study file
    /// when ages come from dates).
    #[serde(default)]
    pub age: String,
    /// The outcome measure.
    pub outcome: String,
    /// Birth date (ISO YYYY-MM-DD); with `date`, age is computed from the two
    /// and `age` names the computed column.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub birth_date: Option<String>,
    /// Assessment date (ISO YYYY-MM-DD).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub date: Option<String>,
    /// Wide files: the outcome's column at each wave, in wave order. With
    /// these, `outcome`, `age` and `wave` name the reshaped long columns.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub wide_outcome: Vec<String>,
    /// Wide files: the age column at each wave, in wave order.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub wide_age: Vec<String>,
    /// Wide files: the assessment-date column at each wave (with `birth_date`).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub wide_date: Vec<String>,
    /// Birth cohort (optional).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub cohort: Option<String>,
    /// Wave or occasion (optional).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub wave: Option<String>,
    /// Cluster such as school (optional).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub cluster: Option<String>,
    /// Period: the calendar time of each assessment as a (decimal) year
    /// (optional; ignored when ages come from dates, which give it).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub period: Option<String>,
    /// Birth year as a number (optional; ignored when ages come from dates).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub birth_year: Option<String>,
    /// Covariates: numeric where every value is a number, otherwise categorical.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub covariates: Vec<String>,
    /// Covariates to treat as categorical even when their values are numbers.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub categorical: Vec<String>,
}

impl Roles {
    /// Every (role, column) pair, in a fixed order.
    pub fn all(&self) -> Vec<(String, String)> {
        if self.is_wide() {
            return self.all_wide();
        }
        let mut v = vec![("id".to_string(), self.id.clone())];
        match self.dates() {
            Some((b, d)) => {
                v.push(("birth_date".to_string(), b.to_string()));
                v.push(("date".to_string(), d.to_string()));
            }
            None => v.push(("age".to_string(), self.age.clone())),
        }
        v.push(("outcome".to_string(), self.outcome.clone()));
        let calendar = if self.dates().is_some() {
            (&None, &None)
        } else {
            (&self.period, &self.birth_year)
        };
        for (role, c) in [
            ("cohort", &self.cohort),
            ("wave", &self.wave),
            ("cluster", &self.cluster),
            ("period", calendar.0),
            ("birth_year", calendar.1),
        ] {
            if let Some(c) = c {
                v.push((role.to_string(), c.clone()));
            }
        }
        for c in &self.covariates {
            v.push(("covariates".to_string(), c.clone()));
        }
        v
    }
}

impl Roles {
    /// Whether the file is wide (one row per participant).
    pub fn is_wide(&self) -> bool {
        !self.wide_outcome.is_empty()
    }

    /// The columns of a wide file, with their roles.
    fn all_wide(&self) -> Vec<(String, String)> {
        let mut v = vec![("id".to_string(), self.id.clone())];
        if let Some(b) = &self.birth_date {
            v.push(("birth_date".to_string(), b.clone()));
        }
        for c in &self.wide_outcome {
            v.push(("wide_outcome".to_string(), c.clone()));
        }
        for c in &self.wide_age {
            v.push(("wide_age".to_string(), c.clone()));
        }
        for c in &self.wide_date {
            v.push(("wide_date".to_string(), c.clone()));
        }
        let birth_year = if self.birth_date.is_some() {
            &None
        } else {
            &self.birth_year
        };
        for (role, c) in [
            ("cohort", &self.cohort),
            ("cluster", &self.cluster),
            ("birth_year", birth_year),
        ] {
            if let Some(c) = c {
                v.push((role.to_string(), c.clone()));
            }
        }
        for c in &self.covariates {
            v.push(("covariates".to_string(), c.clone()));
        }
        v
    }

    /// The birth-date and assessment-date columns, when age comes from dates.
    pub fn dates(&self) -> Option<(&str, &str)> {
        match (&self.birth_date, &self.date) {
            (Some(b), Some(d)) => Some((b.as_str(), d.as_str())),
            _ => None,
        }
    }
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
            let numeric: Option<Vec<f64>> = levels.iter().map(|l| l.trim().parse::<f64>().ok()).collect();
            match numeric {
                Some(nums) => order.sort_by(|&a, &b| nums[a].total_cmp(&nums[b])),
                None => order.sort_by(|&a, &b| levels[a].cmp(&levels[b])),
            }
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

/// Options for reading.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ReadOptions {
    /// Field delimiter for CSV files.
    pub delimiter: u8,
}

impl Default for ReadOptions {
    fn default() -> Self {
        ReadOptions { delimiter: b',' }
    }
}

/// Cells that mean "missing" (common practice).
pub(crate) fn is_missing(s: &str) -> bool {
    matches!(s, "" | "NA" | "." | "na" | "N/A")
}

/// A numeric cell: `Ok(None)` when missing.
fn number_at(path: &Path, column: &str, col: &RawColumn, r: usize) -> Result<Option<f64>> {
    let bad = |value: String, advice: &str| Error::BadValue {
        path: path.to_path_buf(),
        column: column.to_string(),
        row: r + 1,
        value,
        advice: advice.to_string(),
    };
    match col {
        RawColumn::Number(v) => match v[r] {
            None => Ok(None),
            Some(x) if x.is_finite() => Ok(Some(x)),
            Some(x) => Err(bad(
                x.to_string(),
                "is not a finite number; store missing values as nulls",
            )),
        },
        RawColumn::Text(v) => match v.get(r).map(str::trim) {
            None => Ok(None),
            Some(s) if is_missing(s) => Ok(None),
            Some(s) => match s.parse::<f64>() {
                Ok(x) if x.is_finite() => Ok(Some(x)),
                Ok(_) => Err(bad(
                    s.to_string(),
                    "is not a finite number; write a missing value as an empty cell or NA",
                )),
                Err(_) => Err(bad(
                    s.to_string(),
                    "is not a number; fix the cell, write a missing value as an empty cell or NA, or check the decimal separator",
                )),
            },
        },
    }
}

/// A label cell: `None` when missing.
fn label_at(col: &RawColumn, r: usize) -> Option<String> {
    match col {
        RawColumn::Text(v) => v.get(r).map(str::trim).filter(|s| !is_missing(s)).map(str::to_string),
        RawColumn::Number(v) => v[r].map(|x| {
            if x.fract() == 0.0 && x.abs() < 1e15 {
                format!("{}", x as i64)
            } else {
                x.to_string()
            }
        }),
    }
}

/// Read and validate a long-format panel.
///
/// # Errors
/// A one-line [`Error`] naming the file, and where it applies the column, row
/// and value, for: an unreadable or empty file, a header with no rows, a
/// missing column, a non-numeric or non-finite value, a missing participant id,
/// fewer than two participants, no variation in age, duplicate
/// participant–wave rows, and a constant covariate.
pub fn load(path: &Path, roles: &Roles, options: ReadOptions) -> Result<Panel> {
    if !path.exists() {
        return Err(Error::Io {
            path: path.to_path_buf(),
            message: "no such file".into(),
        });
    }
    if path.is_dir() {
        return Err(Error::Io {
            path: path.to_path_buf(),
            message: "this is a folder, not a file".into(),
        });
    }
    validate_roles(roles)?;
    let header = read::header(path, options.delimiter)?;
    for (role, column) in roles.all() {
        if !header.iter().any(|h| h == &column) {
            let mut available = header.clone();
            if header.len() == 1 {
                for d in [';', '\t', '|'] {
                    if header[0].contains(d) {
                        available = vec![format!(
                            "{} (one column only: the file looks {}-delimited; set the `delimiter` to '{}')",
                            header[0],
                            match d {
                                ';' => "semicolon",
                                '\t' => "tab",
                                _ => "pipe",
                            },
                            if d == '\t' { "\\t".to_string() } else { d.to_string() }
                        )];
                    }
                }
            }
            return Err(Error::MissingColumn {
                path: path.to_path_buf(),
                role: role.into(),
                column,
                available,
            });
        }
    }
    let mut wanted: Vec<String> = roles.all().into_iter().map(|(_, c)| c).collect();
    wanted.dedup();
    let mut seen = std::collections::HashSet::new();
    wanted.retain(|c| seen.insert(c.clone()));
    let mut numeric: Vec<String> = vec![roles.outcome.clone()];
    if roles.dates().is_none() {
        numeric.push(roles.age.clone());
    }
    numeric.extend(roles.period.iter().chain(&roles.birth_year).cloned());
    numeric.extend(roles.wide_outcome.iter().chain(&roles.wide_age).cloned());
    let table = read::read_columns(path, &wanted, &numeric, options.delimiter)?;
    if table.n_rows == 0 {
        return Err(Error::Data {
            path: path.to_path_buf(),
            message: "the file has a header but no data rows; add data or check that the right file was given".into(),
        });
    }
    if roles.is_wide() {
        let (long, long_roles, file_row) = reshape_wide(path, roles, &table)?;
        let mut panel = build(path, &long_roles, &long)?;
        panel.row = panel.row.iter().map(|&r| file_row[r - 1]).collect();
        return Ok(panel);
    }
    build(path, roles, &table)
}

/// Reshape a wide table (one row per participant, one column per wave for the
/// outcome and for age or date) to long, participant by participant in wave
/// order. Wide cells are checked first, so errors name the file's own column
/// and row. Returns the long table, its roles, and each long row's file row.
fn reshape_wide(path: &Path, roles: &Roles, table: &read::RawTable) -> Result<(read::RawTable, Roles, Vec<usize>)> {
    let k = roles.wide_outcome.len();
    let times = if roles.wide_date.is_empty() {
        &roles.wide_age
    } else {
        &roles.wide_date
    };
    if times.len() != k {
        return Err(Error::Spec {
            parameter: if roles.wide_date.is_empty() {
                "wide_age"
            } else {
                "wide_date"
            }
            .into(),
            message: format!(
                "{} columns for {} outcome columns; give one per wave, in the same order",
                times.len(),
                k
            ),
        });
    }
    if !roles.wide_date.is_empty() && roles.birth_date.is_none() {
        return Err(Error::Spec {
            parameter: "wide_date".into(),
            message: "dates per wave need a `birth_date` column".into(),
        });
    }
    if roles.wide_date.is_empty() && roles.birth_date.is_some() {
        return Err(Error::Spec {
            parameter: "birth_date".into(),
            message: "in a wide file, give the assessment dates with `wide_date`".into(),
        });
    }
    let n = table.n_rows;
    let col = |name: &str| &table.columns[name];
    // Check every numeric wide cell in place.
    for r in 0..n {
        for c in roles.wide_outcome.iter().chain(roles.wide_age.iter()) {
            number_at(path, c, col(c), r)?;
        }
    }
    let text = |c: &RawColumn, r: usize| label_at(c, r);
    let number = |c: &RawColumn, r: usize| -> Option<String> {
        match c {
            RawColumn::Number(v) => v[r].map(|x| x.to_string()),
            RawColumn::Text(v) => v.get(r).map(str::to_string),
        }
    };
    let mut file_row = Vec::with_capacity(n * k);
    let mut out: Vec<(String, Vec<Option<String>>)> = Vec::new();
    let outcome_name = roles.outcome.clone();
    let age_name = roles.age.clone();
    let wave_name = roles.wave.clone().unwrap_or_else(|| "wave".into());
    let mut constant: Vec<String> = vec![roles.id.clone()];
    constant.extend(roles.cohort.iter().cloned());
    constant.extend(roles.cluster.iter().cloned());
    constant.extend(roles.birth_date.iter().cloned());
    constant.extend(roles.birth_year.iter().filter(|_| roles.birth_date.is_none()).cloned());
    constant.extend(roles.covariates.iter().cloned());
    for c in &constant {
        out.push((c.clone(), Vec::with_capacity(n * k)));
    }
    let time_name = if roles.wide_date.is_empty() {
        age_name.clone()
    } else {
        roles.date.clone().unwrap_or_else(|| "date".into())
    };
    let mut y = Vec::with_capacity(n * k);
    let mut t = Vec::with_capacity(n * k);
    let mut w = Vec::with_capacity(n * k);
    for r in 0..n {
        for (wave, (outcome_col, time_col)) in roles.wide_outcome.iter().zip(times).enumerate() {
            for (j, c) in constant.iter().enumerate() {
                out[j].1.push(number(col(c), r).or_else(|| text(col(c), r)));
            }
            y.push(number(col(outcome_col), r));
            t.push(number(col(time_col), r));
            w.push(Some((wave + 1).to_string()));
            file_row.push(r + 1);
        }
    }
    let mut columns: std::collections::HashMap<String, RawColumn> =
        out.into_iter().map(|(c, v)| (c, RawColumn::Text(v.into()))).collect();
    columns.insert(outcome_name.clone(), RawColumn::Text(y.into()));
    columns.insert(time_name.clone(), RawColumn::Text(t.into()));
    columns.insert(wave_name.clone(), RawColumn::Text(w.into()));
    let long_roles = Roles {
        wide_outcome: Vec::new(),
        wide_age: Vec::new(),
        wide_date: Vec::new(),
        wave: Some(wave_name),
        date: if roles.wide_date.is_empty() {
            None
        } else {
            Some(time_name)
        },
        ..roles.clone()
    };
    Ok((
        read::RawTable {
            path: path.to_path_buf(),
            n_rows: n * k,
            columns,
        },
        long_roles,
        file_row,
    ))
}

fn validate_roles(roles: &Roles) -> Result<()> {
    for (role, c) in roles.all() {
        if c.trim().is_empty() {
            return Err(Error::Spec {
                parameter: role.into(),
                message: "the column name is empty; name a column of the file".into(),
            });
        }
    }
    let all = roles.all();
    for (i, (ra, ca)) in all.iter().enumerate() {
        for (rb, cb) in &all[..i] {
            if ca == cb {
                return Err(Error::SharedColumn {
                    column: ca.clone(),
                    first: rb.as_str().into(),
                    second: ra.as_str().into(),
                });
            }
        }
    }
    if !roles.is_wide() && roles.birth_date.is_some() != roles.date.is_some() {
        return Err(Error::Spec {
            parameter: if roles.birth_date.is_some() {
                "date"
            } else {
                "birth_date"
            }
            .into(),
            message: "ages from dates need both a `birth_date` and a `date` column".into(),
        });
    }
    if roles.is_wide() && roles.period.is_some() {
        return Err(Error::Spec {
            parameter: "period".into(),
            message: "a wide file has one assessment time per wave: give them with `wide_date` (and `birth_date`), or a `birth_year` column".into(),
        });
    }
    for c in &roles.categorical {
        if !roles.covariates.contains(c) {
            return Err(Error::Spec {
                parameter: "categorical".into(),
                message: format!("'{c}' is not among the covariates; also list it under `covariates`"),
            });
        }
    }
    Ok(())
}

fn build(path: &Path, roles: &Roles, table: &read::RawTable) -> Result<Panel> {
    let n = table.n_rows;
    let col = |name: &str| &table.columns[name];
    let y_col = col(&roles.outcome);
    // The columns read per row, looked up once.
    let dates = roles.dates().map(|(b, d)| (b, d, col(b), col(d)));
    let age_col = if dates.is_none() { Some(col(&roles.age)) } else { None };
    let cov_cols: Vec<&RawColumn> = roles.covariates.iter().map(|c| col(c)).collect();
    // Age: a numeric column, or computed from two date columns.
    let age_at = |r: usize| -> Result<Option<f64>> {
        match (age_col, dates) {
            (Some(c), _) => number_at(path, &roles.age, c, r),
            (None, None) => Ok(None),
            (None, Some((b, d, bc, dc))) => {
                let (Some(bs), Some(ds)) = (label_at(bc, r), label_at(dc, r)) else {
                    return Ok(None);
                };
                let parse = |column: &str, s: &str| {
                    dates::Date::parse(s).ok_or_else(|| Error::BadValue {
                        path: path.to_path_buf(),
                        column: column.to_string(),
                        row: r + 1,
                        value: s.to_string(),
                        advice: "is not a calendar date in YYYY-MM-DD form; fix the cell or leave it empty".into(),
                    })
                };
                let (birth, date) = (parse(b, &bs)?, parse(d, &ds)?);
                match dates::decimal_age(birth, date) {
                    Some(a) => Ok(Some(a)),
                    None => Err(Error::BadValue {
                        path: path.to_path_buf(),
                        column: d.to_string(),
                        row: r + 1,
                        value: ds,
                        advice: format!("is before the birth date {bs}; check both dates"),
                    }),
                }
            }
        }
    };
    let mut dropped = DropReport::default();
    let mut keep_rows = Vec::with_capacity(n);
    let mut age = Vec::with_capacity(n);
    let mut outcome = Vec::with_capacity(n);
    // Covariates: numeric unless declared categorical or any cell is not a number.
    let mut cov_numeric: Vec<bool> = roles
        .covariates
        .iter()
        .map(|c| {
            !roles.categorical.contains(c)
                && match col(c) {
                    RawColumn::Number(_) => true,
                    RawColumn::Text(v) => v
                        .iter()
                        .flatten()
                        .map(|s| s.trim())
                        .filter(|s| !is_missing(s))
                        .all(|s| s.parse::<f64>().is_ok()),
                }
        })
        .collect();
    if roles.covariates.is_empty() {
        cov_numeric.clear();
    }
    'rows: for r in 0..n {
        let y = number_at(path, &roles.outcome, y_col, r)?;
        let a = age_at(r)?;
        let Some(y) = y else {
            dropped.missing_outcome += 1;
            continue;
        };
        let Some(a) = a else {
            dropped.missing_age += 1;
            continue;
        };
        for (k, c) in roles.covariates.iter().enumerate() {
            let missing = if cov_numeric[k] {
                number_at(path, c, cov_cols[k], r)?.is_none()
            } else {
                label_at(cov_cols[k], r).is_none()
            };
            if missing {
                dropped.missing_covariate += 1;
                continue 'rows;
            }
        }
        keep_rows.push(r);
        age.push(a);
        outcome.push(y);
    }
    if keep_rows.is_empty() {
        return Err(Error::Data {
            path: path.to_path_buf(),
            message: format!(
                "no usable rows: {} with a missing outcome, {} with a missing age, {} with a missing covariate; check the column roles",
                dropped.missing_outcome, dropped.missing_age, dropped.missing_covariate
            ),
        });
    }
    let labels = |name: &str, required: bool| -> Result<Vec<String>> {
        let c = col(name);
        keep_rows
            .iter()
            .map(|&r| match label_at(c, r) {
                Some(s) => Ok(s),
                None if required => Err(Error::BadValue {
                    path: path.to_path_buf(),
                    column: name.to_string(),
                    row: r + 1,
                    value: String::new(),
                    advice: "is empty; every row needs a value in this column".into(),
                }),
                None => Ok("(missing)".to_string()),
            })
            .collect()
    };
    // Label columns: coded straight from the text, every cell required.
    let codes_of = |name: &str, sort: bool| -> Result<Codes> {
        match col(name) {
            RawColumn::Text(v) => {
                let cells: Vec<&str> = keep_rows
                    .iter()
                    .map(|&r| match v.get(r).map(str::trim) {
                        Some(t) if !is_missing(t) => Ok(t),
                        _ => Err(Error::BadValue {
                            path: path.to_path_buf(),
                            column: name.to_string(),
                            row: r + 1,
                            value: String::new(),
                            advice: "is empty; every row needs a value in this column".into(),
                        }),
                    })
                    .collect::<Result<_>>()?;
                Ok(Codes::from_strs(cells.into_iter(), sort))
            }
            RawColumn::Number(_) => Ok(Codes::new(&labels(name, true)?, sort)),
        }
    };
    let id = codes_of(&roles.id, false)?;
    let cohort = roles.cohort.as_deref().map(|c| codes_of(c, true)).transpose()?;
    let wave = roles.wave.as_deref().map(|c| codes_of(c, true)).transpose()?;
    let cluster = roles.cluster.as_deref().map(|c| codes_of(c, true)).transpose()?;
    let mut covariates = Vec::with_capacity(roles.covariates.len());
    for (k, c) in roles.covariates.iter().enumerate() {
        let values = if cov_numeric[k] {
            let mut v = Vec::with_capacity(keep_rows.len());
            for &r in &keep_rows {
                v.push(number_at(path, c, col(c), r)?.unwrap_or(f64::NAN));
            }
            let first = v[0];
            if v.iter().all(|&x| x == first) {
                return Err(Error::Data {
                    path: path.to_path_buf(),
                    message: format!(
                        "covariate '{c}' takes the single value {first} in every usable row; drop it from the model"
                    ),
                });
            }
            CovariateValues::Numeric(v)
        } else {
            let codes = Codes::new(&labels(c, true)?, true);
            if codes.n_levels() < 2 {
                return Err(Error::Data {
                    path: path.to_path_buf(),
                    message: format!(
                        "covariate '{c}' takes the single value '{}' in every usable row; drop it from the model",
                        codes.levels[0]
                    ),
                });
            }
            CovariateValues::Categorical(codes)
        };
        covariates.push(Covariate {
            name: c.clone(),
            values,
        });
    }
    let row: Vec<usize> = keep_rows.iter().map(|r| r + 1).collect();
    let calendar = calendar_of(path, roles, table, &keep_rows, &age)?;
    // A participant's cohort and birth date cannot change between waves.
    let mut fixed: Vec<(&str, Vec<String>)> = Vec::new();
    if let Some(c) = &roles.cohort {
        fixed.push((c.as_str(), labels(c, true)?));
    }
    if let (None, Some(b)) = (roles.dates(), &roles.birth_year) {
        fixed.push((b.as_str(), labels(b, true)?));
    }
    if let Some((b, _)) = roles.dates() {
        fixed.push((
            b,
            keep_rows
                .iter()
                .map(|&r| label_at(col(b), r).unwrap_or_default())
                .collect(),
        ));
    }
    for (column, values) in &fixed {
        let mut first: Vec<Option<usize>> = vec![None; id.n_levels()];
        for (k, v) in values.iter().enumerate() {
            let who = id.codes[k] as usize;
            match first[who] {
                None => first[who] = Some(k),
                Some(f) if values[f] != *v => {
                    return Err(Error::Data {
                        path: path.to_path_buf(),
                        message: format!(
                            "participant '{}' has {column} '{}' in row {} but '{}' in row {}; a participant's {column} cannot change between waves",
                            id.levels[who], values[f], row[f], v, row[k]
                        ),
                    });
                }
                Some(_) => {}
            }
        }
    }
    if id.n_levels() < 2 {
        return Err(Error::Data {
            path: path.to_path_buf(),
            message: format!(
                "column '{}' holds a single participant ('{}'); a trajectory across participants needs at least two",
                roles.id, id.levels[0]
            ),
        });
    }
    let (amin, amax) = age.iter().fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &a| {
        (lo.min(a), hi.max(a))
    });
    if amax - amin <= 0.0 {
        return Err(Error::Data {
            path: path.to_path_buf(),
            message: format!(
                "column '{}' has the same age {amin} in every usable row; an age trajectory needs ages that differ",
                roles.age
            ),
        });
    }
    if let Some(w) = &wave {
        let mut seen: FastMap<(u32, u32), usize> =
            FastMap::with_capacity_and_hasher(id.codes.len(), Default::default());
        for r in 0..id.codes.len() {
            if let Some(prev) = seen.insert((id.codes[r], w.codes[r]), r) {
                return Err(Error::Data {
                    path: path.to_path_buf(),
                    message: format!(
                        "participant '{}' has two rows for wave '{}' (rows {} and {}); remove the duplicate or check the wave column",
                        id.label(r),
                        w.label(r),
                        row[prev],
                        row[r]
                    ),
                });
            }
        }
    }
    Ok(Panel {
        source: path.to_path_buf(),
        roles: roles.clone(),
        n_rows_read: n,
        dropped,
        row,
        id,
        age,
        outcome,
        cohort,
        wave,
        cluster,
        covariates,
        calendar,
    })
}

/// Calendar times of the kept rows: from dates, or from period and birth-year
/// columns (one derived from the other and age when only one is given).
fn calendar_of(
    path: &Path,
    roles: &Roles,
    table: &read::RawTable,
    keep_rows: &[usize],
    age: &[f64],
) -> Result<Option<Calendar>> {
    let col = |name: &str| &table.columns[name];
    if let Some((b, d)) = roles.dates() {
        let year_of = |c: &str, r: usize| {
            label_at(col(c), r)
                .and_then(|s| dates::Date::parse(&s))
                .map_or(f64::NAN, dates::decimal_year)
        };
        return Ok(Some(Calendar {
            period: keep_rows.iter().map(|&r| year_of(d, r)).collect(),
            birth: keep_rows.iter().map(|&r| year_of(b, r)).collect(),
            source: CalendarSource::Dates,
        }));
    }
    let numbers = |name: &str| -> Result<Vec<f64>> {
        keep_rows
            .iter()
            .map(|&r| {
                number_at(path, name, col(name), r)?.ok_or_else(|| Error::BadValue {
                    path: path.to_path_buf(),
                    column: name.to_string(),
                    row: r + 1,
                    value: String::new(),
                    advice: "is empty; every row with an outcome and age needs a value in this column".into(),
                })
            })
            .collect()
    };
    let period = roles.period.as_deref().map(numbers).transpose()?;
    let birth = roles.birth_year.as_deref().map(numbers).transpose()?;
    Ok(match (period, birth) {
        (Some(period), Some(birth)) => Some(Calendar {
            period,
            birth,
            source: CalendarSource::Columns,
        }),
        (Some(period), None) => Some(Calendar {
            birth: period.iter().zip(age).map(|(p, a)| p - a).collect(),
            period,
            source: CalendarSource::BirthFromPeriod,
        }),
        (None, Some(birth)) => Some(Calendar {
            period: birth.iter().zip(age).map(|(b, a)| b + a).collect(),
            birth,
            source: CalendarSource::PeriodFromBirth,
        }),
        (None, None) => None,
    })
}

/// Numeric columns of a file, with the rows that have every value.
#[derive(Debug, Clone, PartialEq)]
pub struct NumericTable {
    /// The file.
    pub source: PathBuf,
    /// One vector per requested column, over the kept rows.
    pub columns: Vec<Vec<f64>>,
    /// Data rows in the file.
    pub n_rows_read: usize,
    /// Rows left out because a value was missing.
    pub dropped: usize,
    /// The 1-based data-row number of each kept row.
    pub rows: Vec<usize>,
}

/// Read named numeric columns (for tables of counts and repeated
/// cross-sections). Rows with a missing value in any of them are dropped and
/// counted; text or non-finite values are errors naming the cell.
///
/// # Errors
/// The errors of [`load`] for the file and its cells, and [`Error::Data`]
/// when no row has every value.
pub fn numeric_table(path: &Path, columns: &[(&str, &str)], options: ReadOptions) -> Result<NumericTable> {
    if !path.exists() {
        return Err(Error::Io {
            path: path.to_path_buf(),
            message: "no such file".into(),
        });
    }
    for (i, (role, column)) in columns.iter().enumerate() {
        if let Some((other, _)) = columns[..i].iter().find(|(_, c)| c == column) {
            return Err(Error::SharedColumn {
                column: column.to_string(),
                first: (*other).into(),
                second: (*role).into(),
            });
        }
    }
    let header = read::header(path, options.delimiter)?;
    for (role, column) in columns {
        if !header.iter().any(|h| h == column) {
            return Err(Error::MissingColumn {
                path: path.to_path_buf(),
                role: (*role).into(),
                column: column.to_string(),
                available: header.clone(),
            });
        }
    }
    let names: Vec<String> = columns.iter().map(|(_, c)| c.to_string()).collect();
    let table = read::read_columns(path, &names, &names, options.delimiter)?;
    let mut out: Vec<Vec<f64>> = vec![Vec::with_capacity(table.n_rows); names.len()];
    let mut dropped = 0;
    let mut kept = Vec::with_capacity(table.n_rows);
    for r in 0..table.n_rows {
        let mut row = Vec::with_capacity(names.len());
        for name in &names {
            row.push(number_at(path, name, &table.columns[name], r)?);
        }
        if row.iter().any(Option::is_none) {
            dropped += 1;
            continue;
        }
        for (c, v) in out.iter_mut().zip(row) {
            c.push(v.unwrap_or(f64::NAN));
        }
        kept.push(r + 1);
    }
    if out[0].is_empty() {
        return Err(Error::Data {
            path: path.to_path_buf(),
            message: format!(
                "no row has a value in every one of {}; check the column roles",
                names.join(", ")
            ),
        });
    }
    Ok(NumericTable {
        source: path.to_path_buf(),
        columns: out,
        n_rows_read: table.n_rows,
        dropped,
        rows: kept,
    })
}
