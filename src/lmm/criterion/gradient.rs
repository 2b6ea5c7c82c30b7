//! The analytic gradient of the profiled deviance in θ (notes/criterion.md).

// Index loops mirror the matrix notation of the derivation.
#![allow(clippy::needless_range_loop)]

use faer::{Mat, Side};

use super::super::crossprod::CrossProducts;
use super::super::{Method, unpack_factor};
use super::Pieces;
use super::primary::{
    CHUNKS, LANES, PARALLEL_LEVELS, lane_backward, lane_block, lane_forward, lane_load, lane_t_column,
};

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

/// Two orders of summation of the same sums agree to this, relative
/// (rounding only).
#[cfg(test)]
pub(super) const SUMMATION_ORDER_REL: f64 = 1e-9;

#[cfg(test)]
impl GradientEval {
    /// Assert that `other` holds the same quantities as `self`, summed in
    /// another order: equal within [`SUMMATION_ORDER_REL`].
    pub(super) fn assert_same_as(&self, other: &GradientEval, what: &str) {
        let close = |x: f64, y: f64| (x - y).abs() <= SUMMATION_ORDER_REL * (1.0 + x.abs());
        assert!(
            close(self.deviance, other.deviance),
            "{what}: {} vs {}",
            self.deviance,
            other.deviance
        );
        for (a, b) in [
            (&self.grad, &other.grad),
            (&self.a_grad, &other.a_grad),
            (&self.r2_grad, &other.r2_grad),
            (&self.sxx_inv, &other.sxx_inv),
        ] {
            assert!(
                a.len() == b.len() && a.iter().zip(b).all(|(x, y)| close(*x, *y)),
                "{what}: {a:?} vs {b:?}"
            );
        }
    }
}

/// Whether [`gradient_eval`] applies: a primary term with 1 to 4
/// coefficients per level, alone or with secondary intercept terms.
pub fn has_gradient(cp: &CrossProducts) -> bool {
    super::twopass::applies(cp)
}

/// A primary term alone with at most this many columns of `[X y]` takes
/// the gradient in one pass (summing one (p+1)² matrix per θ entry and
/// level); wider models, and every model with terms beside the primary
/// one, take it in [`super::twopass`] (one fused pass or two passes).
/// Measured: with p = 3 the one pass was about 15% faster than two passes
/// on the 3,000-participant file (notes/benchmarks.md), and with p ≥ 12
/// the two passes were faster.
pub const ONE_PASS_MAX_COLUMNS: usize = 12;

fn primary_only(cp: &CrossProducts) -> bool {
    cp.secondary.is_empty() && cp.q2_total == 0 && cp.primary.is_some() && (1..=4).contains(&cp.q1)
}

/// See [`deviance_gradient`]; `None` when [`has_gradient`] does not hold.
pub fn gradient_eval(cp: &CrossProducts, theta: &[f64], method: Method) -> Option<GradientEval> {
    if let Some(pools) = &cp.pools {
        return super::pooled::gradient_eval(cp, pools, theta, method);
    }
    if primary_only(cp) && cp.p < ONE_PASS_MAX_COLUMNS {
        return one_pass(cp, theta, method);
    }
    super::twopass::gradient_eval(cp, theta, method)
}

