//! Reading CSV and Parquet files with polars into plain columns.
//!
//! CSV columns are read as text and parsed by braid itself, so that an
//! unusable value is reported with its exact row and column. Parquet columns
//! keep their numeric type where they have one.

use std::collections::HashMap;
use std::fs::File;
use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};
use std::sync::Arc;

use polars::prelude::*;

use crate::error::{Error, Result};

/// A column of text cells in one buffer (a cell is a range of it, or
/// missing): reading a label column costs one allocation, not one per cell,
/// and four bytes per cell beside its text.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct TextCells {
    text: String,
    /// Per cell, the end of its text in `text` (it starts where the cell
    /// before it ends), with [`MISSING`] set for a missing cell.
    ends: Vec<u32>,
    /// Whether the text outgrew what `ends` can address ([`TEXT_LIMIT`]).
    overflow: bool,
}

/// The bit of [`TextCells::ends`] that marks a missing cell.
const MISSING: u32 = 1 << 31;

/// The most text one column holds: offsets below [`MISSING`].
pub const TEXT_LIMIT: usize = (MISSING - 1) as usize;

impl TextCells {
    /// Number of cells.
    pub fn len(&self) -> usize {
        self.ends.len()
    }
    /// Whether there are no cells.
    pub fn is_empty(&self) -> bool {
        self.ends.is_empty()
    }
    /// Cell `r` (`None` when missing).
    pub fn get(&self, r: usize) -> Option<&str> {
        let end = self.ends[r];
        if end & MISSING != 0 {
            return None;
        }
        let start = if r == 0 { 0 } else { self.ends[r - 1] & !MISSING };
        Some(&self.text[start as usize..end as usize])
    }
    /// The cells in order.
    pub fn iter(&self) -> impl Iterator<Item = Option<&str>> + '_ {
        (0..self.len()).map(|r| self.get(r))
    }
    /// Whether the column's text is longer than [`TEXT_LIMIT`] bytes, so
    /// that its cells cannot be read back.
    pub fn overflowed(&self) -> bool {
        self.overflow
    }
    /// The bytes of text held.
    pub(super) fn text_len(&self) -> usize {
        self.text.len()
    }
    /// Room for `cells` cells of `bytes` bytes in all.
    pub(super) fn with_capacity(cells: usize, bytes: usize) -> Self {
        TextCells {
            text: String::with_capacity(bytes),
            ends: Vec::with_capacity(cells),
            overflow: false,
        }
    }
    /// Add a cell at the end.
    pub(super) fn push(&mut self, cell: Option<&str>) {
        if let Some(t) = cell {
            self.text.push_str(t);
        }
        self.overflow |= self.text.len() > TEXT_LIMIT;
        let end = self.text.len() as u32 & !MISSING;
        self.ends.push(if cell.is_some() { end } else { end | MISSING });
    }
    /// Add `other`'s cells at the end.
    pub(super) fn append(&mut self, other: TextCells) {
        let shift = self.text.len() as u32;
        self.text.push_str(&other.text);
        self.overflow |= other.overflow || self.text.len() > TEXT_LIMIT;
        self.ends.extend(
            other
                .ends
                .into_iter()
                .map(|e| ((e & !MISSING).wrapping_add(shift) & !MISSING) | (e & MISSING)),
        );
    }
}

impl<'a> FromIterator<Option<&'a str>> for TextCells {
    fn from_iter<I: IntoIterator<Item = Option<&'a str>>>(cells: I) -> Self {
        let cells = cells.into_iter();
        let n = cells.size_hint().0;
        let mut out = TextCells::with_capacity(n, 8 * n);
        for c in cells {
            out.push(c);
        }
        out
    }
}

impl From<Vec<Option<String>>> for TextCells {
    fn from(cells: Vec<Option<String>>) -> Self {
        cells.iter().map(|c| c.as_deref()).collect()
    }
}

/// One column, as braid sees it.
#[derive(Debug, Clone, PartialEq)]
pub enum RawColumn {
    /// Text cells (`None` for an empty cell).
    Text(TextCells),
    /// Numeric cells from a typed file (`None` for a null).
    Number(Vec<Option<f64>>),
}

impl RawColumn {
    /// Number of cells.
    pub fn len(&self) -> usize {
        match self {
            RawColumn::Text(v) => v.len(),
            RawColumn::Number(v) => v.len(),
        }
    }
    /// Whether the column is empty.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }
}

