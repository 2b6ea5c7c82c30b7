//! Wide files (one row per participant) reshaped to long form.

use std::path::Path;

use super::Roles;
use super::cells::{label_at, number_at};
use super::read::{self, RawColumn};
use crate::error::{Error, Result};

/// Reshape a wide table (one row per participant, one column per wave for the
/// outcome and for age or date) to long, participant by participant in wave
/// order. Wide cells are checked first, so errors name the file's own column
/// and row. Returns the long table, its roles, and each long row's file row.
pub(super) fn reshape_wide(
    path: &Path,
    roles: &Roles,
    table: &read::RawTable,
) -> Result<(read::RawTable, Roles, Vec<usize>)> {
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
