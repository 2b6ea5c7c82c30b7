//! Numeric columns of a file, for tables of counts and repeated cross-sections.

use std::path::{Path, PathBuf};

use super::cells::{label_at, number_at};
use super::{ReadOptions, read};
use crate::error::{Error, Result};

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

/// The file exists, no column holds two roles, and every column is in the
/// header.
fn check_columns(path: &Path, columns: &[(&str, &str)], options: ReadOptions) -> Result<()> {
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
    Ok(())
}

/// Rows of label columns and numeric columns, missing cells kept: the label
/// columns as text (`None` when empty), the numeric ones as NaN when empty.
#[derive(Debug, Clone, PartialEq)]
pub struct LabelledTable {
    /// The file.
    pub source: PathBuf,
    /// One vector per label column, over every data row.
    pub labels: Vec<Vec<Option<String>>>,
    /// One vector per numeric column, over every data row (NaN: missing).
    pub numbers: Vec<Vec<f64>>,
    /// Data rows in the file.
    pub n_rows: usize,
}

/// Read label columns and numeric columns, keeping every row (for item
/// responses, where a blank item is data, not a reason to drop the row).
///
/// # Errors
/// The errors of [`load`] for the file and its cells: a missing column, a
/// column named for two roles, text in a numeric column.
pub fn labelled_table(
    path: &Path,
    labels: &[(&str, &str)],
    numbers: &[(&str, &str)],
    options: ReadOptions,
) -> Result<LabelledTable> {
    let all: Vec<(&str, &str)> = labels.iter().chain(numbers).copied().collect();
    check_columns(path, &all, options)?;
    let names: Vec<String> = all.iter().map(|(_, c)| c.to_string()).collect();
    let numeric: Vec<String> = numbers.iter().map(|(_, c)| c.to_string()).collect();
    let table = read::read_columns(path, &names, &numeric, options.delimiter)?;
    let label_columns = labels
        .iter()
        .map(|(_, c)| (0..table.n_rows).map(|r| label_at(&table.columns[*c], r)).collect())
        .collect();
    let mut number_columns = Vec::with_capacity(numbers.len());
    for (_, c) in numbers {
        let col = &table.columns[*c];
        let mut v = Vec::with_capacity(table.n_rows);
        for r in 0..table.n_rows {
            v.push(number_at(path, c, col, r)?.unwrap_or(f64::NAN));
        }
        number_columns.push(v);
    }
    Ok(LabelledTable {
        source: path.to_path_buf(),
        labels: label_columns,
        numbers: number_columns,
        n_rows: table.n_rows,
    })
}

/// Read named numeric columns (for tables of counts and repeated
/// cross-sections). Rows with a missing value in any of them are dropped and
/// counted; text or non-finite values are errors naming the cell.
///
/// # Errors
/// The errors of [`load`] for the file and its cells, and [`Error::Data`]
/// when no row has every value.
pub fn numeric_table(path: &Path, columns: &[(&str, &str)], options: ReadOptions) -> Result<NumericTable> {
    check_columns(path, columns, options)?;
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
