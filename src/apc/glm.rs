//! The two fits the age–period–cohort report needs, on cell totals:
//! Poisson log-linear with a log-exposure offset by IRLS (McCullagh & Nelder
//! 1989, ch. 2), and Gaussian least squares from cell sums. X must have full
//! column rank; the APC design is passed in the coordinates of a basis of
//! the null vector's complement.

use faer::linalg::solvers::Solve;
use faer::{Mat, Side};

use crate::error::{Error, Result};

/// One cell of an age × period table (or the records falling in it).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Cell {
    /// Age group, 1-based.
    pub i: usize,
    /// Period, 1-based.
    pub j: usize,
    /// Events (counts), or the sum of the outcome over the cell's records.
    pub y: f64,
    /// Exposure (person-years), or the number of records.
    pub e: f64,
    /// Sum of squared outcomes (records only).
    pub yy: f64,
}

/// The outcome's family.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Family {
    /// Counts with exposure: Poisson, log link, offset log(exposure).
    Poisson,
    /// A continuous outcome: normal errors, identity link.
    Gaussian,
}

/// A fitted model.
#[derive(Debug, Clone, PartialEq)]
pub struct GlmFit {
    /// Coefficients, in the columns' order.
    pub coef: Vec<f64>,
    /// Their covariance (dispersion 1 for Poisson; σ̂² = RSS / df for Gaussian).
    pub cov: Vec<f64>,
    /// Poisson deviance, or the residual sum of squares.
    pub deviance: f64,
    /// Residual degrees of freedom (observations − columns).
    pub df: usize,
    /// Fitted events or fitted cell means, per cell.
    pub fitted: Vec<f64>,
    /// IRLS iterations (0 for Gaussian).
    pub iterations: usize,
}

/// IRLS stops when the deviance changes by less than this, relative.
const IRLS_TOLERANCE: f64 = 1e-13;
/// And after at most this many iterations.
const IRLS_MAX: usize = 100;

fn solve(xtwx: &[f64], rhs: &[f64], q: usize) -> Option<(Vec<f64>, Vec<f64>)> {
    let m = Mat::from_fn(q, q, |r, c| xtwx[r * q + c]);
    let llt = m.llt(Side::Lower).ok()?;
    let b = Mat::from_fn(q, 1, |r, _| rhs[r]);
    let sol = llt.solve(&b);
    use faer::linalg::solvers::DenseSolveCore;
    let inv = llt.inverse();
    Some((
        (0..q).map(|r| sol[(r, 0)]).collect(),
        (0..q * q).map(|k| inv[(k / q, k % q)]).collect(),
    ))
}

/// Fit a model with design rows `x` (one per cell, `q` columns each).
///
/// # Errors
/// [`Error::Numerical`] when XᵀWX is singular or IRLS does not converge.
pub fn fit(cells: &[Cell], x: &[Vec<f64>], family: Family) -> Result<GlmFit> {
    let q = x.first().map_or(0, Vec::len);
    let singular = || Error::Numerical {
        step: "age–period–cohort fit".into(),
        message: "the design is singular (a group with no observations, or too few groups); choose another `width`"
            .into(),
    };
    match family {
        Family::Gaussian => {
            let mut xtx = vec![0.0; q * q];
            let mut xty = vec![0.0; q];
            let (mut n, mut syy) = (0.0, 0.0);
            for (c, row) in cells.iter().zip(x) {
                for r in 0..q {
                    if row[r] == 0.0 {
                        continue;
                    }
                    xty[r] += row[r] * c.y;
                    for s in 0..q {
                        xtx[r * q + s] += c.e * row[r] * row[s];
                    }
                }
                n += c.e;
                syy += c.yy;
            }
            let (coef, inv) = solve(&xtx, &xty, q).ok_or_else(singular)?;
            let fitted: Vec<f64> = x
                .iter()
                .map(|r| r.iter().zip(&coef).map(|(a, b)| a * b).sum())
                .collect();
            // RSS = Σy² − 2 bᵀXᵀy + bᵀXᵀXb = Σy² − bᵀXᵀy at the solution.
            let rss = (syy - coef.iter().zip(&xty).map(|(a, b)| a * b).sum::<f64>()).max(0.0);
            let df = (n as usize).saturating_sub(q);
            let s2 = if df > 0 { rss / df as f64 } else { f64::NAN };
            Ok(GlmFit {
                coef,
                cov: inv.iter().map(|v| v * s2).collect(),
                deviance: rss,
                df,
                fitted,
                iterations: 0,
            })
        }
        Family::Poisson => {
            let offset: Vec<f64> = cells.iter().map(|c| c.e.ln()).collect();
            // Start from the observed rates (events + ½ to avoid log 0).
            let mut eta: Vec<f64> = cells
                .iter()
                .zip(&offset)
                .map(|(c, o)| (c.y + 0.5).ln() - o + o)
                .collect();
            let mut coef = vec![0.0; q];
            let mut inv = vec![0.0; q * q];
            let mut previous = f64::INFINITY;
            let mut deviance = f64::NAN;
            let mut iterations = 0;
            for it in 0..IRLS_MAX {
                iterations = it + 1;
                let mut xtwx = vec![0.0; q * q];
                let mut xtwz = vec![0.0; q];
                for ((c, row), (&e, &o)) in cells.iter().zip(x).zip(eta.iter().zip(&offset)) {
                    let mu = e.exp();
                    let z = e - o + (c.y - mu) / mu;
                    for r in 0..q {
                        if row[r] == 0.0 {
                            continue;
                        }
                        xtwz[r] += mu * row[r] * z;
                        for s in 0..q {
                            xtwx[r * q + s] += mu * row[r] * row[s];
                        }
                    }
                }
                let (b, ii) = solve(&xtwx, &xtwz, q).ok_or_else(singular)?;
                coef = b;
                inv = ii;
                for ((e, row), o) in eta.iter_mut().zip(x).zip(&offset) {
                    *e = o + row.iter().zip(&coef).map(|(a, b)| a * b).sum::<f64>();
                }
                deviance = poisson_deviance(cells, &eta);
                if (previous - deviance).abs() <= IRLS_TOLERANCE * deviance.abs().max(1.0) {
                    break;
                }
                previous = deviance;
            }
            if !deviance.is_finite() {
                return Err(singular());
            }
            Ok(GlmFit {
                coef,
                cov: inv,
                deviance,
                df: cells.len().saturating_sub(q),
                fitted: eta.iter().map(|e| e.exp()).collect(),
                iterations,
            })
        }
    }
}

