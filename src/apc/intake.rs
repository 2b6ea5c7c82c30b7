//! From columns to the cells of an age × period table: a table of counts
//! with exposure, or individual records grouped into bands of equal width.

use std::path::Path;

use super::Shape;
use super::analysis::{ApcData, Labels};
use super::glm::{Cell, Family};
use crate::data::NumericTable;
use crate::error::{Error, Result};

/// At most this many age groups or periods (a guard against a wrong column
/// or width, whose table would not fit in memory).
pub const MAX_GROUPS: usize = 200;

/// Default number of age groups when records are grouped from the data.
pub const DEFAULT_AGE_GROUPS: f64 = 8.0;

fn label(x: f64) -> String {
    if (x - x.round()).abs() < 1e-9 {
        format!("{}", x.round() as i64)
    } else {
        format!("{x:.2}")
    }
}

fn labels(age0: f64, period0: f64, width: f64, shape: Shape) -> Labels {
    Labels {
        age: (0..shape.a).map(|i| label(age0 + i as f64 * width)).collect(),
        period: (0..shape.p).map(|j| label(period0 + j as f64 * width)).collect(),
        // Full cohort index k = a − i + j: earliest birth = first period − last age group.
        cohort: (0..shape.k())
            .map(|k| label(period0 - age0 + ((shape.k0 + k) as f64 - shape.a as f64) * width))
            .collect(),
    }
}

/// Trim the cohorts to those observed, and check that every age group,
/// period and cohort in between has observations.
fn observed_shape(path: &Path, a: usize, p: usize, cells: &[Cell]) -> Result<Shape> {
    let full = |c: &Cell| a + c.j - c.i;
    let k0 = cells.iter().map(full).min().unwrap_or(1);
    let k1 = cells.iter().map(full).max().unwrap_or(1);
    let shape = Shape {
        a,
        p,
        k0,
        kn: k1 - k0 + 1,
    };
    for (name, levels, of) in [
        ("age group", a, &(|c: &Cell| c.i) as &dyn Fn(&Cell) -> usize),
        ("period", p, &|c: &Cell| c.j),
        ("cohort", shape.kn, &|c: &Cell| full(c) - k0 + 1),
    ] {
        let mut seen = vec![false; levels];
        for c in cells.iter() {
            seen[of(c) - 1] = true;
        }
        if let Some(l) = seen.iter().position(|s| !s) {
            return Err(Error::Data {
                path: path.to_path_buf(),
                message: format!(
                    "{name} {} of {levels} has no observations, so its effect cannot be estimated; choose a wider `width` or drop the empty group",
                    l + 1
                ),
            });
        }
    }
    Ok(shape)
}

/// Distinct sorted values and their common spacing, if any.
fn spacing(values: &[f64]) -> (Vec<f64>, Option<f64>) {
    let mut v = values.to_vec();
    v.sort_by(f64::total_cmp);
    v.dedup_by(|a, b| (*a - *b).abs() < 1e-9);
    if v.len() < 2 {
        return (v, None);
    }
    let d = v[1] - v[0];
    let even = v
        .windows(2)
        .all(|w| ((w[1] - w[0]) - d).abs() < 1e-6 * d.abs().max(1.0));
    (v, if even { Some(d) } else { None })
}

/// A table of counts: columns age, period, events, exposure.
///
/// # Errors
/// [`Error::Data`] for unequal or mismatched group spacing, or a repeated
/// cell; [`Error::BadValue`] for negative events or non-positive exposure.
pub fn from_table(t: &NumericTable, names: [&str; 4]) -> Result<ApcData> {
    let path = &t.source;
    let (age, period, events, exposure) = (&t.columns[0], &t.columns[1], &t.columns[2], &t.columns[3]);
    for (k, &r) in t.rows.iter().enumerate() {
        if events[k] < 0.0 {
            return Err(bad(path, names[2], r, events[k], "is negative; events are counts"));
        }
        if exposure[k] <= 0.0 {
            return Err(bad(
                path,
                names[3],
                r,
                exposure[k],
                "is not positive; exposure is person-time at risk",
            ));
        }
    }
    let (ages, da) = spacing(age);
    let (periods, dp) = spacing(period);
    if ages.len() > MAX_GROUPS || periods.len() > MAX_GROUPS {
        return Err(Error::Data {
            path: path.to_path_buf(),
            message: format!(
                "{} age groups and {} periods: more than {MAX_GROUPS}; check that the age and period columns hold group starts",
                ages.len(),
                periods.len()
            ),
        });
    }
    let width = match (da, dp) {
        (Some(a), Some(p)) if (a - p).abs() < 1e-6 * a.abs().max(1.0) => a,
        _ => {
            return Err(Error::Data {
                path: path.to_path_buf(),
                message: format!(
                    "age groups ({}) and periods ({}) must be evenly spaced with the same width, so that cohort = period − age indexes whole groups",
                    ages.iter().map(|x| label(*x)).collect::<Vec<_>>().join(", "),
                    periods.iter().map(|x| label(*x)).collect::<Vec<_>>().join(", ")
                ),
            });
        }
    };
    let (a_n, p_n) = (ages.len(), periods.len());
    let mut seen = std::collections::HashMap::new();
    let mut cells = Vec::with_capacity(age.len());
    for k in 0..age.len() {
        let i = ((age[k] - ages[0]) / width).round() as usize + 1;
        let j = ((period[k] - periods[0]) / width).round() as usize + 1;
        if let Some(prev) = seen.insert((i, j), t.rows[k]) {
            return Err(Error::Data {
                path: path.to_path_buf(),
                message: format!(
                    "age {} and period {} appear in rows {prev} and {}; give each cell once",
                    label(age[k]),
                    label(period[k]),
                    t.rows[k]
                ),
            });
        }
        cells.push(Cell {
            i,
            j,
            y: events[k],
            e: exposure[k],
            yy: 0.0,
        });
    }
    let shape = observed_shape(path, a_n, p_n, &cells)?;
    Ok(ApcData {
        shape,
        cells,
        family: Family::Poisson,
        labels: labels(ages[0], periods[0], width, shape),
        n_obs: age.len(),
        width,
        origin: (ages[0], periods[0]),
        ids: None,
    })
}

