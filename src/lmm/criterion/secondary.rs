//! The analytic gradient when the primary term is joined by secondary
//! intercept terms (a school intercept; crossed period and cohort
//! intercepts), each with `Λ_s = θ_s I` (notes/criterion.md, "Secondary
//! intercept terms").
//!
//! The primary part follows [`super::gradient`] with the dense columns
//! `[Z₂Λ₂ X y]` in place of `[X y]`: per level only the linked secondary
//! columns and `X y` are non-zero, so each level updates a few entries of
//! the m×m sums. With `S` the dense Schur complement and `S₁` its leading
//! block without `y`:
//! - primary entry: `∂S = −(M + Mᵀ)`, `∂ log|A₁| = Σᵢ ∂log|Aᵢ| + tr(S₁⁻¹ ∂S₁)`
//!   (REML), or with `S_Z₂Z₂` in place of `S₁` (ML), and `∂r² = ξᵀ ∂S ξ`;
//! - secondary term s: `∂A = (P_s(A − D) + (A − D)P_s)/θ_s`, so
//!   `∂ log|A₁| = (2/θ_s)(n_s − tr_s(S₁⁻¹))` and, as `Aξ = [0; r²]`,
//!   `∂r² = −(2/θ_s) Σ_{i∈s} ξᵢ²`; both are 0 at θ_s = 0.
//!
//! The sums over levels run in two passes ([`super::twopass`]); this module
//! keeps how the levels share their factors ([`Levels`]) and the dense
//! solve with its contractions ([`DenseSolve`]).

// Index loops mirror the matrix notation of the derivation.
#![allow(clippy::needless_range_loop)]

use faer::linalg::solvers::DenseSolveCore;
use faer::{Mat, Side};

use super::super::Method;
use super::super::crossprod::CrossProducts;
use super::Pieces;
use super::gradient::{GradientEval, LevelSolver};

/// How the primary levels' factors are shared: one factor for all, or a
/// factor and a weight per group of levels (the grouped fit, whose level
/// in group g has its cross-products multiplied by `weight[g]`).
pub(super) struct Levels<'a, const Q: usize> {
    /// Per group, the solver of its factor.
    pub solvers: Vec<LevelSolver<Q>>,
    /// Per primary level, its group (`None`: one group).
    pub group: Option<&'a [u32]>,
    /// Per group, the weight of its levels' cross-products.
    pub weight: Vec<f64>,
}

/// The dense Schur complement `S` factored, with what every gradient
/// entry needs of it: `S₁⁻¹` (the leading block without y), `ξ`, the
/// inverse whose trace enters `∂ log|A₁|` (`S₁⁻¹` for REML, the secondary
/// block's inverse for ML) and the degrees of freedom of r².
pub(super) struct DenseSolve {
    /// log-determinant of the secondary block of the factor.
    pub logdet_dense_z: f64,
    /// log|R_X|².
    pub logdet_x: f64,
    /// r².
    pub r2: f64,
    /// S₁⁻¹.
    pub inv1: Mat<f64>,
    /// ξ = [−S₁⁻¹ s₁y; 1].
    pub xi: Vec<f64>,
    /// The inverse whose trace enters the log-determinants.
    pub inv_t: Mat<f64>,
    /// Its order.
    pub nt_dim: usize,
    /// n − p (REML) or n (ML).
    pub nu: f64,
}

impl DenseSolve {
    /// Factor `s` (m×m row-major, lower triangle read).
    pub fn new(cp: &CrossProducts, s: &[f64], method: Method) -> Option<DenseSolve> {
        let (m, p, q2) = (cp.m, cp.p, cp.q2_total);
        let sm = Mat::from_fn(m, m, |r, c| if r >= c { s[r * m + c] } else { s[c * m + r] });
        let llt = sm.llt(Side::Lower).ok()?;
        let l = llt.L();
        let logdet_dense_z: f64 = (0..q2).map(|k| 2.0 * l[(k, k)].ln()).sum();
        let logdet_x: f64 = (q2..q2 + p).map(|k| 2.0 * l[(k, k)].ln()).sum();
        let r2 = l[(m - 1, m - 1)] * l[(m - 1, m - 1)];
        let m1 = m - 1;
        let s1 = Mat::from_fn(m1, m1, |r, c| sm[(r, c)]);
        let inv1 = s1.llt(Side::Lower).ok()?.inverse();
        let mut xi = vec![0.0; m];
        for r in 0..m1 {
            xi[r] = -(0..m1).map(|c| inv1[(r, c)] * sm[(c, m1)]).sum::<f64>();
        }
        xi[m1] = 1.0;
        let reml = method == Method::Reml;
        let (inv_t, nt_dim) = if reml {
            (inv1.clone(), m1)
        } else {
            if q2 == 0 {
                (Mat::zeros(0, 0), 0)
            } else {
                let s2 = Mat::from_fn(q2, q2, |r, c| sm[(r, c)]);
                (s2.llt(Side::Lower).ok()?.inverse(), q2)
            }
        };
        let nu = if reml { (cp.n - p) as f64 } else { cp.n as f64 };
        Some(DenseSolve {
            logdet_dense_z,
            logdet_x,
            r2,
            inv1,
            xi,
            inv_t,
            nt_dim,
            nu,
        })
    }

