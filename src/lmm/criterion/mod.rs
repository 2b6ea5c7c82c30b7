//! One evaluation of the profiled criterion for a given θ.
//!
//! With `Λ` built from θ, the augmented matrix
//! `A = [ΛᵀZᵀZΛ + I, ΛᵀZᵀX, ΛᵀZᵀy; ·, XᵀX, Xᵀy; ·, ·, yᵀy]` is factored as
//! `A = LLᵀ` in two stages (notes/criterion.md):
//! 1. the primary block is block-diagonal: `Lᵢ = chol(T₁ᵀGᵢT₁ + I)` per level,
//!    and `Wᵢ = Lᵢ⁻¹ T₁ᵀ Z₁ᵢᵀ[Z₂Λ₂ X y]`;
//! 2. the dense Schur complement `S = Λ̃ᵀ D Λ̃ + I₂ − Σᵢ WᵢᵀWᵢ` is factored by
//!    faer's dense Cholesky.
//!
//! From the factors: `log|L_Z|² = Σᵢ log|Lᵢ|² + log|L₂|²`, `log|R_X|²` from the
//! fixed block, and the penalized residual sum of squares `r² = L[m,m]²`.

// Index loops mirror the matrix notation of the derivation.
#![allow(clippy::needless_range_loop)]

mod gradient;
pub mod grouped;
mod nested;
mod pooled;
mod primary;
mod secondary;
pub(in crate::lmm) use secondary::factor_derivatives;
mod twopass;

pub use gradient::{GradientEval, deviance_gradient, gradient_eval, has_gradient};
pub use primary::primary_effects;
use primary::{primary_fixed, primary_general};

use faer::{Mat, Side};

use super::crossprod::CrossProducts;
use super::{Method, unpack_factor};

/// The scalar pieces of one evaluation.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Pieces {
    /// `log|L_Z|²`, the log-determinant of `ΛᵀZᵀZΛ + I`.
    pub logdet_z: f64,
    /// `log|R_X|²`, the log-determinant of `XᵀV⁻¹X` (V relative to σ²).
    pub logdet_x: f64,
    /// Penalized weighted residual sum of squares `r²`.
    pub pwrss: f64,
}

impl Pieces {
    /// The profiled deviance (−2 × log-likelihood at the profiled σ²).
    pub fn profiled_deviance(&self, method: Method, n: usize, p: usize) -> f64 {
        let two_pi = 2.0 * std::f64::consts::PI;
        match method {
            Method::Ml => {
                let nf = n as f64;
                self.logdet_z + nf * (1.0 + (two_pi * self.pwrss / nf).ln())
            }
            Method::Reml => {
                let nu = (n - p) as f64;
                self.logdet_z + self.logdet_x + nu * (1.0 + (two_pi * self.pwrss / nu).ln())
            }
        }
    }

    /// The deviance at a given σ² (not profiled), used for the information matrix.
    pub fn deviance_at(&self, method: Method, n: usize, p: usize, sigma2: f64) -> f64 {
        let two_pi = 2.0 * std::f64::consts::PI;
        let (nu, extra) = match method {
            Method::Ml => (n as f64, 0.0),
            Method::Reml => ((n - p) as f64, self.logdet_x),
        };
        self.logdet_z + extra + nu * (two_pi * sigma2).ln() + self.pwrss / sigma2
    }

    /// The σ² that maximises the criterion for this θ.
    pub fn sigma2(&self, method: Method, n: usize, p: usize) -> f64 {
        match method {
            Method::Ml => self.pwrss / n as f64,
            Method::Reml => self.pwrss / (n - p) as f64,
        }
    }
}

/// Why an evaluation failed.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum EvalFailure {
    /// The dense Schur complement was not positive definite at this pivot
    /// (in the fixed block: the design is rank deficient).
    NotPositiveDefinite {
        /// The failing pivot in the dense part.
        pivot: usize,
    },
}

/// Everything a full evaluation produces, kept for post-fit quantities.
#[derive(Debug, Clone)]
pub struct Factor {
    /// The scalar pieces.
    pub pieces: Pieces,
    /// Lower Cholesky factor of the dense part, m×m.
    pub dense_l: Mat<f64>,
}

/// Build the per-term lower-triangular factors `T_k` (row-major) from θ.
pub fn factors(cp: &CrossProducts, theta: &[f64]) -> Vec<Vec<f64>> {
    cp.term_q
        .iter()
        .zip(&cp.theta_offset)
        .map(|(&q, &off)| unpack_factor(&theta[off..off + q * (q + 1) / 2], q))
        .collect()
}

/// The dense part before the primary levels are eliminated:
/// `Λ̃ᵀ D Λ̃ + I₂`, with `Λ̃ = blockdiag(T_s per secondary level, I_{p+1})`
/// (m×m row-major, full symmetric).
fn scaled_dense(cp: &CrossProducts, t: &[Vec<f64>]) -> Vec<f64> {
    scaled_dense_of(cp, &cp.dense, t)
}

/// [`scaled_dense`] for any dense part `dense` laid out as `cp`'s (the
/// weighted sum of the row groups' parts, say).
fn scaled_dense_of(cp: &CrossProducts, dense: &[f64], t: &[Vec<f64>]) -> Vec<f64> {
    let mut e = scaled(cp, dense, t);
    for k in 0..cp.q2_total {
        e[k * cp.m + k] += 1.0;
    }
    e
}

