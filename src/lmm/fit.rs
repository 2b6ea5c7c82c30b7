//! The fit: start values, optimisation with restarts, and post-fit quantities.
//!
//! Start values are scale-aware: each random coefficient starts with a
//! relative SD proportional to `1/rms(z)`, so a slope on age in years starts
//! near its plausible size rather than at the identity; the best of three
//! scalings of that start is taken. When the optimum lies on the boundary the
//! fit is restarted from the interior and the better optimum kept.

use serde::Serialize;
use std::cell::RefCell;

use super::criterion::{self};
use super::crossprod::CrossProducts;
use super::optimize::{self, OptimOptions};
use super::search::search;
use super::sensitivity::{Stencil, sensitivity, stencil_steps};
use super::solution::{components, fixed_cov, solve_pls, values_per_row};
use super::start::{base_start, moment_start, row_scales};
use super::{Method, MixedProblem, Subspace};
use crate::error::{Error, Result};

/// A fit counts as converged when the Newton decrement of the deviance is
/// below this (the remaining improvement of the log-likelihood is then below
/// a quarter of it).
pub const NEWTON_DECREMENT_TOLERANCE: f64 = 1e-6;

/// The search's first value tolerance is multiplied by this when the
/// criterion has an analytic gradient (see `search::descend`); on the
/// 3,000-participant benchmark it saves 7 of 41 evaluations.
pub(super) const EXACT_GRADIENT_TIGHTENING: f64 = 1e-2;

/// Restarts from the interior after a boundary optimum, at most.
pub(super) const MAX_RESTARTS: usize = 3;

/// At most this many gradient-led steps refine the search's end point before
/// the Newton finish ([`optimize::refine_by_gradient`]); each must halve the
/// decrement, so a few suffice or none helps.
pub(super) const REFINE_STEPS: usize = 6;

/// The refinement aims below the finish's own target by this factor, so that
/// the Newton step after the finish's stencil stays within the share of a
/// stencil step at which the stencil still serves Satterthwaite.
pub(super) const REFINE_TARGET: f64 = 1e-4;

/// A diagonal entry of θ below this fraction of its start value is tested
/// against the boundary (set to zero when that does not raise the deviance).
pub const BOUNDARY_SNAP: f64 = 1e-4;

/// Relative finite-difference step for the information matrix and for the
/// derivatives of cov(β̂). With the response centred the pieces are smooth to
/// near machine precision, and this step balances truncation against
/// rounding: the balanced one-way df come out within about 2e-7 of a − 1.
pub(super) const HESSIAN_STEP: f64 = 3e-4;

/// Settings of a fit.
#[derive(Debug, Clone, Copy, Default)]
pub struct FitOptions {
    /// REML (default) or ML.
    pub method: Method,
    /// Optimiser settings.
    pub optim: OptimOptions,
    /// What the fit computes beyond the estimates.
    pub detail: Detail,
    /// The factorisation: chosen by the size of the dense part (default),
    /// or forced.
    pub route: Route,
}

impl FitOptions {
    /// REML with [`Detail::Estimates`]: the estimates and Satterthwaite's
    /// sensitivity, without the values per row and per level.
    pub fn estimates() -> FitOptions {
        FitOptions {
            detail: Detail::Estimates,
            ..Default::default()
        }
    }
}

/// The factorisation a fit runs on (notes/criterion.md, "The sparse route").
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Route {
    /// Chosen by the model: blocked unless the terms beside the largest one
    /// would make the dense part larger than [`DENSE_LIMIT`].
    #[default]
    Auto,
    /// The largest term's levels one by one, every other term's columns in
    /// one dense block.
    Blocked,
    /// Every random term's columns in one sparse Cholesky factor.
    Sparse,
}

impl Route {
    /// The route a fit of `problem` takes under this choice.
    pub fn resolve(self, problem: &MixedProblem) -> Route {
        match self {
            Route::Auto if super::crossprod::dense_order(problem).0 > DENSE_LIMIT => Route::Sparse,
            Route::Auto => Route::Blocked,
            chosen => chosen,
        }
    }
}

/// What a fit computes beyond θ̂, β̂, cov(β̂), σ̂² and the likelihood.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub enum Detail {
    /// Everything: BLUPs, conditional fitted values and residuals, and the
    /// sensitivity of cov(β̂) for Satterthwaite df.
    #[default]
    Full,
    /// Everything but the values per row and per level: the estimates and
    /// the sensitivity of cov(β̂), as the fit's tables, curve and tests
    /// need. No BLUPs and no fitted values or residuals (all empty). On a
    /// file of millions of rows this leaves out 32 bytes per row and about
    /// 60 per level.
    Estimates,
    /// What a likelihood-ratio test needs: the estimates, the likelihood
    /// and the marginal fitted values Xβ̂. No BLUPs, conditional fitted
    /// values or residuals (empty), and no sensitivity (NaN). With an
    /// analytic gradient the search stops on its quasi-Newton decrement
    /// without a Newton finish, so `min_curvature` is `None`; without one
    /// the curvature comes from the finish's last stencil.
    Likelihood,
}

