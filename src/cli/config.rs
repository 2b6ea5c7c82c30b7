//! The validated configuration of a fit, built from flags, a study file, or both.

use std::fs;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use super::args::{FitArgs, MethodArg};
use crate::data::{ReadOptions, Roles};
use crate::error::{Error, Result};
use crate::infer::TrajectoryRequest;
use crate::lmm::Method;
use crate::spec::{AgeSpec, ModelSpec, RandomSpec};

/// The `[data]` table of a study file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct DataSection {
    /// The data file, relative to the study file's folder.
    pub file: PathBuf,
    /// CSV delimiter (one character, or `\t`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub delimiter: Option<String>,
}

/// A study file: data, roles and model in one TOML document.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Study {
    /// Where the data are.
    pub data: DataSection,
    /// Which column plays which part.
    pub roles: Roles,
    /// The model.
    #[serde(default)]
    pub model: ModelSpec,
}

impl Study {
    /// Read a study file.
    ///
    /// # Errors
    /// [`Error::Io`] when unreadable, [`Error::Parse`] with the TOML message when malformed.
    pub fn read(path: &Path) -> Result<Study> {
        let text = fs::read_to_string(path).map_err(|e| Error::Io {
            path: path.to_path_buf(),
            message: e.to_string(),
        })?;
        toml::from_str(&text).map_err(|e| Error::Parse {
            path: path.to_path_buf(),
            message: format!("not a valid study file: {}", e.to_string().replace('\n', " ").trim()),
        })
    }

    /// The study as TOML text.
    pub fn to_toml(&self) -> String {
        toml::to_string_pretty(self).unwrap_or_default()
    }
}

/// A validated fit configuration: one route for flags and study files alike.
#[derive(Debug, Clone, PartialEq)]
pub struct FitConfig {
    /// The data file.
    pub data: PathBuf,
    /// Reading options.
    pub read: ReadOptions,
    /// Column roles.
    pub roles: Roles,
    /// The model.
    pub model: ModelSpec,
    /// Output folder.
    pub out: Option<PathBuf>,
    /// A JSON file to write.
    pub json: Option<PathBuf>,
    /// Where to evaluate the trajectory.
    pub trajectory: TrajectoryRequest,
    /// Whether to write per-row predictions and BLUPs.
    pub predictions: bool,
    /// Individual paths to draw.
    pub lines: usize,
    /// Suppress printing.
    pub quiet: bool,
    /// Overwrite existing outputs.
    pub force: bool,
}

pub(crate) fn parse_delimiter(s: &str) -> Result<u8> {
    match s {
        "\\t" | "tab" | "\t" => Ok(b'\t'),
        _ if s.len() == 1 && s.is_ascii() => Ok(s.as_bytes()[0]),
        _ => Err(Error::Spec {
            parameter: "--delimiter".into(),
            message: format!("'{s}' is not a single character; use for example ';' or '\\t'"),
        }),
    }
}

fn need(value: Option<String>, flag: &str) -> Result<String> {
    value.ok_or_else(|| Error::Spec {
        parameter: flag.into(),
        message: format!("is required: name the column with {flag} COLUMN (or give it in a study file's [roles])"),
    })
}

/// The column roles from flags alone.
///
/// # Errors
/// [`Error::Spec`] when `--id`, `--age` or `--outcome` is missing, or the delimiter is invalid.
pub fn roles_from_flags(r: &super::args::RoleArgs) -> Result<(Roles, ReadOptions)> {
    let roles = merge_roles(r, None)?;
    let delimiter = match &r.delimiter {
        Some(d) => parse_delimiter(d)?,
        None => b',',
    };
    Ok((roles, ReadOptions { delimiter }))
}

