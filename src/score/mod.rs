//! From item responses to scale scores: reverse keying, a mean or prorated
//! sum over the answered items, and the scale's reliability per wave, per
//! cohort and per cohort × wave.
//!
//! [`ItemInput::read`] reads the id, wave, optional cohort, pass-through
//! columns and the items; [`score`] takes it with validated
//! [`ScoreOptions`] and returns a [`ScoreReport`].

pub mod equate;
pub mod factor;
pub mod reliability;

use std::path::Path;

use serde::Serialize;

use crate::data::{DataSummary, LabelledTable, ReadOptions, label_order, labelled_table};
use crate::error::{Error, Result};
use crate::warning::{Warning, WarningCode};

pub use equate::Equating;
pub use factor::OneFactor;
pub use reliability::{ItemStats, Reliability};

/// The bootstrap's seed unless one is given.
pub const DEFAULT_SEED: u64 = 20_140_101;

/// α below this is flagged (common practice, not a law).
pub const ALPHA_FLAG: f64 = 0.70;

/// An item whose standardized one-factor loading moves by more than this
/// between two waves is flagged: a screen for a change in what the item
/// measures, chosen as a moderate change on the loading scale (common
/// practice; not an invariance test).
pub const LOADING_SHIFT_FLAG: f64 = 0.20;

/// The score of a respondent.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum ScoreRule {
    /// The mean of the answered items.
    Mean,
    /// The prorated sum: the mean of the answered items × the number of items.
    Sum,
}

/// The columns a scoring reads, by role.
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct ItemColumns {
    /// The participant id.
    pub id: String,
    /// The wave.
    pub wave: String,
    /// The cohort, when given.
    pub cohort: Option<String>,
    /// The alternate form each respondent took, when forms were used.
    pub form: Option<String>,
    /// Columns copied to the scores (for example age).
    pub pass: Vec<String>,
    /// The items, in order.
    pub items: Vec<String>,
}

/// Expand an item list: comma-separated names, each of which may be a range
/// `q1..q12` (a common prefix and whole numbers).
///
/// # Errors
/// [`Error::Spec`] for a range whose ends do not share a prefix or run down.
pub fn expand_items(list: &str) -> Result<Vec<String>> {
    let bad = |m: String| Error::Spec {
        parameter: "items".into(),
        message: m,
    };
    let mut out = Vec::new();
    for part in list.split(',').map(str::trim).filter(|p| !p.is_empty()) {
        let Some((a, b)) = part.split_once("..") else {
            out.push(part.to_string());
            continue;
        };
        let split = |s: &str| {
            let digits = s.len() - s.trim_end_matches(|c: char| c.is_ascii_digit()).len();
            let (p, n) = s.split_at(s.len() - digits);
            (p.to_string(), n.parse::<usize>().ok())
        };
        match (split(a), split(b)) {
            ((pa, Some(x)), (pb, Some(y))) if pa == pb && x <= y => out.extend((x..=y).map(|i| format!("{pa}{i}"))),
            _ => return Err(bad(format!("'{part}' is not a range like q1..q12"))),
        }
    }
    Ok(out)
}

/// Settings of a scoring, validated by [`ScoreOptions::new`].
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ScoreOptions {
    /// Reverse-keyed items (x → min + max − x).
    pub reverse: Vec<String>,
    /// The lowest legal response.
    pub scale_min: f64,
    /// The highest legal response.
    pub scale_max: f64,
    /// Mean or prorated sum.
    pub rule: ScoreRule,
    /// A score needs at least this many answered items.
    pub min_answered: usize,
    /// Seed of the bootstrap of the equating constants.
    pub seed: u64,
    /// Anchor items shared by the forms: with them, forms are equated by
    /// chained linear equating through the anchor score (common items).
    pub anchor: Vec<String>,
}

