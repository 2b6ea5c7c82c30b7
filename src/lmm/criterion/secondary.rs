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
//! Models whose levels share one factor evaluate these in two passes
//! ([`super::twopass`]); this module keeps the one-pass level kernel of the
//! grouped fit ([`levels`], which sums one m×m matrix per θ entry) and the
//! dense solve that both use.

// Index loops mirror the matrix notation of the derivation.
#![allow(clippy::needless_range_loop)]

use faer::linalg::solvers::DenseSolveCore;
use faer::{Mat, Side};

use super::super::Method;
use super::super::crossprod::CrossProducts;
use super::gradient::LevelSolver;
use super::primary::{CHUNKS, PARALLEL_LEVELS, level_block};
use super::{LogDet, Pieces};

/// One range of primary levels' sums, over the m dense columns, per group
/// of levels (one group when the levels share one factor).
pub(super) struct Part {
    pub logdet: f64,
    /// Per group, per primary θ entry, Σ ∂log|Aᵢ|.
    pub dlog: Vec<f64>,
    /// Σ Bᵢᵀ Hᵢ, m×m (both triangles).
    pub bh: Vec<f64>,
    /// Per group, per primary θ entry, Σ uᵢₐ hᵢᵦᵀ, m×m each.
    pub acc: Vec<f64>,
    /// Grouped levels only: per group, Σ (BᵢᵀHᵢ + HᵢᵀHᵢ), m×m each.
    pub eh: Vec<f64>,
    /// Grouped levels only: per group, Σ (q − tr Aᵢ⁻¹).
    pub tau: Vec<f64>,
}

impl Part {
    fn add(&mut self, o: &Part) {
        self.logdet += o.logdet;
        for (a, b) in [
            (&mut self.dlog, &o.dlog),
            (&mut self.bh, &o.bh),
            (&mut self.acc, &o.acc),
            (&mut self.eh, &o.eh),
            (&mut self.tau, &o.tau),
        ] {
            a.iter_mut().zip(b).for_each(|(x, y)| *x += y);
        }
    }
}

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

/// The per-level sums over `range`; `theta_s[s]` scales secondary term s.
pub(super) fn levels<const Q: usize>(
    cp: &CrossProducts,
    shared: &Levels<Q>,
    theta_s: &[f64],
    range: std::ops::Range<usize>,
) -> Part {
    let (m, p, q2) = (cp.m, cp.p, cp.q2_total);
    let c1 = p + 1;
    let n_groups = shared.solvers.len();
    let nt = shared.solvers[0].nt;
    let grouped = shared.group.is_some();
    let mut logdet = LogDet::new();
    let mut part = Part {
        logdet: 0.0,
        dlog: vec![0.0; n_groups * nt],
        bh: vec![0.0; m * m],
        acc: vec![0.0; n_groups * nt * m * m],
        eh: if grouped {
            vec![0.0; n_groups * m * m]
        } else {
            Vec::new()
        },
        tau: if grouped { vec![0.0; n_groups] } else { Vec::new() },
    };
    let mut cols: Vec<usize> = Vec::new();
    let mut c: Vec<[f64; Q]> = Vec::new();
    let mut b: Vec<[f64; Q]> = Vec::new();
    let mut h: Vec<[f64; Q]> = Vec::new();
    let mut u: Vec<[f64; Q]> = Vec::new();
    let mut gw = vec![0.0; Q * Q];
    for i in range {
        let g = shared.group.map_or(0, |lg| lg[i] as usize);
        let solver = &shared.solvers[g];
        let w = shared.weight[g];
        let gi = &cp.g[i * Q * Q..(i + 1) * Q * Q];
        let gi = if grouped {
            gw.iter_mut().zip(gi).for_each(|(a, v)| *a = w * v);
            &gw[..]
        } else {
            gi
        };
        let zi = &cp.zxy[i * Q * c1..(i + 1) * Q * c1];
        cols.clear();
        c.clear();
        let (lo, hi) = cp.link_ranges[i];
        for link in &cp.links[lo..hi] {
            let v = &cp.link_values[link.start..link.start + Q];
            let th = theta_s[link.secondary] * w;
            let mut col = [0.0; Q];
            for r in 0..Q {
                col[r] = v[r] * th;
            }
            cols.push(link.offset);
            c.push(col);
        }
        // A level's all-zero columns (another cohort's terms, say) add
        // nothing to any sum: skip them, as the value kernel does.
        for j in 0..c1 {
            let mut col = [0.0; Q];
            for r in 0..Q {
                col[r] = w * zi[r * c1 + j];
            }
            if col.iter().any(|v| *v != 0.0) {
                cols.push(q2 + j);
                c.push(col);
            }
        }
        let (gt, l, inv) = level_block::<Q>(gi, &solver.tq, &mut logdet);
        let nc = cols.len();
        b.resize(nc, [0.0; Q]);
        h.resize(nc, [0.0; Q]);
        u.resize(nc, [0.0; Q]);
        for j in 0..nc {
            (b[j], h[j], u[j]) = solver.column(&gt, &l, &inv, &c[j]);
        }
        solver.add_dlog(&gt, &l, &inv, &mut part.dlog[g * nt..(g + 1) * nt]);
        if grouped {
            let eh = &mut part.eh[g * m * m..(g + 1) * m * m];
            for x in 0..nc {
                let row = cols[x] * m;
                for y in 0..nc {
                    let mut bh = 0.0;
                    let mut hh = 0.0;
                    for r in 0..Q {
                        bh += b[x][r] * h[y][r];
                        hh += h[x][r] * h[y][r];
                    }
                    part.bh[row + cols[y]] += bh;
                    eh[row + cols[y]] += bh + hh;
                }
            }
            let mut trace = 0.0;
            for r in 0..Q {
                let mut e = [0.0f64; Q];
                e[r] = 1.0;
                LevelSolver::<Q>::solve(&l, &inv, &mut e);
                trace += e[r];
            }
            part.tau[g] += Q as f64 - trace;
        } else {
            for x in 0..nc {
                let row = cols[x] * m;
                for y in 0..nc {
                    let mut s = 0.0;
                    for r in 0..Q {
                        s += b[x][r] * h[y][r];
                    }
                    part.bh[row + cols[y]] += s;
                }
            }
        }
        for (k, &(ia, ib)) in solver.pairs[..nt].iter().enumerate() {
            let blk = &mut part.acc[(g * nt + k) * m * m..(g * nt + k + 1) * m * m];
            for x in 0..nc {
                let ux = u[x][ia];
                let row = cols[x] * m;
                for y in 0..nc {
                    blk[row + cols[y]] += ux * h[y][ib];
                }
            }
        }
    }
    part.logdet = logdet.total();
    part
}

