//! Per-row fitted values and per-group random effects of a fit, in long
//! layouts for `predictions.csv` and `random_effects.csv`.

use std::fmt::Write as _;
use std::path::Path;

use super::write_text;
use crate::data::Panel;
use crate::error::Result;
use crate::lmm::Fit;
use crate::spec::ModelFrame;

/// One observation used by the fit.
#[derive(Debug, Clone, PartialEq)]
pub struct PredictionRow {
    /// 1-based data row of the file.
    pub row: usize,
    /// Participant label.
    pub id: String,
    /// Age.
    pub age: f64,
    /// Observed outcome.
    pub outcome: f64,
    /// Fitted value with the random effects (the participant's own curve).
    pub fitted_conditional: f64,
    /// Fitted value of the mean curve alone.
    pub fitted_marginal: f64,
    /// Outcome − conditional fitted value.
    pub residual: f64,
}

/// One predicted random effect (BLUP).
#[derive(Debug, Clone, PartialEq)]
pub struct RandomEffectRow {
    /// Grouping factor.
    pub factor: String,
    /// Level of the factor.
    pub level: String,
    /// Coefficient (intercept, or a slope's column).
    pub term: String,
    /// Predicted value.
    pub value: f64,
}

/// The per-row and per-group predictions of a fit.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Predictions {
    /// Column names of id, age and outcome.
    pub names: [String; 3],
    /// One row per observation used.
    pub rows: Vec<PredictionRow>,
    /// One row per group and coefficient.
    pub random_effects: Vec<RandomEffectRow>,
}

impl Predictions {
    /// Collect the predictions of a fit.
    pub fn new(panel: &Panel, frame: &ModelFrame, fit: &Fit) -> Predictions {
        let rows = (0..panel.n())
            .map(|r| PredictionRow {
                row: panel.row[r],
                id: panel.id.label(r).to_string(),
                age: panel.age[r],
                outcome: panel.outcome[r],
                fitted_conditional: fit.fitted[r],
                fitted_marginal: fit.fitted_marginal[r],
                residual: fit.residuals[r],
            })
            .collect();
        let mut random_effects = Vec::new();
        for (t, term) in frame.problem.terms.iter().enumerate() {
            for (lvl, name) in term.level_names.iter().enumerate() {
                for (c, col) in term.columns.iter().enumerate() {
                    random_effects.push(RandomEffectRow {
                        factor: term.factor.clone(),
                        level: name.clone(),
                        term: col.clone(),
                        value: fit.blups[t][lvl][c],
                    });
                }
            }
        }
        Predictions {
            names: [
                panel.roles.id.clone(),
                frame.age_name.clone(),
                frame.outcome_name.clone(),
            ],
            rows,
            random_effects,
        }
    }

    /// Write `predictions.csv` and `random_effects.csv` into `dir`; returns
    /// the file names.
    ///
    /// # Errors
    /// [`Error::Output`] when a file cannot be written.
    pub fn write(&self, dir: &Path) -> Result<Vec<String>> {
        let [id, age, outcome] = &self.names;
        let mut s = format!(
            "row,{},{},{},fitted_conditional,fitted_marginal,residual\n",
            csv_field(id),
            csv_field(age),
            csv_field(outcome)
        );
        for p in &self.rows {
            let _ = writeln!(
                s,
                "{},{},{},{},{:.8},{:.8},{:.8}",
                p.row,
                csv_field(&p.id),
                p.age,
                p.outcome,
                p.fitted_conditional,
                p.fitted_marginal,
                p.residual
            );
        }
        write_text(&dir.join("predictions.csv"), &s)?;
        let mut s = String::from("factor,level,term,value\n");
        for e in &self.random_effects {
            let _ = writeln!(
                s,
                "{},{},{},{:.8}",
                csv_field(&e.factor),
                csv_field(&e.level),
                csv_field(&e.term),
                e.value
            );
        }
        write_text(&dir.join("random_effects.csv"), &s)?;
        Ok(vec!["predictions.csv".into(), "random_effects.csv".into()])
    }
}

/// Quote a CSV field when it holds a delimiter, quote or line break.
pub fn csv_field(s: &str) -> String {
    if s.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", s.replace('"', "\"\""))
    } else {
        s.to_string()
    }
}
