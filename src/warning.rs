//! Typed warnings: a code that scripts and tests can match, and a message
//! for the reader. A warning serialises as its message, as the reports have
//! always shown it; the codes are listed beside the messages.

use serde::Serialize;

/// What a warning is about.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum WarningCode {
    /// Assessments of one participant fall in one derived wave.
    WaveClash,
    /// Two neighbouring cohorts share no ages.
    CohortGap,
    /// Two neighbouring cohorts overlap in few observations.
    ThinOverlap,
    /// Those who left differ from those who stayed at baseline.
    SelectiveDropout,
    /// Exact ages and calendar times were grouped for an APC analysis.
    GroupedExactAges,
    /// Records could not be grouped by default; only the exact-value APC model is reported.
    NoGroupedModel,
    /// Cohorts were assessed at different sets of waves; the ANOVA uses the common ones.
    UncommonWaves,
    /// An item has no variance at a wave.
    ConstantItem,
    /// A plan's population has an effect that the analysis does not model,
    /// or its figures rest on expected information alone.
    UnmodelledEffect,
    /// Some of a plan's simulated replicates could not be fitted.
    FailedReplicates,
}

/// A warning: its code and its message.
#[derive(Debug, Clone, PartialEq)]
pub struct Warning {
    /// What it is about.
    pub code: WarningCode,
    /// What it means, in words.
    pub message: String,
}

impl Warning {
    /// A warning of `code` saying `message`.
    pub fn new(code: WarningCode, message: impl Into<String>) -> Warning {
        Warning {
            code,
            message: message.into(),
        }
    }
}

impl std::fmt::Display for Warning {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(&self.message)
    }
}

impl Serialize for Warning {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_str(&self.message)
    }
}

/// The codes of some warnings, in order.
pub fn codes(warnings: &[Warning]) -> Vec<WarningCode> {
    warnings.iter().map(|w| w.code).collect()
}