/// The sums of [`levels`] over all primary levels, in fixed chunks summed
/// in chunk order (in parallel above [`PARALLEL_LEVELS`]).
pub(super) fn all_levels(cp: &CrossProducts, per_range: &(dyn Fn(std::ops::Range<usize>) -> Part + Sync)) -> Part {
    if cp.n1 < PARALLEL_LEVELS {
        return per_range(0..cp.n1);
    }
    use rayon::prelude::*;
    let parts: Vec<Part> = (0..CHUNKS)
        .into_par_iter()
        .map(|c| per_range(c * cp.n1 / CHUNKS..(c + 1) * cp.n1 / CHUNKS))
        .collect();
    let mut it = parts.into_iter();
    let mut total = it.next().expect("CHUNKS > 0");
    for pt in it {
        total.add(&pt);
    }
    total
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

    /// Subtract the levels' `Σ BᵢᵀHᵢ` from the scaled dense part `s`,
    /// factor the result, and add the levels' log-determinant to the pieces.
    pub fn after_levels(
        cp: &CrossProducts,
        mut s: Vec<f64>,
        part: &Part,
        method: Method,
    ) -> Option<(DenseSolve, Pieces)> {
        for (v, d) in s.iter_mut().zip(&part.bh) {
            *v -= d;
        }
        let dense = DenseSolve::new(cp, &s, method)?;
        let pieces = Pieces {
            logdet_z: part.logdet + dense.logdet_dense_z,
            logdet_x: dense.logdet_x,
            pwrss: dense.r2,
        };
        Some((dense, pieces))
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

    /// The secondary intercept terms' entries of the gradients of A(θ) and
    /// r²(θ) (see the module note); `theta_s[s]` scales secondary term s.
    pub fn secondary_derivatives(&self, cp: &CrossProducts, theta_s: &[f64], a_grad: &mut [f64], r2_grad: &mut [f64]) {
        let q2 = cp.q2_total;
        for (s_idx, &kt) in cp.secondary.iter().enumerate() {
            let th = theta_s[s_idx];
            let from = cp.secondary_offset[s_idx];
            let to = cp.secondary_offset.get(s_idx + 1).copied().unwrap_or(q2);
            let at = cp.theta_offset[kt];
            if th == 0.0 {
                continue;
            }
            let n_s = (to - from) as f64;
            let trace: f64 = (from..to).map(|i| self.inv_t[(i, i)]).sum();
            a_grad[at] = 2.0 / th * (n_s - trace);
            r2_grad[at] = -2.0 / th * (from..to).map(|i| self.xi[i] * self.xi[i]).sum::<f64>();
        }
    }
}

#[cfg(test)]
mod tests {
    use super::super::deviance;
    use super::*;
    use crate::lmm::{MixedProblem, RandomTermData};

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
            level,
            columns,
            z,
        };
        let problem = MixedProblem {
            y,
            x_names: vec!["1".into(), "a".into(), "a2".into()],
            x,
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
            for method in [Method::Reml, Method::Ml] {
                let g = super::super::gradient_eval(&cp, &theta, method).unwrap();
                let d = deviance(&cp, &theta, method);
                assert!((g.deviance - d).abs() < 1e-9 * d.abs(), "{} vs {d}", g.deviance);
                for k in 0..theta.len() {
                    if theta[k] == 0.0 {
                        assert_eq!(g.grad[k], 0.0);
                        continue;
                    }
                    let h = 1e-5;
                    let (mut tp, mut tm) = (theta, theta);
                    tp[k] += h;
                    tm[k] -= h;
                    let fd = (deviance(&cp, &tp, method) - deviance(&cp, &tm, method)) / (2.0 * h);
                    assert!(
                        (g.grad[k] - fd).abs() < 1e-5 * (1.0 + fd.abs()),
                        "{method:?} θ{k}: {} vs {fd}",
                        g.grad[k]
                    );
                }
            }
        }
    }
}