/// The columns that were asked for, by name.
#[derive(Debug, Clone, PartialEq)]
pub struct RawTable {
    /// The file read.
    pub path: PathBuf,
    /// Number of data rows.
    pub n_rows: usize,
    /// Columns by name.
    pub columns: HashMap<String, RawColumn>,
}

/// File formats braid reads.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Format {
    /// Delimited text.
    Csv,
    /// Apache Parquet.
    Parquet,
}

/// The format implied by a file's extension (CSV unless it ends in `.parquet` or `.pq`).
pub fn format_of(path: &Path) -> Format {
    match path
        .extension()
        .and_then(|e| e.to_str())
        .map(str::to_ascii_lowercase)
        .as_deref()
    {
        Some("parquet") | Some("pq") => Format::Parquet,
        _ => Format::Csv,
    }
}

/// The header of a file: its column names.
///
/// # Errors
/// [`Error::Io`] when the file cannot be opened, [`Error::Parse`] when it is
/// empty or not a readable table.
pub fn header(path: &Path, delimiter: u8) -> Result<Vec<String>> {
    let io = |e: std::io::Error| Error::Io {
        path: path.to_path_buf(),
        message: e.to_string(),
    };
    match format_of(path) {
        Format::Csv => {
            let file = File::open(path).map_err(io)?;
            let mut first = String::new();
            BufReader::new(file).read_line(&mut first).map_err(|e| Error::Parse {
                path: path.to_path_buf(),
                message: format!("the first line is not valid UTF-8 text ({e}); save the file as UTF-8 CSV"),
            })?;
            let line = first.trim_end_matches(['\n', '\r']).trim_start_matches('\u{feff}');
            if line.trim().is_empty() {
                return Err(Error::Parse {
                    path: path.to_path_buf(),
                    message: "the file is empty; expected a header line naming the columns".into(),
                });
            }
            Ok(line
                .split(delimiter as char)
                .map(|s| s.trim().trim_matches('"').to_string())
                .collect())
        }
        Format::Parquet => {
            let file = File::open(path).map_err(io)?;
            guard_damaged(path, || {
                let mut reader = ParquetReader::new(file);
                let schema = reader.schema().map_err(|e| Error::Parse {
                    path: path.to_path_buf(),
                    message: format!("not a readable Parquet file ({e}); check that the file is complete"),
                })?;
                Ok(schema.iter_names().map(|n| n.to_string()).collect())
            })
        }
    }
}

/// Guarded Parquet reads in progress (the decoder may run on worker threads,
/// so this is process-wide rather than per thread).
static PARQUET_READS: std::sync::atomic::AtomicUsize = std::sync::atomic::AtomicUsize::new(0);

/// Whether a guarded Parquet read is in progress (for the binary's panic hook).
pub fn in_parquet_read() -> bool {
    PARQUET_READS.load(std::sync::atomic::Ordering::SeqCst) > 0
}

/// Run a Parquet read, turning a panic of the decoder on a damaged file
/// (some corrupt metadata makes it panic rather than return an error) into
/// an [`Error::Parse`] naming the file.
fn guard_damaged<T>(path: &Path, read: impl FnOnce() -> Result<T>) -> Result<T> {
    PARQUET_READS.fetch_add(1, std::sync::atomic::Ordering::SeqCst);
    let out = std::panic::catch_unwind(std::panic::AssertUnwindSafe(read));
    PARQUET_READS.fetch_sub(1, std::sync::atomic::Ordering::SeqCst);
    out.unwrap_or_else(|_| {
        Err(Error::Parse {
            path: path.to_path_buf(),
            message: "is a damaged Parquet file (its metadata cannot be decoded); export it again from the source"
                .into(),
        })
    })
}

/// Below this size a CSV file is read on one thread.
const SMALL_CSV_BYTES: u64 = 4 << 20;

