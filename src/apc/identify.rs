//! The entry point of an APC analysis: what it reads, its validated options,
//! and [`identify`], which runs the analysis and returns a report that renders
//! alone.

use std::collections::HashMap;
use std::path::Path;

use serde::Serialize;

use super::analysis::{self, ApcData, ApcReport, Assumption, Constraint};
use super::{hierarchical, intake};
use crate::data::{self, DataSummary, NumericTable, Panel, ReadOptions, Roles};
use crate::error::{Error, Result};
use crate::warning::{Warning, WarningCode};

/// The columns an APC analysis reads, by role.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct ApcColumns {
    /// Age (exact years for records; the group's first year for a table).
    pub age: String,
    /// Period (calendar time of assessment, or the group's first year).
    pub period: String,
    /// Records: a continuous outcome.
    pub outcome: Option<String>,
    /// A table: the number of events.
    pub events: Option<String>,
    /// A table: the exposure.
    pub exposure: Option<String>,
    /// Panels: the participant id.
    pub id: Option<String>,
    /// Panels: a cluster (for example the school), a random intercept each
    /// in the exact-value model.
    pub cluster: Option<String>,
    /// Records: a birth-year column, checked against period − age.
    pub birth_year: Option<String>,
}

/// A given birth-year column, by data row.
#[derive(Debug, Clone, PartialEq)]
pub struct BirthYears {
    /// The column.
    pub column: String,
    /// Its values, with the rows that have one.
    pub table: NumericTable,
}

/// What an APC analysis reads.
#[derive(Debug, Clone)]
pub enum ApcInput {
    /// A table of counts: columns age, period, events, exposure.
    Counts {
        /// The table.
        table: NumericTable,
        /// Role of each column.
        columns: ApcColumns,
    },
    /// Records (repeated cross-sections or a panel without ids): columns
    /// age, period, outcome.
    Records {
        /// The records.
        table: NumericTable,
        /// Role of each column.
        columns: ApcColumns,
        /// A given birth-year column.
        birth_years: Option<BirthYears>,
    },
    /// A panel: records with a participant id (a random intercept each).
    Panel {
        /// The panel.
        panel: Box<Panel>,
        /// Its records as age, period, outcome.
        table: NumericTable,
        /// A given birth-year column.
        birth_years: Option<BirthYears>,
    },
}

impl ApcInput {
    /// Read the columns named in `columns` from a file: a table of counts
    /// when events and exposure are named, a panel when an id is named,
    /// otherwise records.
    ///
    /// # Errors
    /// [`Error::Spec`] when neither an outcome nor events and exposure are
    /// named; errors of reading the file.
    pub fn read(path: &Path, columns: &ApcColumns, read: ReadOptions) -> Result<ApcInput> {
        let (age, period) = (columns.age.as_str(), columns.period.as_str());
        let births = |c: &Option<String>| -> Result<Option<BirthYears>> {
            c.as_ref()
                .map(|c| {
                    Ok(BirthYears {
                        column: c.clone(),
                        table: data::numeric_table(path, &[("birth_year", c)], read)?,
                    })
                })
                .transpose()
        };
        match (&columns.outcome, &columns.events, &columns.exposure) {
            (Some(y), _, _) if columns.id.is_some() => {
                let roles = Roles {
                    id: columns.id.clone().unwrap_or_default(),
                    age: age.into(),
                    outcome: y.clone(),
                    period: Some(period.into()),
                    cluster: columns.cluster.clone(),
                    ..Default::default()
                };
                let panel = data::load(path, &roles, read)?;
                let table = panel_records(&panel)?;
                let birth_years = births(&columns.birth_year)?;
                Ok(ApcInput::Panel {
                    panel: Box::new(panel),
                    table,
                    birth_years,
                })
            }
            (Some(y), _, _) => Ok(ApcInput::Records {
                table: data::numeric_table(path, &[("age", age), ("period", period), ("outcome", y)], read)?,
                columns: columns.clone(),
                birth_years: births(&columns.birth_year)?,
            }),
            (None, Some(ev), Some(ex)) => Ok(ApcInput::Counts {
                table: data::numeric_table(
                    path,
                    &[("age", age), ("period", period), ("events", ev), ("exposure", ex)],
                    read,
                )?,
                columns: columns.clone(),
            }),
            _ => Err(Error::Spec {
                parameter: "outcome".into(),
                message: "name an `outcome` column (records) or `events` with `exposure` (a table of counts)".into(),
            }),
        }
    }

