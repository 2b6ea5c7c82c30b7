//! Reporting: the serializable fit report, text tables, JSON/CSV files and
//! figures. Nothing here computes an estimate; it arranges results.

pub mod anova_figure;
pub mod apc_figure;
pub mod converge_figure;
pub mod design_figure;
pub mod figure;
pub mod html;
pub mod plan_figure;
pub mod predictions;
pub mod render;
pub mod score_figure;
pub mod text;

pub use render::Render;

use std::collections::BTreeMap;
use std::fs;
use std::path::Path;

use serde::Serialize;

use crate::data::Panel;
use crate::error::{Error, Result};
use crate::infer::{self, FixedEffect, Trajectory};
use crate::lmm::{Fit, FitInfo, RandomComponent};
use crate::spec::{AgeBasis, ModelFrame};

/// The cautions every report carries.
pub const CAUTIONS: [&str; 3] = [
    "Associations are not causes: the trajectory describes how the outcome differs with age in these cohorts, not what age does to a person.",
    "Pooling cohorts into one curve assumes they converge where their ages overlap (no cohort or period differences); test that assumption before relying on the curve.",
    "Only de-identified data belong in braid; follow the study's ethics approval and data-protection rules when sharing these outputs.",
];

pub use crate::data::DataSummary;

/// A cohort's observed mean at one wave, for the figure and the table.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct CellMean {
    /// Cohort label (or entry-age group when no cohort column is given).
    pub cohort: String,
    /// Wave label (or rounded age when no wave column is given).
    pub wave: String,
    /// Rows in the cell.
    pub n: usize,
    /// Mean age.
    pub age: f64,
    /// Mean outcome.
    pub mean: f64,
    /// Standard error of the mean outcome (NaN for a single row).
    pub se: f64,
}

/// The complete result of `braid fit`, with stable JSON keys.
#[derive(Debug, Clone, Serialize)]
pub struct FitReport {
    /// braid's version.
    pub braid_version: String,
    /// `"REML"` or `"ML"`.
    pub method: String,
    /// Rows used.
    pub n_obs: usize,
    /// Levels per grouping factor.
    pub n_groups: BTreeMap<String, usize>,
    /// Maximised log-likelihood (REML or ML as `method`).
    pub loglik: f64,
    /// Akaike's criterion.
    pub aic: f64,
    /// Schwarz's criterion.
    pub bic: f64,
    /// Number of estimated parameters.
    pub n_params: usize,
    /// Fixed effects with SE, Satterthwaite df, t, p and 95% interval.
    pub fixed: Vec<FixedEffect>,
    /// Random-effect covariances per grouping factor.
    pub random: Vec<RandomComponent>,
    /// Residual variance σ̂².
    pub residual_variance: f64,
    /// Whether the optimiser reached a clear minimum.
    pub converged: bool,
    /// Covariance parameters on the boundary.
    pub boundary: Vec<String>,
    /// The mean trajectory with rate of change and turning points.
    pub trajectory: Trajectory,
    /// Data summary.
    pub data: DataSummary,
    /// The model in words.
    pub model: Vec<String>,
    /// The age basis (with centre and knots).
    pub basis: AgeBasis,
    /// Observed cohort × wave means.
    pub cells: Vec<CellMean>,
    /// Optimisation record.
    pub info: FitInfo,
    /// Cautions for the reader.
    pub cautions: Vec<String>,
    /// The request that produced the report.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub options: Option<crate::FitRequest>,
    /// Observed paths of a few participants, drawn beside the curve.
    #[serde(skip)]
    pub paths: Vec<crate::data::paths::Path>,
    /// Per-row and per-group predictions, when asked for.
    #[serde(skip)]
    pub predictions: Option<predictions::Predictions>,
    /// A simulation's true values, printed beside the estimates.
    #[serde(skip)]
    pub truth: Option<Vec<(String, f64)>>,
}

impl FitReport {
    /// Assemble the report from the pipeline's results.
    pub fn new(panel: &Panel, frame: &ModelFrame, fit: &Fit, trajectory: Trajectory) -> FitReport {
        let mut n_groups = BTreeMap::new();
        for r in &fit.random {
            n_groups.insert(r.factor.clone(), r.n_levels);
        }
        FitReport {
            braid_version: env!("CARGO_PKG_VERSION").to_string(),
            method: fit.method.label().to_string(),
            n_obs: fit.n_obs,
            n_groups,
            loglik: fit.loglik,
            aic: fit.aic,
            bic: fit.bic,
            n_params: fit.n_params,
            fixed: infer::fixed_effects(fit),
            random: fit.random.clone(),
            residual_variance: fit.sigma2,
            converged: fit.info.converged,
            boundary: fit.info.boundary.clone(),
            trajectory,
            data: panel.summary(),
            model: frame.description.clone(),
            basis: frame.basis.clone(),
            cells: cell_means(panel),
            info: fit.info.clone(),
            cautions: CAUTIONS.iter().map(|s| s.to_string()).collect(),
            options: None,
            paths: Vec::new(),
            predictions: None,
            truth: None,
        }
    }
}