impl ScoreOptions {
    /// Validated settings.
    ///
    /// # Errors
    /// [`Error::Spec`] for a scale whose minimum is not below its maximum,
    /// or `min_answered` of zero.
    pub fn new(
        reverse: Vec<String>,
        scale_min: f64,
        scale_max: f64,
        rule: ScoreRule,
        min_answered: usize,
    ) -> Result<ScoreOptions> {
        let o = ScoreOptions {
            reverse,
            scale_min,
            scale_max,
            rule,
            min_answered,
            seed: DEFAULT_SEED,
            anchor: Vec::new(),
        };
        o.validate(None)?;
        Ok(o)
    }

    fn validate(&self, items: Option<&[String]>) -> Result<()> {
        let spec = |parameter: &str, message: String| Error::Spec {
            parameter: parameter.into(),
            message,
        };
        if !(self.scale_min.is_finite() && self.scale_max.is_finite() && self.scale_min < self.scale_max) {
            return Err(spec(
                "scale_min",
                format!(
                    "the scale runs from {} to {}; the minimum must be below the maximum",
                    self.scale_min, self.scale_max
                ),
            ));
        }
        if self.min_answered == 0 {
            return Err(spec("min_answered", "a score needs at least one answered item".into()));
        }
        if let Some(items) = items {
            if items.len() < 3 {
                return Err(spec(
                    "items",
                    format!("{} item(s): a scale with reliability needs at least 3", items.len()),
                ));
            }
            if let Some(a) = self.anchor.iter().find(|a| !items.contains(a)) {
                return Err(spec(
                    "anchor",
                    format!("'{a}' is not one of the items ({})", items.join(", ")),
                ));
            }
            if let Some(r) = self.reverse.iter().find(|r| !items.contains(r)) {
                return Err(spec(
                    "reverse",
                    format!("'{r}' is not one of the items ({})", items.join(", ")),
                ));
            }
            if self.min_answered > items.len() {
                return Err(spec(
                    "min_answered",
                    format!(
                        "{} answered items asked for, but the scale has {}",
                        self.min_answered,
                        items.len()
                    ),
                ));
            }
        }
        Ok(())
    }

    /// Integer responses are required when both ends of the scale are whole.
    fn integers(&self) -> bool {
        self.scale_min.fract() == 0.0 && self.scale_max.fract() == 0.0
    }
}

/// Item responses with their id, wave, cohort and pass-through columns.
#[derive(Debug, Clone)]
pub struct ItemInput {
    /// The columns read.
    pub columns: ItemColumns,
    /// The table: labels id, wave, [cohort], pass...; numbers: the items.
    pub table: LabelledTable,
}

impl ItemInput {
    /// Read the columns of `columns` from a file, keeping blank items.
    ///
    /// # Errors
    /// Errors of reading the file; [`Error::Data`] for a row without an id
    /// or a wave.
    pub fn read(path: &Path, columns: &ItemColumns, read: ReadOptions) -> Result<ItemInput> {
        let mut labels: Vec<(&str, &str)> = vec![("id", &columns.id), ("wave", &columns.wave)];
        if let Some(c) = &columns.cohort {
            labels.push(("cohort", c));
        }
        if let Some(f) = &columns.form {
            labels.push(("form", f));
        }
        labels.extend(columns.pass.iter().map(|p| ("pass-through", p.as_str())));
        let items: Vec<(&str, &str)> = columns.items.iter().map(|i| ("items", i.as_str())).collect();
        let table = labelled_table(path, &labels, &items, read)?;
        for (k, name) in [(0, "id"), (1, "wave")] {
            if let Some(r) = table.labels[k].iter().position(Option::is_none) {
                return Err(Error::Data {
                    path: path.to_path_buf(),
                    message: format!("data row {}: the {name} is blank; every row needs one", r + 1),
                });
            }
        }
        Ok(ItemInput {
            columns: columns.clone(),
            table,
        })
    }

    fn label(&self, column: usize, r: usize) -> &str {
        self.table.labels[column][r].as_deref().unwrap_or("")
    }
}