/// The gradient in one pass over the levels, for a primary term alone
/// with few fixed columns (see [`ONE_PASS_MAX_COLUMNS`]).
fn one_pass(cp: &CrossProducts, theta: &[f64], method: Method) -> Option<GradientEval> {
    let k1 = cp.primary?;
    let q = cp.q1;
    let p = cp.p;
    let m = cp.m;
    let c1 = p + 1;
    let nt = q * (q + 1) / 2;
    let off = cp.theta_offset[k1];
    let t = unpack_factor(&theta[off..off + nt], q);
    let per_range = |range: std::ops::Range<usize>| -> Option<GradPart> { grad_levels_dispatch(cp, &t, range) };
    let part = if cp.n1 < PARALLEL_LEVELS {
        per_range(0..cp.n1)?
    } else {
        use rayon::prelude::*;
        let parts: Vec<Option<GradPart>> = (0..CHUNKS)
            .into_par_iter()
            .map(|c| per_range(c * cp.n1 / CHUNKS..(c + 1) * cp.n1 / CHUNKS))
            .collect();
        let mut total: Option<GradPart> = None;
        for pt in parts {
            let pt = pt?;
            match &mut total {
                None => total = Some(pt),
                Some(tt) => tt.add(&pt),
            }
        }
        total?
    };
    let logdet_z = part.logdet;
    let dlog = part.dlog;
    let acc = part.acc;
    let mut s = cp.dense.clone();
    for r in 0..c1 {
        for cc in 0..=r {
            s[r * m + cc] -= part.bh[r * c1 + cc];
        }
    }
    let sm = Mat::from_fn(m, m, |r, cc| if r >= cc { s[r * m + cc] } else { s[cc * m + r] });
    let llt = sm.llt(Side::Lower).ok()?;
    let ls = llt.L();
    let logdet_x: f64 = (0..p).map(|k| 2.0 * ls[(k, k)].ln()).sum();
    let r2 = ls[(p, p)] * ls[(p, p)];
    // S_XX⁻¹ and ξ from the factor of the X block.
    let sxx = Mat::from_fn(p, p, |r, cc| sm[(r, cc)]);
    let lx = sxx.llt(Side::Lower).ok()?;
    use faer::linalg::solvers::{DenseSolveCore, Solve};
    let inv = lx.inverse();
    let sxy = Mat::from_fn(p, 1, |r, _| sm[(r, p)]);
    let beta = lx.solve(&sxy);
    let xi: Vec<f64> = (0..p).map(|r| -beta[(r, 0)]).chain(std::iter::once(1.0)).collect();
    let pieces = Pieces {
        logdet_z,
        logdet_x,
        pwrss: r2,
    };
    let (nu, reml) = match method {
        Method::Ml => (cp.n as f64, false),
        Method::Reml => ((cp.n - p) as f64, true),
    };
    let mut grad = vec![0.0; theta.len()];
    let mut a_grad = vec![0.0; theta.len()];
    let mut r2_grad = vec![0.0; theta.len()];
    for k in 0..nt {
        let blk = &acc[k * c1 * c1..(k + 1) * c1 * c1];
        // ∂S = −(M + Mᵀ).
        let ds = |r: usize, cc: usize| -(blk[r * c1 + cc] + blk[cc * c1 + r]);
        let mut dr2 = 0.0;
        for r in 0..c1 {
            for cc in 0..c1 {
                dr2 += xi[r] * ds(r, cc) * xi[cc];
            }
        }
        let mut dx = 0.0;
        if reml {
            for r in 0..p {
                for cc in 0..p {
                    dx += inv[(r, cc)] * ds(cc, r);
                }
            }
        }
        grad[off + k] = dlog[k] + dx + nu * dr2 / r2;
        a_grad[off + k] = dlog[k] + dx;
        r2_grad[off + k] = dr2;
    }
    Some(GradientEval {
        deviance: pieces.profiled_deviance(method, cp.n, p),
        grad,
        a_grad,
        r2_grad,
        sxx_inv: (0..p * p).map(|k| inv[(k / p, k % p)]).collect(),
    })
}

/// One range of primary levels' contributions to the gradient.
pub(super) struct GradPart {
    logdet: f64,
    dlog: Vec<f64>,
    /// Σ Bᵢᵀ Hᵢ, (p+1)², lower triangle used.
    bh: Vec<f64>,
    /// Per θ entry, Σ uᵢₐ hᵢᵦᵀ, (p+1)² each.
    acc: Vec<f64>,
}

