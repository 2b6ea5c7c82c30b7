//! The analytic gradient of the profiled deviance in θ (notes/criterion.md).

// Index loops mirror the matrix notation of the derivation.
#![allow(clippy::needless_range_loop)]

use super::super::Method;
use super::super::crossprod::CrossProducts;

/// The profiled deviance with its analytic gradient in θ, for models whose
/// only random term is the primary one (no dense random part). Per level,
/// with `Aᵢ = TᵀGᵢT + I`, `Cᵢ = Z₁ᵢᵀ[X y]`, `Bᵢ = TᵀCᵢ` and `Hᵢ = Aᵢ⁻¹Bᵢ`, for
/// the entry `T_ab` (notes/criterion.md):
/// `∂ log|Aᵢ| = 2 (Aᵢ⁻¹TᵀGᵢ)_ba` and
/// `∂S = −Σᵢ (uᵢₐ hᵢᵦᵀ + hᵢᵦ uᵢₐᵀ)`, where `uᵢₐ` is row a of `Cᵢ − GᵢTHᵢ`
/// and `hᵢᵦ` row b of `Hᵢ`; then `∂ log|S_XX| = tr(S_XX⁻¹ ∂S_XX)` and
/// `∂r² = ξᵀ ∂S ξ` with `ξ = [−S_XX⁻¹ s_Xy; 1]`. `None` when the model has
/// other random terms or the factorisation fails.
pub fn deviance_gradient(cp: &CrossProducts, theta: &[f64], method: Method) -> Option<(f64, Vec<f64>)> {
    gradient_eval(cp, theta, method).map(|g| (g.deviance, g.grad))
}

/// One evaluation with the analytic gradient, and its pieces: the gradients
/// of A(θ) (= log|L_Z|², plus log|R_X|² for REML) and of r²(θ), and S_XX⁻¹
/// (so that cov(β̂) = σ² S_XX⁻¹ at this θ).
#[derive(Debug, Clone)]
pub struct GradientEval {
    /// The profiled deviance.
    pub deviance: f64,
    /// Its gradient in θ.
    pub grad: Vec<f64>,
    /// Gradient of A(θ).
    pub a_grad: Vec<f64>,
    /// Gradient of r²(θ).
    pub r2_grad: Vec<f64>,
    /// S_XX⁻¹, p×p row-major.
    pub sxx_inv: Vec<f64>,
}

/// Whether [`gradient_eval`] applies: a primary term with 1 to 4
/// coefficients per level, alone or with secondary intercept terms.
pub fn has_gradient(cp: &CrossProducts) -> bool {
    super::twopass::applies(cp)
}

/// See [`deviance_gradient`]; `None` when [`has_gradient`] does not hold.
pub fn gradient_eval(cp: &CrossProducts, theta: &[f64], method: Method) -> Option<GradientEval> {
    super::twopass::gradient_eval(cp, theta, method)
}

/// One primary level's share of the gradient, the same in both kernels: the
/// factor T as an array, the order of its entries, and the solves with the
/// level's block `Aᵢ = TᵀGᵢT + I`.
pub(super) struct LevelSolver<const Q: usize> {
    /// T, row-major.
    pub tq: [[f64; Q]; Q],
    /// The (row, column) of each θ entry, column by column.
    pub pairs: [(usize, usize); 10],
    /// Number of θ entries.
    pub nt: usize,
}

impl<const Q: usize> LevelSolver<Q> {
    /// The solver for the factor `t` (Q×Q row-major).
    pub fn new(t: &[f64]) -> Self {
        let mut tq = [[0.0f64; Q]; Q];
        for r in 0..Q {
            for c in 0..Q {
                tq[r][c] = t[r * Q + c];
            }
        }
        let mut pairs = [(0usize, 0usize); 10];
        let mut k = 0;
        for j in 0..Q {
            for i in j..Q {
                pairs[k] = (i, j);
                k += 1;
            }
        }
        LevelSolver {
            tq,
            pairs,
            nt: Q * (Q + 1) / 2,
        }
    }