impl Detail {
    /// Whether the fit computes BLUPs, conditional fitted values and
    /// residuals.
    pub fn per_row(self) -> bool {
        self == Detail::Full
    }

    /// Whether the fit computes the marginal fitted values Xβ̂.
    pub fn marginal(self) -> bool {
        self != Detail::Estimates
    }

    /// Whether the fit computes the sensitivity of cov(β̂) (Satterthwaite
    /// df) and certifies its optimum by a Newton finish.
    pub fn inference(self) -> bool {
        self != Detail::Likelihood
    }
}

/// One grouping factor's estimated covariance.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct RandomComponent {
    /// The grouping factor.
    pub factor: String,
    /// Its coefficients, for example `["intercept", "age"]`.
    pub terms: Vec<String>,
    /// Number of levels (groups).
    pub n_levels: usize,
    /// Covariance matrix of the coefficients, in outcome units squared
    /// (per unit of the slope variable for slopes).
    pub covariance: Vec<Vec<f64>>,
    /// Standard deviations (square roots of the diagonal).
    pub sd: Vec<f64>,
    /// Correlation matrix (NaN where an SD is zero; zero by assumption off
    /// the diagonal of a diagonal structure).
    pub correlation: Vec<Vec<f64>>,
    /// The covariance structure (written out only when not unstructured).
    #[serde(skip_serializing_if = "super::Covariance::is_unstructured")]
    pub structure: super::Covariance,
}

/// How the optimisation went.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct FitInfo {
    /// Quasi-Newton iterations, summed over restarts.
    pub iterations: usize,
    /// Evaluations of the criterion, summed over restarts.
    pub evaluations: usize,
    /// Largest projected gradient component of the profiled deviance at the end.
    pub gradient_norm: f64,
    /// Newton decrement `gᵀH⁻¹g` of the profiled deviance at the end: twice the
    /// decrease still predicted by a Newton step (`None` if H is not positive definite).
    pub newton_decrement: Option<f64>,
    /// Smallest eigenvalue of the deviance Hessian over the free parameters
    /// (positive at a proper minimum); `None` when there are no free parameters.
    pub min_curvature: Option<f64>,
    /// Whether the optimiser stopped at a minimum (gradient small, curvature positive).
    /// (Serialised once, at the top of the fit report, not again here.)
    #[serde(skip_serializing)]
    pub converged: bool,
    /// Covariance parameters at the boundary, named as `factor:coefficient`.
    /// (Serialised once, at the top of the fit report.)
    #[serde(skip_serializing)]
    pub boundary: Vec<String>,
    /// Number of restarts made.
    pub restarts: usize,
    /// Advice and warnings for the user.
    pub messages: Vec<String>,
    /// The last quasi-Newton search's inverse Hessian of the deviance over
    /// the estimated entries of θ (row-major): a first inverse Hessian for
    /// the search of a nearby model ([`Prepared::fit_near`]).
    #[serde(skip)]
    pub inverse_hessian: Option<Vec<f64>>,
    /// The factorisation the fit ran on: blocked or sparse.
    pub route: Route,
}

/// Sensitivity of cov(β̂) to the variance parameters, for Satterthwaite df.
#[derive(Debug, Clone)]
pub struct VarianceSensitivity {
    /// Asymptotic covariance of the free variance parameters φ = (θ_free, σ²),
    /// `2 H⁻¹` with H the Hessian of the (unprofiled) deviance; k×k row-major.
    pub acov: Vec<f64>,
    /// `∂ cov(β̂) / ∂φ_k`, each p×p row-major.
    pub dcov: Vec<Vec<f64>>,
}

impl VarianceSensitivity {
    /// No sensitivity (NaN throughout), for `k` variance parameters and
    /// `p` fixed effects.
    pub fn unknown(k: usize, p: usize) -> VarianceSensitivity {
        VarianceSensitivity {
            acov: vec![f64::NAN; k * k],
            dcov: vec![vec![f64::NAN; p * p]; k],
        }
    }
}