/// Read the named columns of a file; the columns in `numeric` are parsed as
/// numbers when every cell allows it.
///
/// # Errors
/// [`Error::Io`] or [`Error::Parse`] when the file cannot be read as a table.
pub fn read_columns(path: &Path, names: &[String], numeric: &[String], delimiter: u8) -> Result<RawTable> {
    // polars panics when a column is asked for twice; ask once.
    let mut unique: Vec<String> = Vec::with_capacity(names.len());
    for n in names {
        if !unique.contains(n) {
            unique.push(n.clone());
        }
    }
    let names = &unique[..];
    let table = match format_of(path) {
        Format::Csv => super::csv_direct::read(path, names, numeric, delimiter),
        _ => None,
    };
    let table = match table {
        Some(t) => t,
        None => read_columns_polars(path, names, numeric, delimiter)?,
    };
    for name in names {
        if let Some(RawColumn::Text(cells)) = table.columns.get(name)
            && cells.overflowed()
        {
            return Err(Error::Data {
                path: path.to_path_buf(),
                message: format!(
                    "column '{name}' holds more than {} MiB of text; split the file by participant and analyse the parts, or shorten its labels",
                    TEXT_LIMIT >> 20
                ),
            });
        }
    }
    Ok(table)
}

/// [`read_columns`] through polars alone: every file braid reads that the
/// direct CSV reader declines (quotes, a byte order mark, ragged rows, a
/// value that is not a number, Parquet), with the errors it reports.
///
/// # Errors
/// As [`read_columns`].
pub fn read_columns_polars(path: &Path, names: &[String], numeric: &[String], delimiter: u8) -> Result<RawTable> {
    let mut unique: Vec<String> = Vec::with_capacity(names.len());
    for n in names {
        if !unique.contains(n) {
            unique.push(n.clone());
        }
    }
    let names = &unique[..];
    let parse = |e: PolarsError| {
        let text = e.to_string();
        let advice = if text.to_ascii_lowercase().contains("utf-8") || text.to_ascii_lowercase().contains("utf8") {
            "save the file as UTF-8 text"
        } else {
            "check the delimiter, quoting and that every row has the same number of fields"
        };
        Error::Parse {
            path: path.to_path_buf(),
            message: format!("cannot be read as a table ({text}); {advice}"),
        }
    };
    let df = match format_of(path) {
        Format::Csv => {
            let cols: Arc<[PlSmallStr]> = names.iter().map(|n| PlSmallStr::from(n.as_str())).collect();
            // Small files read faster on one thread than split into chunks.
            let small = std::fs::metadata(path).is_ok_and(|m| m.len() < SMALL_CSV_BYTES);
            CsvReadOptions::default()
                .with_n_threads(if small { Some(1) } else { None })
                .with_has_header(true)
                .with_infer_schema_length(Some(0))
                .with_columns(Some(cols))
                .map_parse_options(|o| o.with_separator(delimiter).with_truncate_ragged_lines(false))
                .try_into_reader_with_file_path(Some(path.to_path_buf()))
                .map_err(parse)?
                .finish()
                .map_err(parse)?
        }
        Format::Parquet => {
            let file = File::open(path).map_err(|e| Error::Io {
                path: path.to_path_buf(),
                message: e.to_string(),
            })?;
            guard_damaged(path, || {
                ParquetReader::new(file)
                    .with_columns(Some(names.to_vec()))
                    .finish()
                    .map_err(parse)
            })?
        }
    };
    let n_rows = df.height();
    let mut columns = HashMap::new();
    for name in names {
        let col = df.column(name).map_err(parse)?;
        let raw = match col.dtype() {
            DataType::String => {
                let ca = col.str().map_err(parse)?;
                // Numeric roles are parsed straight from the text when every
                // cell is a finite number or a missing-value token; otherwise
                // the text is kept so that the bad cell is reported as written.
                let parsed: Option<Vec<Option<f64>>> = if numeric.contains(name) {
                    let mut out = Vec::with_capacity(ca.len());
                    for v in ca.iter() {
                        out.push(match v.map(str::trim) {
                            None => None,
                            Some(t) if super::is_missing(t) => None,
                            Some(t) => match t.parse::<f64>() {
                                Ok(x) if x.is_finite() => Some(x),
                                _ => break,
                            },
                        });
                    }
                    (out.len() == ca.len()).then_some(out)
                } else {
                    None
                };
                match parsed {
                    Some(v) => RawColumn::Number(v),
                    None => RawColumn::Text(ca.iter().collect()),
                }
            }
            dt if dt.is_primitive_numeric() => {
                let c = col.cast(&DataType::Float64).map_err(parse)?;
                let ca = c.f64().map_err(parse)?;
                RawColumn::Number(ca.iter().collect())
            }
            _ => {
                let c = col.cast(&DataType::String).map_err(parse)?;
                let ca = c.str().map_err(parse)?;
                RawColumn::Text(ca.iter().collect())
            }
        };
        columns.insert(name.clone(), raw);
    }
    Ok(RawTable {
        path: path.to_path_buf(),
        n_rows,
        columns,
    })
}

