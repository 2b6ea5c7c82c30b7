//! The validated configuration of a fit, built from flags, a study file, or both.

use std::fs;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use super::args::{
    AnovaArgs, ApcArgs, ConvergeArgs, FitArgs, InputArgs, InspectArgs, MethodArg, ModelArgs, PlanArgs, ReportArgs,
    RetestArg, RouteArg, RuleArg, ScoreArgs,
};
use crate::FitRequest;
use crate::anova::AnovaOptions;
use crate::apc::{ApcColumns, ApcOptions};
use crate::data::{ReadOptions, Roles};
use crate::design::DesignOptions;
use crate::error::{Error, Result};
use crate::infer::TrajectoryRequest;
use crate::linkage::retest::RetestForm;
use crate::linkage::{ConvergeOptions, DEFAULT_MARGIN_SD, Margin};
use crate::lmm::{Covariance, Method};
use crate::plan::shard::Shard;
use crate::plan::{Plan, Population, Route};
use crate::score::{ItemColumns, ScoreOptions, ScoreRule, expand_items};
use crate::spec::{AgeSpec, ModelSpec, RandomSpec, default_random};
use crate::study::StudyOptions;

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
    /// A multi-item scale scored on the fly as the outcome.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub score: Option<ScaleSection>,
    /// What `braid report` adds to the analyses it always runs.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub report: Option<ReportSection>,
}

/// The `[report]` table of a study file.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ReportSection {
    /// Run the cohort × wave mixed ANOVA beside the mixed model.
    #[serde(default)]
    pub anova: bool,
}

/// The `[score]` table of a study file: the outcome is this scale's score,
/// computed from its items when the study is loaded.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ScaleSection {
    /// The items: names or ranges, comma-separated ("q1..q12").
    pub items: String,
    /// Reverse-keyed items.
    #[serde(default)]
    pub reverse: String,
    /// The lowest legal response.
    pub scale_min: f64,
    /// The highest legal response.
    pub scale_max: f64,
    /// "mean" (default) or "sum" (prorated).
    #[serde(default)]
    pub rule: Option<String>,
    /// A score needs this many answered items [default: all but one].
    #[serde(default)]
    pub min_answered: Option<usize>,
}

impl ScaleSection {
    /// The items and the validated scoring options.
    ///
    /// # Errors
    /// [`Error::Spec`] for a bad item list, rule or scale.
    pub fn options(&self) -> Result<(Vec<String>, ScoreOptions)> {
        let items = expand_items(&self.items)?;
        let reverse = expand_items(&self.reverse)?;
        let rule = match self.rule.as_deref().unwrap_or("mean") {
            "mean" => ScoreRule::Mean,
            "sum" => ScoreRule::Sum,
            other => {
                return Err(Error::Spec {
                    parameter: "rule".into(),
                    message: format!("'{other}' is not a scoring rule; use mean or sum"),
                });
            }
        };
        let min_answered = self.min_answered.unwrap_or(items.len().saturating_sub(1).max(1));
        let options = ScoreOptions::new(reverse, self.scale_min, self.scale_max, rule, min_answered)?;
        Ok((items, options))
    }
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
        let mut study: Study = toml::from_str(&text).map_err(|e| Error::Parse {
            path: path.to_path_buf(),
            message: format!("not a valid study file: {}", e.to_string().replace('\n', " ").trim()),
        })?;
        // A scored scale is the outcome unless the roles name another.
        if study.score.is_some() && study.roles.outcome.is_empty() {
            study.roles.outcome = "score".into();
        }
        Ok(study)
    }

    /// The study as TOML text.
    pub fn to_toml(&self) -> String {
        toml::to_string_pretty(self).unwrap_or_default()
    }
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

