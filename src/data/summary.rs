//! What an analysis read and used: the data summary every report carries.

use std::collections::BTreeMap;

use serde::Serialize;

use super::{DropReport, NumericTable, Panel};

/// What was read and used, carried by every report so that it renders alone.
#[derive(Debug, Clone, Default, Serialize, PartialEq)]
pub struct DataSummary {
    /// The input file, as the user named it.
    pub file: String,
    /// Data rows in the file.
    pub n_rows_read: usize,
    /// Rows used.
    pub n_obs: usize,
    /// Rows left out, by reason.
    pub dropped: DropReport,
    /// Participants (absent for a table of counts).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub n_participants: Option<usize>,
    /// Cohorts (when a cohort column is given).
    pub n_cohorts: Option<usize>,
    /// Clusters (when a cluster column is given).
    pub n_clusters: Option<usize>,
    /// Youngest age.
    pub age_min: f64,
    /// Oldest age.
    pub age_max: f64,
    /// Name of the outcome column.
    pub outcome: String,
    /// Name of the age column.
    pub age: String,
    /// Which column played which role, by role.
    pub roles: BTreeMap<String, String>,
}

impl Panel {
    /// The data summary of this panel.
    pub fn summary(&self) -> DataSummary {
        let (age_min, age_max) = self
            .age
            .iter()
            .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &a| {
                (lo.min(a), hi.max(a))
            });
        let mut roles = BTreeMap::new();
        for (role, column) in self.roles.all() {
            roles
                .entry(role)
                .and_modify(|c: &mut String| {
                    c.push(',');
                    c.push_str(&column);
                })
                .or_insert(column);
        }
        DataSummary {
            file: self.source.display().to_string(),
            n_rows_read: self.n_rows_read,
            n_obs: self.n(),
            dropped: self.dropped,
            n_participants: Some(self.id.n_levels()),
            n_cohorts: self.cohort.as_ref().map(|c| c.n_levels()),
            n_clusters: self.cluster.as_ref().map(|c| c.n_levels()),
            age_min,
            age_max,
            outcome: self.roles.outcome.clone(),
            age: self.roles.age.clone(),
            roles,
        }
    }
}

impl NumericTable {
    /// The data summary of this table; `roles` pairs each role with its
    /// column, in the order of the table's columns. The first is age.
    pub fn summary(&self, roles: &[(&str, &str)], outcome: &str) -> DataSummary {
        let (age_min, age_max) = self
            .columns
            .first()
            .map(|a| {
                a.iter().fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &v| {
                    (lo.min(v), hi.max(v))
                })
            })
            .unwrap_or((f64::NAN, f64::NAN));
        DataSummary {
            file: self.source.display().to_string(),
            n_rows_read: self.n_rows_read,
            n_obs: self.rows.len(),
            dropped: DropReport {
                missing_other: self.dropped,
                ..Default::default()
            },
            n_participants: None,
            n_cohorts: None,
            n_clusters: None,
            age_min,
            age_max,
            outcome: outcome.to_string(),
            age: roles.first().map(|r| r.1.to_string()).unwrap_or_default(),
            roles: roles.iter().map(|(r, c)| (r.to_string(), c.to_string())).collect(),
        }
    }
}