/// Column roles from flags, each falling back to a study file's value.
/// With ages from dates, or in a wide file, `--age` and `--outcome` only name
/// the derived columns and default to "age" and "outcome".
fn merge_roles(r: &super::args::RoleArgs, study: Option<&Roles>) -> Result<Roles> {
    let pick =
        |flag: &Option<String>, from: fn(&Roles) -> Option<String>| flag.clone().or_else(|| study.and_then(from));
    let list = |flag: &Vec<String>, from: fn(&Roles) -> Vec<String>| {
        if flag.is_empty() {
            study.map(from).unwrap_or_default()
        } else {
            flag.clone()
        }
    };
    let birth_date = pick(&r.birth_date, |x| x.birth_date.clone());
    let date = pick(&r.date, |x| x.date.clone());
    let wide_outcome = list(&r.wide_outcome, |x| x.wide_outcome.clone());
    let wide = !wide_outcome.is_empty();
    let derived_age = wide || (birth_date.is_some() && date.is_some());
    let label =
        |flag: &Option<String>, from: fn(&Roles) -> Option<String>, default: &str, name: &str, derived: bool| {
            match pick(flag, from).filter(|a| !a.is_empty()) {
                Some(v) => Ok(v),
                None if derived => Ok(default.to_string()),
                None => need(None, name),
            }
        };
    Ok(Roles {
        id: need(pick(&r.id, |x| Some(x.id.clone()).filter(|a| !a.is_empty())), "--id")?,
        age: label(&r.age, |x| Some(x.age.clone()), "age", "--age", derived_age)?,
        outcome: label(&r.outcome, |x| Some(x.outcome.clone()), "outcome", "--outcome", wide)?,
        birth_date,
        date,
        wide_outcome,
        wide_age: list(&r.wide_age, |x| x.wide_age.clone()),
        wide_date: list(&r.wide_date, |x| x.wide_date.clone()),
        cohort: pick(&r.cohort, |x| x.cohort.clone()),
        wave: pick(&r.wave, |x| x.wave.clone()),
        cluster: pick(&r.cluster, |x| x.cluster.clone()),
        period: pick(&r.period, |x| x.period.clone()),
        birth_year: pick(&r.birth_year, |x| x.birth_year.clone()),
        covariates: list(&r.covariates, |x| x.covariates.clone()),
        categorical: list(&r.categorical, |x| x.categorical.clone()),
    })
}

/// The data file, its column roles and read options, from flags and an
/// optional study file (flags win).
#[derive(Debug, Clone)]
pub struct Source {
    /// The data file.
    pub data: PathBuf,
    /// Column roles.
    pub roles: Roles,
    /// How to read the file.
    pub read: ReadOptions,
    /// The study file, when one was given.
    pub study: Option<Study>,
}

impl Source {
    /// Resolve the data file and roles from flags and an optional study file.
    /// A relative data path in a study file is taken from the study file's folder.
    ///
    /// # Errors
    /// [`Error::Spec`] for no data file, a missing role or a bad delimiter;
    /// errors of [`Study::read`] for a bad study file.
    pub fn resolve(data: Option<&PathBuf>, study_path: Option<&Path>, r: &super::args::RoleArgs) -> Result<Source> {
        let study = study_path.map(Study::read).transpose()?;
        let base_dir = study_path
            .and_then(Path::parent)
            .map(Path::to_path_buf)
            .unwrap_or_default();
        let data = match (data, &study) {
            (Some(d), _) => d.clone(),
            (None, Some(s)) => {
                if s.data.file.is_absolute() {
                    s.data.file.clone()
                } else {
                    base_dir.join(&s.data.file)
                }
            }
            (None, None) => {
                return Err(Error::Spec {
                    parameter: "DATA".into(),
                    message: "no data file: give DATA or --study FILE".into(),
                });
            }
        };
        let roles = merge_roles(r, study.as_ref().map(|s| &s.roles))?;
        let delimiter = match (&r.delimiter, study.as_ref().and_then(|s| s.data.delimiter.clone())) {
            (Some(d), _) => parse_delimiter(d)?,
            (None, Some(d)) => parse_delimiter(&d)?,
            (None, None) => b',',
        };
        Ok(Source {
            data,
            roles,
            read: ReadOptions { delimiter },
            study,
        })
    }
}

