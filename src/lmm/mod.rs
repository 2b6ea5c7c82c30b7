//! The linear mixed-model engine.
//!
//! The model is `y = Xβ + Zb + ε` with `b ~ N(0, σ²ΛΛᵀ)` and `ε ~ N(0, σ²I)`.
//! It is fitted in the penalized least squares form of Bates, Mächler, Bolker
//! & Walker (2015, *J. Stat. Software* 67(1)): for a relative covariance
//! parameter θ, the Cholesky factor of the augmented system
//! `[ΛᵀZᵀZΛ + I, ΛᵀZᵀX, ΛᵀZᵀy; ·, XᵀX, Xᵀy; ·, ·, yᵀy]` gives the profiled ML
//! and REML criteria in closed form. The derivation, with the blocked
//! factorisation used here, is in `notes/criterion.md`.
//!
//! Files by algorithm:
//! - [`rows`]: the rows of X and the columns of Z, stored or made on demand;
//! - [`crossprod`]: the one pass over the rows that gathers every cross-product;
//! - [`criterion`]: one evaluation of the profiled criterion for a θ;
//! - [`optimize`]: the bounded quasi-Newton optimiser;
//! - [`fit`]: the fit itself, start values, restarts and post-fit quantities;
//! - [`grouped`]: covariances and residual variances specific to groups of levels.
//!
//! The engine sees plain Rust types and faer matrices only.
#![allow(non_snake_case)]

pub mod criterion;
pub mod crossprod;
pub mod fit;
pub mod grouped;
pub mod optimize;
pub mod rows;
mod search;
mod sensitivity;
mod solution;
mod sparse;
mod start;

pub use rows::{Fixed, RowMaker, ZColumn};

pub use fit::{Detail, Fit, FitInfo, FitOptions, Prepared, RandomComponent, Route, fit, fit_from, fit_near};

use std::sync::Arc;

use serde::{Deserialize, Serialize};

/// The estimation criterion.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Method {
    /// Restricted maximum likelihood (the default).
    #[default]
    Reml,
    /// Maximum likelihood (needed for likelihood-ratio tests of fixed effects).
    Ml,
}

impl Method {
    /// The label used in reports and JSON: `"REML"` or `"ML"`.
    pub fn label(self) -> &'static str {
        match self {
            Method::Reml => "REML",
            Method::Ml => "ML",
        }
    }
}

/// The covariance structure of one random term's coefficients.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Covariance {
    /// Any positive semi-definite matrix: variances and correlations are
    /// estimated (the default).
    #[default]
    Unstructured,
    /// Independent coefficients: variances are estimated, correlations are
    /// zero by assumption.
    Diagonal,
}

impl Covariance {
    /// Whether this is the default, unstructured covariance.
    pub fn is_unstructured(&self) -> bool {
        *self == Covariance::Unstructured
    }
}

/// One random-effect term: a grouping factor with an intercept and/or slopes,
/// whose coefficients share a covariance matrix of the given structure.
#[derive(Debug, Clone)]
pub struct RandomTermData {
    /// Name of the grouping factor (a column of the data).
    pub factor: String,
    /// Label of each level, in level-index order (shared, not copied, with
    /// the panel the term comes from).
    pub level_names: Arc<[String]>,
    /// Level index of each row (`0..level_names.len()`; shared likewise).
    pub level: Arc<[u32]>,
    /// Names of the coefficients (for example `"intercept"`, `"age"`).
    pub columns: Vec<String>,
    /// The model-matrix columns of this term, one column of n entries per
    /// coefficient: ones, or the data's own columns, shared and not copied
    /// ([`ZColumn`]).
    pub z: Vec<ZColumn>,
    /// The structure of the coefficients' covariance.
    pub covariance: Covariance,
}

impl RandomTermData {
    /// A term whose levels are named by their index (`"0"`, `"1"`, …):
    /// `n_levels` levels, each row's level, and one column of `z` per
    /// coefficient named in `columns`.
    pub fn numbered(factor: &str, n_levels: usize, level: Vec<u32>, columns: &[&str], z: Vec<Vec<f64>>) -> Self {
        RandomTermData {
            factor: factor.into(),
            level_names: (0..n_levels).map(|i| i.to_string()).collect(),
            level: level.into(),
            columns: columns.iter().map(|c| (*c).to_string()).collect(),
            z: z.into_iter().map(Into::into).collect(),
            covariance: Covariance::Unstructured,
        }
    }

    /// The same term with a diagonal covariance (independent coefficients).
    pub fn diagonal(self) -> Self {
        RandomTermData {
            covariance: Covariance::Diagonal,
            ..self
        }
    }

    /// Number of coefficients per level (q).
    pub fn q(&self) -> usize {
        self.columns.len()
    }
    /// Number of levels.
    pub fn n_levels(&self) -> usize {
        self.level_names.len()
    }
    /// Number of entries of θ for this term: the lower triangle of a q×q
    /// factor, whatever the structure (a diagonal structure holds the
    /// entries off the diagonal at zero).
    pub fn n_theta(&self) -> usize {
        let q = self.q();
        q * (q + 1) / 2
    }