/// A fitted linear mixed model.
#[derive(Debug, Clone)]
pub struct Fit {
    /// REML or ML.
    pub method: Method,
    /// Number of rows used.
    pub n_obs: usize,
    /// Fixed-effect names.
    pub x_names: Vec<String>,
    /// Fixed effects β̂.
    pub beta: Vec<f64>,
    /// cov(β̂) = σ̂²(XᵀV⁻¹X)⁻¹ (the GLS covariance at the estimates), p×p row-major.
    pub cov_beta: Vec<f64>,
    /// Residual variance σ̂².
    pub sigma2: f64,
    /// Relative covariance parameters θ̂.
    pub theta: Vec<f64>,
    /// Random-effect covariances per grouping factor.
    pub random: Vec<RandomComponent>,
    /// BLUPs: per term, per level, its q coefficients.
    pub blups: Vec<Vec<Vec<f64>>>,
    /// Fitted values including the BLUPs (conditional), per row.
    pub fitted: Vec<f64>,
    /// Marginal fitted values Xβ̂, per row.
    pub fitted_marginal: Vec<f64>,
    /// Conditional residuals y − fitted.
    pub residuals: Vec<f64>,
    /// The maximised log-likelihood (REML or ML, matching `method`).
    pub loglik: f64,
    /// Number of estimated parameters (fixed, covariance and σ²).
    pub n_params: usize,
    /// Akaike's criterion, −2ℓ + 2k.
    pub aic: f64,
    /// Schwarz's criterion, −2ℓ + k·ln(n).
    pub bic: f64,
    /// Optimisation record.
    pub info: FitInfo,
    /// Sensitivity of cov(β̂), for Satterthwaite df.
    pub sensitivity: VarianceSensitivity,
}

impl Fit {
    /// Number of fixed effects.
    pub fn p(&self) -> usize {
        self.beta.len()
    }
    /// Standard errors of β̂.
    pub fn se(&self) -> Vec<f64> {
        let p = self.p();
        (0..p).map(|i| self.cov_beta[i * p + i].sqrt()).collect()
    }
}

/// Names of the covariance parameters θ, as `factor:row,col`.
pub(super) fn theta_names(problem: &MixedProblem) -> Vec<String> {
    let mut names = Vec::new();
    for t in &problem.terms {
        let q = t.q();
        for j in 0..q {
            for i in j..q {
                if i == j {
                    names.push(format!("{}:{}", t.factor, t.columns[i]));
                } else {
                    names.push(format!("{}:{}~{}", t.factor, t.columns[i], t.columns[j]));
                }
            }
        }
    }
    names
}

/// Fit a linear mixed model by REML or ML.
///
/// # Errors
/// [`Error::Spec`] when there are no rows or more fixed effects than rows;
/// [`Error::Numerical`] when the fixed design is rank deficient (naming the
/// first collinear column) or the criterion cannot be evaluated at the start.
pub fn fit(problem: &MixedProblem, options: FitOptions) -> Result<Fit> {
    match options.route.resolve(problem) {
        Route::Sparse => super::sparse::fit(problem, options, None),
        _ => Prepared::new(problem)?.fit(options, None),
    }
}

/// [`fit`] with `start` (a θ of this problem, from the fit of a nearby
/// model, say) among the start candidates; ignored when its length is not
/// the problem's number of covariance parameters or it is not finite.
///
/// # Errors
/// As [`fit`].
pub fn fit_from(problem: &MixedProblem, options: FitOptions, start: &[f64]) -> Result<Fit> {
    match options.route.resolve(problem) {
        Route::Sparse => super::sparse::fit(problem, options, Some(start)),
        _ => Prepared::new(problem)?.fit(options, Some(start)),
    }
}

/// [`fit`] from a nearby model's fit ([`Prepared::fit_near`]).
///
/// # Errors
/// As [`fit`].
pub fn fit_near(problem: &MixedProblem, options: FitOptions, near: &Fit) -> Result<Fit> {
    match options.route.resolve(problem) {
        Route::Sparse => super::sparse::fit(problem, options, Some(&near.theta)),
        _ => Prepared::new(problem)?.fit_near(options, near),
    }
}

/// A problem with its cross-products gathered once, for several fits of the
/// same design: by ML and by REML, or for a likelihood-ratio test and then
/// in full. The pass over the rows is the one part of a fit whose cost grows
/// with the rows (notes/criterion.md, "Warm starts and shared
/// cross-products").
pub struct Prepared<'a> {
    problem: &'a MixedProblem,
    cp: CrossProducts,
}