/// Write a table of named numeric or text columns to CSV (used by the demo).
///
/// # Errors
/// [`Error::Output`] when the file cannot be written.
pub fn write_csv(path: &Path, header: &[&str], rows: &[Vec<String>]) -> Result<()> {
    use std::io::Write;
    let out = |e: std::io::Error| Error::Output {
        path: path.to_path_buf(),
        message: format!("cannot write ({e})"),
    };
    let mut w = std::io::BufWriter::new(File::create(path).map_err(out)?);
    writeln!(w, "{}", header.join(",")).map_err(out)?;
    for r in rows {
        writeln!(w, "{}", r.join(",")).map_err(out)?;
    }
    w.flush().map_err(out)
}

/// Write named columns to a Parquet file (used by the demo, so that users
/// and tests have a Parquet twin of the CSV).
///
/// # Errors
/// [`Error::Output`] when the file cannot be written.
pub fn write_parquet(path: &Path, columns: Vec<(String, RawColumn)>) -> Result<()> {
    let out = |m: String| Error::Output {
        path: path.to_path_buf(),
        message: format!("cannot write Parquet ({m})"),
    };
    let cols: Vec<Column> = columns
        .into_iter()
        .map(|(name, c)| match c {
            RawColumn::Number(v) => Column::new(name.as_str().into(), v),
            RawColumn::Text(v) => Column::new(name.as_str().into(), v.iter().collect::<Vec<Option<&str>>>()),
        })
        .collect();
    let mut df = DataFrame::new_infer_height(cols).map_err(|e| out(e.to_string()))?;
    let mut file = File::create(path).map_err(|e| out(e.to_string()))?;
    ParquetWriter::new(&mut file)
        .finish(&mut df)
        .map_err(|e| out(e.to_string()))?;
    Ok(())
}

/// Columns from a text table: a column becomes numeric when every cell is a
/// number, text otherwise. A short row's missing cells are empty text.
pub fn columns_from_text(header: &[&str], rows: &[Vec<String>]) -> Vec<(String, RawColumn)> {
    header
        .iter()
        .enumerate()
        .map(|(j, name)| {
            let at = |r: &Vec<String>| r.get(j).cloned().unwrap_or_default();
            let nums: Option<Vec<Option<f64>>> = rows.iter().map(|r| at(r).parse::<f64>().ok().map(Some)).collect();
            let col = match nums {
                Some(v) => RawColumn::Number(v),
                None => RawColumn::Text(rows.iter().map(|r| Some(r.get(j).map_or("", String::as_str))).collect()),
            };
            (name.to_string(), col)
        })
        .collect()
}

#[cfg(test)]
mod text_cells_tests {
    use super::TextCells;

    // Identity: the cells come back as they went in, missing ones included.
    #[test]
    fn text_cells_round_trip() {
        let cells = vec![Some("P01"), None, Some(""), Some("Quillmère Ridge"), Some("P01")];
        let t: TextCells = cells.iter().copied().collect();
        assert_eq!(t.len(), 5);
        assert_eq!(t.iter().collect::<Vec<_>>(), cells);
        let owned: Vec<Option<String>> = cells.iter().map(|c| c.map(str::to_string)).collect();
        assert_eq!(TextCells::from(owned), t);
    }

    // Identity: appending one column to another gives the cells of both in
    // order, with missing cells first, last and in between.
    #[test]
    fn appended_text_cells_keep_their_cells() {
        let a = [None, Some("S1"), Some(""), None];
        let b = [None, Some("S22"), None, Some("S333")];
        let mut t: TextCells = a.iter().copied().collect();
        t.append(b.iter().copied().collect());
        let all: Vec<Option<&str>> = a.iter().chain(&b).copied().collect();
        assert_eq!(t.iter().collect::<Vec<_>>(), all);
        assert_eq!(t, all.iter().copied().collect::<TextCells>());
        assert!(!t.overflowed());
    }
}
