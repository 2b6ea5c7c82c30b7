//! A direct reader for plain CSV files: the role columns only, parsed in
//! blocks of the file (two threads per block), with memory that grows with
//! the columns kept rather than the file.
//!
//! It reads only what it is sure of: UTF-8 text without quotes or a byte
//! order mark, a header whose asked-for names each appear once, every row
//! with the header's number of fields, no blank line but a final one, and
//! numeric columns whose every cell is a finite number or a missing-value
//! token. Anything else returns `None`, and the caller reads the file with
//! polars, which reports problems with their row and column
//! (notes/decisions.md, "Reading CSV files directly").

use std::fs::File;
use std::io::Read;
use std::path::Path;

use super::read::{RawColumn, RawTable, TextCells};

/// Bytes read per block.
const BLOCK: usize = 8 << 20;

/// Blocks at least this large are parsed as two halves side by side.
const SPLIT_BYTES: usize = 1 << 20;

/// One column's cells so far.
enum Cells {
    Number(Vec<Option<f64>>),
    Text(TextCells),
}

/// What each field of a row becomes: the index of its column among those
/// asked for, or nothing.
struct Layout {
    fields: usize,
    wanted: Vec<Option<usize>>,
    numeric: Vec<bool>,
    delimiter: u8,
}

/// Read `names` from a plain CSV file, `numeric` as numbers; `None` when the
/// file is not one this reader is sure of.
pub(super) fn read(path: &Path, names: &[String], numeric: &[String], delimiter: u8) -> Option<RawTable> {
    if delimiter == b'"' || delimiter == b'\n' || delimiter == b'\r' {
        return None;
    }
    let mut file = File::open(path).ok()?;
    // The unparsed bytes: the tail of the last block (an incomplete line)
    // and the next block, read straight in after it.
    let mut carry: Vec<u8> = Vec::with_capacity(BLOCK);
    let mut layout: Option<Layout> = None;
    let mut columns: Option<Vec<Cells>> = None;
    let mut eof = false;
    while !eof {
        carry.reserve(BLOCK);
        let got = (&mut file).take(BLOCK as u64).read_to_end(&mut carry).ok()?;
        eof = got < BLOCK;
        // Complete lines only, unless the file has ended.
        let end = if eof {
            carry.len()
        } else {
            match memchr::memrchr(b'\n', &carry) {
                Some(i) => i + 1,
                None => continue,
            }
        };
        let mut start = 0;
        if layout.is_none() {
            let nl = memchr::memchr(b'\n', &carry[..end]).unwrap_or(end);
            layout = Some(header_layout(&carry[..nl], names, numeric, delimiter)?);
            start = (nl + 1).min(end);
        }
        let l = layout.as_ref()?;
        let part = parse_lines(&carry[start..end], l)?;
        // The first block's cells are the columns; later blocks append.
        match &mut columns {
            None => columns = Some(part),
            Some(c) => append(c, part),
        }
        carry.drain(..end);
    }
    let layout = layout?;
    let columns = columns?;
    let n_rows = columns.first().map_or(0, |c| match c {
        Cells::Number(v) => v.len(),
        Cells::Text(t) => t.len(),
    });
    let mut out = std::collections::HashMap::new();
    for (name, cells) in names.iter().zip(columns) {
        out.insert(
            name.clone(),
            match cells {
                Cells::Number(v) => RawColumn::Number(v),
                Cells::Text(t) => RawColumn::Text(t),
            },
        );
    }
    debug_assert_eq!(layout.numeric.len(), out.len());
    Some(RawTable {
        path: path.to_path_buf(),
        n_rows,
        columns: out,
    })
}

