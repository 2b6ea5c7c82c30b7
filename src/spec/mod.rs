//! The model specification as Rust types, and the model frame built from it.
//!
//! A model is stated as data, not as a formula string: the age basis, the
//! centre, the covariates (from the column roles) and a list of random-effect
//! terms, each naming a grouping column, whether it has an intercept, and which
//! numeric columns get slopes. The same [`ModelSpec`] is read from a study
//! file (TOML) or built from command-line flags.

pub mod basis;

use std::sync::Arc;

use serde::{Deserialize, Serialize};

pub use basis::AgeBasis;

use crate::data::{CovariateValues, Panel};
use crate::error::{Error, Result};
use crate::lmm::{Covariance, Fixed, Method, MixedProblem, RandomTermData, RowMaker, ZColumn};

/// How age enters the fixed part.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "basis", rename_all = "snake_case", deny_unknown_fields)]
pub enum AgeSpec {
    /// Powers 1..=degree of (age − centre).
    Polynomial {
        /// Degree, 1 to 4.
        degree: usize,
    },
    /// A natural cubic spline.
    Spline {
        /// Number of interior knots placed at quantiles of age.
        #[serde(default, skip_serializing_if = "Option::is_none")]
        interior_knots: Option<usize>,
        /// Interior knots given by the user (ages, inside the observed range).
        #[serde(default, skip_serializing_if = "Option::is_none")]
        knots: Option<Vec<f64>>,
    },
}

impl Default for AgeSpec {
    fn default() -> Self {
        AgeSpec::Polynomial { degree: 2 }
    }
}

/// One random-effect term.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RandomSpec {
    /// The grouping column (for example the participant id or the school).
    pub factor: String,
    /// Whether the term has a random intercept.
    #[serde(default = "yes")]
    pub intercept: bool,
    /// Columns with random slopes. The age column means centred age.
    #[serde(default)]
    pub slopes: Vec<String>,
    /// The structure of the coefficients' covariance: `"unstructured"` (the
    /// default; correlations estimated) or `"diagonal"` (independent
    /// intercept and slopes).
    #[serde(default, skip_serializing_if = "Covariance::is_unstructured")]
    pub covariance: Covariance,
}

fn yes() -> bool {
    true
}

/// The whole model.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ModelSpec {
    /// REML (default) or ML.
    #[serde(default)]
    pub method: Method,
    /// The age basis.
    #[serde(default)]
    pub age: AgeSpec,
    /// The centre age; the mean age when absent.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub center: Option<f64>,
    /// Random-effect terms; when absent, an intercept and age slope per
    /// participant, plus an intercept per cluster when a cluster is given.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub random: Option<Vec<RandomSpec>>,
}

impl ModelSpec {
    /// The random terms in force for a panel's roles.
    pub fn random_terms(&self, panel: &Panel) -> Vec<RandomSpec> {
        match &self.random {
            Some(r) => r.clone(),
            None => default_random(&panel.roles),
        }
    }
}

/// The random terms used when a model names none: an intercept and age
/// slope per participant, with an unstructured covariance, plus an
/// intercept per cluster when a cluster is given.
pub fn default_random(roles: &crate::data::Roles) -> Vec<RandomSpec> {
    let mut v = vec![RandomSpec {
        factor: roles.id.clone(),
        intercept: true,
        slopes: vec![roles.age.clone()],
        covariance: Covariance::Unstructured,
    }];
    if let Some(c) = &roles.cluster {
        v.push(RandomSpec {
            factor: c.clone(),
            intercept: true,
            slopes: vec![],
            covariance: Covariance::Unstructured,
        });
    }
    v
}

/// The fitted-model frame: the engine's problem plus what is needed to read
/// the estimates back in terms of age.
#[derive(Debug, Clone)]
pub struct ModelFrame {
    /// The engine's input.
    pub problem: MixedProblem,
    /// The age basis with its centre and knots.
    pub basis: AgeBasis,
    /// Name of the age column.
    pub age_name: String,
    /// Name of the outcome column.
    pub outcome_name: String,
    /// The values of the covariate columns of X used for the mean trajectory:
    /// the sample mean of each (for factors, the share of each level).
    pub covariate_reference: Vec<f64>,
    /// The random terms as specified.
    pub random: Vec<RandomSpec>,
    /// Observed age range.
    pub age_range: (f64, f64),
    /// The model in words, one line per part.
    pub description: Vec<String>,
}