    /// The deviance and its gradient from the pieces and the gradients of
    /// A(θ) and r²(θ), with `S_XX⁻¹` from this solve.
    pub fn gradient_eval(
        &self,
        cp: &CrossProducts,
        pieces: &Pieces,
        method: Method,
        a_grad: Vec<f64>,
        r2_grad: Vec<f64>,
    ) -> GradientEval {
        let (p, q2) = (cp.p, cp.q2_total);
        let grad = a_grad
            .iter()
            .zip(&r2_grad)
            .map(|(a, r)| a + self.nu * r / self.r2)
            .collect();
        GradientEval {
            deviance: pieces.profiled_deviance(method, cp.n, p),
            grad,
            a_grad,
            r2_grad,
            sxx_inv: (0..p * p).map(|k| self.inv1[(q2 + k / p, q2 + k % p)]).collect(),
        }
    }

    /// `(ξᵀEξ, tr(inv_t E))` for a perturbation `E` of `S` given entry by entry.
    pub fn quad_trace(&self, e: impl Fn(usize, usize) -> f64) -> (f64, f64) {
        let m = self.xi.len();
        let mut quad = 0.0;
        for r in 0..m {
            if self.xi[r] == 0.0 {
                continue;
            }
            for c in 0..m {
                quad += self.xi[r] * e(r, c) * self.xi[c];
            }
        }
        let mut tr = 0.0;
        for r in 0..self.nt_dim {
            for c in 0..self.nt_dim {
                tr += self.inv_t[(r, c)] * e(c, r);
            }
        }
        (quad, tr)
    }

    /// The secondary terms' entries of the gradients of A(θ) and r²(θ)
    /// (notes/criterion.md, "Secondary terms with slopes"); `sec[s]` is
    /// secondary term s's factor T_s (row-major). `false` when a term of
    /// several coefficients has a singular T_s (a variance at zero), where
    /// these formulas do not hold.
    pub fn secondary_derivatives(
        &self,
        cp: &CrossProducts,
        sec: &[Vec<f64>],
        a_grad: &mut [f64],
        r2_grad: &mut [f64],
    ) -> bool {
        let q2 = cp.q2_total;
        for (s_idx, &kt) in cp.secondary.iter().enumerate() {
            let from = cp.secondary_offset[s_idx];
            let to = cp.secondary_offset.get(s_idx + 1).copied().unwrap_or(q2);
            let at = cp.theta_offset[kt];
            let qs = cp.term_q[kt];
            if qs == 1 {
                let th = sec[s_idx][0];
                if th == 0.0 {
                    continue;
                }
                let n_s = (to - from) as f64;
                let trace: f64 = (from..to).map(|i| self.inv_t[(i, i)]).sum();
                a_grad[at] = 2.0 / th * (n_s - trace);
                r2_grad[at] = -2.0 / th * (from..to).map(|i| self.xi[i] * self.xi[i]).sum::<f64>();
                continue;
            }
            let levels = (to - from) / qs;
            // M = L·I − Σ_l N_l and R = Σ_l ξ_l ξ_lᵀ over the term's level blocks.
            let mut msum = vec![0.0; qs * qs];
            let mut r = vec![0.0; qs * qs];
            for l in 0..levels {
                let base = from + l * qs;
                for a in 0..qs {
                    for b in 0..qs {
                        msum[a * qs + b] -= self.inv_t[(base + a, base + b)];
                        r[a * qs + b] += self.xi[base + a] * self.xi[base + b];
                    }
                }
            }
            for a in 0..qs {
                msum[a * qs + a] += levels as f64;
            }
            let nt = qs * (qs + 1) / 2;
            if factor_derivatives(
                &sec[s_idx],
                qs,
                &msum,
                &r,
                &mut a_grad[at..at + nt],
                &mut r2_grad[at..at + nt],
            )
            .is_none()
            {
                return false;
            }
        }
        true
    }
}

