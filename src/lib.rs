//! # braid
//!
//! Stitch one age trajectory from the overlapping cohort segments of a
//! cohort-sequential (accelerated longitudinal) study, with honest
//! uncertainty.
//!
//! ## The shape of every analysis
//!
//! Each analysis has four parts, and every new one copies them:
//!
//! 1. **Options**, a typed value built by a validating constructor
//!    ([`FitRequest::new`], [`design::DesignOptions::new`],
//!    [`linkage::ConvergeOptions::new`], [`apc::ApcOptions::new`]). Bad
//!    values are refused there, naming the option by its key.
//! 2. **One entry point** that takes the loaded data and the options.
//! 3. **A self-describing report** ([`serde::Serialize`]) that carries its
//!    data summary ([`data::DataSummary`]), the options that produced it,
//!    its warnings and its results.
//! 4. **Renderers** in [`report`]: the [`report::Render`] trait gives each
//!    report its text screen, its JSON file name and its figures.
//!
//! The command line ([`cli`]) only turns flags and a study file into options,
//! calls the entry point, and hands the report to one emitter.
//!
//! ## The pipelines
//!
//! Every example runs on a small invented study from [`simulate`].
//!
//! **Load.** [`data::load`] reads a CSV or Parquet file into a validated
//! [`data::Panel`]; [`simulate`] makes one with a known truth.
//!
//! **Know the design:** [`design::inspect`] reports coverage, overlap,
//! retention, attrition and collinearity.
//!
//! ```
//! use braid::design::{inspect, DesignOptions};
//! use braid::data::derive::{CohortRule, WaveRule};
//! let mut design = braid::simulate::Design::demo();
//! design.per_cohort = 40;
//! let panel = braid::simulate::simulate(&design).panel(true);
//! let options = DesignOptions::new(1.0, 30, CohortRule::Auto, WaveRule::Auto).unwrap();
//! let report = inspect(&panel, options).unwrap();
//! assert_eq!(report.cohorts.len(), 5);
//! assert_eq!(report.data.n_participants, Some(200));
//! ```
//!
//! **Stitch one trajectory:** [`fit_panel`] builds the model frame
//! ([`spec`]), fits it by REML ([`lmm`]) and adds Satterthwaite df, the
//! mean curve, its rate of change and turning points ([`infer`]).
//!
//! ```
//! use braid::{fit_panel, FitRequest};
//! use braid::infer::TrajectoryRequest;
//! use braid::spec::ModelSpec;
//! let mut design = braid::simulate::Design::demo();
//! design.per_cohort = 40;
//! let panel = braid::simulate::simulate(&design).panel(true);
//! let request = FitRequest::new(ModelSpec::default(), TrajectoryRequest::grid(21)).unwrap();
//! let analysis = fit_panel(&panel, &request).unwrap();
//! let slope = &analysis.report.fixed[1];
//! assert_eq!(slope.term, "age");
//! assert!(analysis.fit.info.converged);
//! // The true linear age term is 1.6 per year at age 16.
//! assert!((slope.lower..slope.upper).contains(&1.6) || (slope.estimate - 1.6).abs() < 4.0 * slope.se);
//! // Options are validated where they are built: a grid needs two ages.
//! assert!(FitRequest::new(ModelSpec::default(), TrajectoryRequest::grid(1)).is_err());
//! ```
//!
//! **Test convergence:** [`linkage::converge`] fits the nested cohort
//! models and tests whether cohorts agree where their ages overlap.
//!
//! ```
//! use braid::linkage::{converge, ConvergeOptions, Margin};
//! use braid::data::derive::CohortRule;
//! let mut design = braid::simulate::Design::demo();
//! design.per_cohort = 40;
//! let panel = braid::simulate::simulate(&design).panel(false);
//! let options = ConvergeOptions::new(None, Margin::Sd(0.2), 5, CohortRule::Auto, None).unwrap();
//! let report = converge(&panel, &braid::spec::ModelSpec::default(), &options).unwrap();
//! assert_eq!(report.cohorts.len(), 5);
//! // A negative margin is refused by the options, naming the option.
//! let bad = ConvergeOptions::new(None, Margin::Outcome(-1.0), 5, CohortRule::Auto, None);
//! assert!(bad.unwrap_err().to_string().starts_with("margin:"));
//! ```
//!
//! **State what is identified:** [`apc::identify`] reads a table of counts,
//! records or a panel ([`apc::ApcInput`]) and reports the line of
//! solutions, what is identified, each constraint's solution and bounds.
//! Records with exact ages also get the exact-value model
//! ([`apc::exact`]: splines in exact age, calendar time and birth time),
//! whose tests hold their level where grouped ones do not.
//!
//! ```
//! use braid::apc::{identify, ApcColumns, ApcInput, ApcOptions};
//! // Holford's (1983) table of prostate-cancer deaths, kept in tests/data.
//! let file = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/data/holford_prostate.csv");
//! let columns = ApcColumns {
//!     age: "age".into(),
//!     period: "period".into(),
//!     events: Some("deaths".into()),
//!     exposure: Some("population".into()),
//!     ..Default::default()
//! };
//! let input = ApcInput::read(&file, &columns, Default::default()).unwrap();
//! let report = identify(&input, &ApcOptions::default()).unwrap();
//! assert_eq!(report.rank_deficiency, 1);
//! assert!(braid::report::Render::text(&report).contains("rank deficiency 1"));
//! ```
//!
//! **The classical analysis beside it:** [`anova::mixed_anova`] runs the
//! cohort × wave mixed ANOVA on complete cases, with sphericity corrections,
//! and fits the same cases as a compound-symmetry mixed model.
//!
//! ```
//! use braid::anova::{mixed_anova, AnovaOptions};
//! use braid::simulate::{simulate, Design};
//! // The invented demo study: five cohorts, four annual waves.
//! let mut design = Design::demo();
//! design.per_cohort = 30;
//! let panel = simulate(&design).panel(false);
//! let report = mixed_anova(&panel, &AnovaOptions::default()).unwrap();
//! assert_eq!(report.analysis.effects.len(), 3);
//! assert!(report.n_complete <= 150);
//! // A sphericity level outside (0, 1) is refused by the options.
//! assert!(AnovaOptions::new(1.5, Default::default(), Default::default()).is_err());
//! ```
//!
//! **Score:** [`score::score`] keys and scores item responses and reports
//! Cronbach's α with Feldt's interval per wave, cohort and cohort × wave.
//!
//! ```
//! use braid::score::{expand_items, score, ItemColumns, ItemInput, ScoreOptions, ScoreRule};
//! // Invented congeneric items, kept in tests/data.
//! let file = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/data/congeneric_items.csv");
//! let columns = ItemColumns {
//!     id: "pupil".into(),
//!     wave: "wave".into(),
//!     cohort: Some("cohort".into()),
//!     items: expand_items("q1..q6").unwrap(),
//!     ..Default::default()
//! };
//! let options = ScoreOptions::new(vec!["q2".into()], 0.0, 4.0, ScoreRule::Mean, 5).unwrap();
//! let report = score(&ItemInput::read(&file, &columns, Default::default()).unwrap(), &options).unwrap();
//! assert_eq!(report.per_wave.len(), 3);
//! // A reversed item that is not an item is refused, naming the option.
//! let bad = ScoreOptions::new(vec!["q9".into()], 0.0, 4.0, ScoreRule::Mean, 5).unwrap();
//! let input = ItemInput::read(&file, &columns, Default::default()).unwrap();
//! assert!(score(&input, &bad).unwrap_err().to_string().starts_with("reverse:"));
//! ```
//!
//! **Plan:** [`plan::run`] answers a plan (candidate designs, an assumed
//! population, costs and targets) by expected information and by simulated
//! replicates through the real fit and convergence test, and names the
//! cheapest design that meets every target.
//!
//! ```
//! use braid::plan::{run, Plan, Route, RunContext};
//! let text = r#"
//! [[design]]
//! name = "three cohorts"
//! entry_ages = [8, 10, 12]
//! waves = 3
//! interval = 1
//! dropout = 0.1
//!
//! [population]
//! center = 10
//! mean = [30, 2]
//! sd_intercept = 3
//! sd_slope = 0.4
//! sd_residual = 2
//!
//! [targets]
//! age_term = { power = 0.9 }
//! "#;
//! let mut plan = Plan::from_toml(std::path::Path::new("plan.toml"), text).unwrap();
//! plan.simulation.route = Route::Information;
//! let context = RunContext { population_source: "invented".into(), progress: &|_| {} };
//! let report = run(&plan, &context).unwrap();
//! assert_eq!(report.recommended.as_deref(), Some("three cohorts"));
//! assert!(report.designs[0].power["age_term"].information >= 0.9);
//! // A dropout above 1 is refused, naming the key.
//! plan.designs[0].dropout = 1.2;
//! assert!(run(&plan, &context).unwrap_err().to_string().contains("design.dropout"));
//! ```
//!
//! **Publish:** [`report`] renders every report as text, JSON, CSV and
//! figures with one shared look.

