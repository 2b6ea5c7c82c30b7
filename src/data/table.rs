//! Numeric columns of a file, for tables of counts and repeated cross-sections.

use std::path::{Path, PathBuf};

use super::cells::number_at;
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