/// The derivatives of `log|A₁|` and `r²` in the entries of a term's factor
/// T (q×q lower triangular, row-major), written into `a` and `r2` in θ's
/// order (column by column, lower triangle), from the term's sums over its
/// levels: `msum = L·I − Σ_l N_l` (N_l the level's diagonal block of the
/// inverse whose trace enters `∂ log|A₁|`) and `r = Σ_l ξ_l ξ_lᵀ`. Entry
/// (a, b) gets `2 (M T⁻¹)_{ba}` and `−2 (T⁻ᵀ R)_{ab}` (notes/criterion.md,
/// "Secondary terms with slopes"); `None` when T is singular.
pub(in crate::lmm) fn factor_derivatives(
    t: &[f64],
    q: usize,
    msum: &[f64],
    r: &[f64],
    a: &mut [f64],
    r2: &mut [f64],
) -> Option<()> {
    let tinv = lower_inverse(t, q)?;
    let mut k = 0;
    for j in 0..q {
        for i in j..q {
            a[k] = 2.0 * (0..q).map(|c| msum[j * q + c] * tinv[c * q + i]).sum::<f64>();
            r2[k] = -2.0 * (0..q).map(|c| tinv[c * q + i] * r[c * q + j]).sum::<f64>();
            k += 1;
        }
    }
    Some(())
}

/// The inverse of a q×q lower-triangular matrix (row-major), by forward
/// substitution; `None` when a diagonal entry is zero.
fn lower_inverse(t: &[f64], q: usize) -> Option<Vec<f64>> {
    if (0..q).any(|i| t[i * q + i] == 0.0) {
        return None;
    }
    let mut inv = vec![0.0; q * q];
    for j in 0..q {
        inv[j * q + j] = 1.0 / t[j * q + j];
        for i in j + 1..q {
            let s: f64 = (j..i).map(|c| t[i * q + c] * inv[c * q + j]).sum();
            inv[i * q + j] = -s / t[i * q + i];
        }
    }
    Some(inv)
}

#[cfg(test)]
mod tests {
    use super::super::deviance;
    use super::*;
    use crate::lmm::{MixedProblem, RandomTermData};

    /// The analytic gradient at θ against central differences of the
    /// deviance (closed-form identity: they agree to the differences'
    /// truncation), by REML and ML; an entry at 0 has a zero derivative
    /// (the deviance is even in a lone θ).
    fn matches_central_differences(cp: &CrossProducts, theta: &[f64]) {
        for method in [Method::Reml, Method::Ml] {
            let g = super::super::gradient_eval(cp, theta, method).unwrap();
            let d = deviance(cp, theta, method);
            assert!((g.deviance - d).abs() < 1e-9 * d.abs(), "{} vs {d}", g.deviance);
            for k in 0..theta.len() {
                if theta[k] == 0.0 {
                    assert_eq!(g.grad[k], 0.0);
                    continue;
                }
                let h = 1e-5;
                let (mut tp, mut tm) = (theta.to_vec(), theta.to_vec());
                tp[k] += h;
                tm[k] -= h;
                let fd = (deviance(cp, &tp, method) - deviance(cp, &tm, method)) / (2.0 * h);
                assert!(
                    (g.grad[k] - fd).abs() < 1e-5 * (1.0 + fd.abs()),
                    "{method:?} θ{k}: {} vs {fd}",
                    g.grad[k]
                );
            }
        }
    }