pub mod anova;
pub mod apc;
pub mod cli;
pub mod data;
pub mod design;
pub mod error;
pub mod infer;
pub mod linkage;
pub mod lmm;
pub mod plan;
pub mod report;
pub mod score;
pub mod simulate;
pub mod spec;
pub mod stats;
pub mod study;
pub mod warning;

pub use error::{Error, Result};

/// Everything one fit produces.
#[derive(Debug, Clone)]
pub struct FitAnalysis {
    /// The model frame (design and basis).
    pub frame: spec::ModelFrame,
    /// The engine's fit; its BLUPs, conditional fitted values and
    /// residuals only when the request asks for predictions
    /// ([`lmm::Detail`]).
    pub fit: lmm::Fit,
    /// The report with stable JSON keys.
    pub report: report::FitReport,
}

/// What a fit is asked for, validated by [`FitRequest::new`].
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct FitRequest {
    /// The model.
    pub model: spec::ModelSpec,
    /// Where to evaluate the trajectory.
    pub trajectory: infer::TrajectoryRequest,
    /// Whether to collect per-row predictions and per-group random effects.
    pub predictions: bool,
    /// How many participants' observed paths to keep for the figure.
    pub paths: usize,
}

impl FitRequest {
    /// A validated request, without predictions or paths.
    ///
    /// # Errors
    /// [`Error::Spec`] for a grid of fewer than 2 or more than 100,000 ages,
    /// or an age to report at that is not finite.
    pub fn new(model: spec::ModelSpec, trajectory: infer::TrajectoryRequest) -> Result<FitRequest> {
        let request = FitRequest {
            model,
            trajectory,
            predictions: false,
            paths: 0,
        };
        request.validate()?;
        Ok(request)
    }