/// 2 Σ [y log(y/μ) − (y − μ)], with 0·log 0 = 0.
fn poisson_deviance(cells: &[Cell], eta: &[f64]) -> f64 {
    2.0 * cells
        .iter()
        .zip(eta)
        .map(|(c, &e)| {
            let mu = e.exp();
            let t = if c.y > 0.0 { c.y * (c.y / mu).ln() } else { 0.0 };
            t - (c.y - mu)
        })
        .sum::<f64>()
}

/// Dense 0-based levels of codes, in code order.
pub(super) fn intercepts(factor: &str, codes: &[u32], n: usize) -> crate::lmm::RandomTermData {
    // A panel's codes are dense (0..levels): the levels present, in
    // increasing code, are then numbered through a lookup table; sparse
    // codes go through a sorted list.
    let size = codes.iter().map(|&c| c as usize + 1).max().unwrap_or(0);
    let (level_names, level): (Vec<String>, Vec<u32>) = if size <= 2 * n + 1024 {
        let mut index = vec![u32::MAX; size];
        for &c in codes {
            index[c as usize] = 0;
        }
        let mut names = Vec::new();
        for (code, slot) in index.iter_mut().enumerate() {
            if *slot == 0 {
                *slot = names.len() as u32;
                names.push(code.to_string());
            }
        }
        (names, codes.iter().map(|&c| index[c as usize]).collect())
    } else {
        let mut levels: Vec<u32> = codes.to_vec();
        levels.sort_unstable();
        levels.dedup();
        let at = |c: &u32| levels.binary_search(c).map_or(0, |k| k as u32);
        (
            levels.iter().map(u32::to_string).collect(),
            codes.iter().map(at).collect(),
        )
    };
    crate::lmm::RandomTermData {
        factor: factor.into(),
        level_names: level_names.into(),
        level: level.into(),
        columns: vec!["intercept".into()],
        z: vec![vec![1.0; n].into()],
        covariance: Default::default(),
    }
}

/// Panels: a linear mixed model with design rows `x` (q columns, row-major,
/// one row per record, held as cells with `e` = 1) and a random intercept per participant, by ML.
/// The deviance is −2 × the ML log-likelihood.
///
/// # Errors
/// Errors of the engine.
pub fn fit_mixed(cells: &[Cell], q: usize, x: Vec<f64>, ids: &[u32]) -> Result<GlmFit> {
    let n = cells.len();
    let terms = vec![intercepts("participant", ids, n)];
    let problem = crate::lmm::MixedProblem {
        y: cells.iter().map(|c| c.y).collect(),
        x_names: (0..q).map(|k| format!("x{k}")).collect(),
        x: x.into(),
        terms,
    };
    let f = crate::lmm::fit(
        &problem,
        crate::lmm::FitOptions {
            method: crate::lmm::Method::Ml,
            detail: crate::lmm::Detail::Likelihood,
            ..Default::default()
        },
    )?;
    Ok(GlmFit {
        coef: f.beta.clone(),
        cov: f.cov_beta.clone(),
        deviance: -2.0 * f.loglik,
        df: n.saturating_sub(q),
        fitted: f.fitted_marginal.clone(),
        iterations: f.info.iterations,
    })
}

#[cfg(test)]
mod tests {
    use super::intercepts;

    // Dense codes (the lookup table) and the same levels under sparse codes
    // (the sorted list) number the levels alike, in increasing code, and
    // skip codes that do not occur.
    #[test]
    fn intercept_levels_agree_for_dense_and_sparse_codes() {
        let dense = [3u32, 0, 3, 5, 0, 5, 5];
        let sparse: Vec<u32> = dense.iter().map(|&c| c * 1_000_000).collect();
        let a = intercepts("id", &dense, dense.len());
        let b = intercepts("id", &sparse, sparse.len());
        assert_eq!(a.level[..], [1, 0, 1, 2, 0, 2, 2]);
        assert_eq!(a.level, b.level);
        assert_eq!(a.level_names[..], ["0", "3", "5"]);
        assert_eq!(b.level_names[..], ["0", "3000000", "5000000"]);
    }
}