    /// A panel already loaded (or simulated): its records as age, period and
    /// outcome, with a random intercept per participant.
    ///
    /// # Errors
    /// [`Error::Data`] when the panel has no calendar times.
    pub fn from_panel(panel: Panel) -> Result<ApcInput> {
        let table = panel_records(&panel)?;
        Ok(ApcInput::Panel {
            panel: Box::new(panel),
            table,
            birth_years: None,
        })
    }

    fn records(&self) -> Option<&NumericTable> {
        match self {
            ApcInput::Counts { .. } => None,
            ApcInput::Records { table, .. } | ApcInput::Panel { table, .. } => Some(table),
        }
    }

    fn birth_years(&self) -> Option<&BirthYears> {
        match self {
            ApcInput::Counts { .. } => None,
            ApcInput::Records { birth_years, .. } | ApcInput::Panel { birth_years, .. } => birth_years.as_ref(),
        }
    }

    fn source(&self) -> &Path {
        match self {
            ApcInput::Counts { table, .. } | ApcInput::Records { table, .. } | ApcInput::Panel { table, .. } => {
                &table.source
            }
        }
    }

    /// The data summary of the input.
    pub fn summary(&self) -> DataSummary {
        match self {
            ApcInput::Panel { panel, .. } => panel.summary(),
            ApcInput::Counts { table, columns } => table.summary(
                &[
                    ("age", &columns.age),
                    ("period", &columns.period),
                    ("events", columns.events.as_deref().unwrap_or_default()),
                    ("exposure", columns.exposure.as_deref().unwrap_or_default()),
                ],
                columns.events.as_deref().unwrap_or_default(),
            ),
            ApcInput::Records { table, columns, .. } => {
                let y = columns.outcome.as_deref().unwrap_or_default();
                table.summary(&[("age", &columns.age), ("period", &columns.period), ("outcome", y)], y)
            }
        }
    }
}

/// A panel's records as a table of age, period and outcome.
fn panel_records(panel: &Panel) -> Result<NumericTable> {
    let Some(calendar) = &panel.calendar else {
        return Err(Error::Data {
            path: panel.source.clone(),
            message: "an APC analysis needs the calendar time of each assessment; name a `period` column".into(),
        });
    };
    Ok(NumericTable {
        source: panel.source.clone(),
        columns: vec![panel.age.to_vec(), calendar.period.clone(), panel.outcome.to_vec()],
        n_rows_read: panel.n_rows_read,
        dropped: panel.dropped.total(),
        rows: panel.row.clone(),
    })
}

/// Settings of an APC analysis, validated by [`ApcOptions::new`].
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct ApcOptions {
    /// Records: width of the age and period groups in years (`None`: about
    /// eight age groups).
    pub width: Option<f64>,
    /// Just-identifying constraints (empty: the default set).
    pub constraints: Vec<Constraint>,
    /// Assumptions for the bounds.
    pub assumptions: Vec<Assumption>,
    /// Records: also fit the hierarchical model.
    pub hierarchical: bool,
}

impl ApcOptions {
    /// Validated settings.
    ///
    /// # Errors
    /// [`Error::Spec`] for a group width that is not a positive number.
    pub fn new(
        width: Option<f64>,
        constraints: Vec<Constraint>,
        assumptions: Vec<Assumption>,
        hierarchical: bool,
    ) -> Result<ApcOptions> {
        let options = ApcOptions {
            width,
            constraints,
            assumptions,
            hierarchical,
        };
        options.validate()?;
        Ok(options)
    }

