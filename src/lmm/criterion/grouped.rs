//! The profiled deviance of the grouped fit ([`crate::lmm::grouped`]) with
//! its analytic gradient, without transforming the cross-products.
//!
//! Group g has its own primary factor T_g and a row scale s_g (s₀ = 1).
//! Scaling the group's rows by s_g multiplies each of its levels' blocks
//! `Gᵢ` and `Z₁ᵢᵀ[Z₂ X y]` by `w_g = s_g²` with the factor `T_g` kept, and
//! the group's dense part `D_g` by `w_g`; −2ℓ gains `−2 Σ_g n_g log s_g`.
//! The two passes of [`super::twopass`] run with a factor and a weight per
//! level's group (the second also contracts `Σ(BᵢᵀHᵢ + HᵢᵀHᵢ)` per group),
//! and the gradient follows (notes/criterion.md, "Grouped
//! levels"):
//! - T_g's entries: the primary-entry formulas of the secondary kernel, with
//!   the sums taken over the group's levels only;
//! - secondary terms: as in the two-pass kernel (intercepts, or intercepts
//!   and slopes; notes/criterion.md, "Secondary terms with slopes");
//! - s_g: `∂S/∂s_g = (2/s_g) E_g`, `E_g = Λ̃ᵀ(w_g D_g)Λ̃ − Σ_{i∈g}(BᵢᵀHᵢ + HᵢᵀHᵢ)`,
//!   and `∂ log|A₁| = (2/s_g)(Σ_{i∈g}(q − tr Aᵢ⁻¹) + tr(S₁⁻¹ E_g))`
//!   (REML; the secondary block for ML), `∂r² = (2/s_g) ξᵀE_gξ`, and the
//!   Jacobian adds `−2n_g/s_g`.

// Index loops mirror the matrix notation of the derivation.
#![allow(clippy::needless_range_loop)]

use super::super::crossprod::CrossProducts;
use super::super::{Method, unpack_factor};
use super::Pieces;
use super::gradient::LevelSolver;
use super::secondary::{DenseSolve, Levels};
use super::twopass::{First, Second, passes};
use super::{factors, scaled, scaled_dense_of};

/// The grouped parameters in the engine's terms.
pub struct GroupedTheta<'a> {
    /// Per primary level, its group.
    pub level_group: &'a [u32],
    /// Per group, its primary factor's θ entries (column by column).
    pub factor_theta: Vec<&'a [f64]>,
    /// Per group, its row scale (the first is 1).
    pub scale: Vec<f64>,
    /// Per group, its rows.
    pub n_rows: &'a [usize],
    /// The engine's θ for the other terms (the primary term's entries are
    /// not read).
    pub theta: Vec<f64>,
}

/// The deviance with its gradient.
#[derive(Debug, Clone)]
pub struct GroupedEval {
    /// The profiled deviance, with the Jacobian of the row scaling.
    pub deviance: f64,
    /// Per group, the gradient in its factor's θ entries.
    pub d_factor: Vec<Vec<f64>>,
    /// The gradient in the engine's θ (the secondary terms' entries).
    pub d_theta: Vec<f64>,
    /// Per group, the gradient in its row scale (the first is 0: fixed).
    pub d_scale: Vec<f64>,
}

/// Whether [`grouped_gradient`] applies: a primary term of 1 to 4
/// coefficients and the dense part kept per row group (secondary terms with
/// or without slopes).
pub fn applies(cp: &CrossProducts) -> bool {
    cp.primary.is_some() && (1..=4).contains(&cp.q1) && !cp.dense_groups.is_empty()
}

/// The deviance and gradient at `at`; `None` when [`applies`] does not
/// hold, a scale is not positive, or a factorisation fails.
pub fn grouped_gradient(cp: &CrossProducts, at: &GroupedTheta, method: Method) -> Option<GroupedEval> {
    if !applies(cp) || at.scale.iter().any(|&s| s <= 0.0 || !s.is_finite()) {
        return None;
    }
    let (m, q) = (cp.m, cp.q1);
    let n_groups = at.scale.len();
    let nt = q * (q + 1) / 2;
    let all = factors(cp, &at.theta);
    let sec: Vec<Vec<f64>> = cp.secondary.iter().map(|&kt| all[kt].clone()).collect();
    let weight: Vec<f64> = at.scale.iter().map(|s| s * s).collect();
    // The dense part of the scaled rows, Σ_g w_g D_g.
    let mut d = vec![0.0; m * m];
    for (dg, w) in cp.dense_groups.iter().zip(&weight) {
        d.iter_mut().zip(dg).for_each(|(a, b)| *a += w * b);
    }
    let s = scaled_dense_of(cp, &d, &all);
    let (part, dense, pieces, sums) = match q {
        1 => grouped_passes::<1>(cp, at, &weight, &sec, s, method),
        2 => grouped_passes::<2>(cp, at, &weight, &sec, s, method),
        3 => grouped_passes::<3>(cp, at, &weight, &sec, s, method),
        _ => grouped_passes::<4>(cp, at, &weight, &sec, s, method),
    }?;
    let jacobian: f64 = -2.0
        * at.n_rows
            .iter()
            .zip(&at.scale)
            .map(|(&n, s)| n as f64 * s.ln())
            .sum::<f64>();
    let ratio = dense.nu / dense.r2;
    // ∂S = −(M + Mᵀ) per factor entry, with M = Σ uₐhᵦᵀ over the group.
    let d_factor = (0..n_groups)
        .map(|g| {
            (0..nt)
                .map(|k| {
                    let j = g * nt + k;
                    part.dlog[j] - 2.0 * sums.trace[j] - 2.0 * ratio * sums.quad[j]
                })
                .collect()
        })
        .collect();
    let mut a_grad = vec![0.0; at.theta.len()];
    let mut r2_grad = vec![0.0; at.theta.len()];
    if !dense.secondary_derivatives(cp, &sec, &mut a_grad, &mut r2_grad) {
        return None;
    }
    let d_theta = a_grad.iter().zip(&r2_grad).map(|(a, r)| a + ratio * r).collect();
    let mut d_scale = vec![0.0; n_groups];
    for g in 1..n_groups {
        // E_g = w_g Γ_g − Σ_{i∈g}(BᵢᵀHᵢ + HᵢᵀHᵢ): the dense part by
        // quad_trace, the levels' part from the second pass.
        let gamma = scaled(cp, &cp.dense_groups[g], &all);
        let w = weight[g];
        let (gq, gt) = dense.quad_trace(|r, c| w * gamma[r * m + c]);
        let (dr2, dtr) = (gq - sums.e_quad[g], gt - sums.e_trace[g]);
        let sg = at.scale[g];
        d_scale[g] = 2.0 / sg * (part.tau[g] + dtr + ratio * dr2) - 2.0 * at.n_rows[g] as f64 / sg;
    }
    Some(GroupedEval {
        deviance: pieces.profiled_deviance(method, cp.n, cp.p) + jacobian,
        d_factor,
        d_theta,
        d_scale,
    })
}

/// Both passes with each group's factor and weight.
fn grouped_passes<const Q: usize>(
    cp: &CrossProducts,
    at: &GroupedTheta,
    weight: &[f64],
    sec: &[Vec<f64>],
    s: Vec<f64>,
    method: Method,
) -> Option<(First, DenseSolve, Pieces, Second)> {
    let shared = Levels::<Q> {
        solvers: at
            .factor_theta
            .iter()
            .map(|th| LevelSolver::new(&unpack_factor(th, Q)))
            .collect(),
        group: Some(at.level_group),
        weight: weight.to_vec(),
    };
    passes(cp, &shared, sec, s, method, false)
}
