//! The study's report as one self-contained HTML page: inline CSS, figures
//! as inline SVG (the same files the analyses write), real tables with
//! header cells, a text alternative for every figure, a print stylesheet,
//! and no script, font or image fetched from anywhere.
//!
//! Every number on the page comes from an analysis's JSON document and
//! carries its address there (`data-json` names the file, `data-ptr` the
//! JSON pointer, `data-dp` the decimals shown), so a test can check that
//! the page and the files say the same.

mod sections;

pub use sections::HEADINGS;

use std::fmt::Write;
use std::path::Path;

use crate::error::{Error, Result};
use crate::study::StudyReport;

/// The page's file name.
pub const PAGE: &str = "report.html";

/// The page's style: braid's warm ground and ink, and the figures'
/// colour-blind-safe palette (Okabe & Ito 2008) for accents.
const CSS: &str = r#"
:root { --ink: #282830; --ground: #fcfaf5; --rule: #d8d2c4; --muted: #5f5b52; --accent: #005f69; --warn: #b35900; }
* { box-sizing: border-box; }
body { margin: 0; background: var(--ground); color: var(--ink); font: 16px/1.55 system-ui, -apple-system, "Segoe UI", sans-serif; }
header, main { max-width: 1040px; margin: 0 auto; padding: 0 24px; }
header { padding-top: 32px; border-bottom: 2px solid var(--accent); }
h1 { font-size: 1.9rem; margin: 0 0 4px; }
h2 { font-size: 1.45rem; margin: 2.2rem 0 0.6rem; border-bottom: 1px solid var(--rule); padding-bottom: 4px; }
h3 { font-size: 1.1rem; margin: 1.4rem 0 0.4rem; }
p.lede { color: var(--muted); margin-top: 0; }
nav ol { columns: 2; padding-left: 1.2rem; margin: 0.6rem 0 1rem; }
a { color: var(--accent); }
table { border-collapse: collapse; margin: 0.6rem 0 1rem; font-variant-numeric: tabular-nums; font-size: 0.92rem; }
caption { text-align: left; color: var(--muted); font-size: 0.88rem; padding-bottom: 4px; }
th, td { padding: 3px 10px; border-bottom: 1px solid var(--rule); }
th { text-align: left; font-weight: 600; background: #f2eee4; }
td.n, th.n { text-align: right; }
figure { margin: 1rem 0 1.4rem; break-inside: avoid; page-break-inside: avoid; }
figure svg { width: 100%; height: auto; display: block; border: 1px solid var(--rule); }
figcaption { color: var(--muted); font-size: 0.9rem; margin-top: 4px; }
header .verdict { margin: 0 0 16px; }
.verdict p { margin: 0; }
.verdict { border-left: 4px solid var(--accent); padding: 6px 12px; background: #eef4f3; }
.warning { border-left: 4px solid var(--warn); padding: 6px 12px; background: #fbf1e6; }
.skipped { color: var(--muted); font-style: italic; }
pre { background: #f2eee4; padding: 10px; overflow-x: auto; font-size: 0.85rem; white-space: pre-wrap; }
code { font-size: 0.9em; }
footer { max-width: 1040px; margin: 2rem auto; padding: 0 24px 32px; color: var(--muted); font-size: 0.85rem; }
@media print {
  body { background: #fff; font-size: 11pt; }
  nav { display: none; }
  header, main, footer { max-width: none; padding: 0; }
  h2 { break-after: avoid; page-break-after: avoid; }
  figure, table, .verdict { break-inside: avoid; page-break-inside: avoid; }
  figure svg { border: none; max-height: 60vh; }
}
"#;

/// The page builder: HTML text plus the folder that holds the analyses'
/// files, from which the figures are inlined.
pub(crate) struct Page<'a> {
    pub html: String,
    dir: &'a Path,
    figures: usize,
}

/// Escape text for HTML.
pub(crate) fn esc(text: &str) -> String {
    text.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

/// A number from `file` at JSON pointer `/ptr` (written without its
/// leading slash), shown with `dp` decimals.
pub(crate) fn num(file: &str, ptr: &str, v: f64, dp: usize) -> String {
    let shown = if v.is_finite() {
        format!("{v:.dp$}")
    } else {
        "—".to_string()
    };
    format!(r#"<span data-json="{file}" data-ptr="/{ptr}" data-dp="{dp}">{shown}</span>"#)
}

/// A p-value from `file` at `/ptr`: three decimals, or "< 0.001".
pub(crate) fn pval(file: &str, ptr: &str, p: f64) -> String {
    let shown = if !p.is_finite() {
        "—".to_string()
    } else if p < 0.001 {
        "&lt; 0.001".to_string()
    } else {
        format!("{p:.3}")
    };
    format!(r#"<span data-json="{file}" data-ptr="/{ptr}" data-p="1">{shown}</span>"#)
}

/// Text from `file` at `/ptr` (a verdict, a caution), shown whole.
pub(crate) fn text(file: &str, ptr: &str, t: &str) -> String {
    format!(r#"<span data-json="{file}" data-ptr="/{ptr}">{}</span>"#, esc(t))
}

impl<'a> Page<'a> {
    fn new(dir: &'a Path) -> Page<'a> {
        Page {
            html: String::new(),
            dir,
            figures: 0,
        }
    }

    /// Append HTML.
    pub fn push(&mut self, s: &str) {
        self.html.push_str(s);
    }

    /// A table: a caption (HTML), header cells (a leading `#` marks a numeric
    /// column) and rows of cells already rendered.
    pub fn table(&mut self, caption: &str, head: &[&str], rows: &[Vec<String>]) {
        let numeric: Vec<bool> = head.iter().map(|h| h.starts_with('#')).collect();
        let _ = write!(self.html, "<table><caption>{caption}</caption><thead><tr>");
        for (h, n) in head.iter().zip(&numeric) {
            let label = esc(h.trim_start_matches('#'));
            let class = if *n { r#" class="n""# } else { "" };
            let _ = write!(self.html, r#"<th scope="col"{class}>{label}</th>"#);
        }
        self.html.push_str("</tr></thead><tbody>");
        for row in rows {
            self.html.push_str("<tr>");
            for (k, cell) in row.iter().enumerate() {
                if k == 0 {
                    let _ = write!(self.html, r#"<th scope="row">{cell}</th>"#);
                } else if numeric.get(k).copied().unwrap_or(false) {
                    let _ = write!(self.html, r#"<td class="n">{cell}</td>"#);
                } else {
                    let _ = write!(self.html, "<td>{cell}</td>");
                }
            }
            self.html.push_str("</tr>");
        }
        self.html.push_str("</tbody></table>\n");
    }

    /// Inline the SVG figure `name` from the folder, with `alt` as its text
    /// alternative (the SVG's title) and its caption.
    ///
    /// # Errors
    /// [`Error::Output`] when the figure cannot be read.
    pub fn figure(&mut self, name: &str, alt: &str) -> Result<()> {
        let path = self.dir.join(name);
        let svg = std::fs::read_to_string(&path).map_err(|e| Error::Output {
            path: path.clone(),
            message: format!("cannot read the figure back for the report ({e})"),
        })?;
        self.figures += 1;
        let id = format!("figure-{}", self.figures);
        let body = svg.trim_start_matches(|c| c != '<');
        let body = body
            .strip_prefix("<?xml")
            .and_then(|r| r.split_once("?>").map(|x| x.1))
            .unwrap_or(body)
            .trim_start();
        let open_end = body.find('>').unwrap_or(0);
        let open = body[..open_end].replace(r#" xmlns="http://www.w3.org/2000/svg""#, "");
        let rest = &body[open_end + 1..];
        let _ = writeln!(
            self.html,
            r#"<figure>{open} role="img" aria-labelledby="{id}-title"><title id="{id}-title">{}</title>{rest}<figcaption>{}</figcaption></figure>"#,
            esc(alt),
            esc(alt)
        );
        Ok(())
    }
}

/// Write the page for a study into `dir`, where the analyses' JSON and
/// figures have already been written.
///
/// # Errors
/// [`Error::Output`] when a figure cannot be read or the page written.
pub fn write_page(dir: &Path, r: &StudyReport, apc_figures: &[String]) -> Result<()> {
    let mut page = Page::new(dir);
    let title = format!("braid report · {}", r.data.file);
    let _ = write!(
        page.html,
        r#"<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><meta name="viewport" content="width=device-width, initial-scale=1">
<title>{}</title><style>{CSS}</style></head><body>
"#,
        esc(&title)
    );
    sections::header(&mut page, r);
    page.push("<main>\n");
    sections::study(&mut page, r)?;
    sections::converge(&mut page, r)?;
    sections::trajectory(&mut page, r)?;
    sections::apc(&mut page, r, apc_figures)?;
    sections::anova(&mut page, r)?;
    sections::reliability(&mut page, r)?;
    sections::cautions(&mut page, r);
    sections::methods(&mut page, r);
    sections::reproducibility(&mut page, r);
    page.push("</main>\n");
    let _ = write!(
        page.html,
        "<footer>Made by braid {} from de-identified data. Results are evidence about people: share them as the study's ethics approval and data-protection rules allow.</footer>\n</body></html>\n",
        esc(&r.provenance.braid_version)
    );
    let path = dir.join(PAGE);
    std::fs::write(&path, page.html).map_err(|e| Error::Output {
        path,
        message: format!("cannot write the report ({e}); check the folder's permissions"),
    })
}