    fn validate(&self) -> Result<()> {
        if let Some(w) = self.width.filter(|w| !(w.is_finite() && *w > 0.0)) {
            return Err(Error::Spec {
                parameter: "width".into(),
                message: format!("group width {w} is not a positive number of years"),
            });
        }
        Ok(())
    }
}

/// Say what the data identify about age, period and cohort: the fits, the
/// line of solutions, the identified quantities, each constrained solution
/// and the bounds; for records, the birth-year check and the hierarchical fit
/// when asked for.
///
/// # Errors
/// [`Error::Spec`] for options that do not fit the input (a width for a table
/// of counts, a hierarchical fit of a table); errors of grouping, the fits and
/// the birth-year check.
pub fn identify(input: &ApcInput, options: &ApcOptions) -> Result<ApcReport> {
    options.validate()?;
    // The exact-value model and the grouped factor models are independent:
    // they run side by side (each fit still splits its levels over the
    // threads, but the grouped models' row building and small searches
    // leave a core idle).
    let (exact, grouped) = rayon::join(
        || exact_model(input, options),
        || {
            group(input, options).and_then(|data| {
                Ok((
                    analysis::analyse(&data, &options.constraints, &options.assumptions)?,
                    data,
                ))
            })
        },
    );
    let exact = exact?;
    let mut report = match (grouped, exact) {
        (Ok((mut report, data)), exact) => {
            if options.hierarchical {
                let Some(t) = input.records() else {
                    return Err(Error::Spec {
                        parameter: "hierarchical".into(),
                        message: "the hierarchical fit needs records, not a table of counts".into(),
                    });
                };
                report.hierarchical = Some(hierarchical::fit(t, &data)?);
            }
            if let Some(exact) = exact {
                report.warnings.push(grouping_warning(&data, options.width.is_some()));
                withhold_grouped_curvature(&mut report);
                // Without groups asked for, the panel's linkage test is the exact one.
                if let (Some(view), Some(sentence), None) = (&mut report.panel, exact.linkage_sentence(), options.width)
                    && let Some(line) = view.text.get_mut(2)
                {
                    *line = sentence;
                }
                report.exact = Some(exact);
            }
            report
        }
        // Records that cannot be grouped, with no grouping asked for: the
        // exact-value model alone, and why there is no grouped model.
        (Err(why), Some(exact)) if options.width.is_none() && !options.hierarchical => {
            let view = match input {
                ApcInput::Panel { panel, .. } => analysis::PanelView::exact(&panel.id.codes, &exact),
                _ => None,
            };
            let mut report = ApcReport::exact_only(exact, view);
            report.warnings.push(Warning::new(
                WarningCode::NoGroupedModel,
                format!(
                    "no grouped factor model beside the exact-value one: the default groups do not form one ({})",
                    why
                ),
            ));
            report
        }
        (Err(why), _) => return Err(why),
    };
    if let (Some(b), Some(t)) = (input.birth_years(), input.records()) {
        report.cohort_check = Some(check_birth_years(input.source(), b, t)?);
    }
    report.warning_codes = crate::warning::codes(&report.warnings);
    report.data = input.summary();
    report.options = options.clone();
    Ok(report)
}

/// Records: the exact-value model (tables of counts have none).
fn exact_model(input: &ApcInput, options: &ApcOptions) -> Result<Option<super::exact::ExactApc>> {
    let Some(t) = input.records() else {
        return Ok(None);
    };
    let (ids, clusters) = match input {
        ApcInput::Panel { panel, .. } => (Some(&panel.id.codes[..]), panel.cluster.as_ref().map(|c| &c.codes[..])),
        _ => (None, None),
    };
    let records = super::exact::ExactInput {
        age: &t.columns[0],
        period: &t.columns[1],
        y: &t.columns[2],
        ids,
        clusters,
    };
    Ok(Some(super::exact::fit(&records, &options.constraints)?))
}