/// `Λ̃ᵀ D Λ̃` for any m×m dense part `dense` laid out as `cp`'s (a row
/// group's share of it, say), without the identity.
fn scaled(cp: &CrossProducts, dense: &[f64], t: &[Vec<f64>]) -> Vec<f64> {
    let m = cp.m;
    let q2 = cp.q2_total;
    let mut e = dense.to_vec();
    // Right-multiply column blocks by T_s.
    for (s, &kt) in cp.secondary.iter().enumerate() {
        let qs = cp.term_q[kt];
        let ts = &t[kt];
        let n_levels = (if s + 1 < cp.secondary.len() {
            cp.secondary_offset[s + 1]
        } else {
            q2
        } - cp.secondary_offset[s])
            / qs;
        let mut tmp = vec![0.0; qs];
        for lvl in 0..n_levels {
            let base = cp.secondary_offset[s] + lvl * qs;
            for row in 0..m {
                let r = &mut e[row * m + base..row * m + base + qs];
                for (c, tc) in tmp.iter_mut().enumerate() {
                    let mut acc = 0.0;
                    for a in c..qs {
                        acc += r[a] * ts[a * qs + c];
                    }
                    *tc = acc;
                }
                r.copy_from_slice(&tmp);
            }
            // Left-multiply row block by T_sᵀ.
            for col in 0..m {
                for (c, tc) in tmp.iter_mut().enumerate() {
                    let mut acc = 0.0;
                    for a in c..qs {
                        acc += ts[a * qs + c] * e[(base + a) * m + col];
                    }
                    *tc = acc;
                }
                for c in 0..qs {
                    e[(base + c) * m + col] = tmp[c];
                }
            }
        }
    }
    e
}

/// Evaluate the pieces of the criterion; `per_level` factors every
/// primary level even where pooled levels ([`crate::lmm::crossprod::Pools`])
/// would give the same sums in another order.
pub fn evaluate(cp: &CrossProducts, theta: &[f64], per_level: bool) -> Result<Factor, EvalFailure> {
    let m = cp.m;
    let p = cp.p;
    let q2 = cp.q2_total;
    let t = factors(cp, theta);

    let mut e = scaled_dense(cp, &t);

    let mut logdet_z = 0.0;
    // At θ = 0 (the rank check) every level's block is the identity and its
    // columns are zero: the levels add nothing, and are not visited.
    let levels_add = theta.iter().any(|&v| v != 0.0);
    if let (Some(pools), false, true) = (&cp.pools, per_level, levels_add) {
        logdet_z = pooled::subtract(pools, t[cp.primary.unwrap_or(0)][0], &mut e, m);
    } else if let (Some(k1), true) = (cp.primary, levels_add) {
        logdet_z = match cp.q1 {
            1 => primary_fixed::<1>(cp, &t[k1], &t, &mut e),
            2 => primary_fixed::<2>(cp, &t[k1], &t, &mut e),
            3 => primary_fixed::<3>(cp, &t[k1], &t, &mut e),
            4 => primary_fixed::<4>(cp, &t[k1], &t, &mut e),
            _ => primary_general(cp, &t[k1], &t, &mut e),
        };
    }

    let s = Mat::from_fn(m, m, |i, j| if i >= j { e[i * m + j] } else { e[j * m + i] });
    let llt = s.llt(Side::Lower).map_err(|_| EvalFailure::NotPositiveDefinite {
        pivot: first_bad_pivot(&s),
    })?;
    let dense_l = llt.L().to_owned();
    for k in 0..q2 {
        logdet_z += 2.0 * dense_l[(k, k)].ln();
    }
    let mut logdet_x = 0.0;
    for k in q2..q2 + p {
        logdet_x += 2.0 * dense_l[(k, k)].ln();
    }
    let r = dense_l[(m - 1, m - 1)];
    Ok(Factor {
        pieces: Pieces {
            logdet_z,
            logdet_x,
            pwrss: r * r,
        },
        dense_l,
    })
}

/// The first pivot at which a plain Cholesky of `s` breaks down.
fn first_bad_pivot(s: &Mat<f64>) -> usize {
    let m = s.nrows();
    let mut l = Mat::<f64>::zeros(m, m);
    for j in 0..m {
        let mut d = s[(j, j)];
        for k in 0..j {
            d -= l[(j, k)] * l[(j, k)];
        }
        if d <= 1e-12 * s[(j, j)].abs().max(1e-300) {
            return j;
        }
        let d = d.sqrt();
        l[(j, j)] = d;
        for i in j + 1..m {
            let mut v = s[(i, j)];
            for k in 0..j {
                v -= l[(i, k)] * l[(j, k)];
            }
            l[(i, j)] = v / d;
        }
    }
    m
}

/// The profiled deviance at θ, or +∞ where the evaluation fails.
pub fn deviance(cp: &CrossProducts, theta: &[f64], method: Method) -> f64 {
    match evaluate(cp, theta, false) {
        Ok(f) => f.pieces.profiled_deviance(method, cp.n, cp.p),
        Err(_) => f64::INFINITY,
    }
}

/// Accumulates Σ 2·ln(dᵢ) for pivots dᵢ ≥ 1 with few logarithms: the pivots
/// are multiplied together and the logarithm taken when the product is large.
struct LogDet {
    sum: f64,
    product: f64,
}

impl LogDet {
    fn new() -> LogDet {
        LogDet { sum: 0.0, product: 1.0 }
    }
    #[inline]
    fn push(&mut self, d: f64) {
        self.product *= d;
        if self.product > 1e250 || self.product < 1e-250 {
            self.sum += self.product.ln();
            self.product = 1.0;
        }
    }
    fn total(&self) -> f64 {
        2.0 * (self.sum + self.product.ln())
    }
}