/// An item whose loading moves across waves.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LoadingShift {
    /// The item.
    pub item: String,
    /// Its standardized loading at each wave, in wave order.
    pub loadings: Vec<f64>,
    /// Largest minus smallest.
    pub range: f64,
}

/// Items whose loading range over the waves exceeds the flag.
fn loading_shifts(items: &[String], per_wave: &[Reliability]) -> Vec<LoadingShift> {
    let fits: Vec<&OneFactor> = per_wave.iter().filter_map(|r| r.one_factor.as_ref()).collect();
    if fits.len() < 2 || fits.iter().any(|f| f.loadings.len() != items.len()) {
        return Vec::new();
    }
    items
        .iter()
        .enumerate()
        .filter_map(|(j, item)| {
            let l: Vec<f64> = fits.iter().map(|f| f.loadings[j]).filter(|v| v.is_finite()).collect();
            if l.len() < 2 {
                return None;
            }
            let range =
                l.iter().copied().fold(f64::NEG_INFINITY, f64::max) - l.iter().copied().fold(f64::INFINITY, f64::min);
            (range > LOADING_SHIFT_FLAG).then(|| LoadingShift {
                item: item.clone(),
                loadings: l,
                range,
            })
        })
        .collect()
}

/// Put every form on the first form's scale (in label order), from the
/// random groups of the wave where the two forms have the most respondents
/// together, and equate the scores in place.
fn equate_forms(
    input: &ItemInput,
    f: usize,
    scores: &mut [ScoreRow],
    keyed: &[f64],
    options: &ScoreOptions,
) -> Result<Vec<Equating>> {
    let seed = options.seed;
    let n = scores.len();
    let mut forms: Vec<String> = (0..n).map(|r| input.label(f, r).to_string()).collect();
    forms.sort_by(|a, b| label_order(a, b));
    forms.dedup();
    let reference = forms[0].clone();
    let mut waves: Vec<String> = (0..n).map(|r| input.label(1, r).to_string()).collect();
    waves.sort_by(|a, b| label_order(a, b));
    waves.dedup();
    let at = |form: &str, wave: &str| -> Vec<f64> {
        (0..n)
            .filter(|&r| input.label(f, r) == form && input.label(1, r) == wave && scores[r].score.is_finite())
            .map(|r| scores[r].score)
            .collect()
    };
    let mut out = Vec::new();
    // Common items: each form's (score, anchor mean) pairs over every wave.
    if !options.anchor.is_empty() {
        let k = input.columns.items.len();
        let anchor: Vec<usize> = options
            .anchor
            .iter()
            .filter_map(|a| input.columns.items.iter().position(|i| i == a))
            .collect();
        let pairs = |form: &str| -> Vec<(f64, f64)> {
            (0..n)
                .filter(|&r| input.label(f, r) == form && scores[r].score.is_finite())
                .filter_map(|r| {
                    let v: Vec<f64> = anchor.iter().map(|&j| keyed[r * k + j]).collect();
                    v.iter()
                        .all(|x| x.is_finite())
                        .then(|| (scores[r].score, v.iter().sum::<f64>() / v.len() as f64))
                })
                .collect()
        };
        let reference_pairs = pairs(&reference);
        for (i, form) in forms.iter().enumerate().skip(1) {
            let own = pairs(form);
            if own.len() < 2 || reference_pairs.len() < 2 {
                return Err(Error::Data {
                    path: input.table.source.clone(),
                    message: format!(
                        "form '{form}' or '{reference}' has fewer than two respondents with every anchor item"
                    ),
                });
            }
            let (slope, intercept, slope_se, intercept_se) =
                equate::equate_chained(&own, &reference_pairs, seed + i as u64);
            out.push(Equating {
                form: form.clone(),
                reference: reference.clone(),
                design: "common items",
                wave: "all".into(),
                n_form: own.len(),
                n_reference: reference_pairs.len(),
                slope,
                intercept,
                slope_se,
                intercept_se,
            });
        }
    }
    for (i, form) in forms.iter().enumerate().skip(1).filter(|_| options.anchor.is_empty()) {
        let best = waves
            .iter()
            .map(|w| (w, at(form, w), at(&reference, w)))
            .filter(|(_, a, b)| a.len() >= 2 && b.len() >= 2)
            .max_by_key(|(_, a, b)| a.len().min(b.len()));
        let Some((wave, x, y)) = best else {
            return Err(Error::Data {
                path: input.table.source.clone(),
                message: format!(
                    "form '{form}' and the reference form '{reference}' were never both given at one wave, so they \
                     cannot be equated by random groups; give both forms at one wave"
                ),
            });
        };
        let (slope, intercept, slope_se, intercept_se) = equate::equate(&x, &y, seed + i as u64);
        out.push(Equating {
            form: form.clone(),
            reference: reference.clone(),
            design: "random groups",
            wave: wave.clone(),
            n_form: x.len(),
            n_reference: y.len(),
            slope,
            intercept,
            slope_se,
            intercept_se,
        });
    }
    for (r, row) in scores.iter_mut().enumerate() {
        if let Some(e) = out.iter().find(|e| e.form == input.label(f, r)) {
            row.score = e.intercept + e.slope * row.score;
        }
    }
    Ok(out)
}