/// The header's fields and the asked-for columns among them.
fn header_layout(line: &[u8], names: &[String], numeric: &[String], delimiter: u8) -> Option<Layout> {
    let line = line.strip_suffix(b"\r").unwrap_or(line);
    if !delimiter.is_ascii() || line.starts_with(&[0xEF, 0xBB, 0xBF]) || line.contains(&b'"') || line.is_empty() {
        return None;
    }
    let text = std::str::from_utf8(line).ok()?;
    let fields: Vec<&str> = text.split(delimiter as char).collect();
    if fields.iter().any(|f| f.trim() != *f || f.is_empty()) {
        return None;
    }
    let mut wanted = vec![None; fields.len()];
    for (k, name) in names.iter().enumerate() {
        let mut at = fields.iter().enumerate().filter(|(_, f)| **f == name.as_str());
        let (i, _) = at.next()?;
        if at.next().is_some() || wanted[i].is_some() {
            return None;
        }
        wanted[i] = Some(k);
    }
    Some(Layout {
        fields: fields.len(),
        wanted,
        numeric: names.iter().map(|n| numeric.contains(n)).collect(),
        delimiter,
    })
}

/// Parse complete lines (the file's last may lack its newline), splitting a
/// large range into two halves parsed side by side.
fn parse_lines(bytes: &[u8], l: &Layout) -> Option<Vec<Cells>> {
    if bytes.len() >= SPLIT_BYTES {
        let mid = bytes.len() / 2;
        if let Some(nl) = bytes[mid..].iter().position(|&b| b == b'\n') {
            let cut = mid + nl + 1;
            if cut < bytes.len() {
                let (a, b) = rayon::join(|| parse_range(&bytes[..cut], l), || parse_range(&bytes[cut..], l));
                return Some(concat(a?, b?));
            }
        }
    }
    parse_range(bytes, l)
}

/// Parse a range of whole lines into one column of cells per asked-for column.
///
/// Fields are found with one vectorised scan for the delimiter and the
/// newline. A line's last field loses a final `\r`; a blank line is allowed
/// only at the end of the range (a file ending in a newline leaves none), and
/// any other goes to polars.
fn parse_range(bytes: &[u8], l: &Layout) -> Option<Vec<Cells>> {
    std::str::from_utf8(bytes).ok()?;
    if memchr::memchr(b'"', bytes).is_some() {
        return None;
    }
    let lines = memchr::memchr_iter(b'\n', bytes).count() + 1;
    let mut out: Vec<Cells> = l
        .numeric
        .iter()
        .map(|&num| {
            if num {
                Cells::Number(Vec::with_capacity(lines))
            } else {
                Cells::Text(TextCells::with_capacity(lines, 8 * lines))
            }
        })
        .collect();
    let n = bytes.len();
    let mut ends = memchr::memchr2_iter(l.delimiter, b'\n', bytes);
    // The current field's start and its index on the line.
    let (mut start, mut count) = (0usize, 0usize);
    loop {
        // Each delimiter or newline ends a field; the range's end ends the
        // last line when it has no newline.
        let (end, line_end) = match ends.next() {
            Some(p) => (p, bytes[p] == b'\n'),
            None if start == n && count == 0 => break,
            None => (n, true),
        };
        let mut field = &bytes[start..end];
        if line_end {
            field = field.strip_suffix(b"\r").unwrap_or(field);
            if count == 0 && field.is_empty() {
                if end + 1 >= n {
                    break;
                }
                return None;
            }
        }
        if count >= l.fields {
            return None;
        }
        if let Some(k) = l.wanted[count] {
            // SAFETY: the range is valid UTF-8 (checked above), and a field
            // starts after an ASCII delimiter or newline (or at the range's
            // start) and ends before one (or a `\r`, or the range's end), so
            // it starts and ends on character boundaries; `header_layout`
            // refuses a delimiter that is not ASCII.
            let text = unsafe { std::str::from_utf8_unchecked(field) };
            match &mut out[k] {
                Cells::Number(v) => {
                    let t = super::trim(text);
                    v.push(if super::is_missing(t) {
                        None
                    } else {
                        match t.parse::<f64>() {
                            Ok(x) if x.is_finite() => Some(x),
                            _ => return None,
                        }
                    });
                }
                Cells::Text(c) => c.push((!text.is_empty()).then_some(text)),
            }
        }
        count += 1;
        if line_end {
            if count != l.fields {
                return None;
            }
            count = 0;
            if end >= n {
                break;
            }
        }
        start = end + 1;
    }
    Some(out)
}

