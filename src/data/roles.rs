//! Which column plays which part, and the checks that need no data.

use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};

/// Which column plays which part.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Roles {
    /// Participant identifier.
    pub id: String,
    /// Exact age at assessment, in years (may be left out of a study file
    /// when ages come from dates).
    #[serde(default)]
    pub age: String,
    /// The outcome measure.
    #[serde(default)]
    pub outcome: String,
    /// Birth date (ISO YYYY-MM-DD); with `date`, age is computed from the two
    /// and `age` names the computed column.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub birth_date: Option<String>,
    /// Assessment date (ISO YYYY-MM-DD).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub date: Option<String>,
    /// Wide files: the outcome's column at each wave, in wave order. With
    /// these, `outcome`, `age` and `wave` name the reshaped long columns.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub wide_outcome: Vec<String>,
    /// Wide files: the age column at each wave, in wave order.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub wide_age: Vec<String>,
    /// Wide files: the assessment-date column at each wave (with `birth_date`).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub wide_date: Vec<String>,
    /// Birth cohort (optional).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub cohort: Option<String>,
    /// Wave or occasion (optional).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub wave: Option<String>,
    /// Cluster such as school (optional).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub cluster: Option<String>,
    /// Period: the calendar time of each assessment as a (decimal) year
    /// (optional; ignored when ages come from dates, which give it).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub period: Option<String>,
    /// Birth year as a number (optional; ignored when ages come from dates).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub birth_year: Option<String>,
    /// Covariates: numeric where every value is a number, otherwise categorical.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub covariates: Vec<String>,
    /// Covariates to treat as categorical even when their values are numbers.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub categorical: Vec<String>,
}

impl Roles {
    /// Every (role, column) pair, in a fixed order.
    pub fn all(&self) -> Vec<(String, String)> {
        if self.is_wide() {
            return self.all_wide();
        }
        let mut v = vec![("id".to_string(), self.id.clone())];
        match self.dates() {
            Some((b, d)) => {
                v.push(("birth_date".to_string(), b.to_string()));
                v.push(("date".to_string(), d.to_string()));
            }
            None => v.push(("age".to_string(), self.age.clone())),
        }
        v.push(("outcome".to_string(), self.outcome.clone()));
        let calendar = if self.dates().is_some() {
            (&None, &None)
        } else {
            (&self.period, &self.birth_year)
        };
        for (role, c) in [
            ("cohort", &self.cohort),
            ("wave", &self.wave),
            ("cluster", &self.cluster),
            ("period", calendar.0),
            ("birth_year", calendar.1),
        ] {
            if let Some(c) = c {
                v.push((role.to_string(), c.clone()));
            }
        }
        for c in &self.covariates {
            v.push(("covariates".to_string(), c.clone()));
        }
        v
    }
}

impl Roles {
    /// Whether the file is wide (one row per participant).
    pub fn is_wide(&self) -> bool {
        !self.wide_outcome.is_empty()
    }

    /// The columns of a wide file, with their roles.
    fn all_wide(&self) -> Vec<(String, String)> {
        let mut v = vec![("id".to_string(), self.id.clone())];
        if let Some(b) = &self.birth_date {
            v.push(("birth_date".to_string(), b.clone()));
        }
        for c in &self.wide_outcome {
            v.push(("wide_outcome".to_string(), c.clone()));
        }
        for c in &self.wide_age {
            v.push(("wide_age".to_string(), c.clone()));
        }
        for c in &self.wide_date {
            v.push(("wide_date".to_string(), c.clone()));
        }
        let birth_year = if self.birth_date.is_some() {
            &None
        } else {
            &self.birth_year
        };
        for (role, c) in [
            ("cohort", &self.cohort),
            ("cluster", &self.cluster),
            ("birth_year", birth_year),
        ] {
            if let Some(c) = c {
                v.push((role.to_string(), c.clone()));
            }
        }
        for c in &self.covariates {
            v.push(("covariates".to_string(), c.clone()));
        }
        v
    }

    /// The birth-date and assessment-date columns, when age comes from dates.
    pub fn dates(&self) -> Option<(&str, &str)> {
        match (&self.birth_date, &self.date) {
            (Some(b), Some(d)) => Some((b.as_str(), d.as_str())),
            _ => None,
        }
    }
}

pub(super) fn validate_roles(roles: &Roles) -> Result<()> {
    for (role, c) in roles.all() {
        if c.trim().is_empty() {
            return Err(Error::Spec {
                parameter: role.into(),
                message: "the column name is empty; name a column of the file".into(),
            });
        }
    }
    let all = roles.all();
    for (i, (ra, ca)) in all.iter().enumerate() {
        for (rb, cb) in &all[..i] {
            if ca == cb {
                return Err(Error::SharedColumn {
                    column: ca.clone(),
                    first: rb.as_str().into(),
                    second: ra.as_str().into(),
                });
            }
        }
    }
    if !roles.is_wide() && roles.birth_date.is_some() != roles.date.is_some() {
        return Err(Error::Spec {
            parameter: if roles.birth_date.is_some() {
                "date"
            } else {
                "birth_date"
            }
            .into(),
            message: "ages from dates need both a `birth_date` and a `date` column".into(),
        });
    }
    if roles.is_wide() && roles.period.is_some() {
        return Err(Error::Spec {
            parameter: "period".into(),
            message: "a wide file has one assessment time per wave: give them with `wide_date` (and `birth_date`), or a `birth_year` column".into(),
        });
    }
    for c in &roles.categorical {
        if !roles.covariates.contains(c) {
            return Err(Error::Spec {
                parameter: "categorical".into(),
                message: format!("'{c}' is not among the covariates; also list it under `covariates`"),
            });
        }
    }
    Ok(())
}