impl<'a> Prepared<'a> {
    /// Check the problem's shape and gather its cross-products.
    ///
    /// # Errors
    /// [`Error::Spec`] when there are no more rows than fixed effects, or the
    /// terms beside the largest one would make the dense part too large.
    pub fn new(problem: &'a MixedProblem) -> Result<Prepared<'a>> {
        let (n, p) = (problem.n(), problem.p());
        if n <= p {
            return Err(Error::Spec {
                parameter: "model".into(),
                message: format!("{n} usable rows for {p} fixed effects; simplify the model or supply more data"),
            });
        }
        check_dense_order(problem)?;
        Ok(Prepared {
            problem,
            cp: CrossProducts::new(problem),
        })
    }

    /// Fit the problem, with `start` among the start candidates as in
    /// [`fit_from`].
    ///
    /// # Errors
    /// As [`fit`].
    pub fn fit(&self, options: FitOptions, start: Option<&[f64]>) -> Result<Fit> {
        // The search runs on a worker of the thread pool, so that each
        // parallel evaluation splits its levels with the other worker
        // directly instead of being handed over from the main thread
        // (measured: about 4% of a 3,000-participant run).
        rayon::scope(|_| fit_on_worker(self.problem, &self.cp, options, start, None))
    }

    /// Fit the problem from a nearby model's fit: its θ is the start and its
    /// search's last inverse Hessian the first one (notes/criterion.md,
    /// "Warm starts and shared cross-products"); both are ignored when the
    /// models' covariance parameters differ in number.
    ///
    /// # Errors
    /// As [`fit`].
    pub fn fit_near(&self, options: FitOptions, near: &Fit) -> Result<Fit> {
        let inverse = near.info.inverse_hessian.as_deref();
        rayon::scope(|_| fit_on_worker(self.problem, &self.cp, options, Some(&near.theta), inverse))
    }
}

/// The largest dense part braid builds: 4,000 × 4,000 doubles are 128 MB a
/// copy, and an evaluation holds a few copies.
pub const DENSE_LIMIT: usize = 4_000;

/// Refuse, before any memory is taken, a model whose terms beside the
/// primary one would make the dense part larger than [`DENSE_LIMIT`] (two
/// large crossed factors).
fn check_dense_order(problem: &MixedProblem) -> Result<()> {
    let (m, terms) = super::crossprod::dense_order(problem);
    if m <= DENSE_LIMIT {
        return Ok(());
    }
    let named: Vec<String> = terms
        .iter()
        .map(|(f, k)| format!("'{f}' ({} columns)", crate::stats::thousands(*k)))
        .collect();
    Err(Error::Spec {
        parameter: "random".into(),
        message: format!(
            "the random terms beside the largest one, {}, would make a dense block of order {} (about {:.1} GB a copy), above the blocked route's limit of {}; a single fit takes the sparse route for such models, but this analysis needs the blocked one: group the smaller factor's levels, or fit it as a fixed effect",
            named.join(", "),
            crate::stats::thousands(m),
            (m * m * 8) as f64 / 1e9,
            crate::stats::thousands(DENSE_LIMIT)
        ),
    })
}

/// The fixed design must have full rank: checked at θ = 0 (ordinary least squares).
fn check_fixed_rank(problem: &MixedProblem, cp: &CrossProducts) -> Result<()> {
    let p = problem.p();
    let zero = vec![0.0; problem.n_theta()];
    if let Err(criterion::EvalFailure::NotPositiveDefinite { pivot }) = criterion::evaluate(cp, &zero, false) {
        let q2 = cp.q2_total;
        let message = if pivot >= q2 && pivot < q2 + p {
            format!(
                "fixed-effect column '{}' is a linear combination of the columns before it (constant or collinear); drop it or recode",
                problem.x_names[pivot - q2]
            )
        } else if pivot == cp.m - 1 {
            "the outcome is fitted exactly by the fixed effects; check that the outcome is not a copy of a covariate"
                .to_string()
        } else {
            format!("the design is singular at dense pivot {pivot}")
        };
        return Err(Error::Numerical {
            step: "fixed-effect design".into(),
            message,
        });
    }

    Ok(())
}

/// The best of three scalings of the scale-aware start and, when the design
/// allows it, a moment estimate (`moment`, asked for only without a given
/// start), each projected onto the estimated entries.
pub(super) fn best_start(
    sub: &Subspace,
    base: &[f64],
    given: Option<&[f64]>,
    moment: impl FnOnce() -> Option<Vec<f64>>,
    dev: &dyn Fn(&[f64]) -> f64,
) -> Result<Vec<f64>> {
    let mut start = base.to_vec();
    let mut best = f64::INFINITY;
    let given = given.filter(|g| g.len() == base.len() && g.iter().all(|v| v.is_finite()));
    // A given start (a nearby model's optimum) is tried first; the generic
    // candidates are evaluated only without one.
    let mut candidates: Vec<Vec<f64>> = match given {
        Some(g) => vec![sub.project(g)],
        None => [0.2, 1.0, 3.0]
            .iter()
            .map(|s| base.iter().map(|v| v * s).collect())
            .collect(),
    };
    if given.is_none()
        && let Some(m) = moment()
    {
        candidates.push(sub.project(&m));
    }
    for cand in candidates {
        let d = dev(&cand);
        if d < best {
            best = d;
            start = cand;
        }
    }
    if !best.is_finite() {
        return Err(Error::Numerical {
            step: "start values".into(),
            message: "the criterion cannot be evaluated at the start values; check the data for extreme values".into(),
        });
    }
    Ok(start)
}

/// The search's coordinates: the estimated entries of θ (a diagonal
/// structure holds the others at zero), each divided by a scale (a diagonal
/// entry's start value, shared by the off-diagonal entries of its row), so
/// that all coordinates are of order one whatever the units of the slope
/// variables.
pub(super) struct SearchSpace {
    sub: Subspace,
    /// The scale of each estimated entry.
    pub(super) scale: Vec<f64>,
}

impl SearchSpace {
    /// The space of `problem`'s θ with per-entry scales `theta_scale`.
    pub(super) fn new(problem: &MixedProblem, theta_scale: &[f64]) -> SearchSpace {
        let sub = Subspace::of(problem);
        let scale = sub.reduce(theta_scale);
        SearchSpace { sub, scale }
    }
    /// The full θ at search point `x`.
    pub(super) fn theta(&self, x: &[f64]) -> Vec<f64> {
        let th: Vec<f64> = x.iter().zip(&self.scale).map(|(a, s)| a * s).collect();
        self.sub.expand(&th)
    }
    /// The search point of a full θ (its fixed entries dropped).
    pub(super) fn point(&self, theta: &[f64]) -> Vec<f64> {
        self.sub
            .reduce(theta)
            .iter()
            .zip(&self.scale)
            .map(|(a, s)| a / s)
            .collect()
    }
    /// A full-θ vector (bounds, say) restricted to the estimated entries.
    pub(super) fn reduce(&self, v: &[f64]) -> Vec<f64> {
        self.sub.reduce(v)
    }
    /// A gradient in θ as a gradient in the search's coordinates.
    pub(super) fn gradient(&self, g: &[f64]) -> Vec<f64> {
        self.sub.reduce(g).iter().zip(&self.scale).map(|(a, s)| a * s).collect()
    }
    /// Positions among the estimated entries as indices of θ.
    pub(super) fn full_indices(&self, positions: &[usize]) -> Vec<usize> {
        self.sub.full_indices(positions)
    }
    /// The number of coordinates.
    pub(super) fn dim(&self) -> usize {
        self.sub.dim()
    }
}

/// The covariance parameters at their bound, by name, and the estimated
/// entries of θ that are free (not at their bound).
pub(super) fn boundary_and_free(problem: &MixedProblem, theta: &[f64]) -> (Vec<String>, Vec<usize>) {
    let lower = problem.theta_lower();
    let estimated = problem.estimated();
    let names = theta_names(problem);
    let (at_bound, free): (Vec<usize>, Vec<usize>) = estimated.iter().partition(|&&i| theta[i] <= lower[i]);
    (at_bound.iter().map(|&i| names[i].clone()).collect(), free)
}

/// The estimates of a fit, as a route computed them.
pub(super) struct Estimates {
    pub(super) theta: Vec<f64>,
    pub(super) beta: Vec<f64>,
    pub(super) cov_beta: Vec<f64>,
    pub(super) sigma2: f64,
    /// The profiled deviance at the optimum.
    pub(super) deviance: f64,
    pub(super) random: Vec<RandomComponent>,
    /// BLUPs, conditional and marginal fitted values.
    pub(super) conditional: (Vec<Vec<Vec<f64>>>, Vec<f64>, Vec<f64>),
    pub(super) sensitivity: VarianceSensitivity,
}

/// How the search went, as a route recorded it.
pub(super) struct Record {
    pub(super) polished: optimize::Polished,
    pub(super) iterations: usize,
    pub(super) evaluations: usize,
    pub(super) restarts: usize,
    pub(super) min_curvature: Option<f64>,
    pub(super) boundary: Vec<String>,
    pub(super) inverse_hessian: Option<Vec<f64>>,
    pub(super) route: Route,
}

/// The fit from a route's estimates and record: residuals, the verdict,
/// the count of parameters and the criteria.
pub(super) fn assemble(problem: &MixedProblem, method: Method, est: Estimates, record: Record) -> Fit {
    let n = problem.n();
    let (blups, fitted, fitted_marginal) = est.conditional;
    let residuals: Vec<f64> = problem.y.iter().zip(&fitted).map(|(y, f)| y - f).collect();
    let polished = record.polished;
    let (converged, messages) = verdict(
        polished.decrement,
        polished.gradient_norm,
        record.min_curvature,
        &record.boundary,
    );
    let n_params = problem.p() + problem.estimated().len() + 1;
    let deviance = est.deviance;
    Fit {
        method,
        n_obs: n,
        x_names: problem.x_names.clone(),
        beta: est.beta,
        cov_beta: est.cov_beta,
        sigma2: est.sigma2,
        theta: est.theta,
        random: est.random,
        blups,
        fitted,
        fitted_marginal,
        residuals,
        loglik: -deviance / 2.0,
        n_params,
        aic: deviance + 2.0 * n_params as f64,
        bic: deviance + n_params as f64 * (n as f64).ln(),
        info: FitInfo {
            iterations: record.iterations,
            evaluations: record.evaluations,
            gradient_norm: polished.gradient_norm,
            newton_decrement: polished.decrement,
            min_curvature: record.min_curvature,
            converged,
            boundary: record.boundary,
            restarts: record.restarts,
            messages,
            inverse_hessian: record.inverse_hessian,
            route: record.route,
        },
        sensitivity: est.sensitivity,
    }
}

/// Whether the fit converged, and the messages for the reader.
pub(super) fn verdict(
    decrement: Option<f64>,
    gradient_norm: f64,
    min_curvature: Option<f64>,
    boundary: &[String],
) -> (bool, Vec<String>) {
    let mut messages = Vec::new();
    let curvature_ok = min_curvature.is_none_or(|c| c > 0.0);
    let decrement_ok = decrement.is_some_and(|d| d < NEWTON_DECREMENT_TOLERANCE);
    let converged = decrement_ok && curvature_ok;
    if !converged {
        messages.push(format!(
            "the optimiser did not reach a clear minimum (gradient {:.2e}{}); simplify the random part or rescale covariates",
            gradient_norm,
            min_curvature.map(|c| format!(", smallest curvature {c:.2e}")).unwrap_or_default()
        ));
    }
    for name in boundary {
        messages.push(format!(
            "covariance parameter {name} is at its boundary (a variance of zero or a correlation of ±1); \
             the data carry no evidence of that variation: consider dropping the coefficient"
        ));
    }
    (converged, messages)
}

fn fit_on_worker(
    problem: &MixedProblem,
    cp: &CrossProducts,
    options: FitOptions,
    given: Option<&[f64]>,
    given_inverse: Option<&[f64]>,
) -> Result<Fit> {
    check_fixed_rank(problem, cp)?;
    let searched = search_optimum(problem, cp, options, given, given_inverse)?;
    results_at(problem, cp, options, searched)
}

/// Where the search ended, with what the results at the optimum need of it.
struct Searched {
    theta: Vec<f64>,
    polished: optimize::Polished,
    iterations: usize,
    evaluations: usize,
    restarts: usize,
    /// The last quasi-Newton inverse Hessian, over the estimated entries of θ.
    inverse_hessian: Option<Vec<f64>>,
    /// The Newton finish's last stencil.
    stencil: Option<Stencil>,
    theta_scale: Vec<f64>,
}

/// Whether a fit stops its quasi-Newton search on the decrement and skips
/// the Newton finish: a likelihood-only fit with an analytic gradient
/// (notes/criterion.md, "Likelihood-only fits").
fn is_lean(cp: &CrossProducts, options: FitOptions) -> bool {
    !options.detail.inference() && criterion::has_gradient(cp)
}

/// `h` (d×d, row-major) with entry (i, j) multiplied by `(sᵢ sⱼ)^power`:
/// an inverse Hessian between θ's coordinates (power 1) and the search's
/// x = θ / s (power −1).
fn rescaled(h: &[f64], s: &[f64], power: i32) -> Vec<f64> {
    let d = s.len();
    (0..d * d).map(|k| h[k] * (s[k / d] * s[k % d]).powi(power)).collect()
}

fn search_optimum(
    problem: &MixedProblem,
    cp: &CrossProducts,
    options: FitOptions,
    given: Option<&[f64]>,
    given_inverse: Option<&[f64]>,
) -> Result<Searched> {
    let method = options.method;
    let dev = |th: &[f64]| criterion::deviance(cp, th, method);
    let base = base_start(problem);
    let start = best_start(
        &Subspace::of(problem),
        &base,
        given,
        || moment_start(problem, cp, &base),
        &dev,
    )?;
    let theta_scale = row_scales(problem, &base);
    let space = SearchSpace::new(problem, &theta_scale);
    let lower = space.reduce(&problem.theta_lower());
    let sdev = |x: &[f64]| dev(&space.theta(x));
    let start_x = space.point(&start);
    let unit = space.point(&base);
    // The analytic gradient in the scaled coordinates, when the model has one.
    // The last evaluation is kept with its θ: the finish's stencil is
    // centred where the search ended, and takes it rather than repeating it.
    let last_gradient: RefCell<Option<(Vec<f64>, criterion::GradientEval)>> = RefCell::new(None);
    let sgrad = |x: &[f64]| -> Option<(f64, Vec<f64>)> {
        let th = space.theta(x);
        let eval = criterion::gradient_eval(cp, &th, method)?;
        let out = (eval.deviance, space.gradient(&eval.grad));
        *last_gradient.borrow_mut() = Some((th, eval));
        Some(out)
    };
    let grad: optimize::Gradient = if criterion::has_gradient(cp) {
        Some(&sgrad)
    } else {
        None
    };
    // The Newton finish's Hessian comes from the same stencil of analytic
    // gradients that Satterthwaite's derivatives need; the last one is kept,
    // and reused when the finish ends next to where it was taken.
    let last_stencil: RefCell<Option<Stencil>> = RefCell::new(None);
    let shess = |x: &[f64], free: &[usize]| -> Option<(Vec<f64>, Vec<f64>, usize)> {
        let th = space.theta(x);
        let free = space.full_indices(free);
        let h = stencil_steps(&th, &theta_scale, &free);
        let mut evals = 0;
        let centre = last_gradient
            .borrow_mut()
            .take()
            .filter(|(at, _)| *at == th)
            .map(|(_, e)| e);
        let st = Stencil::new(cp, &th, &free, &h, method, &mut evals, centre)?;
        let (g, h) = st.scaled_gradient_hessian(&theta_scale);
        *last_stencil.borrow_mut() = Some(st);
        Some((g, h, evals))
    };
    let lean = is_lean(cp, options);
    let hess_at: optimize::HessianAt = if criterion::has_gradient(cp) && !lean {
        Some(&shess)
    } else {
        None
    };
    let optim = if lean {
        OptimOptions {
            decrement_tolerance: Some(NEWTON_DECREMENT_TOLERANCE),
            ..options.optim
        }
    } else {
        options.optim
    };
    // A nearby model's inverse Hessian, when the search starts from that
    // model's optimum.
    let d = space.dim();
    let first_inverse: Option<Vec<f64>> = given_inverse
        .filter(|h| h.len() == d * d && given.is_some_and(|g| g == start.as_slice()))
        .map(|h| rescaled(h, &space.scale, -1));
    let (current, (iterations, evaluations, restarts)) = search(
        &sdev,
        grad,
        hess_at,
        &start_x,
        first_inverse.as_deref(),
        &lower,
        &unit,
        optim,
    );
    Ok(Searched {
        theta: space.theta(&current.theta),
        polished: current.polished,
        // The start's candidates cost up to four evaluations.
        iterations,
        evaluations: evaluations + 4,
        restarts,
        inverse_hessian: current.inverse_hessian.map(|h| rescaled(&h, &space.scale, 1)),
        stencil: last_stencil.take(),
        theta_scale,
    })
}

/// The estimates, their covariance and sensitivity, and the fit's record at
/// the optimum the search found.
fn results_at(problem: &MixedProblem, cp: &CrossProducts, options: FitOptions, searched: Searched) -> Result<Fit> {
    let (n, p) = (problem.n(), problem.p());
    let method = options.method;
    let (per_row, inference) = (options.detail.per_row(), options.detail.inference());
    let Searched {
        theta,
        polished,
        iterations,
        mut evaluations,
        restarts,
        inverse_hessian,
        stencil,
        theta_scale,
    } = searched;
    let factor = criterion::evaluate(cp, &theta, false).map_err(|_| Error::Numerical {
        step: "final evaluation".into(),
        message: "the criterion failed at the optimum; please report this with the data shape".into(),
    })?;
    let pieces = factor.pieces;
    let sigma2 = pieces.sigma2(method, n, p);
    let (boundary, free) = boundary_and_free(problem, &theta);

    let t = criterion::factors(cp, &theta);
    let (beta, u) = solve_pls(cp, &factor, per_row.then_some(t.as_slice()));
    let cov_beta = fixed_cov(&factor, cp.q2_total, p, sigma2);
    let conditional = values_per_row(problem, options.detail, &t, &beta, || u);
    let random = components(problem, cp, &theta, sigma2);

    // The likelihood alone takes its curvature from the finish's last
    // stencil, taken next to the optimum, rather than a new one.
    let kept = stencil.filter(|st| !inference || st.serves(&theta, &free));
    let (sensitivity, min_curvature) = if is_lean(cp, options) {
        ((VarianceSensitivity::unknown(free.len() + 1, p), 0), None)
    } else {
        sensitivity(cp, &theta, &theta_scale, &free, method, sigma2, kept)
    };
    evaluations += sensitivity.1;
    let sensitivity = if inference {
        sensitivity.0
    } else {
        VarianceSensitivity::unknown(free.len() + 1, p)
    };
    let estimates = Estimates {
        theta,
        beta,
        cov_beta,
        sigma2,
        deviance: pieces.profiled_deviance(method, n, p),
        random,
        conditional,
        sensitivity,
    };
    let record = Record {
        polished,
        iterations,
        evaluations,
        restarts,
        min_curvature,
        boundary,
        inverse_hessian,
        route: Route::Blocked,
    };
    Ok(assemble(problem, method, estimates, record))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::lmm::RandomTermData;

    // Two large crossed factors (pupils crossed with 4,500 raters) are
    // refused by the blocked route before any memory is taken, naming the
    // factor and the limit; left to choose, the fit takes the sparse route.
    #[test]
    fn two_large_crossed_factors_take_the_sparse_route() {
        let n = 9_000;
        let term = |factor: &str, k: usize| {
            let level = (0..n).map(|r| (r % k) as u32).collect();
            RandomTermData::numbered(factor, k, level, &["intercept"], vec![vec![1.0; n]])
        };
        let problem = MixedProblem {
            y: (0..n).map(|r| (r % 7) as f64).collect(),
            x_names: vec!["intercept".into()],
            x: vec![1.0; n].into(),
            terms: vec![term("pupil", 6_000), term("rater", 4_500)],
        };
        let blocked = FitOptions {
            route: Route::Blocked,
            ..Default::default()
        };
        let e = fit(&problem, blocked).unwrap_err().to_string();
        assert!(
            e.contains("'rater' (4,500 columns)") && e.contains("limit of 4,000"),
            "{e}"
        );
        let f = fit(&problem, FitOptions::default()).unwrap();
        assert_eq!(f.info.route, Route::Sparse);
        assert_eq!(f.random.len(), 2);
    }
}

#[cfg(test)]
mod near_tests {
    use super::*;
    use crate::lmm::RandomTermData;
    use crate::simulate::Rng;

