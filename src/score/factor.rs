//! One-factor maximum-likelihood factor analysis of the keyed items, and
//! McDonald's ω_total of their unit-weighted sum.
//!
//! Σ = λλᵀ + Ψ is fitted to the sample covariance S by maximum likelihood
//! (Jöreskog 1967): for fixed Ψ the ML loadings are λ = Ψ^{1/2}·u·√(θ − 1),
//! with θ, u the largest eigenvalue and eigenvector of Ψ^{-1/2} S Ψ^{-1/2};
//! at the optimum diag(Σ) = diag(S), so Ψ = diag(S − λλᵀ). The two steps
//! alternate until Ψ stops moving; a uniqueness is kept above a small share
//! of its item's variance (a Heywood case is reported). ML is scale
//! invariant, so the standardized loadings λ_j/√S_jj are those of the
//! correlation matrix. ω_total = (Σλ)² / ((Σλ)² + ΣΨ) (McDonald 1999).

use faer::linalg::solvers::DenseSolveCore;
use faer::{Mat, Side};
use serde::Serialize;

/// Iterations of the alternating fit, at most.
const MAX_ITERATIONS: usize = 5000;
/// Largest relative change of a uniqueness that counts as converged.
const TOLERANCE: f64 = 1e-10;
/// A uniqueness is kept above this share of its item's variance.
const HEYWOOD_FLOOR: f64 = 0.005;

/// The one-factor model of a group of respondents.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct OneFactor {
    /// Standardized loadings, one per item (in a reliability entry: NaN for
    /// an item left out because it does not vary).
    pub loadings: Vec<f64>,
    /// McDonald's ω_total of the unit-weighted sum of the keyed items.
    pub omega: f64,
    /// The likelihood-ratio χ² of one factor against an unstructured
    /// covariance, with Bartlett's correction: (n − 1 − (2k + 5)/6)·F.
    pub chi2: f64,
    /// Its df, k(k − 3)/2.
    pub df: f64,
    /// RMSEA: √(max(χ² − df, 0) / (df·(n − 1))).
    pub rmsea: f64,
    /// Whether a uniqueness reached its floor (a Heywood case).
    pub heywood: bool,
    /// Whether the alternating fit converged.
    pub converged: bool,
}

/// Fit one factor to the k × k covariance `s` of `n` respondents.
pub fn one_factor(s: &[f64], k: usize, n: usize) -> Option<OneFactor> {
    if k < 3 || n <= k || (0..k).any(|j| s[j * k + j].is_nan() || s[j * k + j] <= 0.0) {
        return None;
    }
    let sm = Mat::from_fn(k, k, |i, j| s[i * k + j]);
    let mut psi: Vec<f64> = (0..k).map(|j| 0.5 * s[j * k + j]).collect();
    let mut lambda = vec![0.0; k];
    let mut converged = false;
    let mut heywood = false;
    for _ in 0..MAX_ITERATIONS {
        let root: Vec<f64> = psi.iter().map(|p| p.sqrt()).collect();
        let scaled = Mat::from_fn(k, k, |i, j| sm[(i, j)] / (root[i] * root[j]));
        let eig = scaled.self_adjoint_eigen(Side::Lower).ok()?;
        let theta = eig.S().column_vector()[k - 1];
        let u = eig.U();
        let stretch = (theta - 1.0).max(0.0).sqrt();
        for j in 0..k {
            lambda[j] = root[j] * u[(j, k - 1)] * stretch;
        }
        let mut change: f64 = 0.0;
        heywood = false;
        for j in 0..k {
            let floor = HEYWOOD_FLOOR * s[j * k + j];
            let mut next = s[j * k + j] - lambda[j] * lambda[j];
            if next < floor {
                next = floor;
                heywood = true;
            }
            change = change.max((next - psi[j]).abs() / s[j * k + j]);
            psi[j] = next;
        }
        if change < TOLERANCE {
            converged = true;
            break;
        }
    }
    // The sign of a single factor is arbitrary: most loadings positive.
    if lambda.iter().sum::<f64>() < 0.0 {
        lambda.iter_mut().for_each(|l| *l = -*l);
    }
    let sigma = Mat::from_fn(k, k, |i, j| lambda[i] * lambda[j] + if i == j { psi[i] } else { 0.0 });
    let inv = sigma.llt(Side::Lower).ok()?.inverse();
    let trace: f64 = (0..k)
        .map(|i| (0..k).map(|j| sm[(i, j)] * inv[(j, i)]).sum::<f64>())
        .sum();
    let ld = |m: &Mat<f64>| crate::stats::log_det(m).unwrap_or(f64::NAN);
    let f = ld(&sigma) + trace - ld(&sm) - k as f64;
    let kf = k as f64;
    let chi2 = ((n as f64 - 1.0 - (2.0 * kf + 5.0) / 6.0) * f).max(0.0);
    let df = kf * (kf - 3.0) / 2.0;
    let sum_l: f64 = lambda.iter().sum();
    let sum_psi: f64 = psi.iter().sum();
    Some(OneFactor {
        loadings: (0..k).map(|j| lambda[j] / s[j * k + j].sqrt()).collect(),
        omega: sum_l * sum_l / (sum_l * sum_l + sum_psi),
        chi2,
        df,
        rmsea: if df > 0.0 {
            ((chi2 - df).max(0.0) / (df * (n as f64 - 1.0))).sqrt()
        } else {
            f64::NAN
        },
        heywood,
        converged,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    // Closed form: a covariance that is exactly one factor, λλᵀ + Ψ, is
    // recovered exactly, with χ² zero.
    #[test]
    fn an_exact_one_factor_covariance_is_recovered() {
        let lambda = [0.9, 0.7, 0.5, 0.8];
        let psi = [0.3, 0.5, 0.6, 0.4];
        let k = 4;
        let s: Vec<f64> = (0..k * k)
            .map(|ij| {
                let (i, j) = (ij / k, ij % k);
                lambda[i] * lambda[j] + if i == j { psi[i] } else { 0.0 }
            })
            .collect();
        let f = one_factor(&s, k, 500).unwrap();
        assert!(f.converged && !f.heywood);
        for j in 0..k {
            let want = lambda[j] / (lambda[j] * lambda[j] + psi[j]).sqrt();
            assert!((f.loadings[j] - want).abs() < 1e-6, "{j}: {} {want}", f.loadings[j]);
        }
        assert!(f.chi2 < 1e-6);
        let sl: f64 = lambda.iter().sum();
        assert!((f.omega - sl * sl / (sl * sl + psi.iter().sum::<f64>())).abs() < 1e-6);
    }
}