    // The analytic gradient with two secondary intercept terms (schools, and
    // raters crossed with them) against central differences of the
    // deviance (closed-form identity: they agree to the differences'
    // truncation), by REML and ML, inside the parameter space and with a
    // secondary θ at 0.
    #[test]
    fn secondary_gradient_matches_central_differences() {
        let mut rng = crate::simulate::Rng::new(7);
        let (n_id, per, schools, raters) = (60, 4, 6, 3);
        let n = n_id * per;
        let school_effect: Vec<f64> = (0..schools).map(|_| rng.normal()).collect();
        let (mut x, mut y, mut z1, mut id, mut sc, mut ra) = (vec![], vec![], vec![], vec![], vec![], vec![]);
        for i in 0..n_id {
            let (b0, b1) = (2.0 * rng.normal(), 0.5 * rng.normal());
            let s = i % schools;
            for w in 0..per {
                let a = w as f64 + rng.uniform() - 2.0;
                let r = (i + w) % raters;
                // The last column is zero for every odd participant (like
                // another cohort's age term), so the kernel skips it there.
                x.extend([1.0, a, a * a, if i % 2 == 0 { a } else { 0.0 }]);
                y.push(10.0 + a + b0 + b1 * a + school_effect[s] + 0.3 * r as f64 + rng.normal());
                z1.push(a);
                id.push(i as u32);
                sc.push(s as u32);
                ra.push(r as u32);
            }
        }
        let term = |factor: &str, k: usize, level: Vec<u32>, z: Vec<Vec<f64>>, columns: Vec<String>| RandomTermData {
            factor: factor.into(),
            level_names: (0..k).map(|i| i.to_string()).collect(),
            level: level.into(),
            columns,
            z: z.into_iter().map(Into::into).collect(),
            covariance: Default::default(),
        };
        let problem = MixedProblem {
            y: y.into(),
            x_names: vec!["1".into(), "a".into(), "a2".into(), "a_even".into()],
            x: x.into(),
            terms: vec![
                term(
                    "id",
                    n_id,
                    id,
                    vec![vec![1.0; n], z1],
                    vec!["intercept".into(), "a".into()],
                ),
                term("school", schools, sc, vec![vec![1.0; n]], vec!["intercept".into()]),
                term("rater", raters, ra, vec![vec![1.0; n]], vec!["intercept".into()]),
            ],
        };
        let cp = CrossProducts::new(&problem);
        assert!(super::super::has_gradient(&cp));
        for theta in [[1.3, 0.2, 0.4, 0.7, 0.3], [1.1, -0.1, 0.3, 0.0, 0.5]] {
            matches_central_differences(&cp, &theta);
        }
    }

    // The analytic gradient with a secondary term of two coefficients (a
    // school intercept and age slope, correlated) beside a participant
    // intercept and slope, against central differences of the deviance
    // (closed-form identity), by REML and ML; with the school's slope
    // variance at zero (T_s singular) the kernel declines and the search
    // takes differences there.
    #[test]
    fn secondary_slope_gradient_matches_central_differences() {
        let mut rng = crate::simulate::Rng::new(8);
        let (n_id, per, schools) = (80, 4, 7);
        let n = n_id * per;
        let school: Vec<(f64, f64)> = (0..schools).map(|_| (rng.normal(), 0.3 * rng.normal())).collect();
        let (mut x, mut y, mut a_col, mut id, mut sc) = (vec![], vec![], vec![], vec![], vec![]);
        for i in 0..n_id {
            let (b0, b1) = (2.0 * rng.normal(), 0.5 * rng.normal());
            let s = i % schools;
            for w in 0..per {
                let a = w as f64 + rng.uniform() - 2.0;
                x.extend([1.0, a, a * a]);
                y.push(10.0 + a + b0 + b1 * a + school[s].0 + school[s].1 * a + rng.normal());
                a_col.push(a);
                id.push(i as u32);
                sc.push(s as u32);
            }
        }
        let problem = MixedProblem {
            y: y.into(),
            x_names: vec!["1".into(), "a".into(), "a2".into()],
            x: x.into(),
            terms: vec![
                RandomTermData::numbered("id", n_id, id, &["intercept", "a"], vec![vec![1.0; n], a_col.clone()]),
                RandomTermData::numbered("school", schools, sc, &["intercept", "a"], vec![vec![1.0; n], a_col]),
            ],
        };
        let cp = CrossProducts::new(&problem);
        assert!(super::super::has_gradient(&cp));
        for theta in [[1.3, 0.2, 0.4, 0.7, -0.2, 0.3], [1.1, -0.1, 0.3, 0.5, 0.4, 0.9]] {
            matches_central_differences(&cp, &theta);
        }
        assert!(super::super::gradient_eval(&cp, &[1.3, 0.2, 0.4, 0.7, -0.2, 0.0], Method::Reml).is_none());
    }
}