/// Observed means per cohort and wave. Cohorts follow the rule every
/// analysis uses ([`crate::data::derive::cohorts`]: the cohort column, else
/// birth year when calendar times are known, else whole-year age at the first
/// assessment); without a wave column, rows are grouped by whole-year age.
pub fn cell_means(panel: &Panel) -> Vec<CellMean> {
    let n = panel.n();
    // Cohorts by the same rule as every analysis (data::derive); the rule
    // without options cannot fail, but the cells are then one group.
    // The cohorts come coded, without a label per row.
    let cohort_codes = crate::data::derive::cohort_codes(panel, crate::data::derive::CohortRule::Auto)
        .map(|(codes, _)| codes)
        .unwrap_or_else(|_| crate::data::Codes::new(&vec![String::new(); n], true));
    let cohort_key: Vec<i64> = cohort_codes.codes.iter().map(|&k| i64::from(k)).collect();
    let cohort_label = |k: i64| cohort_codes.levels[k as usize].clone();
    let wave_key = |r: usize| match &panel.wave {
        Some(w) => i64::from(w.codes[r]),
        None => panel.age[r].floor() as i64,
    };
    let wave_label = |k: i64| match &panel.wave {
        Some(w) => w.levels[k as usize].clone(),
        None => format!("age {k}"),
    };
    let mut sums: crate::data::FastMap<(i64, i64), (usize, f64, f64, f64)> = Default::default();
    for (r, &ck) in cohort_key.iter().enumerate() {
        let e = sums.entry((ck, wave_key(r))).or_insert((0, 0.0, 0.0, 0.0));
        e.0 += 1;
        e.1 += panel.age[r];
        e.2 += panel.outcome[r];
        e.3 += panel.outcome[r] * panel.outcome[r];
    }
    let groups: BTreeMap<(String, String), (usize, f64, f64, f64)> = sums
        .into_iter()
        .map(|((c, w), v)| ((cohort_label(c), wave_label(w)), v))
        .collect();
    let mut cells: Vec<CellMean> = groups
        .into_iter()
        .map(|((cohort, wave), (k, sa, sy, syy))| {
            let kf = k as f64;
            let mean = sy / kf;
            let var = if k > 1 {
                ((syy - kf * mean * mean) / (kf - 1.0)).max(0.0)
            } else {
                f64::NAN
            };
            CellMean {
                cohort,
                wave,
                n: k,
                age: sa / kf,
                mean,
                se: (var / kf).sqrt(),
            }
        })
        .collect();
    // Order cohorts and waves numerically where their labels are numbers.
    cells.sort_by(|a, b| crate::data::label_order(&a.cohort, &b.cohort).then(a.age.total_cmp(&b.age)));
    cells
}

/// Create the output folder (refusing one that is a file).
///
/// # Errors
/// [`Error::Output`] when the folder cannot be created.
pub fn ensure_dir(dir: &Path) -> Result<()> {
    if dir.exists() && !dir.is_dir() {
        return Err(Error::Output {
            path: dir.to_path_buf(),
            message: "exists and is not a folder; name a folder for the outputs".into(),
        });
    }
    fs::create_dir_all(dir).map_err(|e| Error::Output {
        path: dir.to_path_buf(),
        message: format!("cannot create the folder ({e})"),
    })
}

/// Write a serializable value as pretty JSON.
///
/// # Errors
/// [`Error::Output`] when the file cannot be written.
pub fn write_json<T: Serialize + ?Sized>(path: &Path, value: &T) -> Result<()> {
    let text = serde_json::to_string_pretty(value).map_err(|e| Error::Output {
        path: path.to_path_buf(),
        message: e.to_string(),
    })?;
    write_text(path, &(text + "\n"))
}

/// Write a text file.
///
/// # Errors
/// [`Error::Output`] when the file cannot be written.
pub fn write_text(path: &Path, text: &str) -> Result<()> {
    fs::write(path, text).map_err(|e| Error::Output {
        path: path.to_path_buf(),
        message: format!("cannot write ({e})"),
    })
}

/// Write the trajectory as CSV: age, mean, lower, upper, rate, rate_lower, rate_upper.
///
/// # Errors
/// [`Error::Output`] when the file cannot be written.
pub fn write_trajectory_csv(path: &Path, t: &Trajectory) -> Result<()> {
    let mut s = String::from("age,mean,lower,upper,rate,rate_lower,rate_upper\n");
    for p in &t.points {
        s.push_str(&format!(
            "{:.6},{:.8},{:.8},{:.8},{:.8},{:.8},{:.8}\n",
            p.age, p.mean, p.lower, p.upper, p.rate, p.rate_lower, p.rate_upper
        ));
    }
    write_text(path, &s)
}