    /// Also collect per-row predictions and per-group random effects.
    #[must_use]
    pub fn with_predictions(mut self, yes: bool) -> FitRequest {
        self.predictions = yes;
        self
    }

    /// Keep `k` participants' observed paths for the figure.
    #[must_use]
    pub fn with_paths(mut self, k: usize) -> FitRequest {
        self.paths = k;
        self
    }

    fn validate(&self) -> Result<()> {
        let t = &self.trajectory;
        if let Some(a) = t.at.iter().find(|a| !a.is_finite()) {
            return Err(Error::Spec {
                parameter: "at".into(),
                message: format!("{a} is not a finite age"),
            });
        }
        if t.grid < 2 || t.grid > 100_000 {
            return Err(Error::Spec {
                parameter: "grid".into(),
                message: format!("{} grid ages; choose between 2 and 100000", t.grid),
            });
        }
        Ok(())
    }
}

/// Build the model for a panel, fit it and compute the trajectory as requested.
///
/// # Errors
/// [`Error::Spec`] for an invalid request; errors of [`spec::build_frame`]
/// and [`lmm::fit`].
pub fn fit_panel(panel: &data::Panel, request: &FitRequest) -> Result<FitAnalysis> {
    request.validate()?;
    let frame = spec::build_frame(panel, &request.model)?;
    let fit = lmm::fit(
        &frame.problem,
        lmm::FitOptions {
            method: request.model.method,
            // The values per row and per level only for predictions.
            detail: if request.predictions {
                lmm::Detail::Full
            } else {
                lmm::Detail::Estimates
            },
            ..Default::default()
        },
    )?;
    let trajectory = infer::trajectory(&fit, &frame, &request.trajectory);
    let mut report = report::FitReport::new(panel, &frame, &fit, trajectory);
    report.options = Some(request.clone());
    report.paths = panel.sample_paths(request.paths);
    if request.predictions {
        report.predictions = Some(report::predictions::Predictions::new(panel, &frame, &fit));
    }
    Ok(FitAnalysis { frame, fit, report })
}