impl ModelFrame {
    /// The fixed-effect row for the mean trajectory at `age`.
    pub fn mean_row(&self, age: f64) -> Vec<f64> {
        let mut v = vec![1.0];
        v.extend(self.basis.eval(age));
        v.extend(&self.covariate_reference);
        v
    }
    /// The derivative of [`Self::mean_row`] with respect to age.
    pub fn rate_row(&self, age: f64) -> Vec<f64> {
        let mut v = vec![0.0];
        v.extend(self.basis.deriv(age));
        v.extend(std::iter::repeat_n(0.0, self.covariate_reference.len()));
        v
    }
    /// The second derivative of [`Self::mean_row`].
    pub fn curvature_row(&self, age: f64) -> Vec<f64> {
        let mut v = vec![0.0];
        v.extend(self.basis.deriv2(age));
        v.extend(std::iter::repeat_n(0.0, self.covariate_reference.len()));
        v
    }
}

fn spec_err(parameter: &str, message: String) -> Error {
    Error::Spec {
        parameter: parameter.into(),
        message,
    }
}

/// Build the age basis for these ages.
///
/// # Errors
/// [`Error::Spec`] for a degree outside 1–4, too few distinct ages for the
/// basis, or spline knots outside the observed range.
pub fn build_basis(spec: &AgeSpec, center: Option<f64>, ages: &[f64]) -> Result<AgeBasis> {
    // The ages are finite (the read checks them), so min and max order them.
    let (lo, hi) = ages
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(l, h), &a| (l.min(a), h.max(a)));
    let center = center.unwrap_or_else(|| ages.iter().sum::<f64>() / ages.len() as f64);
    if !center.is_finite() {
        return Err(spec_err("center", format!("centre {center} is not a finite age")));
    }
    match spec {
        AgeSpec::Polynomial { degree } => {
            if !(1..=4).contains(degree) {
                return Err(spec_err(
                    "degree",
                    format!(
                        "degree {degree} is not supported; choose 1, 2, 3 or 4 (or a spline with interior `knots`)"
                    ),
                ));
            }
            let distinct = distinct_up_to(ages, degree + 1);
            if distinct <= *degree {
                return Err(spec_err(
                    "degree",
                    format!("{distinct} distinct ages cannot support a degree-{degree} polynomial; lower the degree"),
                ));
            }
            Ok(AgeBasis::Polynomial {
                degree: *degree,
                center,
            })
        }
        AgeSpec::Spline { interior_knots, knots } => {
            let mut sorted = ages.to_vec();
            sorted.sort_by(f64::total_cmp);
            let mut distinct = sorted.clone();
            distinct.dedup();
            let inner: Vec<f64> = match (interior_knots, knots) {
                (_, Some(k)) => {
                    let mut k = k.clone();
                    k.sort_by(f64::total_cmp);
                    for &v in &k {
                        if !(v > lo && v < hi) {
                            return Err(spec_err(
                                "knots",
                                format!(
                                    "knot {v} is not strictly inside the observed ages {lo:.2} to {hi:.2}; move it inside"
                                ),
                            ));
                        }
                    }
                    k
                }
                (Some(kn), None) => {
                    if *kn == 0 || *kn > 20 {
                        return Err(spec_err(
                            "knots",
                            format!("{kn} interior knots; choose between 1 and 20"),
                        ));
                    }
                    (1..=*kn)
                        .map(|j| basis::quantile_sorted(&sorted, j as f64 / (*kn + 1) as f64))
                        .collect()
                }
                (None, None) => return Err(spec_err("age", "a spline needs interior_knots or knots".into())),
            };
            let mut all = vec![lo];
            all.extend(inner);
            all.push(hi);
            if all.windows(2).any(|w| w[1] - w[0] <= 1e-9 * (hi - lo)) {
                return Err(spec_err(
                    "knots",
                    "two knots coincide (ages are too concentrated for this many knots); use fewer knots or give them explicitly".into(),
                ));
            }
            if distinct.len() < all.len() {
                return Err(spec_err(
                    "knots",
                    format!(
                        "{} distinct ages cannot support {} knots; use fewer",
                        distinct.len(),
                        all.len()
                    ),
                ));
            }
            Ok(AgeBasis::Spline { knots: all, center })
        }
    }
}