    /// Solve `Aᵢ w = v` in place from its Cholesky factor `l` and inverse pivots `inv`.
    #[inline(always)]
    pub(super) fn solve(l: &[[f64; Q]; Q], inv: &[f64; Q], w: &mut [f64; Q]) {
        for r in 0..Q {
            let mut s = w[r];
            for x in 0..r {
                s -= l[r][x] * w[x];
            }
            w[r] = s * inv[r];
        }
        for r in (0..Q).rev() {
            let mut s = w[r];
            for x in r + 1..Q {
                s -= l[x][r] * w[x];
            }
            w[r] = s * inv[r];
        }
    }

    /// For one column `c` of `Cᵢ`: `b = Tᵀc`, `h = Aᵢ⁻¹b` and `u = c − GᵢT h`.
    #[inline(always)]
    pub fn column(
        &self,
        gt: &[[f64; Q]; Q],
        l: &[[f64; Q]; Q],
        inv: &[f64; Q],
        c: &[f64; Q],
    ) -> ([f64; Q], [f64; Q], [f64; Q]) {
        let mut b = [0.0f64; Q];
        for r in 0..Q {
            let mut s = 0.0;
            for x in r..Q {
                s += self.tq[x][r] * c[x];
            }
            b[r] = s;
        }
        let mut h = b;
        Self::solve(l, inv, &mut h);
        let mut u = [0.0f64; Q];
        for r in 0..Q {
            let mut s = c[r];
            for x in 0..Q {
                s -= gt[r][x] * h[x];
            }
            u[r] = s;
        }
        (b, h, u)
    }

    /// Add `∂ log|Aᵢ| / ∂T_ab = 2 (Aᵢ⁻¹ (GᵢT)ᵀ)_ba` to `dlog`.
    #[inline(always)]
    pub fn add_dlog(&self, gt: &[[f64; Q]; Q], l: &[[f64; Q]; Q], inv: &[f64; Q], dlog: &mut [f64]) {
        for col in 0..Q {
            let mut w = gt[col];
            Self::solve(l, inv, &mut w);
            for (k, &(ia, ib)) in self.pairs[..self.nt].iter().enumerate() {
                if ia == col {
                    dlog[k] += 2.0 * w[ib];
                }
            }
        }
    }
}

#[cfg(test)]
mod gradient_tests {
    use super::super::deviance;
    use super::*;
    use crate::lmm::{MixedProblem, RandomTermData};

    // The analytic gradient against central differences of the deviance
    // (closed-form identity: they agree to the differences' truncation).
    #[test]
    fn analytic_gradient_matches_central_differences() {
        let mut rng = crate::simulate::Rng::new(99);
        let (n_id, per) = (40, 4);
        let n = n_id * per;
        let mut x = Vec::new();
        let mut y = Vec::new();
        let mut z1 = Vec::new();
        let mut level = Vec::new();
        for i in 0..n_id {
            let b0 = 2.0 * rng.normal();
            let b1 = 0.5 * rng.normal();
            for w in 0..per {
                let a = w as f64 + rng.uniform() - 2.0;
                x.extend([1.0, a, a * a]);
                y.push(10.0 + a + b0 + b1 * a + rng.normal());
                z1.push(a);
                level.push(i as u32);
            }
        }
        let problem = MixedProblem {
            y,
            x_names: vec!["1".into(), "a".into(), "a2".into()],
            x,
            terms: vec![RandomTermData {
                factor: "id".into(),
                level_names: (0..n_id).map(|i| i.to_string()).collect(),
                level,
                columns: vec!["intercept".into(), "a".into()],
                z: vec![vec![1.0; n], z1],
            }],
        };
        let cp = CrossProducts::new(&problem);
        let theta = [1.3, 0.2, 0.4];
        for method in [Method::Reml, Method::Ml] {
            let (d, g) = deviance_gradient(&cp, &theta, method).unwrap();
            assert!((d - deviance(&cp, &theta, method)).abs() < 1e-9 * d.abs());
            for k in 0..3 {
                let h = 1e-5;
                let mut tp = theta;
                let mut tm = theta;
                tp[k] += h;
                tm[k] -= h;
                let fd = (deviance(&cp, &tp, method) - deviance(&cp, &tm, method)) / (2.0 * h);
                assert!(
                    (g[k] - fd).abs() < 1e-5 * (1.0 + fd.abs()),
                    "{method:?} θ{k}: {} vs {fd}",
                    g[k]
                );
            }
        }
    }
}
