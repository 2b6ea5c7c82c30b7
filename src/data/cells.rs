//! Reading one cell as a number or a label, with the one-line error that
//! names the file, column, row and value.

use std::path::Path;

use super::is_missing;
use super::read::RawColumn;
use crate::error::{Error, Result};

/// A numeric cell: `Ok(None)` when missing.
pub(super) fn number_at(path: &Path, column: &str, col: &RawColumn, r: usize) -> Result<Option<f64>> {
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
        RawColumn::Text(v) => match v.get(r).map(super::trim) {
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
pub(super) fn label_at(col: &RawColumn, r: usize) -> Option<String> {
    label_ref(col, r).map(std::borrow::Cow::into_owned)
}

/// [`label_at`] without a copy of text cells.
pub(super) fn label_ref(col: &RawColumn, r: usize) -> Option<std::borrow::Cow<'_, str>> {
    match col {
        RawColumn::Text(v) => v
            .get(r)
            .map(super::trim)
            .filter(|s| !is_missing(s))
            .map(std::borrow::Cow::Borrowed),
        RawColumn::Number(v) => v[r].map(|x| {
            std::borrow::Cow::Owned(if x.fract() == 0.0 && x.abs() < 1e15 {
                format!("{}", x as i64)
            } else {
                x.to_string()
            })
        }),
    }
}
