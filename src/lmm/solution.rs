//! The solution at the optimum: fixed effects and their covariance, the
//! predicted random effects, fitted values and the variance components.

use faer::Mat;

use super::MixedProblem;
use super::criterion::{self, Factor};
use super::crossprod::CrossProducts;
use super::fit::RandomComponent;

/// Solve the PLS system `Lᵀx = l_y` for `[u₂, β]`, then each `u₁ᵢ`
/// ([`criterion::primary_effects`]) when `t`, each term's relative factor,
/// is given (else the primary term's effects are left empty). Returns β
/// and the spherical random effects u per term (problem order, flat).
pub(super) fn solve_pls(cp: &CrossProducts, f: &Factor, t: Option<&[Vec<f64>]>) -> (Vec<f64>, Vec<Vec<f64>>) {
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
    if let (Some(k1), Some(t)) = (cp.primary, t) {
        u[k1] = criterion::primary_effects(cp, t, &x);
    }
    (beta, u)
}

/// `σ²(L_X L_Xᵀ)⁻¹` from the fixed block of the dense factor.
pub(super) fn fixed_cov(f: &Factor, q2: usize, p: usize, sigma2: f64) -> Vec<f64> {
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
pub(super) fn lower_inverse(l: &Mat<f64>) -> Mat<f64> {
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

/// The marginal fitted values Xβ̂, per row.
pub(super) fn marginal(problem: &MixedProblem, beta: &[f64]) -> Vec<f64> {
    let p = problem.p();
    if p == 0 {
        return vec![0.0; problem.n()];
    }
    let mut x_store = vec![0.0; p];
    (0..problem.n())
        .map(|r| {
            problem
                .x_row(r, &mut x_store)
                .iter()
                .zip(beta)
                .map(|(a, b)| a * b)
                .sum()
        })
        .collect()
}

/// The values per row and per level that `detail` asks for: everything
/// ([`conditional`]), the marginal fitted values alone, or nothing; `u`
/// gives the spherical random effects when they are needed.
pub(super) fn values_per_row(
    problem: &MixedProblem,
    detail: super::Detail,
    t: &[Vec<f64>],
    beta: &[f64],
    u: impl FnOnce() -> Vec<Vec<f64>>,
) -> Conditional {
    if detail.per_row() {
        return conditional(problem, t, beta, &u());
    }
    let fitted_marginal = if detail.marginal() {
        marginal(problem, beta)
    } else {
        Vec::new()
    };
    (Vec::new(), Vec::new(), fitted_marginal)
}

/// BLUPs b = Λu per term and level, conditional and marginal fitted values;
/// `t` holds each term's relative factor (row-major).
pub(super) fn conditional(problem: &MixedProblem, t: &[Vec<f64>], beta: &[f64], u: &[Vec<f64>]) -> Conditional {
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
    let mut x_store = vec![0.0; p];
    for r in 0..n {
        let xr = problem.x_row(r, &mut x_store);
        let xb: f64 = xr.iter().zip(beta).map(|(a, b)| a * b).sum();
        marginal[r] = xb;
        let mut zb = 0.0;
        for (k, term) in problem.terms.iter().enumerate() {
            let b = &blups[k][term.level[r] as usize];
            for (c, bc) in b.iter().enumerate() {
                zb += term.z[c].at(r) * bc;
            }
        }
        fitted[r] = xb + zb;
    }
    (blups, fitted, marginal)
}

pub(super) fn components(
    problem: &MixedProblem,
    cp: &CrossProducts,
    theta: &[f64],
    sigma2: f64,
) -> Vec<RandomComponent> {
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
                        } else if term.covariance == super::Covariance::Diagonal {
                            0.0
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
            structure: term.covariance,
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
