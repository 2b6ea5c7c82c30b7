//! The whole study in one run: every analysis the data allow, each through
//! its own entry point, gathered for one shareable report.
//!
//! [`analyse`] runs the design report, the convergence tests, the stitched
//! fit, the age–period–cohort report when calendar time is known, and the
//! mixed ANOVA when asked for; a scale's reliability comes in from the
//! scoring step. An analysis that the data cannot support (one cohort, no
//! calendar time) is skipped with the reason, not an error.

use serde::Serialize;

use crate::anova::{AnovaOptions, AnovaReport};
use crate::apc::analysis::ApcReport;
use crate::apc::{ApcInput, ApcOptions};
use crate::data::{DataSummary, Panel};
use crate::design::{DesignOptions, DesignReport};
use crate::error::Result;
use crate::linkage::{ConvergeOptions, ConvergeReport};
use crate::report::FitReport;
use crate::score::ScoreReport;

/// What each analysis of the study is asked for.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct StudyOptions {
    /// The stitched fit.
    pub fit: crate::FitRequest,
    /// The design report.
    pub design: DesignOptions,
    /// The convergence tests.
    pub converge: ConvergeOptions,
    /// The age–period–cohort report (run when calendar time is known).
    pub apc: ApcOptions,
    /// The mixed ANOVA, when the study asks for it.
    pub anova: Option<AnovaOptions>,
}

/// Where the results came from, so that anyone can run them again.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Provenance {
    /// braid's version.
    pub braid_version: String,
    /// The command as typed.
    pub command: String,
    /// The study file's text, when one was used.
    pub study_file: Option<String>,
    /// The data file as named.
    pub data_file: String,
    /// SHA-256 of the data file's bytes, in hex.
    pub data_sha256: String,
    /// Every seed of a random step, named.
    pub seeds: Vec<(String, u64)>,
}

/// SHA-256 of a file's bytes, in hex.
///
/// # Errors
/// [`crate::Error::Io`] when the file cannot be read.
pub fn sha256_file(path: &std::path::Path) -> Result<String> {
    use sha2::{Digest, Sha256};
    let bytes = std::fs::read(path).map_err(|e| crate::Error::Io {
        path: path.to_path_buf(),
        message: e.to_string(),
    })?;
    Ok(Sha256::digest(&bytes).iter().map(|b| format!("{b:02x}")).collect())
}

/// Every analysis of one study.
#[derive(Debug, Clone, Serialize)]
pub struct StudyReport {
    /// What was read and used.
    pub data: DataSummary,
    /// The options of every analysis.
    pub options: StudyOptions,
    /// Where it came from.
    pub provenance: Provenance,
    /// Analyses skipped, with the reason.
    pub skipped: Vec<(String, String)>,
    /// The design report.
    #[serde(skip)]
    pub design: DesignReport,
    /// The convergence tests.
    #[serde(skip)]
    pub converge: Option<ConvergeReport>,
    /// The stitched fit.
    #[serde(skip)]
    pub fit: FitReport,
    /// The age–period–cohort report.
    #[serde(skip)]
    pub apc: Option<ApcReport>,
    /// The mixed ANOVA.
    #[serde(skip)]
    pub anova: Option<AnovaReport>,
    /// The scale's scoring and reliability.
    #[serde(skip)]
    pub score: Option<ScoreReport>,
}

/// Run every analysis the data allow. `step(lane, name)` is told the name
/// of each analysis as it starts, for a progress line: two lanes (0 and 1)
/// run side by side, and a lane that has finished is told an empty name.
///
/// # Errors
/// Errors of the design report and the fit; the convergence, APC and ANOVA
/// steps are skipped with their reason instead.
pub fn analyse(
    panel: &Panel,
    options: &StudyOptions,
    provenance: Provenance,
    step: &(dyn Fn(usize, &str) + Sync),
) -> Result<StudyReport> {
    // Two independent branches run side by side: each fit already splits
    // its levels over the threads, but cross-products, post-fit quantities
    // and the smaller models leave a core idle (measured in
    // notes/benchmarks.md). The results do not depend on the schedule.
    let calendar = panel.calendar().is_some();
    let ((design, converge), (fit, apc)) = rayon::join(
        || {
            step(0, "design");
            let design = crate::design::inspect(panel, options.design);
            step(0, "convergence");
            let converge = crate::linkage::converge(panel, &options.fit.model, &options.converge);
            step(0, "");
            (design, converge)
        },
        || {
            step(1, "fit");
            let fit = crate::fit_panel(panel, &options.fit);
            let apc = calendar.then(|| {
                step(1, "age, period and cohort");
                ApcInput::from_panel(panel.clone()).and_then(|input| crate::apc::identify(&input, &options.apc))
            });
            step(1, "");
            (fit, apc)
        },
    );
    let design = design?;
    let fit = fit?.report;
    let mut skipped = Vec::new();
    let converge = converge
        .map_err(|e| skipped.push(("converge".to_string(), e.to_string())))
        .ok();
    let apc = match apc {
        Some(result) => result
            .map_err(|e| skipped.push(("apc".to_string(), e.to_string())))
            .ok(),
        None => {
            skipped.push((
                "apc".into(),
                "the data have no calendar time (period or birth year)".into(),
            ));
            None
        }
    };
    let anova = match &options.anova {
        Some(o) => {
            step(0, "mixed ANOVA");
            crate::anova::mixed_anova(panel, o)
                .map_err(|e| skipped.push(("anova".to_string(), e.to_string())))
                .ok()
        }
        None => None,
    };
    Ok(StudyReport {
        data: panel.summary(),
        options: options.clone(),
        provenance,
        skipped,
        design,
        converge,
        fit,
        apc,
        anova,
        score: None,
    })
}