/// One row of `scores.csv`.
#[derive(Debug, Clone, PartialEq)]
pub struct ScoreRow {
    /// Id, wave, [cohort], pass-through values, as read, comma-separated.
    pub labels: String,
    /// The score (NaN: too few items answered).
    pub score: f64,
    /// Items answered.
    pub n_answered: usize,
}

/// The scoring report, with stable JSON keys.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ScoreReport {
    /// What was read.
    pub data: DataSummary,
    /// The settings.
    pub options: ScoreOptions,
    /// The items, in order.
    pub items: Vec<String>,
    /// Warnings.
    pub warnings: Vec<Warning>,
    /// Their codes.
    pub warning_codes: Vec<WarningCode>,
    /// Rows scored.
    pub n_scored: usize,
    /// Rows left without a score: fewer than `min_answered` items answered.
    pub n_unscored: usize,
    /// Every row (listwise on the items for α).
    pub overall: Reliability,
    /// Per wave.
    pub per_wave: Vec<Reliability>,
    /// Per cohort (when a cohort column is given).
    pub per_cohort: Vec<Reliability>,
    /// Per cohort × wave.
    pub per_cohort_wave: Vec<Reliability>,
    /// Each non-reference form placed on the reference form's scale (the
    /// scores in scores.csv are equated).
    pub equating: Vec<Equating>,
    /// Items whose standardized loading moves across waves by more than
    /// [`LOADING_SHIFT_FLAG`] (largest minus smallest over the waves).
    pub loading_shifts: Vec<LoadingShift>,
    /// The scores, for `scores.csv`.
    #[serde(skip)]
    pub scores: Vec<ScoreRow>,
    /// The header of `scores.csv`.
    #[serde(skip)]
    pub score_header: Vec<String>,
}

/// Check and key every response; the keyed responses, row-major.
fn keyed(table: &LabelledTable, items: &[String], options: &ScoreOptions) -> Result<Vec<f64>> {
    let k = items.len();
    let (lo, hi) = (options.scale_min, options.scale_max);
    let mut out = Vec::with_capacity(table.n_rows * k);
    let reversed: Vec<bool> = items.iter().map(|i| options.reverse.contains(i)).collect();
    let integers = options.integers();
    for r in 0..table.n_rows {
        for (j, item) in items.iter().enumerate() {
            let x = table.numbers[j][r];
            if x.is_finite() && (x < lo || x > hi || (integers && x.fract() != 0.0)) {
                return Err(Error::BadValue {
                    path: table.source.clone(),
                    column: item.clone(),
                    row: r + 1,
                    value: x.to_string(),
                    advice: format!(
                        "is not a legal response: the scale takes {} from {lo} to {hi}; correct the value or the scale \
                         (`scale_min`, `scale_max`)",
                        if options.integers() { "whole numbers" } else { "values" }
                    ),
                });
            }
            out.push(if reversed[j] { lo + hi - x } else { x });
        }
    }
    Ok(out)
}