fn bad(path: &Path, column: &str, row: usize, value: f64, advice: &str) -> Error {
    Error::BadValue {
        path: path.to_path_buf(),
        column: column.to_string(),
        row,
        value: value.to_string(),
        advice: advice.to_string(),
    }
}

/// The default group width: whole years giving about eight age groups, made
/// narrower (down to one year, then half and a quarter of a year) until
/// there are at least three age groups and three periods, as an APC model
/// needs; a short fieldwork span (a cohort-sequential panel's few years)
/// otherwise leaves only two periods.
fn default_width(a0: f64, a1: f64, p0: f64, p1: f64) -> f64 {
    let groups = |w: f64, lo: f64, hi: f64| ((hi - lo) / w).floor() + 1.0;
    let fits = |w: f64| groups(w, a0, a1) >= 3.0 && groups(w, p0, p1) >= 3.0;
    let mut w = ((a1 - a0) / DEFAULT_AGE_GROUPS).ceil().max(1.0);
    while w > 1.0 && !fits(w) {
        w -= 1.0;
    }
    [w, 0.5, 0.25].into_iter().find(|&c| fits(c)).unwrap_or(w)
}

/// Individual records: columns age, period, outcome, grouped into bands of
/// `width` years from the youngest age and the earliest period (default:
/// the whole number of years giving about eight age groups).
///
/// # Errors
/// [`Error::Spec`] for a width that is not positive.
pub fn from_records(t: &NumericTable, width: Option<f64>) -> Result<ApcData> {
    let (age, period, y) = (&t.columns[0], &t.columns[1], &t.columns[2]);
    let min = |v: &[f64]| v.iter().cloned().fold(f64::INFINITY, f64::min);
    let max = |v: &[f64]| v.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    let (a0, p0) = (min(age).floor(), min(period).floor());
    let width = match width {
        Some(w) if w.is_finite() && w > 0.0 => w,
        Some(w) => {
            return Err(Error::Spec {
                parameter: "width".into(),
                message: format!("{w} is not a positive number of years"),
            });
        }
        None => default_width(a0, max(age), p0, max(period)),
    };
    let (a_span, p_span) = ((max(age) - a0) / width, (max(period) - p0) / width);
    if !(a_span < MAX_GROUPS as f64 && p_span < MAX_GROUPS as f64) {
        return Err(Error::Data {
            path: t.source.clone(),
            message: format!(
                "ages {} to {} and periods {} to {} make more than {MAX_GROUPS} groups of {width} years; choose a wider `width` or check the columns",
                label(min(age)),
                label(max(age)),
                label(min(period)),
                label(max(period))
            ),
        });
    }
    let a = a_span.floor() as usize + 1;
    let p = p_span.floor() as usize + 1;
    let mut sums = vec![(0.0, 0.0, 0.0); a * p];
    for k in 0..age.len() {
        let i = ((age[k] - a0) / width).floor() as usize;
        let j = ((period[k] - p0) / width).floor() as usize;
        let s = &mut sums[i * p + j];
        s.0 += y[k];
        s.1 += 1.0;
        s.2 += y[k] * y[k];
    }
    let cells: Vec<Cell> = sums
        .iter()
        .enumerate()
        .filter(|(_, s)| s.1 > 0.0)
        .map(|(idx, s)| Cell {
            i: idx / p + 1,
            j: idx % p + 1,
            y: s.0,
            e: s.1,
            yy: s.2,
        })
        .collect();
    let shape = observed_shape(&t.source, a, p, &cells)?;
    Ok(ApcData {
        shape,
        cells,
        family: Family::Gaussian,
        labels: labels(a0, p0, width, shape),
        n_obs: age.len(),
        width,
        origin: (a0, p0),
        ids: None,
    })
}

/// Panels: records of participants seen repeatedly, one cell per record so
/// that a random intercept per participant can be fitted.
///
/// # Errors
/// Those of [`from_records`].
pub fn from_panel(t: &NumericTable, ids: &[u32], width: Option<f64>) -> Result<ApcData> {
    let grouped = from_records(t, width)?;
    let (a0, p0) = grouped.origin;
    let w = grouped.width;
    let (age, period, y) = (&t.columns[0], &t.columns[1], &t.columns[2]);
    let cells = (0..age.len())
        .map(|k| Cell {
            i: ((age[k] - a0) / w).floor() as usize + 1,
            j: ((period[k] - p0) / w).floor() as usize + 1,
            y: y[k],
            e: 1.0,
            yy: y[k] * y[k],
        })
        .collect();
    Ok(ApcData {
        cells,
        ids: Some(ids.to_vec()),
        ..grouped
    })
}

#[cfg(test)]
mod width_tests {
    // The default width keeps about eight age groups where the calendar span
    // allows, and narrows until there are three periods where it does not.
    #[test]
    fn default_width_adapts_to_a_short_calendar_span() {
        assert_eq!(super::default_width(20.0, 70.0, 2000.0, 2030.0), 7.0);
        // A cohort-sequential panel: 12 years of age in under 4 of fieldwork.
        assert_eq!(super::default_width(11.0, 23.55, 2031.0, 2034.8), 1.0);
        // Two calendar years need half-year periods.
        assert_eq!(super::default_width(11.0, 23.0, 2031.0, 2032.2), 0.5);
    }
}
