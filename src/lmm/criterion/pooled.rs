//! The criterion and its gradient over pooled levels (notes/criterion.md,
//! "Pooled levels"): a one-coefficient primary term alone, whose levels
//! take few values of `γ = ZᵢᵀZᵢ`.
//!
//! With `T = [t]`, level i has `Aᵢ = 1 + t²γᵢ` and adds `wᵢ cᵢcᵢᵀ` to
//! `Σ BᵢᵀHᵢ` with `wᵢ = t²/(1 + t²γᵢ)`, so per pool k
//! `log|A| += n_k log(1 + t²γ_k)` and `S = D − Σ_k w_k P_k` with
//! `P_k = Σ_{i∈k} cᵢcᵢᵀ`; in t, `∂ log Aᵢ = 2tγᵢ/(1 + t²γᵢ)` and
//! `∂wᵢ = 2t/(1 + t²γᵢ)²`.

use super::super::Method;
use super::super::crossprod::{CrossProducts, Pools};
use super::gradient::GradientEval;
use super::secondary::DenseSolve;

/// Subtract `Σ_k w_k P_k` from the lower triangle of the dense part `e`
/// (m×m row-major) and return `log|A|` summed over the levels.
pub(super) fn subtract(pools: &Pools, t: f64, e: &mut [f64], m: usize) -> f64 {
    let t2 = t * t;
    let mut logdet = 0.0;
    for (k, (&g, &n)) in pools.gamma.iter().zip(&pools.count).enumerate() {
        let a = 1.0 + t2 * g;
        logdet += n * a.ln();
        let w = t2 / a;
        let o = &pools.outer[k * m * m..(k + 1) * m * m];
        for r in 0..m {
            for c in 0..=r {
                e[r * m + c] -= w * o[r * m + c];
            }
        }
    }
    logdet
}

/// The deviance with its gradient in the primary term's single θ entry.
pub(super) fn gradient_eval(cp: &CrossProducts, pools: &Pools, theta: &[f64], method: Method) -> Option<GradientEval> {
    let m = cp.m;
    let k1 = cp.primary?;
    let off = cp.theta_offset[k1];
    let t = theta[off];
    let mut s = cp.dense.clone();
    let logdet = subtract(pools, t, &mut s, m);
    let dense = DenseSolve::new(cp, &s, method)?;
    let pieces = super::Pieces {
        logdet_z: logdet + dense.logdet_dense_z,
        logdet_x: dense.logdet_x,
        pwrss: dense.r2,
    };
    let t2 = t * t;
    let nd = dense.nt_dim;
    let (mut dlog, mut dr2, mut dtr) = (0.0, 0.0, 0.0);
    for (k, (&g, &n)) in pools.gamma.iter().zip(&pools.count).enumerate() {
        let a = 1.0 + t2 * g;
        dlog += n * 2.0 * t * g / a;
        let dw = 2.0 * t / (a * a);
        let o = &pools.outer[k * m * m..(k + 1) * m * m];
        // ∂S = −dw·P_k, P_k symmetric with its lower triangle stored.
        let entry = |r: usize, c: usize| if r >= c { o[r * m + c] } else { o[c * m + r] };
        let mut quad = 0.0;
        let mut trace = 0.0;
        for r in 0..m {
            for c in 0..m {
                let v = entry(r, c);
                quad += dense.xi[r] * v * dense.xi[c];
                if r < nd && c < nd {
                    trace += dense.inv_t[(r, c)] * v;
                }
            }
        }
        dr2 -= dw * quad;
        dtr -= dw * trace;
    }
    let mut a_grad = vec![0.0; theta.len()];
    let mut r2_grad = vec![0.0; theta.len()];
    a_grad[off] = dlog + dtr;
    r2_grad[off] = dr2;
    Some(dense.gradient_eval(cp, &pieces, method, a_grad, r2_grad))
}

#[cfg(test)]
mod tests {
    use super::super::{deviance, evaluate};
    use super::*;
    use crate::lmm::{MixedProblem, RandomTermData};

    // Pooled levels against the level-by-level factorisation (the same
    // quantities summed in another order) and the gradient against central
    // differences of the deviance (closed-form identities), by REML and ML.
    #[test]
    fn pooled_levels_match_the_level_by_level_criterion() {
        let mut rng = crate::simulate::Rng::new(11);
        let (mut x, mut y, mut level) = (vec![], vec![], vec![]);
        let n_id = 90;
        for i in 0..n_id {
            let b = 1.5 * rng.normal();
            // One, two or three rows per level.
            for w in 0..(1 + i % 3) {
                let a = w as f64 + rng.uniform() - 1.0;
                x.extend([1.0, a, if i % 2 == 0 { a * a } else { 0.0 }]);
                y.push(5.0 + 0.7 * a + b + rng.normal());
                level.push(i as u32);
            }
        }
        let n = y.len();
        let problem = MixedProblem {
            y: y.into(),
            x_names: vec!["1".into(), "a".into(), "a2".into()],
            x: x.into(),
            terms: vec![RandomTermData::numbered(
                "id",
                n_id,
                level,
                &["intercept"],
                vec![vec![1.0; n]],
            )],
        };
        let cp = CrossProducts::new(&problem);
        let pools = cp.pools.as_ref().expect("three values of γ");
        assert_eq!(pools.gamma.len(), 3);
        for theta in [[0.8], [1.7], [0.0]] {
            let pooled = evaluate(&cp, &theta, false).unwrap().pieces;
            let levels = evaluate(&cp, &theta, true).unwrap().pieces;
            for (a, b) in [
                (pooled.logdet_z, levels.logdet_z),
                (pooled.logdet_x, levels.logdet_x),
                (pooled.pwrss, levels.pwrss),
            ] {
                assert!((a - b).abs() < 1e-10 * (1.0 + b.abs()), "{a} vs {b}");
            }
            for method in [Method::Reml, Method::Ml] {
                let g = gradient_eval(&cp, pools, &theta, method).unwrap();
                let d = deviance(&cp, &theta, method);
                assert!((g.deviance - d).abs() < 1e-10 * d.abs());
                let h = 1e-5;
                let fd = (deviance(&cp, &[theta[0] + h], method) - deviance(&cp, &[theta[0] - h], method)) / (2.0 * h);
                assert!(
                    (g.grad[0] - fd).abs() < 1e-5 * (1.0 + fd.abs()),
                    "{method:?} at {theta:?}: {} vs {fd}",
                    g.grad[0]
                );
            }
        }
    }
}