/// The score of one row of keyed responses, and the items answered (NaN
/// when fewer than `min_answered` are).
fn row_score(row: &[f64], options: &ScoreOptions) -> (f64, usize) {
    let (sum, answered) = row
        .iter()
        .filter(|v| v.is_finite())
        .fold((0.0, 0usize), |(s, n), v| (s + v, n + 1));
    if answered < options.min_answered {
        return (f64::NAN, answered);
    }
    let mean = sum / answered as f64;
    match options.rule {
        ScoreRule::Mean => (mean, answered),
        ScoreRule::Sum => (mean * row.len() as f64, answered),
    }
}

/// The score of every data row of a file, for a study file that names its
/// scale: the outcome is scored on the fly (`None`: too few items answered).
///
/// # Errors
/// As [`score`], and errors of reading the items.
pub fn score_column(
    path: &Path,
    items: &[String],
    options: &ScoreOptions,
    read: ReadOptions,
) -> Result<Vec<Option<f64>>> {
    options.validate(Some(items))?;
    let cols: Vec<(&str, &str)> = items.iter().map(|i| ("items", i.as_str())).collect();
    let table = labelled_table(path, &[], &cols, read)?;
    let y = keyed(&table, items, options)?;
    let k = items.len();
    Ok((0..table.n_rows)
        .map(|r| Some(row_score(&y[r * k..(r + 1) * k], options).0).filter(|s| s.is_finite()))
        .collect())
}