/// The number of distinct values in `v`, counted up to `k`: a polynomial of
/// degree d needs only to know whether there are more than d.
fn distinct_up_to(v: &[f64], k: usize) -> usize {
    let mut seen: Vec<f64> = Vec::with_capacity(k);
    for &x in v {
        if !seen.contains(&x) {
            seen.push(x);
            if seen.len() >= k {
                break;
            }
        }
    }
    seen.len()
}

/// The data of one random term: its grouping codes and the columns of Z,
/// which are the panel's own columns (ones for an intercept, age less the
/// basis centre for an age slope), shared and not copied.
fn random_term<'a>(panel: &'a Panel, rs: &RandomSpec, center: f64) -> Result<RandomTermData> {
    let age_name = &panel.roles.age;
    let coded_numeric;
    let by_role = |role: &Option<String>, codes: &'a Option<crate::data::Codes>| {
        codes.as_ref().filter(|_| role.as_ref() == Some(&rs.factor))
    };
    let codes: &crate::data::Codes = if rs.factor == panel.roles.id {
        &panel.id
    } else if let Some(c) = by_role(&panel.roles.cluster, &panel.cluster)
        .or_else(|| by_role(&panel.roles.cohort, &panel.cohort))
        .or_else(|| by_role(&panel.roles.wave, &panel.wave))
    {
        c
    } else if let Some(cv) = panel.covariates.iter().find(|c| c.name == rs.factor) {
        match &cv.values {
            CovariateValues::Categorical(c) => c,
            CovariateValues::Numeric(v) => {
                let labels: Vec<String> = v.iter().map(|x| x.to_string()).collect();
                coded_numeric = crate::data::Codes::new(&labels, true);
                &coded_numeric
            }
        }
    } else {
        return Err(spec_err(
            "random.factor",
            format!(
                "grouping column '{}' is not one of the column roles (id, cluster, cohort, wave or a covariate)",
                rs.factor
            ),
        ));
    };
    if codes.n_levels() < 2 {
        return Err(spec_err(
            "random.factor",
            format!(
                "grouping column '{}' has a single level; a random effect needs at least two",
                rs.factor
            ),
        ));
    }
    let mut columns = Vec::new();
    let mut z: Vec<ZColumn> = Vec::new();
    if rs.intercept {
        columns.push("intercept".to_string());
        z.push(ZColumn::Ones);
    }
    for s in &rs.slopes {
        if s == age_name {
            columns.push(age_name.clone());
            z.push(ZColumn::Less(Arc::clone(&panel.age), center));
        } else if let Some(cv) = panel.covariates.iter().find(|c| &c.name == s) {
            match &cv.values {
                CovariateValues::Numeric(v) => {
                    columns.push(s.clone());
                    z.push(ZColumn::Values(Arc::clone(v)));
                }
                CovariateValues::Categorical(_) => {
                    return Err(spec_err(
                        "random.slopes",
                        format!("'{s}' is categorical; random slopes need a numeric column"),
                    ));
                }
            }
        } else {
            return Err(spec_err(
                "random.slopes",
                format!("slope column '{s}' is neither the age column nor a numeric covariate"),
            ));
        }
    }
    if columns.is_empty() {
        return Err(spec_err(
            "random",
            format!("the term for '{}' has neither an intercept nor slopes", rs.factor),
        ));
    }
    Ok(RandomTermData {
        factor: rs.factor.clone(),
        level_names: codes.levels.clone(),
        level: codes.codes.clone(),
        columns,
        z,
        covariance: rs.covariance,
    })
}

/// The model in words.
fn describe(panel: &Panel, basis: &AgeBasis, terms: &[RandomTermData], method: crate::lmm::Method) -> Vec<String> {
    let age_name = &panel.roles.age;
    let mut description = vec![format!("mean of {}: {}", panel.roles.outcome, basis.describe(age_name))];
    if !panel.covariates.is_empty() {
        let names: Vec<&str> = panel.covariates.iter().map(|c| c.name.as_str()).collect();
        description.push(format!("adjusted for {}", names.join(", ")));
    }
    for t in terms {
        let what = t
            .columns
            .iter()
            .map(|c| {
                if c == "intercept" {
                    "intercept".to_string()
                } else {
                    format!("slope on {c}")
                }
            })
            .collect::<Vec<_>>()
            .join(" and ");
        let structure = if t.columns.len() == 1 {
            "one variance"
        } else if t.covariance == Covariance::Diagonal {
            "independent (diagonal covariance)"
        } else {
            "unstructured covariance"
        };
        description.push(format!(
            "random {what} per {} ({} levels), {structure}",
            t.factor,
            crate::stats::thousands(t.n_levels())
        ));
    }
    description.push(format!("fitted by {}", method.label()));
    description
}