/// The cells of `a` then `b`, column by column, each column allocated once
/// at its full length.
fn concat(a: Vec<Cells>, b: Vec<Cells>) -> Vec<Cells> {
    a.into_iter()
        .zip(b)
        .map(|pair| match pair {
            (Cells::Number(x), Cells::Number(y)) => {
                let mut v = Vec::with_capacity(x.len() + y.len());
                v.extend(x);
                v.extend(y);
                Cells::Number(v)
            }
            (Cells::Text(x), Cells::Text(y)) => {
                let mut t = TextCells::with_capacity(x.len() + y.len(), x.text_len() + y.text_len());
                t.append(x);
                t.append(y);
                Cells::Text(t)
            }
            _ => unreachable!("a column keeps its kind"),
        })
        .collect()
}

/// Append `part`'s cells to `columns`, column by column.
fn append(columns: &mut [Cells], part: Vec<Cells>) {
    for (c, p) in columns.iter_mut().zip(part) {
        match (c, p) {
            (Cells::Number(a), Cells::Number(b)) => a.extend(b),
            (Cells::Text(a), Cells::Text(b)) => a.append(b),
            _ => unreachable!("a column keeps its kind"),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::super::read::{header, read_columns_polars};
    use super::*;

    /// Both readers on one file and column list: when the direct reader
    /// takes the file, its table equals polars'. Returns whether it did.
    fn agree(path: &Path, names: &[String], numeric: &[String]) -> bool {
        let Some(direct) = read(path, names, numeric, b',') else {
            return false;
        };
        let reference =
            read_columns_polars(path, names, numeric, b',').expect("polars reads what the direct reader reads");
        assert_eq!(direct, reference, "{}", path.display());
        true
    }

    // Every CSV file of the test data (the malformed ones included), every
    // column, as text and as numbers: the direct reader either declines the
    // file or reads exactly what polars 0.55.2 reads (the reader braid used
    // before, and still uses for the files declined).
    #[test]
    fn the_direct_reader_agrees_with_polars_or_declines() {
        let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/data");
        let mut taken = 0;
        let mut files = 0;
        for dir in [root.clone(), root.join("bad")] {
            let mut paths: Vec<_> = std::fs::read_dir(&dir).unwrap().map(|e| e.unwrap().path()).collect();
            paths.sort();
            for path in paths.iter().filter(|p| p.extension().is_some_and(|e| e == "csv")) {
                let Ok(names) = header(path, b',') else { continue };
                files += 1;
                let as_numbers = agree(path, &names, &names);
                let as_text = agree(path, &names, &[]);
                if as_numbers || as_text {
                    taken += 1;
                }
            }
        }
        assert!(taken >= 10, "the direct reader took only {taken} of {files} files");
    }

    // Windows line ends, empty cells, missing-value tokens and a last line
    // without its newline; and the cases it leaves to polars.
    #[test]
    fn line_ends_and_missing_cells_read_as_polars_reads_them() {
        let dir = std::env::temp_dir().join(format!("braid-direct-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let names: Vec<String> = ["id", "age", "score"].iter().map(|s| s.to_string()).collect();
        let cases = [
            (
                "crlf.csv",
                "id,age,score,note\r\nA,10.5,3,x\r\nB,,NA,\r\nC,11, 4 ,y\r\n",
                true,
            ),
            ("no_final_newline.csv", "id,age,score\nA,1,2\nB,3,.", true),
            ("quoted.csv", "id,age,score\n\"A\",1,2\n", false),
            ("ragged.csv", "id,age,score\nA,1,2,9\n", false),
            ("blank_line.csv", "id,age,score\nA,1,2\n\nB,3,4\n", false),
            ("text_in_number.csv", "id,age,score\nA,1,two\n", false),
        ];
        for (file, text, taken) in cases {
            let path = dir.join(file);
            std::fs::write(&path, text).unwrap();
            assert_eq!(agree(&path, &names, &names[1..]), taken, "{file}");
        }
        std::fs::remove_dir_all(&dir).unwrap();
    }
}