/// What grouping exact ages and calendar times does, how the groups were
/// formed, and what to read instead.
fn grouping_warning(data: &ApcData, asked: bool) -> Warning {
    let (w, (a0, p0)) = (data.width, data.origin);
    let (a, p) = (data.shape.a, data.shape.p);
    let years = if w == 1.0 { "year" } else { "years" };
    let groups = format!(
        "{a} age groups of {w} {years} from age {a0}, {p} periods of {w} {years} from {p0}, and cohort group = period \
         group − age group"
    );
    let leak = "Inside a group, records of one cohort group sit at different exact ages, so a steep age curve leaks \
                into the period and cohort second differences and their curvature tests, which can then reject \
                without any period or cohort effect; their p-values are withheld.";
    let message = if asked {
        format!(
            "exact ages and calendar times were grouped: {groups}. {leak} The exact-value model, which groups \
             nothing and whose tests hold their level, is printed below (`exact` in the JSON)."
        )
    } else {
        format!(
            "the JSON also holds a grouped factor model, for comparison only: {groups}. {leak} The exact-value model \
             printed here groups nothing."
        )
    };
    Warning::new(WarningCode::GroupedExactAges, message)
}

/// On grouped exact ages the period and cohort curvature tests do not hold
/// their level: on simulated panels without any cohort effect the cohort test
/// rejected at 5% in 47% of replicates at 100 participants per cohort and 86%
/// at 240 (notes/apc-size.md). A wrong p-value is worse than none, so the
/// statistic is kept and the p-value withheld, with the reason.
fn withhold_grouped_curvature(report: &mut ApcReport) {
    for t in &mut report.curvature_tests {
        if t.dimension != super::Dimension::Age {
            t.p = f64::NAN;
            t.withheld = Some(
                "grouping exact ages leaks the age curve into this test, which then rejects without any such \
                 effect (by simulation, far above its nominal 5%)"
                    .into(),
            );
        }
    }
}

/// The age × period cells of the input.
fn group(input: &ApcInput, options: &ApcOptions) -> Result<ApcData> {
    match input {
        ApcInput::Counts { table, columns } => {
            if options.width.is_some() {
                return Err(Error::Spec {
                    parameter: "width".into(),
                    message: "a table of counts keeps its own groups; leave out the group width".into(),
                });
            }
            let names = [
                columns.age.as_str(),
                columns.period.as_str(),
                columns.events.as_deref().unwrap_or_default(),
                columns.exposure.as_deref().unwrap_or_default(),
            ];
            intake::from_table(table, names)
        }
        ApcInput::Records { table, .. } => intake::from_records(table, options.width),
        ApcInput::Panel { panel, table, .. } => intake::from_panel(table, &panel.id.codes, options.width),
    }
}

/// Match a birth-year column to the records by data row (rows with a missing
/// birth year are not among the records' rows) and check it.
fn check_birth_years(path: &Path, b: &BirthYears, t: &NumericTable) -> Result<analysis::CohortCheck> {
    let by_row: HashMap<usize, f64> = b
        .table
        .rows
        .iter()
        .copied()
        .zip(b.table.columns[0].iter().copied())
        .collect();
    let mut kept = (Vec::new(), Vec::new(), Vec::new(), Vec::new());
    for (k, r) in t.rows.iter().enumerate() {
        if let Some(&y) = by_row.get(r) {
            kept.0.push(*r);
            kept.1.push(t.columns[0][k]);
            kept.2.push(t.columns[1][k]);
            kept.3.push(y);
        }
    }
    analysis::check_cohort(path, &b.column, &kept.0, &kept.1, &kept.2, &kept.3)
}