    /// Two searches of one criterion agree this closely in log-likelihood
    /// (the Newton finish certifies a decrement below 1e-6; the value at
    /// such points differs far less) and, relatively, in θ.
    const LOGLIK_AGREEMENT: f64 = 1e-8;
    const THETA_AGREEMENT: f64 = 1e-5;

    /// Participants with a random intercept and age slope, `waves` rows
    /// each from a baseline age between 8 and 12 (centred at 10).
    fn growth_problem(levels: usize, waves: usize, seed: u64) -> MixedProblem {
        let n = levels * waves;
        let mut rng = Rng::new(seed);
        let mut age = Vec::with_capacity(n);
        let mut y = Vec::with_capacity(n);
        for _ in 0..levels {
            let (b0, b1) = (rng.normal(), 0.3 * rng.normal());
            let a0 = 8.0 + 4.0 * rng.uniform();
            for w in 0..waves {
                let a = a0 + w as f64 - 10.0;
                age.push(a);
                y.push(2.0 + 0.5 * a + b0 + b1 * a + 0.7 * rng.normal());
            }
        }
        MixedProblem {
            y: y.into(),
            x_names: vec!["intercept".into(), "age".into()],
            x: age.iter().flat_map(|&a| [1.0, a]).collect(),
            terms: vec![RandomTermData::numbered(
                "id",
                levels,
                (0..n).map(|r| (r / waves) as u32).collect(),
                &["intercept", "age"],
                vec![vec![1.0; n], age],
            )],
        }
    }