impl GradPart {
    fn add(&mut self, o: &GradPart) {
        self.logdet += o.logdet;
        self.dlog.iter_mut().zip(&o.dlog).for_each(|(a, b)| *a += b);
        self.bh.iter_mut().zip(&o.bh).for_each(|(a, b)| *a += b);
        self.acc.iter_mut().zip(&o.acc).for_each(|(a, b)| *a += b);
    }
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
        let tq = super::primary::factor_array::<Q>(t);
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

/// [`grad_levels`] for the primary term's `q` coefficients and the `p + 1`
/// columns of `[X y]`, both as compile-time sizes (q ≤ 4 and, by
/// [`ONE_PASS_MAX_COLUMNS`], p + 1 ≤ 12), so that every loop of the level
/// kernel is unrolled. `None` outside those sizes.
fn grad_levels_dispatch(cp: &CrossProducts, t: &[f64], range: std::ops::Range<usize>) -> Option<GradPart> {
    macro_rules! by_columns {
        ($q:literal) => {
            by_columns!($q; 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12)
        };
        ($q:literal; $($c:literal),*) => {
            match cp.p + 1 {
                $($c => grad_levels::<$q, $c>(cp, t, range),)*
                _ => None,
            }
        };
    }
    match cp.q1 {
        1 => by_columns!(1),
        2 => by_columns!(2),
        3 => by_columns!(3),
        4 => by_columns!(4),
        _ => None,
    }
}

/// The per-level sums of [`deviance_gradient`] over `range`, with the Q×Q
/// blocks and the C = p + 1 columns of `[X y]` in fixed-size arrays, and
/// [`LANES`] levels at a time (a last odd level beside a level of zeros,
/// which adds exact zeros). `H` and `U` are held by row (one row of C
/// entries per coefficient), so that the sums `Σ uᵢₐ hᵢᵦᵀ` run along
/// contiguous rows. Each lane keeps its own sums; they are added at the end.
fn grad_levels<const Q: usize, const C: usize>(
    cp: &CrossProducts,
    t: &[f64],
    range: std::ops::Range<usize>,
) -> Option<GradPart> {
    const L: usize = LANES;
    type V = [f64; L];
    let solver = LevelSolver::<Q>::new(t);
    let nt = solver.nt;
    let tq = solver.tq;
    let mut product: V = [1.0; L];
    let mut log_sum = 0.0;
    let mut dlog = [[0.0f64; L]; 10];
    let mut bh = [[[0.0f64; L]; C]; C];
    // One C×C sum per θ entry, in the order of `solver.pairs`.
    let mut acc = [[[[0.0f64; L]; C]; C]; 10];
    let mut first = range.start;
    while first < range.end {
        let (g, cz) = lane_load::<Q, C, L>(cp, first, range.end);
        first += L;
        let (gt, lf, inv) = lane_block::<Q, L>(&g, &tq, &mut product, &mut log_sum);
        // Solve A w = v in place (A = LLᵀ, lanes side by side).
        let solve = |w: &mut [V; Q]| {
            lane_forward(&lf, &inv, w);
            lane_backward(&lf, &inv, w);
        };
        // Per column of Cᵢ: b = Tᵀc, h = A⁻¹b, u = c − GᵢT h.
        let mut b = [[[0.0f64; L]; Q]; C];
        let mut h = [[[0.0f64; L]; C]; Q];
        let mut u = [[[0.0f64; L]; C]; Q];
        for col in 0..C {
            let bc = lane_t_column(&tq, &cz, col);
            let mut hc = bc;
            solve(&mut hc);
            for r in 0..Q {
                let mut uc = cz[r][col];
                for x in 0..Q {
                    for l in 0..L {
                        uc[l] -= gt[r][x][l] * hc[x][l];
                    }
                }
                h[r][col] = hc[r];
                u[r][col] = uc;
            }
            b[col] = bc;
        }
        // ∂ log|Aᵢ| / ∂T_ab = 2 (Aᵢ⁻¹ (GᵢT)ᵀ)_ba.
        for col in 0..Q {
            let mut w = gt[col];
            solve(&mut w);
            for (k, &(ia, ib)) in solver.pairs[..nt].iter().enumerate() {
                if ia == col {
                    for l in 0..L {
                        dlog[k][l] += 2.0 * w[ib][l];
                    }
                }
            }
        }
        for r in 0..C {
            for c in 0..=r {
                for x in 0..Q {
                    for l in 0..L {
                        bh[r][c][l] += b[r][x][l] * h[x][c][l];
                    }
                }
            }
        }
        // θ entries column by column of T, as in `LevelSolver::pairs`.
        let mut k = 0;
        for ib in 0..Q {
            for ia in ib..Q {
                let blk = &mut acc[k];
                for r in 0..C {
                    for c in 0..C {
                        for l in 0..L {
                            blk[r][c][l] += u[ia][r][l] * h[ib][c][l];
                        }
                    }
                }
                k += 1;
            }
        }
    }
    let lanes = |v: &V| v.iter().sum::<f64>();
    let log_product: f64 = product.iter().map(|x| x.ln()).sum();
    Some(GradPart {
        logdet: 2.0 * (log_sum + log_product),
        dlog: dlog[..nt].iter().map(lanes).collect(),
        bh: bh.iter().flatten().map(lanes).collect(),
        acc: acc[..nt].iter().flatten().flatten().map(lanes).collect(),
    })
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
            y: y.into(),
            x_names: vec!["1".into(), "a".into(), "a2".into()],
            x: x.into(),
            terms: vec![RandomTermData::numbered(
                "id",
                n_id,
                level,
                &["intercept", "a"],
                vec![vec![1.0; n], z1],
            )],
        };
        let cp = CrossProducts::new(&problem);
        let theta = [1.3, 0.2, 0.4];
        for method in [Method::Reml, Method::Ml] {
            // The one pass and the two passes compute the same quantities
            // in a different order of summation.
            let one = one_pass(&cp, &theta, method).unwrap();
            let two = super::super::twopass::gradient_eval(&cp, &theta, method).unwrap();
            one.assert_same_as(&two, &format!("{method:?}"));
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

    // The one pass with every compile-time size it is built for (q₁ = 1–4,
    // p + 1 = 2–8) against the two passes: the same quantities summed in
    // another order.
    #[test]
    fn one_pass_matches_two_passes_at_every_size() {
        for q1 in 1..=4 {
            for p in 1..ONE_PASS_MAX_COLUMNS {
                let prob = super::super::primary::tests::alone_problem(q1, p);
                let cp = CrossProducts::new(&prob);
                let theta: Vec<f64> = (0..prob.n_theta()).map(|k| 0.3 + 0.1 * k as f64).collect();
                for method in [Method::Reml, Method::Ml] {
                    let one = one_pass(&cp, &theta, method).unwrap();
                    let two = super::super::twopass::gradient_eval(&cp, &theta, method).unwrap();
                    one.assert_same_as(&two, &format!("q1 {q1}, p {p}, {method:?}"));
                }
            }
        }
    }
}