/// The rows of a frame's fixed design, made from the panel's columns on
/// demand: the intercept, the age basis at the row's age, and the
/// covariates (numeric as they are, factors by treatment coding). The
/// frame holds no n×p copy of them (notes/decisions.md, "Rows made on
/// demand").
#[derive(Debug)]
struct FrameRows {
    age: Arc<[f64]>,
    basis: AgeBasis,
    covariates: Vec<CovariateColumn>,
}

/// One covariate column of X.
#[derive(Debug)]
enum CovariateColumn {
    /// A numeric covariate as it is.
    Numeric(Arc<[f64]>),
    /// One level of a factor: 1 on its rows, 0 elsewhere.
    Level(Arc<[u32]>, u32),
}

impl CovariateColumn {
    #[inline(always)]
    fn at(&self, r: usize) -> f64 {
        match self {
            CovariateColumn::Numeric(v) => v[r],
            CovariateColumn::Level(codes, level) => {
                if codes[r] == *level {
                    1.0
                } else {
                    0.0
                }
            }
        }
    }
}

impl RowMaker for FrameRows {
    #[inline]
    fn fill(&self, r: usize, out: &mut [f64]) {
        let nb = self.basis.n_columns();
        out[0] = 1.0;
        self.basis.fill_eval(self.age[r], &mut out[1..1 + nb]);
        for (o, c) in out[1 + nb..].iter_mut().zip(&self.covariates) {
            *o = c.at(r);
        }
    }
    fn ones(&self) -> Option<usize> {
        Some(0)
    }
}

/// Build the model frame: fixed design, random terms and reference row.
///
/// # Errors
/// [`Error::Spec`] when a random term names an unknown column or a slope on a
/// non-numeric column, or when the basis cannot be built.
pub fn build_frame(panel: &Panel, spec: &ModelSpec) -> Result<ModelFrame> {
    let basis = build_basis(&spec.age, spec.center, &panel.age)?;
    let n = panel.n();
    let age_name = panel.roles.age.clone();
    let mut x_names = vec!["intercept".to_string()];
    x_names.extend(basis.names(&age_name));
    // Covariate columns: numeric as is, factors by treatment coding.
    let mut covariates: Vec<CovariateColumn> = Vec::new();
    for c in &panel.covariates {
        match &c.values {
            CovariateValues::Numeric(v) => {
                x_names.push(c.name.clone());
                covariates.push(CovariateColumn::Numeric(Arc::clone(v)));
            }
            CovariateValues::Categorical(codes) => {
                for (lvl, label) in codes.levels.iter().enumerate().skip(1) {
                    x_names.push(format!("{}={}", c.name, label));
                    covariates.push(CovariateColumn::Level(Arc::clone(&codes.codes), lvl as u32));
                }
            }
        }
    }
    let covariate_reference: Vec<f64> = covariates
        .iter()
        .map(|c| (0..n).map(|r| c.at(r)).sum::<f64>() / n as f64)
        .collect();
    let rows = FrameRows {
        age: Arc::clone(&panel.age),
        basis: basis.clone(),
        covariates,
    };

    let random = spec.random_terms(panel);
    let mut terms = Vec::with_capacity(random.len());
    let center = basis.center();
    for rs in &random {
        terms.push(random_term(panel, rs, center)?);
    }
    let age_range = panel
        .age
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &a| {
            (lo.min(a), hi.max(a))
        });
    let description = describe(panel, &basis, &terms, spec.method);
    Ok(ModelFrame {
        problem: MixedProblem {
            y: Arc::clone(&panel.outcome),
            x_names,
            x: Fixed::Made(Arc::new(rows)),
            terms,
        },
        basis,
        age_name,
        outcome_name: panel.roles.outcome.clone(),
        covariate_reference,
        random,
        age_range,
        description,
    })
}