    // A REML fit started from the same design's ML fit (its θ and its last
    // inverse Hessian) reaches the cold REML fit's optimum, in fewer
    // evaluations; the cross-products are gathered once for both.
    #[test]
    fn a_fit_started_near_reaches_the_cold_optimum() {
        let problem = growth_problem(300, 4, 11);
        let prepared = Prepared::new(&problem).unwrap();
        let ml = prepared
            .fit(
                FitOptions {
                    method: Method::Ml,
                    ..Default::default()
                },
                None,
            )
            .unwrap();
        assert!(ml.info.inverse_hessian.is_some());
        let near = prepared.fit_near(FitOptions::default(), &ml).unwrap();
        let cold = fit(&problem, FitOptions::default()).unwrap();
        assert!(near.info.converged && cold.info.converged);
        assert!(
            (near.loglik - cold.loglik).abs() < LOGLIK_AGREEMENT,
            "{} vs {}",
            near.loglik,
            cold.loglik
        );
        for (a, b) in near.theta.iter().zip(&cold.theta) {
            assert!(
                (a - b).abs() < THETA_AGREEMENT * (1.0 + b.abs()),
                "θ {:?} vs {:?}",
                near.theta,
                cold.theta
            );
        }
        assert!(
            near.info.evaluations < cold.info.evaluations,
            "{} vs {} evaluations",
            near.info.evaluations,
            cold.info.evaluations
        );
    }

    // Detail::Estimates runs the same search and inference as Detail::Full
    // and leaves out only the values per row and per level (closed-form
    // identity: the same arithmetic, so equal numbers).
    #[test]
    fn estimates_detail_drops_only_the_values_per_row() {
        let (levels, waves) = (200, 3);
        let problem = growth_problem(levels, waves, 12);
        let n = levels * waves;
        let full = fit(&problem, FitOptions::default()).unwrap();
        let lean = fit(&problem, FitOptions::estimates()).unwrap();
        assert_eq!(full.loglik, lean.loglik);
        assert_eq!(full.theta, lean.theta);
        assert_eq!(full.beta, lean.beta);
        assert_eq!(full.cov_beta, lean.cov_beta);
        assert_eq!(full.sensitivity.dcov, lean.sensitivity.dcov);
        assert_eq!(full.sensitivity.acov, lean.sensitivity.acov);
        assert_eq!(full.fitted.len(), n);
        assert_eq!(full.blups[0].len(), levels);
        assert!(lean.fitted.is_empty() && lean.residuals.is_empty() && lean.fitted_marginal.is_empty());
        assert!(lean.blups.iter().all(Vec::is_empty));
    }
}
