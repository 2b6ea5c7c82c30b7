//! Data intake: reading a long-format file and validating its columns into a
//! [`Panel`].
//!
//! Rules (notes/decisions.md):
//! - missing cells are empty, `NA` or `.`; rows with a missing outcome, age or
//!   covariate are dropped and counted in [`DropReport`], never silently;
//! - `NaN`, `inf` and text in a numeric column are errors naming the row;
//! - a participant id is required on every row;
//! - with a wave column, two rows for one participant and wave are an error.

mod build;
mod cells;
mod csv_direct;
pub mod dates;
pub mod derive;
mod panel;
pub mod paths;
pub mod read;
mod roles;
pub mod summary;
mod table;
mod wide;

pub use panel::{
    Calendar, CalendarSource, Codes, Covariate, CovariateValues, DropReport, Panel, label_key, label_order,
};
pub use roles::Roles;
pub use summary::DataSummary;
pub use table::{LabelledTable, NumericTable, labelled_table, numeric_table};

use std::collections::HashMap;

/// A hash map with a fast, fixed (hence reproducible) hasher, for the
/// label and key lookups done once per row (foldhash, already a dependency
/// of the table reader; notes/decisions.md).
pub type FastMap<K, V> = HashMap<K, V, foldhash::fast::FixedState>;
use std::path::Path;

use crate::error::{Error, Result};

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

/// `s.trim()`, without looking at the characters when `s` starts and ends
/// with a printable ASCII byte (as nearly every cell does): every character
/// that `str::trim` removes is ASCII at or below the space, or starts and
/// ends with a byte of 0x80 or above.
#[inline]
pub(crate) fn trim(s: &str) -> &str {
    let plain = |b: u8| b > b' ' && b < 0x80;
    match (s.as_bytes().first(), s.as_bytes().last()) {
        (Some(&a), Some(&b)) if plain(a) && plain(b) => s,
        _ => s.trim(),
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
    load_with(path, roles, options, None)
}

/// [`load`], with the outcome given as one value per data row instead of
/// read from a column (a scale scored on the fly from its items); the
/// `outcome` role then names the scored variable, not a column.
///
/// # Errors
/// As [`load`]; [`Error::Data`] for a wide file, or for a column of values
/// whose length is not the file's number of rows.
pub fn load_with_outcome(path: &Path, roles: &Roles, options: ReadOptions, outcome: &[Option<f64>]) -> Result<Panel> {
    if roles.is_wide() {
        return Err(Error::Data {
            path: path.to_path_buf(),
            message: "a scale scored on the fly needs a long file (one row per participant and wave)".into(),
        });
    }
    load_with(path, roles, options, Some(outcome))
}

fn load_with(path: &Path, roles: &Roles, options: ReadOptions, outcome: Option<&[Option<f64>]>) -> Result<Panel> {
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
    roles::validate_roles(roles)?;
    let header = read::header(path, options.delimiter)?;
    let given = |role: &str| outcome.is_some() && role == "outcome";
    for (role, column) in roles.all() {
        if !given(&role) && !header.iter().any(|h| h == &column) {
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
    let mut wanted: Vec<String> = roles
        .all()
        .into_iter()
        .filter(|(role, _)| !given(role))
        .map(|(_, c)| c)
        .collect();
    wanted.dedup();
    let mut seen = std::collections::HashSet::new();
    wanted.retain(|c| seen.insert(c.clone()));
    let mut numeric: Vec<String> = vec![roles.outcome.clone()];
    if roles.dates().is_none() {
        numeric.push(roles.age.clone());
    }
    numeric.extend(roles.period.iter().chain(&roles.birth_year).cloned());
    numeric.extend(roles.wide_outcome.iter().chain(&roles.wide_age).cloned());
    numeric.retain(|c| outcome.is_none() || c != &roles.outcome);
    let mut table = read::read_columns(path, &wanted, &numeric, options.delimiter)?;
    if let Some(values) = outcome {
        if values.len() != table.n_rows {
            return Err(Error::Data {
                path: path.to_path_buf(),
                message: format!("{} scored values for {} rows", values.len(), table.n_rows),
            });
        }
        table
            .columns
            .insert(roles.outcome.clone(), read::RawColumn::Number(values.to_vec()));
    }
    if table.n_rows == 0 {
        return Err(Error::Data {
            path: path.to_path_buf(),
            message: "the file has a header but no data rows; add data or check that the right file was given".into(),
        });
    }
    if roles.is_wide() {
        let (long, long_roles, file_row) = wide::reshape_wide(path, roles, &table)?;
        let mut panel = build::build(path, &long_roles, long)?;
        panel.row = panel.row.iter().map(|&r| file_row[r - 1]).collect();
        return Ok(panel);
    }
    build::build(path, roles, table)
}

#[cfg(test)]
mod tests {
    // The quick trim is `str::trim` (identity): on every string of up to
    // three characters drawn from printable ASCII, ASCII whitespace and
    // controls, and Unicode spaces and letters.
    #[test]
    fn quick_trim_is_the_standard_trim() {
        let alphabet = [
            'a', '7', ' ', '\t', '\r', '\n', '\u{b}', '\u{1}', '\u{a0}', '\u{3000}', '\u{2028}', 'é', '中',
        ];
        let mut checked = 0;
        for a in 0..=alphabet.len() {
            for b in 0..=alphabet.len() {
                for c in 0..=alphabet.len() {
                    let s: String = [a, b, c].iter().filter_map(|&k| alphabet.get(k)).collect();
                    assert_eq!(super::trim(&s), s.trim(), "{s:?}");
                    checked += 1;
                }
            }
        }
        assert_eq!(checked, 14 * 14 * 14);
    }
}