/// Score every row and measure the scale's reliability.
///
/// # Errors
/// [`Error::Spec`] for options that do not fit the items (fewer than 3, an
/// unknown reversed item); [`Error::BadValue`] for a response outside the
/// scale.
pub fn score(input: &ItemInput, options: &ScoreOptions) -> Result<ScoreReport> {
    let items = &input.columns.items;
    options.validate(Some(items))?;
    let k = items.len();
    let y = keyed(&input.table, items, options)?;
    let n = input.table.n_rows;
    let n_labels = input.table.labels.len();
    let mut scores: Vec<ScoreRow> = Vec::with_capacity(n);
    let mut unscored = 0;
    for r in 0..n {
        let (score, answered) = row_score(&y[r * k..(r + 1) * k], options);
        unscored += usize::from(score.is_nan());
        scores.push(ScoreRow {
            labels: {
                let mut l = String::new();
                for c in 0..n_labels {
                    if c > 0 {
                        l.push(',');
                    }
                    l.push_str(input.label(c, r));
                }
                l
            },
            score,
            n_answered: answered,
        });
    }
    let cohort_col = input.columns.cohort.as_ref().map(|_| 2);
    // Each row's wave and cohort as an index into its labels, in label order.
    let codes = |column: usize| -> (Vec<String>, Vec<usize>) {
        let mut index: std::collections::HashMap<&str, usize> = std::collections::HashMap::new();
        let raw: Vec<usize> = (0..n)
            .map(|r| {
                let len = index.len();
                *index.entry(input.label(column, r)).or_insert(len)
            })
            .collect();
        let mut labels: Vec<(&str, usize)> = index.into_iter().collect();
        labels.sort_by(|a, b| label_order(a.0, b.0));
        let mut rank = vec![0; labels.len()];
        for (new, (_, old)) in labels.iter().enumerate() {
            rank[*old] = new;
        }
        (
            labels.into_iter().map(|(l, _)| l.to_string()).collect(),
            raw.into_iter().map(|c| rank[c]).collect(),
        )
    };
    // Rows per group code.
    let members = |code: &dyn Fn(usize) -> usize, groups: usize| -> Vec<Vec<&[f64]>> {
        let mut m: Vec<Vec<&[f64]>> = vec![Vec::new(); groups];
        for r in 0..n {
            m[code(r)].push(&y[r * k..(r + 1) * k]);
        }
        m
    };
    let (waves, wave_code) = codes(1);
    let per_wave: Vec<Reliability> = members(&|r| wave_code[r], waves.len())
        .into_iter()
        .zip(&waves)
        .map(|(rows, w)| reliability::reliability(items, &rows, Some(w.clone()), None))
        .collect();
    let (per_cohort, per_cohort_wave) = match cohort_col {
        Some(c) => {
            let (cohorts, cohort_code) = codes(c);
            let by_cohort = members(&|r| cohort_code[r], cohorts.len());
            let by_pair = members(
                &|r| cohort_code[r] * waves.len() + wave_code[r],
                cohorts.len() * waves.len(),
            );
            (
                by_cohort
                    .into_iter()
                    .zip(&cohorts)
                    .map(|(rows, g)| reliability::reliability(items, &rows, None, Some(g.clone())))
                    .collect(),
                by_pair
                    .into_iter()
                    .enumerate()
                    .filter(|(_, rows)| !rows.is_empty())
                    .map(|(i, rows)| {
                        let (g, w) = (&cohorts[i / waves.len()], &waves[i % waves.len()]);
                        reliability::reliability(items, &rows, Some(w.clone()), Some(g.clone()))
                    })
                    .collect(),
            )
        }
        None => (Vec::new(), Vec::new()),
    };
    let loading_shifts = loading_shifts(items, &per_wave);
    let equating = match input
        .columns
        .form
        .as_ref()
        .map(|_| 2 + usize::from(cohort_col.is_some()))
    {
        Some(f) => equate_forms(input, f, &mut scores, &y, options)?,
        None => Vec::new(),
    };
    let all: Vec<&[f64]> = (0..n).map(|r| &y[r * k..(r + 1) * k]).collect();
    let overall = reliability::reliability(items, &all, None, None);
    let mut warnings = Vec::new();
    for rel in &per_wave {
        if !rel.constant_items.is_empty() {
            warnings.push(Warning::new(
                WarningCode::ConstantItem,
                format!(
                    "at wave {}, item(s) {} have no variance among the respondents used; they add nothing to α and \
                     their item-rest correlations are not defined",
                    rel.wave.as_deref().unwrap_or(""),
                    rel.constant_items.join(", ")
                ),
            ));
        }
    }
    let mut score_header = vec![input.columns.id.clone(), input.columns.wave.clone()];
    score_header.extend(input.columns.cohort.iter().cloned());
    score_header.extend(input.columns.form.iter().cloned());
    score_header.extend(input.columns.pass.iter().cloned());
    score_header.extend(["score".to_string(), "n_answered".to_string()]);
    Ok(ScoreReport {
        data: summary(input),
        options: options.clone(),
        items: items.clone(),
        warning_codes: crate::warning::codes(&warnings),
        warnings,
        n_scored: n - unscored,
        n_unscored: unscored,
        overall,
        per_wave,
        per_cohort,
        per_cohort_wave,
        loading_shifts,
        equating,
        scores,
        score_header,
    })
}

fn summary(input: &ItemInput) -> DataSummary {
    let mut ids: Vec<&str> = input.table.labels[0].iter().flatten().map(String::as_str).collect();
    ids.sort_unstable();
    ids.dedup();
    let c = &input.columns;
    let mut roles = std::collections::BTreeMap::new();
    roles.insert("id".to_string(), c.id.clone());
    roles.insert("wave".to_string(), c.wave.clone());
    if let Some(g) = &c.cohort {
        roles.insert("cohort".to_string(), g.clone());
    }
    roles.insert("items".to_string(), c.items.join(","));
    DataSummary {
        file: input.table.source.display().to_string(),
        n_rows_read: input.table.n_rows,
        n_obs: input.table.n_rows,
        n_participants: Some(ids.len()),
        age_min: f64::NAN,
        age_max: f64::NAN,
        outcome: "score".into(),
        roles,
        ..Default::default()
    }
}
