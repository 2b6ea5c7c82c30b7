//! # braid
//!
//! Stitch one age trajectory from the overlapping cohort segments of a
//! cohort-sequential (accelerated longitudinal) study, with honest
//! uncertainty.
//!
//! The pipeline, in the order the code runs it:
//!
//! 1. [`data`] reads a CSV or Parquet file into a validated [`data::Panel`];
//! 2. [`spec`] turns a [`spec::ModelSpec`] (age basis, centre, covariates,
//!    random terms) into a [`spec::ModelFrame`];
//! 3. [`lmm`] fits the linear mixed model by REML or ML in penalized least
//!    squares form, returning a [`lmm::Fit`];
//! 4. [`infer`] adds Satterthwaite degrees of freedom, the mean trajectory,
//!    its rate of change and turning points;
//! 5. [`report`] arranges the results as text, JSON, CSV and figures.
//!
//! [`simulate`] generates invented studies with a known truth.
//!
//! ```
//! use braid::simulate::{simulate, Design};
//! use braid::spec::ModelSpec;
//!
//! let mut design = Design::demo();
//! design.per_cohort = 40; // a small study for the example
//! let study = simulate(&design);
//! let panel = study.panel(true);
//! let request = braid::infer::TrajectoryRequest::grid(21);
//! let analysis = braid::fit_panel(&panel, &ModelSpec::default(), &request).unwrap();
//! let slope = &analysis.report.fixed[1];
//! assert_eq!(slope.term, "age");
//! assert!(analysis.fit.info.converged);
//! // The true linear age term is 1.6 per year at age 16.
//! assert!((slope.lower..slope.upper).contains(&1.6) || (slope.estimate - 1.6).abs() < 4.0 * slope.se);
//! ```

pub mod apc;
pub mod cli;
pub mod data;
pub mod design;
pub mod error;
pub mod infer;
pub mod linkage;
pub mod lmm;
pub mod report;
pub mod simulate;
pub mod spec;

pub use error::{Error, Result};

/// Everything one fit produces.
#[derive(Debug, Clone)]
pub struct FitAnalysis {
    /// The model frame (design and basis).
    pub frame: spec::ModelFrame,
    /// The engine's fit.
    pub fit: lmm::Fit,
    /// The report with stable JSON keys.
    pub report: report::FitReport,
}

/// Build the model for a panel, fit it and compute the trajectory as requested.
///
/// # Errors
/// Errors of [`spec::build_frame`] and [`lmm::fit`].
pub fn fit_panel(
    panel: &data::Panel,
    model: &spec::ModelSpec,
    request: &infer::TrajectoryRequest,
) -> Result<FitAnalysis> {
    let frame = spec::build_frame(panel, model)?;
    let fit = lmm::fit(
        &frame.problem,
        lmm::FitOptions {
            method: model.method,
            ..Default::default()
        },
    )?;
    let trajectory = infer::trajectory(&fit, &frame, request);
    let report = report::FitReport::new(panel, &frame, &fit, trajectory);
    Ok(FitAnalysis { frame, fit, report })
}