/// Column roles from flags, each falling back to a study file's value.
/// With ages from dates, or in a wide file, `--age` and `--outcome` only name
/// the derived columns and default to "age" and "outcome".
/// With `strict` false, a missing id, age or outcome is left empty for the
/// command to check (apc needs an id only for panels, an outcome only for records).
fn merge_roles(r: &super::args::RoleArgs, study: Option<&Roles>, strict: bool) -> Result<Roles> {
    let need = |value: Option<String>, flag: &str| {
        if strict {
            need(value, flag)
        } else {
            Ok(value.unwrap_or_default())
        }
    };
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
    pub fn resolve(input: &InputArgs) -> Result<Source> {
        Source::resolve_with(input, true)
    }

    /// As [`Source::resolve`], but a missing id, age or outcome is left empty.
    ///
    /// # Errors
    /// As [`Source::resolve`], but for the missing roles.
    pub fn resolve_loose(input: &InputArgs) -> Result<Source> {
        Source::resolve_with(input, false)
    }

    fn resolve_with(input: &InputArgs, strict: bool) -> Result<Source> {
        let (data, study_path, r) = (input.data.as_ref(), input.study.as_deref(), &input.roles);
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
        let roles = merge_roles(r, study.as_ref().map(|s| &s.roles), strict)?;
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

/// The model from a study file (or the default), with the model flags applied.
///
/// # Errors
/// [`Error::Spec`] when `--cluster-slope` is given without a cluster column.
pub fn model_from(
    study: Option<&Study>,
    m: &ModelArgs,
    center: Option<f64>,
    method: Option<MethodArg>,
    roles: &Roles,
) -> Result<ModelSpec> {
    if m.cluster_slope && roles.cluster.is_none() {
        return Err(Error::Spec {
            parameter: "--cluster-slope".into(),
            message: "there is no cluster column to give a slope; name it with --cluster or in the study file".into(),
        });
    }
    let mut model = study.map(|s| s.model.clone()).unwrap_or_default();
    if let Some(m) = method {
        model.method = match m {
            MethodArg::Reml => Method::Reml,
            MethodArg::Ml => Method::Ml,
        };
    }
    if let Some(d) = m.degree {
        model.age = AgeSpec::Polynomial { degree: d };
    }
    if let Some(k) = m.knots {
        model.age = AgeSpec::Spline {
            interior_knots: Some(k),
            knots: None,
        };
    }
    if let Some(k) = &m.knot_ages {
        model.age = AgeSpec::Spline {
            interior_knots: None,
            knots: Some(k.clone()),
        };
    }
    if let Some(c) = center {
        model.center = Some(c);
    }
    if m.no_slope {
        let intercept = |factor: &String| RandomSpec {
            factor: factor.clone(),
            intercept: true,
            slopes: vec![],
            covariance: Default::default(),
        };
        model.random = Some(
            std::iter::once(&roles.id)
                .chain(&roles.cluster)
                .map(intercept)
                .collect(),
        );
    }
    if m.cluster_slope || m.uncorrelated {
        let mut terms = model.random.take().unwrap_or_else(|| default_random(roles));
        for t in &mut terms {
            if m.cluster_slope && roles.cluster.as_ref() == Some(&t.factor) && !t.slopes.contains(&roles.age) {
                t.slopes.push(roles.age.clone());
            }
            if m.uncorrelated {
                t.covariance = Covariance::Diagonal;
            }
        }
        model.random = Some(terms);
    }
    Ok(model)
}

impl FitArgs {
    /// The data source and the validated fit request these flags ask for.
    ///
    /// # Errors
    /// [`Error::Spec`] for a missing data file or role, or an invalid option;
    /// errors of [`Study::read`] for a bad study file.
    pub fn request(&self) -> Result<(Source, FitRequest)> {
        let source = Source::resolve(&self.input)?;
        let model = model_from(
            source.study.as_ref(),
            &self.model,
            self.center,
            self.method,
            &source.roles,
        )?;
        let trajectory = TrajectoryRequest {
            grid: self.grid,
            at: self.at.clone(),
        };
        let request = FitRequest::new(model, trajectory)?
            .with_predictions(self.predictions)
            .with_paths(self.lines);
        Ok((source, request))
    }
}

impl ReportArgs {
    /// The data source and the options of every analysis of the study.
    ///
    /// # Errors
    /// Those of [`FitArgs::request`]; [`Error::Spec`] without --out.
    pub fn options(&self) -> Result<(Source, StudyOptions)> {
        if self.fit.output.out.is_none() {
            return Err(Error::Spec {
                parameter: "--out".into(),
                message: "is required: the report is a folder of files around report.html".into(),
            });
        }
        let (source, fit) = self.fit.request()?;
        let asks = source
            .study
            .as_ref()
            .and_then(|s| s.report.as_ref())
            .is_some_and(|r| r.anova);
        let options = StudyOptions {
            fit,
            design: DesignOptions::default(),
            converge: ConvergeOptions::default(),
            apc: ApcOptions::default(),
            anova: (self.anova || asks).then(AnovaOptions::default),
        };
        Ok((source, options))
    }
}

impl InspectArgs {
    /// The data source and the validated design options.
    ///
    /// # Errors
    /// Those of [`Source::resolve`] and [`DesignOptions::new`].
    pub fn options(&self) -> Result<(Source, DesignOptions)> {
        let d = &self.derive;
        let options = DesignOptions::new(self.band, self.thin, d.cohort_rule(), d.wave_rule())?;
        Ok((Source::resolve(&self.input)?, options))
    }
}

impl AnovaArgs {
    /// The data source and the validated ANOVA options.
    ///
    /// # Errors
    /// Those of [`Source::resolve`] and [`AnovaOptions::new`].
    pub fn options(&self) -> Result<(Source, AnovaOptions)> {
        let d = &self.derive;
        let options = AnovaOptions::new(self.sphericity_level, d.cohort_rule(), d.wave_rule())?;
        Ok((Source::resolve(&self.input)?, options))
    }
}

impl ScoreArgs {
    /// The data source, the columns and the validated scoring options.
    ///
    /// # Errors
    /// Those of [`Source::resolve_loose`], [`expand_items`] and
    /// [`ScoreOptions::new`]; a missing id or wave column.
    pub fn options(&self) -> Result<(Source, ItemColumns, ScoreOptions)> {
        let source = Source::resolve_loose(&self.input)?;
        let r = &source.roles;
        let required = |v: Option<String>, key: &str| {
            v.filter(|s| !s.is_empty()).ok_or_else(|| Error::Spec {
                parameter: key.into(),
                message: "is required: name the column".into(),
            })
        };
        let missing = |key: &str| Error::Spec {
            parameter: key.into(),
            message: "is required: give it, or a [score] table in the study file".into(),
        };
        // Flags win over the study file's [score] table.
        let scale = source.study.as_ref().and_then(|s| s.score.as_ref());
        let from_study = scale.map(ScaleSection::options).transpose()?;
        let items = match (&self.items, &from_study) {
            (Some(list), _) => expand_items(list)?,
            (None, Some((items, _))) => items.clone(),
            (None, None) => return Err(missing("items")),
        };
        let columns = ItemColumns {
            id: required(Some(r.id.clone()), "id")?,
            wave: required(r.wave.clone(), "wave")?,
            cohort: r.cohort.clone(),
            form: self.form.clone(),
            pass: self.pass.clone(),
            items: items.clone(),
        };
        let study = from_study.map(|(_, o)| o);
        let reverse = match (&self.reverse, &study) {
            (Some(list), _) => expand_items(list)?,
            (None, Some(o)) => o.reverse.clone(),
            (None, None) => Vec::new(),
        };
        let end = |flag: Option<f64>, of: fn(&ScoreOptions) -> f64, key: &str| {
            flag.or(study.as_ref().map(of)).ok_or_else(|| missing(key))
        };
        let (scale_min, scale_max) = (
            end(self.scale_min, |o| o.scale_min, "scale_min")?,
            end(self.scale_max, |o| o.scale_max, "scale_max")?,
        );
        let rule = match (self.rule, &study) {
            (Some(RuleArg::Mean), _) => ScoreRule::Mean,
            (Some(RuleArg::Sum), _) => ScoreRule::Sum,
            (None, Some(o)) => o.rule,
            (None, None) => ScoreRule::Mean,
        };
        let min_answered = self
            .min_answered
            .or(study.as_ref().map(|o| o.min_answered))
            .unwrap_or(items.len().saturating_sub(1).max(1));
        let mut options = ScoreOptions::new(reverse, scale_min, scale_max, rule, min_answered)?;
        options.seed = self.seed.unwrap_or(options.seed);
        if let Some(list) = &self.anchor {
            options.anchor = expand_items(list)?;
        }
        Ok((source, columns, options))
    }
}

impl ConvergeArgs {
    /// The data source, the model of M0 and the validated options.
    ///
    /// # Errors
    /// Those of [`Source::resolve`] and [`ConvergeOptions::new`].
    pub fn options(&self) -> Result<(Source, ModelSpec, ConvergeOptions)> {
        let source = Source::resolve(&self.input)?;
        let model = model_from(source.study.as_ref(), &self.model, None, None, &source.roles)?;
        let margin = match (self.margin, self.margin_sd) {
            (Some(m), _) => Margin::Outcome(m),
            (None, Some(s)) => Margin::Sd(s),
            (None, None) => Margin::Sd(DEFAULT_MARGIN_SD),
        };
        let retest = self.retest.map(|r| match r {
            RetestArg::Count => RetestForm::Count,
            RetestArg::Later => RetestForm::Later,
            RetestArg::Sqrt => RetestForm::Sqrt,
        });
        let cohort_rule = self.derive.cohort_rule();
        let options = ConvergeOptions::new(self.reference_age, margin, self.shared_ages, cohort_rule, retest)?;
        Ok((source, model, options))
    }
}

impl ApcArgs {
    /// The data file, the columns, the read options and the validated APC options.
    ///
    /// # Errors
    /// [`Error::Spec`] for a missing role, a bad delimiter or width; errors of
    /// [`Source::resolve_loose`]. (Constraints and assumptions are parsed by
    /// the flags themselves.)
    pub fn options(&self) -> Result<(Source, ApcColumns, ApcOptions)> {
        let source = Source::resolve_loose(&self.input)?;
        let r = &source.roles;
        let nonempty = |s: &String| Some(s.clone()).filter(|s| !s.is_empty());
        let required = |s: Option<String>, key: &str| {
            s.ok_or_else(|| Error::Spec {
                parameter: key.into(),
                message: "is required: name the column".into(),
            })
        };
        let columns = ApcColumns {
            age: required(nonempty(&r.age), "age")?,
            period: required(r.period.clone(), "period")?,
            outcome: nonempty(&r.outcome).filter(|_| self.events.is_none()),
            events: self.events.clone(),
            exposure: self.exposure.clone(),
            id: nonempty(&r.id),
            cluster: r.cluster.clone(),
            birth_year: r.birth_year.clone(),
        };
        if columns.outcome.is_none() && columns.events.is_none() {
            return Err(Error::Spec {
                parameter: "outcome".into(),
                message: "name the `outcome` column (records), or `events` with `exposure` (a table of counts)".into(),
            });
        }
        let options = ApcOptions::new(
            self.width,
            self.constraints.clone(),
            self.assumptions.clone(),
            self.hierarchical,
        )?;
        Ok((source, columns, options))
    }
}

impl PlanArgs {
    /// The plan with the flags applied, where its population came from,
    /// and the shard to run, if any.
    ///
    /// # Errors
    /// Those of [`Plan::read`], [`Population::from_fit_json`] and
    /// [`Shard::parse`]; [`Plan::validate`] checks the rest.
    pub fn options(&self) -> Result<(Plan, String, Option<Shard>)> {
        let path = self.plan.as_deref().ok_or_else(|| Error::Spec {
            parameter: "plan".into(),
            message: "is required: give a plan file".into(),
        })?;
        let mut plan = Plan::read(path)?;
        let mut source = format!("from the plan file {}", path.display());
        if let Some(fit) = &self.from {
            let text = std::fs::read_to_string(fit).map_err(|e| Error::Io {
                path: fit.clone(),
                message: e.to_string(),
            })?;
            plan.population = Some(Population::from_fit_json(fit, &text)?);
            source = format!("from the pilot fit {}", fit.display());
        }
        let s = &mut plan.simulation;
        if let Some(r) = self.route {
            s.route = match r {
                RouteArg::Information => Route::Information,
                RouteArg::Simulation => Route::Simulation,
                RouteArg::Both => Route::Both,
            };
        }
        s.replicates = self.replicates.unwrap_or(s.replicates);
        s.precision = self.precision.unwrap_or(s.precision);
        s.seed = self.seed.unwrap_or(s.seed);
        if let Some(n) = self.per_cohort {
            for d in &mut plan.designs {
                d.per_cohort = Some(n);
            }
        }
        let shard = self.shard.as_deref().map(Shard::parse).transpose()?;
        Ok((plan, source, shard))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // A study file and the equivalent flags build the same source and validated request.
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
        let from_study = FitArgs {
            input: InputArgs {
                study: Some(study),
                ..Default::default()
            },
            grid: 101,
            ..Default::default()
        }
        .request()
        .unwrap();
        let flags = FitArgs {
            input: InputArgs {
                data: Some(dir.join("panel.csv")),
                roles: super::super::args::RoleArgs {
                    id: Some("pupil".into()),
                    age: Some("age".into()),
                    outcome: Some("score".into()),
                    cluster: Some("school".into()),
                    ..Default::default()
                },
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
        let from_flags = flags.request().unwrap();
        assert_eq!(from_study.1, from_flags.1);
        assert_eq!(from_study.0.data, from_flags.0.data);
        assert_eq!(from_study.0.roles, from_flags.0.roles);
        assert_eq!(from_study.0.read, from_flags.0.read);
        fs::remove_dir_all(&dir).unwrap();
    }
}