    /// Whether each entry of the term's θ (lower triangle, column-major) is
    /// estimated: all of them when unstructured, the diagonal only when
    /// diagonal.
    pub fn estimated(&self) -> Vec<bool> {
        let q = self.q();
        let mut v = Vec::with_capacity(self.n_theta());
        for j in 0..q {
            for i in j..q {
                v.push(i == j || self.covariance == Covariance::Unstructured);
            }
        }
        v
    }
}

/// A mixed-model problem: response, fixed design and random terms.
#[derive(Debug, Clone)]
pub struct MixedProblem {
    /// The response, length n (shared, not copied, with the data).
    pub y: Arc<[f64]>,
    /// Names of the fixed-effect columns, length p.
    pub x_names: Vec<String>,
    /// The fixed-effect design, n×p: stored row-major, or made row by row
    /// ([`Fixed`]).
    pub x: Fixed,
    /// The random-effect terms (possibly none).
    pub terms: Vec<RandomTermData>,
}

impl MixedProblem {
    /// Number of rows.
    pub fn n(&self) -> usize {
        self.y.len()
    }
    /// Number of fixed-effect columns.
    pub fn p(&self) -> usize {
        self.x_names.len()
    }
    /// Row `r` of X, through `buf` (of length p) when the rows are made on
    /// demand.
    #[inline(always)]
    pub fn x_row<'a>(&'a self, r: usize, buf: &'a mut [f64]) -> &'a [f64] {
        self.x.row(r, buf)
    }
    /// X whole, n×p row-major (made in full when the rows are made on
    /// demand).
    pub fn x_rows(&self) -> std::borrow::Cow<'_, [f64]> {
        self.x.rows(self.n(), self.p())
    }
    /// Total number of covariance parameters θ.
    pub fn n_theta(&self) -> usize {
        self.terms.iter().map(RandomTermData::n_theta).sum()
    }
    /// The entries of θ that are estimated, in increasing order; the others
    /// are held at zero by a diagonal structure.
    pub fn estimated(&self) -> Vec<usize> {
        self.terms
            .iter()
            .flat_map(RandomTermData::estimated)
            .enumerate()
            .filter_map(|(k, e)| e.then_some(k))
            .collect()
    }

    /// Lower bounds of θ: zero for the diagonal of each factor, −∞ elsewhere.
    pub fn theta_lower(&self) -> Vec<f64> {
        let mut lower = Vec::with_capacity(self.n_theta());
        for t in &self.terms {
            let q = t.q();
            for j in 0..q {
                for i in j..q {
                    lower.push(if i == j { 0.0 } else { f64::NEG_INFINITY });
                }
            }
        }
        lower
    }
}

/// Unpack a term's θ (lower triangle, column-major) into a dense q×q
/// lower-triangular factor `T`, row-major.
pub(crate) fn unpack_factor(theta: &[f64], q: usize) -> Vec<f64> {
    let mut t = vec![0.0; q * q];
    let mut k = 0;
    for j in 0..q {
        for i in j..q {
            t[i * q + j] = theta[k];
            k += 1;
        }
    }
    t
}

/// The estimated entries of a parameter vector of length `full`, the others
/// held at zero: the coordinates a search runs in when a diagonal structure
/// fixes some entries of θ.
#[derive(Debug, Clone)]
pub(crate) struct Subspace {
    index: Vec<usize>,
    full: usize,
}

impl Subspace {
    /// The entries `index` (increasing) of a vector of length `full`.
    pub(crate) fn new(index: Vec<usize>, full: usize) -> Subspace {
        Subspace { index, full }
    }
    /// The estimated entries of a problem's θ.
    pub(crate) fn of(problem: &MixedProblem) -> Subspace {
        Subspace::new(problem.estimated(), problem.n_theta())
    }
    /// The number of estimated entries.
    pub(crate) fn dim(&self) -> usize {
        self.index.len()
    }
    /// The estimated entries of a full vector.
    pub(crate) fn reduce(&self, v: &[f64]) -> Vec<f64> {
        self.index.iter().map(|&i| v[i]).collect()
    }
    /// The full vector with `x` at the estimated entries and zero elsewhere.
    pub(crate) fn expand(&self, x: &[f64]) -> Vec<f64> {
        let mut v = vec![0.0; self.full];
        for (&i, &a) in self.index.iter().zip(x) {
            v[i] = a;
        }
        v
    }
    /// A full vector with its fixed entries set to zero.
    pub(crate) fn project(&self, v: &[f64]) -> Vec<f64> {
        self.expand(&self.reduce(v))
    }
    /// The full indices of estimated entries given by their position.
    pub(crate) fn full_indices(&self, positions: &[usize]) -> Vec<usize> {
        positions.iter().map(|&j| self.index[j]).collect()
    }
}