impl FitConfig {
    /// Build and validate the configuration from `braid fit` flags.
    ///
    /// # Errors
    /// [`Error::Spec`] for a missing data file or role, or an invalid option;
    /// errors of [`Study::read`] for a bad study file.
    pub fn from_args(args: &FitArgs) -> Result<FitConfig> {
        let Source {
            data,
            roles,
            read,
            study,
        } = Source::resolve(args.data.as_ref(), args.study.as_deref(), &args.roles)?;
        let mut model = study.map(|s| s.model).unwrap_or_default();
        if let Some(m) = args.method {
            model.method = match m {
                MethodArg::Reml => Method::Reml,
                MethodArg::Ml => Method::Ml,
            };
        }
        if let Some(d) = args.model.degree {
            model.age = AgeSpec::Polynomial { degree: d };
        }
        if let Some(k) = args.model.knots {
            model.age = AgeSpec::Spline {
                interior_knots: Some(k),
                knots: None,
            };
        }
        if let Some(k) = &args.model.knot_ages {
            model.age = AgeSpec::Spline {
                interior_knots: None,
                knots: Some(k.clone()),
            };
        }
        if let Some(c) = args.center {
            model.center = Some(c);
        }
        if args.model.no_slope {
            let mut terms = vec![RandomSpec {
                factor: roles.id.clone(),
                intercept: true,
                slopes: vec![],
            }];
            if let Some(c) = &roles.cluster {
                terms.push(RandomSpec {
                    factor: c.clone(),
                    intercept: true,
                    slopes: vec![],
                });
            }
            model.random = Some(terms);
        }
        if let Some(a) = args.at.iter().find(|a| !a.is_finite()) {
            return Err(Error::Spec {
                parameter: "--at".into(),
                message: format!("{a} is not a finite age"),
            });
        }
        if args.grid < 2 || args.grid > 100_000 {
            return Err(Error::Spec {
                parameter: "--grid".into(),
                message: format!("{} grid ages; choose between 2 and 100000", args.grid),
            });
        }
        Ok(FitConfig {
            data,
            read,
            roles,
            model,
            out: args.out.clone(),
            json: args.json.clone(),
            trajectory: TrajectoryRequest {
                grid: args.grid,
                at: args.at.clone(),
            },
            predictions: args.predictions,
            lines: args.lines,
            quiet: args.quiet,
            force: args.force,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // A study file and the equivalent flags build the same validated config.
    #[test]
    fn study_file_and_flags_agree() {
        let dir = std::env::temp_dir().join(format!("braid-config-{}", std::process::id()));
        fs::create_dir_all(&dir).unwrap();
        let study = dir.join("study.toml");
        fs::write(
            &study,
            "[data]\nfile = \"panel.csv\"\n[roles]\nid = \"pupil\"\nage = \"age\"\noutcome = \"score\"\ncluster = \"school\"\n\
             [model]\nmethod = \"ml\"\ncenter = 16.0\n[model.age]\nbasis = \"polynomial\"\ndegree = 3\n",
        )
        .unwrap();
        let from_study = FitConfig::from_args(&FitArgs {
            study: Some(study),
            grid: 101,
            ..Default::default()
        })
        .unwrap();
        let flags = FitArgs {
            data: Some(dir.join("panel.csv")),
            roles: super::super::args::RoleArgs {
                id: Some("pupil".into()),
                age: Some("age".into()),
                outcome: Some("score".into()),
                cluster: Some("school".into()),
                ..Default::default()
            },
            model: super::super::args::ModelArgs {
                degree: Some(3),
                ..Default::default()
            },
            center: Some(16.0),
            method: Some(MethodArg::Ml),
            grid: 101,
            ..Default::default()
        };
        let from_flags = FitConfig::from_args(&flags).unwrap();
        assert_eq!(from_study, from_flags);
        fs::remove_dir_all(&dir).unwrap();
    }
}
