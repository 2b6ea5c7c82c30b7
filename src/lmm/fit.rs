//! The fit: start values, optimisation with restarts, and post-fit quantities.
//!
//! Start values are scale-aware: each random coefficient starts with a
//! relative SD proportional to `1/rms(z)`, so a slope on age in years starts
//! near its plausible size rather than at the identity; the best of three
//! scalings of that start is taken. When the optimum lies on the boundary the
//! fit is restarted from the interior and the better optimum kept.

use faer::Mat;
use serde::Serialize;
use std::cell::RefCell;

use super::criterion::{self, Factor};
use super::crossprod::CrossProducts;
use super::optimize::{self, OptimOptions};
use super::{Method, MixedProblem};
use crate::error::{Error, Result};

/// Settings of a fit.
#[derive(Debug, Clone, Copy, Default)]
pub struct FitOptions {
    /// REML (default) or ML.
    pub method: Method,
    /// Optimiser settings.
    pub optim: OptimOptions,
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
    /// Correlation matrix (NaN where an SD is zero).
    pub correlation: Vec<Vec<f64>>,
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
    pub converged: bool,
    /// Covariance parameters at the boundary, named as `factor:coefficient`.
    pub boundary: Vec<String>,
    /// Number of restarts made.
    pub restarts: usize,
    /// Advice and warnings for the user.
    pub messages: Vec<String>,
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
fn theta_names(problem: &MixedProblem) -> Vec<String> {
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

/// Scale-aware start: diagonal factor with entries `0.5/(√q · rms(z))`.
pub(super) fn base_start(problem: &MixedProblem) -> Vec<f64> {
    let mut theta = Vec::with_capacity(problem.n_theta());
    for t in &problem.terms {
        let q = t.q();
        for j in 0..q {
            for i in j..q {
                if i == j {
                    let z = &t.z[i];
                    let rms = (z.iter().map(|v| v * v).sum::<f64>() / z.len().max(1) as f64).sqrt();
                    let rms = if rms > 0.0 { rms } else { 1.0 };
                    theta.push(0.5 / ((q as f64).sqrt() * rms));
                } else {
                    theta.push(0.0);
                }
            }
        }
    }
    theta
}

/// The search scale of each θ entry: the start value of its row's diagonal.
pub(super) fn row_scales(problem: &MixedProblem, base: &[f64]) -> Vec<f64> {
    let mut scales = Vec::with_capacity(base.len());
    let mut offset = 0;
    for t in &problem.terms {
        let q = t.q();
        // Position of diagonal (i, i) in the column-major lower triangle.
        let diag_pos = |i: usize| (0..i).map(|j| q - j).sum::<usize>();
        for j in 0..q {
            for i in j..q {
                scales.push(base[offset + diag_pos(i)].max(1e-12));
            }
        }
        offset += q * (q + 1) / 2;
    }
    scales
}

/// Moment start for the primary term (Swamy-type): per-level least-squares
/// coefficients b̂ᵢ of the OLS residuals on the term's columns, whose
/// covariance, less the average sampling covariance σ̂²·(ZᵢᵀZᵢ)⁻¹, estimates
/// the random-effect covariance. Other terms keep their scale-aware start.
/// `None` when too few levels have more rows than coefficients.
fn moment_start(problem: &MixedProblem, cp: &CrossProducts, base: &[f64]) -> Option<Vec<f64>> {
    let k1 = cp.primary?;
    let q = cp.q1;
    let (n, p, m) = (cp.n, cp.p, cp.m);
    let q2 = cp.q2_total;
    // OLS on the (shifted) response from the dense cross-products.
    let xtx = Mat::from_fn(p, p, |i, j| cp.dense[(q2 + i) * m + q2 + j]);
    let llt = xtx.llt(faer::Side::Lower).ok()?;
    let mut rhs = Mat::from_fn(p, 1, |i, _| cp.dense[(q2 + i) * m + m - 1]);
    use faer::linalg::solvers::SolveCore;
    llt.solve_in_place_with_conj(faer::Conj::No, rhs.as_mut());
    let beta: Vec<f64> = (0..p).map(|i| rhs[(i, 0)]).collect();
    let term = &problem.terms[k1];
    let levels = term.n_levels();
    let mut zte = vec![0.0; levels * q];
    let mut ete = vec![0.0; levels];
    let mut count = vec![0usize; levels];
    for r in 0..n {
        let xb: f64 = problem.x[r * p..(r + 1) * p]
            .iter()
            .zip(&beta)
            .map(|(a, b)| a * b)
            .sum();
        let e = problem.y[r] - cp.y_shift - xb;
        let l = term.level[r] as usize;
        for c in 0..q {
            zte[l * q + c] += term.z[c][r] * e;
        }
        ete[l] += e * e;
        count[l] += 1;
    }
    let mut sum_bb = vec![0.0; q * q];
    let mut sum_ginv = vec![0.0; q * q];
    let (mut rss, mut df, mut used) = (0.0, 0usize, 0usize);
    let mut ginv = vec![0.0; q * q];
    let mut work = vec![0.0; q * q];
    let mut b = vec![0.0; q];
    for l in 0..levels {
        if count[l] <= q || !spd_inverse(&cp.g[l * q * q..(l + 1) * q * q], q, &mut ginv, &mut work) {
            continue;
        }
        for a in 0..q {
            b[a] = (0..q).map(|c| ginv[a * q + c] * zte[l * q + c]).sum();
        }
        rss += ete[l] - (0..q).map(|a| b[a] * zte[l * q + a]).sum::<f64>();
        df += count[l] - q;
        used += 1;
        for a in 0..q {
            for c in 0..q {
                sum_bb[a * q + c] += b[a] * b[c];
                sum_ginv[a * q + c] += ginv[a * q + c];
            }
        }
    }
    if used < 10 || df == 0 {
        return None;
    }
    let sigma2 = (rss / df as f64).max(f64::MIN_POSITIVE);
    let mut cov = Mat::from_fn(q, q, |a, c| {
        (sum_bb[a * q + c] - sigma2 * sum_ginv[a * q + c]) / used as f64 / sigma2
    });
    // Keep the estimate positive definite: floor the diagonal, then shrink
    // the off-diagonal part until the Cholesky factor exists.
    let floor: Vec<f64> = (0..q)
        .map(|a| (0.01 * sum_bb[a * q + a] / used as f64 / sigma2).max(1e-8))
        .collect();
    for a in 0..q {
        cov[(a, a)] = cov[(a, a)].max(floor[a]);
    }
    let mut factor = None;
    for _ in 0..20 {
        if let Ok(l) = cov.llt(faer::Side::Lower) {
            factor = Some(l.L().to_owned());
            break;
        }
        for a in 0..q {
            for c in 0..q {
                if a != c {
                    cov[(a, c)] *= 0.5;
                }
            }
        }
    }
    let factor = factor?;
    let mut start = base.to_vec();
    let off = cp.theta_offset[k1];
    let mut k = 0;
    for j in 0..q {
        for i in j..q {
            start[off + k] = factor[(i, j)];
            k += 1;
        }
    }
    Some(start)
}

/// The inverse of a small symmetric positive definite q×q matrix (row-major)
/// into `out`, through its Cholesky factor in `work`; `false` when it is not
/// positive definite. No allocation: the moment start calls it per level.
fn spd_inverse(g: &[f64], q: usize, out: &mut [f64], work: &mut [f64]) -> bool {
    let l = work;
    if !optimize::small_cholesky(g, q, l) {
        return false;
    }
    // Column c of the inverse solves L Lᵀ x = e_c.
    for c in 0..q {
        for i in 0..q {
            let mut v = if i == c { 1.0 } else { 0.0 };
            for k in 0..i {
                v -= l[i * q + k] * out[k * q + c];
            }
            out[i * q + c] = v / l[i * q + i];
        }
        for i in (0..q).rev() {
            let mut v = out[i * q + c];
            for k in i + 1..q {
                v -= l[k * q + i] * out[k * q + c];
            }
            out[i * q + c] = v / l[i * q + i];
        }
    }
    true
}

/// Fit a linear mixed model by REML or ML.
///
/// # Errors
/// [`Error::Spec`] when there are no rows or more fixed effects than rows;
/// [`Error::Numerical`] when the fixed design is rank deficient (naming the
/// first collinear column) or the criterion cannot be evaluated at the start.
pub fn fit(problem: &MixedProblem, options: FitOptions) -> Result<Fit> {
    // The search runs on a worker of the thread pool, so that each parallel
    // evaluation splits its levels with the other worker directly instead of
    // being handed over from the main thread (measured: about 4% of a
    // 3,000-participant run).
    rayon::scope(|_| fit_on_worker(problem, options))
}

fn fit_on_worker(problem: &MixedProblem, options: FitOptions) -> Result<Fit> {
    let n = problem.n();
    let p = problem.p();
    if n <= p {
        return Err(Error::Spec {
            parameter: "model".into(),
            message: format!("{n} usable rows for {p} fixed effects; simplify the model or supply more data"),
        });
    }
    let method = options.method;
    let cp = CrossProducts::new(problem);
    let lower = problem.theta_lower();
    let names = theta_names(problem);
    let dev = |th: &[f64]| criterion::deviance(&cp, th, method);

    // Rank of the fixed design, checked at θ = 0 (ordinary least squares).
    let zero = vec![0.0; problem.n_theta()];
    if let Err(criterion::EvalFailure::NotPositiveDefinite { pivot }) = criterion::evaluate(&cp, &zero, false) {
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

    // Start from the best of three scalings of the scale-aware start and,
    // when the design allows it, a moment estimate for the primary term.
    let base = base_start(problem);
    let mut start = base.clone();
    let mut best = f64::INFINITY;
    let mut candidates: Vec<Vec<f64>> = [0.2, 1.0, 3.0]
        .iter()
        .map(|s| base.iter().map(|v| v * s).collect())
        .collect();
    if let Some(m) = moment_start(problem, &cp, &base) {
        candidates.push(m);
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
    // The search runs on θ divided by a scale per entry (a diagonal entry's
    // start value, shared by the off-diagonal entries of its row), so that all
    // coordinates are of order one whatever the units of the slope variables.
    let theta_scale = row_scales(problem, &base);
    let sdev = |x: &[f64]| {
        let th: Vec<f64> = x.iter().zip(&theta_scale).map(|(a, s)| a * s).collect();
        dev(&th)
    };
    let start_x: Vec<f64> = start.iter().zip(&theta_scale).map(|(a, s)| a / s).collect();
    let unit: Vec<f64> = base.iter().zip(&theta_scale).map(|(a, s)| a / s).collect();
    let mut evaluations = 4;
    let mut iterations = 0;
    // The analytic gradient in the scaled coordinates, when the model has one.
    let sgrad = |x: &[f64]| -> Option<(f64, Vec<f64>)> {
        let th: Vec<f64> = x.iter().zip(&theta_scale).map(|(a, s)| a * s).collect();
        criterion::deviance_gradient(&cp, &th, method)
            .map(|(d, g)| (d, g.iter().zip(&theta_scale).map(|(a, s)| a * s).collect()))
    };
    let grad: optimize::Gradient = if criterion::has_gradient(&cp) {
        Some(&sgrad)
    } else {
        None
    };
    // The Newton finish's Hessian comes from the same stencil of analytic
    // gradients that Satterthwaite's derivatives need; the last one is kept,
    // and reused below when the finish ends next to where it was taken.
    let last_stencil: RefCell<Option<Stencil>> = RefCell::new(None);
    let shess = |x: &[f64], free: &[usize]| -> Option<(Vec<f64>, Vec<f64>)> {
        let th: Vec<f64> = x.iter().zip(&theta_scale).map(|(a, s)| a * s).collect();
        let h = stencil_steps(&th, &theta_scale, free);
        let mut evals = 0;
        let st = Stencil::new(&cp, &th, free, &h, method, &mut evals)?;
        let out = st.scaled_gradient_hessian(&theta_scale);
        *last_stencil.borrow_mut() = Some(st);
        Some(out)
    };
    let hess_at: optimize::HessianAt = if criterion::has_gradient(&cp) {
        Some(&shess)
    } else {
        None
    };
    let (current, searched) = search(&sdev, grad, hess_at, &start_x, &lower, &unit, options.optim);
    iterations += searched.0;
    evaluations += searched.1;
    let restarts = searched.2;
    let theta: Vec<f64> = current.theta.iter().zip(&theta_scale).map(|(x, s)| x * s).collect();
    let polished = current.polished;
    let factor = criterion::evaluate(&cp, &theta, true).map_err(|_| Error::Numerical {
        step: "final evaluation".into(),
        message: "the criterion failed at the optimum; please report this with the data shape".into(),
    })?;
    let pieces = factor.pieces;
    let sigma2 = pieces.sigma2(method, n, p);
    let deviance = pieces.profiled_deviance(method, n, p);

    let boundary_idx: Vec<usize> = (0..theta.len()).filter(|&i| theta[i] <= lower[i]).collect();
    let free: Vec<usize> = (0..theta.len()).filter(|i| !boundary_idx.contains(i)).collect();
    let boundary: Vec<String> = boundary_idx.iter().map(|&i| names[i].clone()).collect();

    let (beta, u) = solve_pls(&cp, &factor);
    let cov_beta = fixed_cov(&factor, cp.q2_total, p, sigma2);
    let (blups, fitted, fitted_marginal) = conditional(problem, &cp, &theta, &beta, &u);
    let residuals: Vec<f64> = problem.y.iter().zip(&fitted).map(|(y, f)| y - f).collect();
    let random = components(problem, &cp, &theta, sigma2);

    let kept = last_stencil.take().filter(|st| st.serves(&theta, &free));
    let (sensitivity, curvature) = sensitivity(&cp, &theta, &theta_scale, &free, method, sigma2, kept);
    evaluations += sensitivity.1;
    let min_curvature = curvature;
    let mut messages = Vec::new();
    let curvature_ok = min_curvature.is_none_or(|c| c > 0.0);
    let decrement_ok = polished.decrement.is_some_and(|d| d < NEWTON_DECREMENT_TOLERANCE);
    let converged = decrement_ok && curvature_ok;
    if !converged {
        messages.push(format!(
            "the optimiser did not reach a clear minimum (gradient {:.2e}{}); simplify the random part or rescale covariates",
            polished.gradient_norm,
            min_curvature.map(|c| format!(", smallest curvature {c:.2e}")).unwrap_or_default()
        ));
    }
    for name in &boundary {
        messages.push(format!(
            "covariance parameter {name} is at its boundary (a variance of zero or a correlation of ±1); \
             the data carry no evidence of that variation: consider dropping the coefficient"
        ));
    }
    let n_params = p + theta.len() + 1;
    let loglik = -deviance / 2.0;
    Ok(Fit {
        method,
        n_obs: n,
        x_names: problem.x_names.clone(),
        beta,
        cov_beta,
        sigma2,
        theta,
        random,
        blups,
        fitted,
        fitted_marginal,
        residuals,
        loglik,
        n_params,
        aic: deviance + 2.0 * n_params as f64,
        bic: deviance + n_params as f64 * (n as f64).ln(),
        info: FitInfo {
            iterations,
            evaluations,
            gradient_norm: polished.gradient_norm,
            newton_decrement: polished.decrement,
            min_curvature,
            converged,
            boundary,
            restarts,
            messages,
        },
        sensitivity: sensitivity.0,
    })
}

/// Descents from `start` (scaled coordinates) until a boundary optimum
/// survives the interior check. Returns the last accepted descent with the
/// iterations, evaluations and restarts used.
///
/// A zero diagonal entry of T is a stationary point of the criterion (it is
/// even in that entry), so a boundary optimum is only accepted when moving
/// back into the interior along each boundary coordinate does not lower the
/// deviance. Otherwise the search restarts from the best interior point found.
fn search(
    sdev: &impl Fn(&[f64]) -> f64,
    grad: optimize::Gradient,
    hess_at: optimize::HessianAt,
    start: &[f64],
    lower: &[f64],
    unit: &[f64],
    optim: OptimOptions,
) -> (Descent, (usize, usize, usize)) {
    let mut current = descend(sdev, grad, hess_at, start, lower, unit, optim);
    let mut iterations = current.iterations;
    let mut evaluations = current.evaluations;
    let mut restarts = 0;
    for _ in 0..MAX_RESTARTS {
        let mut candidate: Option<(Vec<f64>, f64)> = None;
        for i in (0..current.theta.len()).filter(|&i| current.theta[i] <= lower[i]) {
            for scale in [0.01, 0.1, 0.5, 1.0, 2.0] {
                let mut trial = current.theta.clone();
                trial[i] = scale;
                let d = sdev(&trial);
                evaluations += 1;
                if d < current.value - 1e-9 && candidate.as_ref().is_none_or(|c| d < c.1) {
                    candidate = Some((trial, d));
                }
            }
        }
        let Some((from, _)) = candidate else { break };
        let next = descend(sdev, grad, hess_at, &from, lower, unit, optim);
        iterations += next.iterations;
        evaluations += next.evaluations;
        restarts += 1;
        if next.value < current.value - 1e-10 {
            current = next;
        } else {
            break;
        }
    }
    (current, (iterations, evaluations, restarts))
}

/// One descent: quasi-Newton search, Newton finish, and snapping of
/// diagonal entries that sit a hair inside the boundary.
struct Descent {
    theta: Vec<f64>,
    value: f64,
    polished: optimize::Polished,
    iterations: usize,
    evaluations: usize,
}

fn descend(
    dev: &impl Fn(&[f64]) -> f64,
    grad: optimize::Gradient,
    hess_at: optimize::HessianAt,
    start: &[f64],
    lower: &[f64],
    base: &[f64],
    optim: OptimOptions,
) -> Descent {
    // The search stops early and hands over to the Newton finish; when the
    // finish cannot certify a minimum (the point is not yet in the region of
    // positive curvature), the search resumes with a tighter tolerance.
    let mut evaluations = 0;
    let mut iterations = 0;
    let mut x = start.to_vec();
    let mut polished = None;
    // With an exact gradient a search iteration is cheap and converges
    // superlinearly, so the search goes on until the finish needs only its
    // certifying stencil (which Satterthwaite's derivatives then reuse).
    let first = if grad.is_some() {
        optim.value_tolerance * EXACT_GRADIENT_TIGHTENING
    } else {
        optim.value_tolerance
    };
    for tolerance in [first, optim.value_tolerance * 1e-3, optim.value_tolerance * 1e-6] {
        let result = optimize::minimize_with(
            dev,
            grad,
            &x,
            lower,
            OptimOptions {
                value_tolerance: tolerance,
                ..optim
            },
        );
        iterations += result.iterations;
        evaluations += result.evaluations;
        let p = optimize::newton_polish_with(dev, grad, hess_at, &result.x, result.value, lower);
        evaluations += p.evaluations;
        x = p.x.clone();
        let done = p.decrement.is_some_and(|d| d < NEWTON_DECREMENT_TOLERANCE);
        polished = Some(p);
        if done {
            break;
        }
    }
    let mut polished = polished.expect("at least one round");
    let mut theta = polished.x.clone();
    // The criterion is even in each diagonal entry of T near zero, so a zero
    // variance is approached smoothly and the optimiser stops a hair inside
    // the bound; snap such entries to the boundary when that costs nothing.
    let mut value = polished.value;
    for i in 0..theta.len() {
        if lower[i] == 0.0 && theta[i] > 0.0 && theta[i] < BOUNDARY_SNAP * base[i].max(f64::MIN_POSITIVE) {
            let mut trial = theta.clone();
            trial[i] = 0.0;
            let d = dev(&trial);
            evaluations += 1;
            if d <= value + 1e-9 {
                theta = trial;
                value = value.min(d);
            }
        }
    }
    if theta != polished.x {
        // Certify the snapped point over the coordinates still free.
        polished = optimize::newton_polish_with(dev, grad, hess_at, &theta, value, lower);
        evaluations += polished.evaluations;
        theta = polished.x.clone();
        value = polished.value;
    }
    Descent {
        theta,
        value,
        polished,
        iterations,
        evaluations,
    }
}

/// Solve the PLS system `Lᵀx = l_y` for `[u₂, β]`, then each `u₁ᵢ`.
/// Returns β and the spherical random effects u per term (problem order, flat).
fn solve_pls(cp: &CrossProducts, f: &Factor) -> (Vec<f64>, Vec<Vec<f64>>) {
    let m = cp.m;
    let k = m - 1;
    let l = &f.dense_l;
    let mut x = vec![0.0; k];
    for i in (0..k).rev() {
        let mut v = l[(k, i)];
        for j in i + 1..k {
            v -= l[(j, i)] * x[j];
        }
        x[i] = v / l[(i, i)];
    }
    let q2 = cp.q2_total;
    let mut beta = x[q2..q2 + cp.p].to_vec();
    if let Some(j) = cp.intercept {
        beta[j] += cp.y_shift;
    }
    let mut u = vec![Vec::new(); cp.term_q.len()];
    for (s, &kt) in cp.secondary.iter().enumerate() {
        let end = if s + 1 < cp.secondary.len() {
            cp.secondary_offset[s + 1]
        } else {
            q2
        };
        u[kt] = x[cp.secondary_offset[s]..end].to_vec();
    }
    if let Some(k1) = cp.primary {
        let q1 = cp.q1;
        let mut u1 = vec![0.0; cp.n1 * q1];
        let mut rhs = vec![0.0; q1];
        for i in 0..cp.n1 {
            let (cols, w) = f.blocks_w.level(i);
            let nc = cols.len();
            let li = &f.blocks_l[i * q1 * q1..(i + 1) * q1 * q1];
            for r in 0..q1 {
                let mut v = 0.0;
                for (c, &dc) in cols.iter().enumerate() {
                    if dc == m - 1 {
                        v += w[r * nc + c];
                    } else {
                        v -= w[r * nc + c] * x[dc];
                    }
                }
                rhs[r] = v;
            }
            // Lᵢᵀ u = rhs (back substitution).
            for r in (0..q1).rev() {
                let mut v = rhs[r];
                for s in r + 1..q1 {
                    v -= li[s * q1 + r] * u1[i * q1 + s];
                }
                u1[i * q1 + r] = v / li[r * q1 + r];
            }
        }
        u[k1] = u1;
    }
    (beta, u)
}

/// `σ²(L_X L_Xᵀ)⁻¹` from the fixed block of the dense factor.
fn fixed_cov(f: &Factor, q2: usize, p: usize, sigma2: f64) -> Vec<f64> {
    let lx = Mat::from_fn(p, p, |i, j| f.dense_l[(q2 + i, q2 + j)]);
    let inv = lower_inverse(&lx);
    let mut c = vec![0.0; p * p];
    for i in 0..p {
        for j in 0..p {
            let mut acc = 0.0;
            for k in i.max(j)..p {
                acc += inv[(k, i)] * inv[(k, j)];
            }
            c[i * p + j] = sigma2 * acc;
        }
    }
    c
}

/// Inverse of a lower-triangular matrix by forward substitution.
fn lower_inverse(l: &Mat<f64>) -> Mat<f64> {
    let p = l.nrows();
    let mut inv = Mat::<f64>::zeros(p, p);
    for j in 0..p {
        inv[(j, j)] = 1.0 / l[(j, j)];
        for i in j + 1..p {
            let mut v = 0.0;
            for k in j..i {
                v -= l[(i, k)] * inv[(k, j)];
            }
            inv[(i, j)] = v / l[(i, i)];
        }
    }
    inv
}

type Conditional = (Vec<Vec<Vec<f64>>>, Vec<f64>, Vec<f64>);

/// BLUPs b = Λu per term and level, conditional and marginal fitted values.
fn conditional(problem: &MixedProblem, cp: &CrossProducts, theta: &[f64], beta: &[f64], u: &[Vec<f64>]) -> Conditional {
    let t = criterion::factors(cp, theta);
    let mut blups = Vec::with_capacity(problem.terms.len());
    for (k, term) in problem.terms.iter().enumerate() {
        let q = term.q();
        let tk = &t[k];
        let per_level: Vec<Vec<f64>> = (0..term.n_levels())
            .map(|lvl| {
                let uu = &u[k][lvl * q..(lvl + 1) * q];
                (0..q).map(|r| (0..=r).map(|c| tk[r * q + c] * uu[c]).sum()).collect()
            })
            .collect();
        blups.push(per_level);
    }
    let p = problem.p();
    let n = problem.n();
    let mut fitted = vec![0.0; n];
    let mut marginal = vec![0.0; n];
    for r in 0..n {
        let xr = &problem.x[r * p..(r + 1) * p];
        let xb: f64 = xr.iter().zip(beta).map(|(a, b)| a * b).sum();
        marginal[r] = xb;
        let mut zb = 0.0;
        for (k, term) in problem.terms.iter().enumerate() {
            let b = &blups[k][term.level[r] as usize];
            for (c, bc) in b.iter().enumerate() {
                zb += term.z[c][r] * bc;
            }
        }
        fitted[r] = xb + zb;
    }
    (blups, fitted, marginal)
}

fn components(problem: &MixedProblem, cp: &CrossProducts, theta: &[f64], sigma2: f64) -> Vec<RandomComponent> {
    let t = criterion::factors(cp, theta);
    problem
        .terms
        .iter()
        .enumerate()
        .map(|(k, term)| RandomComponent::from_factor(term, &t[k], sigma2))
        .collect()
}

impl RandomComponent {
    /// The component of `term` whose relative factor is `t` (q×q lower,
    /// row-major): covariance σ²TTᵀ, SDs and correlations (NaN where an SD
    /// is zero).
    pub(super) fn from_factor(term: &super::RandomTermData, t: &[f64], sigma2: f64) -> RandomComponent {
        let q = term.q();
        let covariance = factor_covariance(t, q, sigma2);
        let sd: Vec<f64> = (0..q).map(|i| covariance[i][i].max(0.0).sqrt()).collect();
        let correlation = (0..q)
            .map(|i| {
                (0..q)
                    .map(|j| {
                        if i == j {
                            1.0
                        } else if sd[i] > 0.0 && sd[j] > 0.0 {
                            covariance[i][j] / (sd[i] * sd[j])
                        } else {
                            f64::NAN
                        }
                    })
                    .collect()
            })
            .collect();
        RandomComponent {
            factor: term.factor.clone(),
            terms: term.columns.clone(),
            n_levels: term.n_levels(),
            covariance,
            sd,
            correlation,
        }
    }
}

/// σ²TTᵀ for a q×q lower-triangular factor T (row-major).
pub(super) fn factor_covariance(t: &[f64], q: usize, sigma2: f64) -> Vec<Vec<f64>> {
    (0..q)
        .map(|i| {
            (0..q)
                .map(|j| sigma2 * (0..q).map(|c| t[i * q + c] * t[j * q + c]).sum::<f64>())
                .collect()
        })
        .collect()
}

/// A fit counts as converged when the Newton decrement of the deviance is
/// below this (the remaining improvement of the log-likelihood is then below
/// a quarter of it).
pub const NEWTON_DECREMENT_TOLERANCE: f64 = 1e-6;

/// The search's first value tolerance is multiplied by this when the
/// criterion has an analytic gradient (see [`descend`]); on the
/// 3,000-participant benchmark it saves 7 of 41 evaluations.
const EXACT_GRADIENT_TIGHTENING: f64 = 1e-2;

/// Restarts from the interior after a boundary optimum, at most.
const MAX_RESTARTS: usize = 3;

/// A diagonal entry of θ below this fraction of its start value is tested
/// against the boundary (set to zero when that does not raise the deviance).
pub const BOUNDARY_SNAP: f64 = 1e-4;

/// Relative finite-difference step for the information matrix and for the
/// derivatives of cov(β̂). With the response centred the pieces are smooth to
/// near machine precision, and this step balances truncation against
/// rounding: the balanced one-way df come out within about 2e-7 of a − 1.
const HESSIAN_STEP: f64 = 3e-4;

/// Derivatives at θ of the θ-dependent pieces, over the free coordinates, by
/// central differences with steps `h`: the gradient and Hessian of
/// A(θ) (= log|L_Z|², plus log|R_X|² for REML) and of r²(θ), and ∂cov(β̂)/∂θ
/// at a fixed σ².
struct PieceDerivatives {
    c0: Vec<f64>,
    a_hess: Vec<f64>,
    r2_grad: Vec<f64>,
    r2_hess: Vec<f64>,
    dcov: Vec<Vec<f64>>,
}

fn piece_derivatives(
    cp: &CrossProducts,
    theta: &[f64],
    free: &[usize],
    h: &[f64],
    method: Method,
    sigma2: f64,
    evals: &mut usize,
) -> Option<PieceDerivatives> {
    let d = free.len();
    let p = cp.p;
    let a_of = |f: &Factor| match method {
        Method::Reml => f.pieces.logdet_z + f.pieces.logdet_x,
        Method::Ml => f.pieces.logdet_z,
    };
    let mut at = |moves: &[(usize, f64)]| -> Option<Factor> {
        let mut th = theta.to_vec();
        for &(j, v) in moves {
            th[free[j]] += v;
        }
        *evals += 1;
        criterion::evaluate(cp, &th, false).ok()
    };
    let f0 = at(&[])?;
    let (a0, r0) = (a_of(&f0), f0.pieces.pwrss);
    let c0 = fixed_cov(&f0, cp.q2_total, p, sigma2);
    let mut a_hess = vec![0.0; d * d];
    let mut r2_hess = vec![0.0; d * d];
    let mut r2_grad = vec![0.0; d];
    let mut dcov = Vec::with_capacity(d);
    for i in 0..d {
        let fp = at(&[(i, h[i])])?;
        let fm = at(&[(i, -h[i])])?;
        a_hess[i * d + i] = (a_of(&fp) - 2.0 * a0 + a_of(&fm)) / (h[i] * h[i]);
        r2_hess[i * d + i] = (fp.pieces.pwrss - 2.0 * r0 + fm.pieces.pwrss) / (h[i] * h[i]);
        r2_grad[i] = (fp.pieces.pwrss - fm.pieces.pwrss) / (2.0 * h[i]);
        let (cp_, cm_) = (
            fixed_cov(&fp, cp.q2_total, p, sigma2),
            fixed_cov(&fm, cp.q2_total, p, sigma2),
        );
        dcov.push(cp_.iter().zip(&cm_).map(|(x, y)| (x - y) / (2.0 * h[i])).collect());
        for j in 0..i {
            let mut av = [0.0; 4];
            let mut rv = [0.0; 4];
            for (k, (si, sj)) in [(1.0, 1.0), (1.0, -1.0), (-1.0, 1.0), (-1.0, -1.0)].iter().enumerate() {
                let f = at(&[(i, si * h[i]), (j, sj * h[j])])?;
                av[k] = a_of(&f);
                rv[k] = f.pieces.pwrss;
            }
            let den = 4.0 * h[i] * h[j];
            let va = (av[0] - av[1] - av[2] + av[3]) / den;
            let vr = (rv[0] - rv[1] - rv[2] + rv[3]) / den;
            a_hess[i * d + j] = va;
            a_hess[j * d + i] = va;
            r2_hess[i * d + j] = vr;
            r2_hess[j * d + i] = vr;
        }
    }
    Some(PieceDerivatives {
        c0,
        a_hess,
        r2_grad,
        r2_hess,
        dcov,
    })
}

/// Central differences of analytic gradient evaluations at θ over the free
/// coordinates (one random term only): the stencil both the Newton finish
/// (the Hessian of the profiled deviance) and Satterthwaite's derivatives
/// ([`PieceDerivatives`]) are built from, 1 + 2d evaluations.
struct Stencil {
    theta: Vec<f64>,
    free: Vec<usize>,
    h: Vec<f64>,
    centre: criterion::GradientEval,
    plus: Vec<criterion::GradientEval>,
    minus: Vec<criterion::GradientEval>,
}

/// The stencil's steps: [`HESSIAN_STEP`] relative to |θᵢ| or, when smaller,
/// to the coordinate's scale.
fn stencil_steps(theta: &[f64], theta_scale: &[f64], free: &[usize]) -> Vec<f64> {
    free.iter()
        .map(|&i| HESSIAN_STEP * theta[i].abs().max(theta_scale[i]))
        .collect()
}

/// A kept stencil serves a final point that lies within this share of each
/// step from where it was taken (a move of at most 3e-7 relative to θ or to
/// its scale). Measured on the balanced closed form: at this share the df
/// stay within 4e-7 of a − 1; at 1e-2 one of them moved to 8e-6.
const STENCIL_REUSE: f64 = 1e-3;

impl Stencil {
    fn new(
        cp: &CrossProducts,
        theta: &[f64],
        free: &[usize],
        h: &[f64],
        method: Method,
        evals: &mut usize,
    ) -> Option<Stencil> {
        let mut at = |i: Option<(usize, f64)>| {
            let mut th = theta.to_vec();
            if let Some((j, v)) = i {
                th[free[j]] += v;
            }
            *evals += 1;
            criterion::gradient_eval(cp, &th, method)
        };
        let centre = at(None)?;
        let mut plus = Vec::with_capacity(free.len());
        let mut minus = Vec::with_capacity(free.len());
        for (i, &hi) in h.iter().enumerate() {
            plus.push(at(Some((i, hi)))?);
            minus.push(at(Some((i, -hi)))?);
        }
        Some(Stencil {
            theta: theta.to_vec(),
            free: free.to_vec(),
            h: h.to_vec(),
            centre,
            plus,
            minus,
        })
    }

    /// Whether this stencil stands for one taken at `theta` over `free`.
    fn serves(&self, theta: &[f64], free: &[usize]) -> bool {
        self.free == free
            && self.theta.len() == theta.len()
            && self
                .free
                .iter()
                .zip(&self.h)
                .all(|(&i, h)| (theta[i] - self.theta[i]).abs() <= STENCIL_REUSE * h)
            && (0..theta.len())
                .filter(|i| !free.contains(i))
                .all(|i| theta[i] == self.theta[i])
    }

    /// The gradient and the symmetrised Hessian of the profiled deviance
    /// over the free coordinates, in the search's scaled coordinates
    /// (θ = x · scale).
    fn scaled_gradient_hessian(&self, scale: &[f64]) -> (Vec<f64>, Vec<f64>) {
        let d = self.free.len();
        let g: Vec<f64> = self.free.iter().map(|&i| self.centre.grad[i] * scale[i]).collect();
        let mut hess = vec![0.0; d * d];
        for a in 0..d {
            let den = 2.0 * self.h[a];
            for (b, &fb) in self.free.iter().enumerate() {
                hess[b * d + a] =
                    (self.plus[a].grad[fb] - self.minus[a].grad[fb]) / den * scale[self.free[a]] * scale[fb];
            }
        }
        symmetrise(&mut hess, d);
        (g, hess)
    }

    /// The piece derivatives at a fixed σ².
    fn derivatives(&self, sigma2: f64) -> PieceDerivatives {
        let d = self.free.len();
        let c0: Vec<f64> = self.centre.sxx_inv.iter().map(|v| sigma2 * v).collect();
        let r2_grad: Vec<f64> = self.free.iter().map(|&i| self.centre.r2_grad[i]).collect();
        let mut a_hess = vec![0.0; d * d];
        let mut r2_hess = vec![0.0; d * d];
        let mut dcov = Vec::with_capacity(d);
        for i in 0..d {
            let (gp, gm) = (&self.plus[i], &self.minus[i]);
            let den = 2.0 * self.h[i];
            for (j, &fj) in self.free.iter().enumerate() {
                a_hess[j * d + i] = (gp.a_grad[fj] - gm.a_grad[fj]) / den;
                r2_hess[j * d + i] = (gp.r2_grad[fj] - gm.r2_grad[fj]) / den;
            }
            dcov.push(
                gp.sxx_inv
                    .iter()
                    .zip(&gm.sxx_inv)
                    .map(|(x, y)| sigma2 * (x - y) / den)
                    .collect(),
            );
        }
        symmetrise(&mut a_hess, d);
        symmetrise(&mut r2_hess, d);
        PieceDerivatives {
            c0,
            a_hess,
            r2_grad,
            r2_hess,
            dcov,
        }
    }
}

/// Replace a d×d row-major matrix by the mean of it and its transpose.
fn symmetrise(m: &mut [f64], d: usize) {
    for i in 0..d {
        for j in 0..i {
            let v = 0.5 * (m[i * d + j] + m[j * d + i]);
            m[i * d + j] = v;
            m[j * d + i] = v;
        }
    }
}

/// The deviance Hessian over φ = (θ_free, σ²), its inverse (×2) and the
/// derivatives of cov(β̂), for Satterthwaite df. The θ-derivatives of the
/// pieces are central differences; the σ² derivatives are exact, since
/// D(θ, σ²) = A(θ) + ν log(2πσ²) + r²(θ)/σ². Returns the sensitivity with the
/// number of evaluations, and the smallest eigenvalue of the θ_free block.
fn sensitivity(
    cp: &CrossProducts,
    theta: &[f64],
    theta_scale: &[f64],
    free: &[usize],
    method: Method,
    sigma2: f64,
    kept: Option<Stencil>,
) -> ((VarianceSensitivity, usize), Option<f64>) {
    let n = cp.n;
    let p = cp.p;
    let d = free.len();
    let k = d + 1;
    let nu = match method {
        Method::Reml => (n - p) as f64,
        Method::Ml => n as f64,
    };
    let mut evals = 0usize;
    let h = stencil_steps(theta, theta_scale, free);
    let stencil = kept.or_else(|| {
        criterion::has_gradient(cp)
            .then(|| Stencil::new(cp, theta, free, &h, method, &mut evals))
            .flatten()
    });
    let derivs = match stencil {
        Some(st) => Some(st.derivatives(sigma2)),
        None => piece_derivatives(cp, theta, free, &h, method, sigma2, &mut evals),
    };
    let Some(derivs) = derivs else {
        let nan = VarianceSensitivity {
            acov: vec![f64::NAN; k * k],
            dcov: vec![vec![f64::NAN; p * p]; k],
        };
        return ((nan, evals), None);
    };
    let PieceDerivatives {
        c0,
        a_hess,
        r2_grad,
        r2_hess,
        mut dcov,
    } = derivs;
    let r2 = sigma2 * nu;
    let s2 = sigma2 * sigma2;
    let mut hess = vec![0.0; k * k];
    for i in 0..d {
        for j in 0..d {
            hess[i * k + j] = a_hess[i * d + j] + r2_hess[i * d + j] / sigma2;
        }
        let v = -r2_grad[i] / s2;
        hess[i * k + d] = v;
        hess[d * k + i] = v;
    }
    hess[d * k + d] = -nu / s2 + 2.0 * r2 / (s2 * sigma2);
    // ∂cov(β̂)/∂σ² = cov(β̂)/σ² exactly.
    dcov.push(c0.iter().map(|v| v / sigma2).collect());
    let hm = Mat::from_fn(k, k, |i, j| hess[i * k + j]);
    let min_curvature = if d > 0 {
        let sub = Mat::from_fn(d, d, |i, j| hess[i * k + j]);
        sub.self_adjoint_eigenvalues(faer::Side::Lower)
            .ok()
            .and_then(|e| e.into_iter().reduce(f64::min))
    } else {
        None
    };
    let acov = match hm.llt(faer::Side::Lower) {
        Ok(llt) => {
            use faer::linalg::solvers::DenseSolveCore;
            let inv = llt.inverse();
            (0..k * k).map(|i| 2.0 * inv[(i / k, i % k)]).collect()
        }
        Err(_) => vec![f64::NAN; k * k],
    };
    ((VarianceSensitivity { acov, dcov }, evals), min_curvature)
}

#[cfg(test)]
mod small_inverse_tests {
    use super::spd_inverse;

    // Closed-form identity: G · G⁻¹ = I, and a matrix that is not positive
    // definite is refused.
    #[test]
    fn spd_inverse_gives_the_inverse() {
        let g = [4.0, 1.0, 0.5, 1.0, 3.0, 0.2, 0.5, 0.2, 2.0];
        let (mut inv, mut work) = ([0.0; 9], [0.0; 9]);
        assert!(spd_inverse(&g, 3, &mut inv, &mut work));
        for i in 0..3 {
            for j in 0..3 {
                let v: f64 = (0..3).map(|k| g[i * 3 + k] * inv[k * 3 + j]).sum();
                let want = if i == j { 1.0 } else { 0.0 };
                assert!((v - want).abs() < 1e-14, "({i},{j}) {v}");
            }
        }
        assert!(!spd_inverse(&[1.0, 2.0, 2.0, 1.0], 2, &mut inv, &mut work));
    }
}
