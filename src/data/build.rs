//! Building a validated panel from the columns read: rows kept and dropped,
//! labels coded, covariates typed, calendar time, and the checks that need
//! the data.

use std::path::Path;
use std::sync::Arc;

use super::cells::{label_at, label_ref, number_at};
use super::read::{self, RawColumn};
use super::{Calendar, CalendarSource, Codes, Covariate, CovariateValues, DropReport, Panel, Roles, dates, is_missing};
use crate::error::{Error, Result};

/// Build the panel from the columns read. The table shrinks as the panel
/// grows: each raw column is dropped once no later step reads it (on ten
/// million rows the raw age and outcome alone are 350 MB), so the raw
/// table and the panel are never both held whole.
pub(super) fn build(path: &Path, roles: &Roles, mut table: read::RawTable) -> Result<Panel> {
    let kept = keep_rows(path, roles, &table)?;
    // Read from here on: the labels, covariates and calendar columns.
    let labels: Vec<&str> = [
        Some(&roles.id),
        roles.cohort.as_ref(),
        roles.wave.as_ref(),
        roles.cluster.as_ref(),
    ]
    .into_iter()
    .flatten()
    .chain(&roles.covariates)
    .map(String::as_str)
    .collect();
    let calendar: Vec<&str> = [roles.period.as_deref(), roles.birth_year.as_deref()]
        .into_iter()
        .flatten()
        .chain(roles.dates().into_iter().flat_map(|(b, d)| [b, d]))
        .collect();
    let later: Vec<&str> = labels.iter().chain(&calendar).copied().collect();
    release(&mut table, &[&roles.outcome, &roles.age], &later);
    // Shared from here on (the conversion copies once, now that the raw
    // columns are gone, rather than at the end beside everything else).
    let age: Arc<[f64]> = kept.age.into();
    let outcome: Arc<[f64]> = kept.outcome.into();
    let (id, cohort, wave, cluster, covariates) = {
        let cells = Cells {
            path,
            table: &table,
            rows: &kept.rows,
        };
        let (id, cohort, wave, cluster) = coded(&cells, roles);
        let (id, cohort, wave, cluster) = (id?, cohort?, wave?, cluster?);
        (id, cohort, wave, cluster, covariates(&cells, roles, &kept.numeric)?)
    };
    release(&mut table, &labels, &calendar);
    let cells = Cells {
        path,
        table: &table,
        rows: &kept.rows,
    };
    let calendar = calendar_of(path, roles, &table, &kept.rows, &age)?;
    check_fixed_per_participant(&cells, roles, &id, cohort.as_ref())?;
    check_design(path, roles, &id, &age, wave.as_ref(), &kept.rows)?;
    // The 1-based file row of each kept row, in place.
    let row: Vec<usize> = kept.rows.into_iter().map(|r| r + 1).collect();
    Ok(Panel {
        source: path.to_path_buf(),
        roles: roles.clone(),
        n_rows_read: table.n_rows,
        dropped: kept.dropped,
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

/// Drop the columns `names` from the table, except those in `kept`.
fn release(table: &mut read::RawTable, names: &[&str], kept: &[&str]) {
    for name in names {
        if !kept.contains(name) {
            table.columns.remove(*name);
        }
    }
}

type Coded = (
    Result<Codes>,
    Result<Option<Codes>>,
    Result<Option<Codes>>,
    Result<Option<Codes>>,
);

/// The label columns coded side by side (each is one pass over the kept
/// rows with its own map): id, cohort, wave and cluster. The caller
/// reports their errors in that order, as when they were coded one after
/// another.
fn coded(cells: &Cells, roles: &Roles) -> Coded {
    let coded = |c: &Option<String>| c.as_deref().map(|c| cells.codes(c, true)).transpose();
    let ((id, cohort), (wave, cluster)) = rayon::join(
        || rayon::join(|| cells.codes(&roles.id, false), || coded(&roles.cohort)),
        || rayon::join(|| coded(&roles.wave), || coded(&roles.cluster)),
    );
    (id, cohort, wave, cluster)
}

/// The rows kept, with their age and outcome, and the rows dropped.
struct Kept {
    rows: Vec<usize>,
    age: Vec<f64>,
    outcome: Vec<f64>,
    dropped: DropReport,
    /// Whether each covariate is numeric.
    numeric: Vec<bool>,
}

/// Age of row `r`: a numeric column, or computed from two date columns.
fn age_at(path: &Path, roles: &Roles, table: &read::RawTable, r: usize) -> Result<Option<f64>> {
    let col = |name: &str| &table.columns[name];
    let Some((b, d)) = roles.dates() else {
        return number_at(path, &roles.age, col(&roles.age), r);
    };
    let (Some(bs), Some(ds)) = (label_at(col(b), r), label_at(col(d), r)) else {
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

/// Covariates are numeric unless declared categorical or any cell is not a number.
fn numeric_covariates(roles: &Roles, table: &read::RawTable) -> Vec<bool> {
    roles
        .covariates
        .iter()
        .map(|c| {
            !roles.categorical.contains(c)
                && match &table.columns[c] {
                    RawColumn::Number(_) => true,
                    RawColumn::Text(v) => v
                        .iter()
                        .flatten()
                        .map(|s| s.trim())
                        .filter(|s| !is_missing(s))
                        .all(|s| s.parse::<f64>().is_ok()),
                }
        })
        .collect()
}

/// Keep the rows with an outcome, an age and every covariate; count the rest.
fn keep_rows(path: &Path, roles: &Roles, table: &read::RawTable) -> Result<Kept> {
    let n = table.n_rows;
    let y_col = &table.columns[&roles.outcome];
    let cov_cols: Vec<&RawColumn> = roles.covariates.iter().map(|c| &table.columns[c]).collect();
    let numeric = numeric_covariates(roles, table);
    let mut kept = Kept {
        rows: Vec::with_capacity(n),
        age: Vec::with_capacity(n),
        outcome: Vec::with_capacity(n),
        dropped: DropReport::default(),
        numeric,
    };
    // A numeric age column is looked up once, not per row.
    let age_col = roles.dates().is_none().then(|| &table.columns[&roles.age]);
    'rows: for r in 0..n {
        let y = number_at(path, &roles.outcome, y_col, r)?;
        let a = match age_col {
            Some(col) => number_at(path, &roles.age, col, r)?,
            None => age_at(path, roles, table, r)?,
        };
        let Some(y) = y else {
            kept.dropped.missing_outcome += 1;
            continue;
        };
        let Some(a) = a else {
            kept.dropped.missing_age += 1;
            continue;
        };
        for (k, c) in roles.covariates.iter().enumerate() {
            let missing = if kept.numeric[k] {
                number_at(path, c, cov_cols[k], r)?.is_none()
            } else {
                label_at(cov_cols[k], r).is_none()
            };
            if missing {
                kept.dropped.missing_covariate += 1;
                continue 'rows;
            }
        }
        kept.rows.push(r);
        kept.age.push(a);
        kept.outcome.push(y);
    }
    if kept.rows.is_empty() {
        let d = kept.dropped;
        return Err(Error::Data {
            path: path.to_path_buf(),
            message: format!(
                "no usable rows: {} with a missing outcome, {} with a missing age, {} with a missing covariate; check the column roles",
                d.missing_outcome, d.missing_age, d.missing_covariate
            ),
        });
    }
    Ok(kept)
}

/// The cells of the kept rows.
struct Cells<'a> {
    path: &'a Path,
    table: &'a read::RawTable,
    rows: &'a [usize],
}

impl Cells<'_> {
    /// A column's labels over the kept rows; an empty cell is an error when
    /// `required`, else "(missing)".
    fn labels(&self, name: &str, required: bool) -> Result<Vec<String>> {
        let c = &self.table.columns[name];
        self.rows
            .iter()
            .map(|&r| match label_at(c, r) {
                Some(s) => Ok(s),
                None if required => Err(self.empty(name, r)),
                None => Ok("(missing)".to_string()),
            })
            .collect()
    }

    /// A label column coded straight from the text, every cell required.
    fn codes(&self, name: &str, sort: bool) -> Result<Codes> {
        match &self.table.columns[name] {
            RawColumn::Text(v) => {
                // Coded from the table directly, in one pass: no list of the
                // cells beside the codes. An empty cell is an error, named
                // by the first.
                let mut missing: Option<usize> = None;
                let labels = self.rows.iter().map(|&r| {
                    v.get(r).map(super::trim).filter(|t| !is_missing(t)).unwrap_or_else(|| {
                        missing.get_or_insert(r);
                        ""
                    })
                });
                let codes = Codes::from_strs_expecting(labels, sort, 0);
                match missing {
                    Some(r) => Err(self.empty(name, r)),
                    None => Ok(codes),
                }
            }
            RawColumn::Number(_) => Ok(Codes::new(&self.labels(name, true)?, sort)),
        }
    }

    fn empty(&self, name: &str, r: usize) -> Error {
        Error::BadValue {
            path: self.path.to_path_buf(),
            column: name.to_string(),
            row: r + 1,
            value: String::new(),
            advice: "is empty; every row needs a value in this column".into(),
        }
    }
}

/// The covariates over the kept rows; one that takes a single value is an error.
fn covariates(cells: &Cells, roles: &Roles, numeric: &[bool]) -> Result<Vec<Covariate>> {
    let path = cells.path;
    let mut covariates = Vec::with_capacity(roles.covariates.len());
    for (k, c) in roles.covariates.iter().enumerate() {
        let values = if numeric[k] {
            let mut v = Vec::with_capacity(cells.rows.len());
            for &r in cells.rows {
                v.push(number_at(path, c, &cells.table.columns[c], r)?.unwrap_or(f64::NAN));
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
            CovariateValues::Numeric(v.into())
        } else {
            let codes = Codes::new(&cells.labels(c, true)?, true);
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
    Ok(covariates)
}

/// A participant's cohort and birth date cannot change between waves.
fn check_fixed_per_participant(cells: &Cells, roles: &Roles, id: &Codes, cohort: Option<&Codes>) -> Result<()> {
    let row = |k: usize| cells.rows[k] + 1;
    let changed = |column: &str, who: usize, was: &str, f: usize, v: &str, k: usize| Error::Data {
        path: cells.path.to_path_buf(),
        message: format!(
            "participant '{}' has {column} '{}' in row {} but '{}' in row {}; a participant's {column} cannot change between waves",
            id.levels[who],
            was,
            row(f),
            v,
            row(k)
        ),
    };
    // The cohort is coded already (every cell present): equal labels are
    // equal codes.
    if let (Some(column), Some(cohort)) = (&roles.cohort, cohort) {
        let mut first: Vec<Option<usize>> = vec![None; id.n_levels()];
        for (k, (&who, &c)) in id.codes.iter().zip(cohort.codes.iter()).enumerate() {
            let who = who as usize;
            match first[who] {
                None => first[who] = Some(k),
                Some(f) if cohort.codes[f] != c => {
                    return Err(changed(column, who, cohort.label(f), f, cohort.label(k), k));
                }
                Some(_) => {}
            }
        }
    }
    // (column, whether an empty cell is an error; else it reads as "").
    let mut fixed: Vec<(&str, bool)> = Vec::new();
    if let (None, Some(b)) = (roles.dates(), &roles.birth_year) {
        fixed.push((b.as_str(), true));
    }
    if let Some((b, _)) = roles.dates() {
        fixed.push((b, false));
    }
    for (column, required) in fixed {
        let col = &cells.table.columns[column];
        // Each kept row's label, borrowed from the table where it is text:
        // no copy of the column (on ten million rows that copy was the
        // largest allocation of the whole read).
        let value = |k: usize| -> Result<std::borrow::Cow<'_, str>> {
            let r = cells.rows[k];
            match label_ref(col, r) {
                Some(v) => Ok(v),
                None if required => Err(cells.empty(column, r)),
                None => Ok(std::borrow::Cow::Borrowed("")),
            }
        };
        let mut first: Vec<Option<usize>> = vec![None; id.n_levels()];
        for k in 0..cells.rows.len() {
            let v = value(k)?;
            let who = id.codes[k] as usize;
            match first[who] {
                None => first[who] = Some(k),
                Some(f) => {
                    let was = value(f)?;
                    if was != v {
                        return Err(changed(column, who, &was, f, &v, k));
                    }
                }
            }
        }
    }
    Ok(())
}

/// At least two participants, ages that differ, and one row per participant and wave.
fn check_design(
    path: &Path,
    roles: &Roles,
    id: &Codes,
    age: &[f64],
    wave: Option<&Codes>,
    kept_rows: &[usize],
) -> Result<()> {
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
    if let Some(w) = wave
        && let Some((prev, r)) = first_repeated_wave(id, w)
    {
        return Err(Error::Data {
            path: path.to_path_buf(),
            message: format!(
                "participant '{}' has two rows for wave '{}' (rows {} and {}); remove the duplicate or check the wave column",
                id.label(r),
                w.label(r),
                kept_rows[prev] + 1,
                kept_rows[r] + 1
            ),
        });
    }
    Ok(())
}

/// The first row r (in row order) whose participant already has a row for
/// its wave, with the last such earlier row. The rows are grouped by
/// participant (a counting sort, stable in row order), so the check needs
/// one index per row rather than a map of every (participant, wave) pair.
fn first_repeated_wave(id: &Codes, wave: &Codes) -> Option<(usize, usize)> {
    // A file that keeps each participant's rows together (codes in order of
    // first appearance, so never decreasing) is already in that order.
    if id.codes.windows(2).all(|w| w[0] <= w[1]) {
        repeated_in_runs(&id.codes, &wave.codes)
    } else {
        repeated_by_participant(id, &wave.codes)
    }
}

/// [`first_repeated_wave`] for rows grouped by participant.
fn repeated_in_runs(id: &[u32], wave: &[u32]) -> Option<(usize, usize)> {
    let mut run = 0;
    for r in 0..id.len() {
        if r > 0 && id[r] != id[r - 1] {
            run = r;
        }
        if let Some(prev) = (run..r).rev().find(|&e| wave[e] == wave[r]) {
            return Some((prev, r));
        }
    }
    None
}

/// [`first_repeated_wave`] for rows in any order.
fn repeated_by_participant(id: &Codes, wave: &[u32]) -> Option<(usize, usize)> {
    let n_levels = id.n_levels();
    let mut start = vec![0usize; n_levels + 1];
    for &k in id.codes.iter() {
        start[k as usize + 1] += 1;
    }
    for i in 0..n_levels {
        start[i + 1] += start[i];
    }
    let mut next = start.clone();
    let mut order = vec![0usize; id.codes.len()];
    for (r, &k) in id.codes.iter().enumerate() {
        order[next[k as usize]] = r;
        next[k as usize] += 1;
    }
    drop(next);
    let mut found: Option<(usize, usize)> = None;
    for k in 0..n_levels {
        let rows = &order[start[k]..start[k + 1]];
        for (j, &r) in rows.iter().enumerate() {
            if found.is_some_and(|(_, fr)| fr <= r) {
                break;
            }
            if let Some(&prev) = rows[..j].iter().rev().find(|&&e| wave[e] == wave[r]) {
                found = Some((prev, r));
                break;
            }
        }
    }
    found
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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::simulate::Rng;

    // Rows grouped by participant: the check along the runs finds the same
    // first repeated wave (and the same earlier row) as the check that
    // sorts the rows by participant (closed-form identity), on 400 random
    // files of 1 to 6 participants with 1 to 4 rows each.
    #[test]
    fn the_check_along_runs_matches_the_sorted_check() {
        let mut rng = Rng::new(31);
        let mut repeated = 0;
        for _ in 0..400 {
            let (mut id, mut wave) = (Vec::new(), Vec::new());
            for who in 0..1 + (rng.uniform() * 6.0) as u32 {
                for _ in 0..1 + (rng.uniform() * 4.0) as usize {
                    id.push(who);
                    wave.push((rng.uniform() * 4.0) as u32);
                }
            }
            let codes = Codes::from_strs(id.iter().map(|w| ["a", "b", "c", "d", "e", "f"][*w as usize]), false);
            assert_eq!(&codes.codes[..], &id[..]);
            let fast = repeated_in_runs(&id, &wave);
            assert_eq!(fast, repeated_by_participant(&codes, &wave), "{id:?} {wave:?}");
            repeated += usize::from(fast.is_some());
        }
        assert!((100..400).contains(&repeated), "{repeated}");
    }
}
