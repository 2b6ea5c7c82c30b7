//! The sparse route: every random term's columns in one sparse Cholesky
//! factor, for models whose terms beside the largest one are too large for
//! the blocked route's dense part (two large crossed factors, or pupils who
//! change school between waves in many schools). Derivation and choice of
//! route: notes/criterion.md, "The sparse route".
//!
//! With `M(θ) = ΛᵀZᵀZΛ + I` (all random columns), `W = ΛᵀZᵀ[X y]` and
//! `B = [X y]ᵀ[X y]`, the Schur complement `S = B − WᵀM⁻¹W` holds
//! `XᵀV⁻¹X` (relative to σ²), and the pieces of the profiled criterion are
//! `log|L_Z|² = log|M|`, `log|R_X|² = log|S_XX|` and
//! `r² = S_yy − S_yX S_XX⁻¹ S_Xy`. The sparsity pattern of M does not depend
//! on θ (Λ is block diagonal by level), so its symbolic analysis (ordering
//! and elimination tree) is made once and each evaluation refactors the
//! values only.

// Index loops mirror the matrix notation of the derivation.
#![allow(clippy::needless_range_loop)]

use std::collections::HashMap;

use faer::Mat;
use faer::dyn_stack::{MemBuffer, MemStack};
use faer::sparse::linalg::SupernodalThreshold;
use faer::sparse::linalg::cholesky::{
    CholeskySymbolicParams, LltRef, SymbolicCholesky, SymbolicCholeskyRaw, SymmetricOrdering,
    factorize_symbolic_cholesky, simplicial::SymbolicSimplicialCholesky, supernodal::SupernodalLltRef,
};
use faer::sparse::{SparseColMatRef, SymbolicSparseColMatRef};
use faer::{Conj, Side};

use super::criterion::Pieces;
use super::criterion::factor_derivatives;
use super::fit::{
    Estimates, Fit, FitOptions, RandomComponent, Record, Route, SearchSpace, VarianceSensitivity, assemble, best_start,
    boundary_and_free,
};
use super::search::search;
use super::sensitivity::{from_derivatives, piece_derivatives_by, stencil_steps};
use super::solution::values_per_row;
use super::start::{base_start, row_scales};
use super::{Method, MixedProblem, Subspace, unpack_factor};
use crate::error::{Error, Result};

/// The cross-products of a problem laid out for the sparse route, with the
/// symbolic analysis of `M(θ)`.
pub(crate) struct SparseSystem {
    p: usize,
    /// Per term: q, and the index of its first level's block.
    term_q: Vec<usize>,
    term_block: Vec<usize>,
    /// Per block (a level of a term): its term and first column.
    block_term: Vec<usize>,
    block_col: Vec<usize>,
    n_z: usize,
    /// Block pairs (bi ≥ bj) with non-zero cross-products: the raw
    /// `Z_biᵀZ_bj` (q_bi × q_bj, row-major) starts at `pair_raw[k]`.
    pairs: Vec<(usize, usize)>,
    pair_raw: Vec<usize>,
    raw: Vec<f64>,
    /// Where each raw entry goes in the values of M's lower triangle
    /// (`usize::MAX` above the diagonal of a diagonal block).
    slot: Vec<usize>,
    col_ptr: Vec<usize>,
    row_idx: Vec<usize>,
    /// `Zᵀ[X y]`, n_z × (p+1), row-major.
    zxy: Vec<f64>,
    /// `[X y]ᵀ[X y]`, (p+1)², row-major.
    xy: Vec<f64>,
    /// The response is centred by this when X has an intercept column
    /// (`intercept`), as on the blocked route.
    pub(crate) y_shift: f64,
    pub(crate) intercept: Option<usize>,
    symbolic: SymbolicCholesky<usize>,
    /// Per column of the simplicial factor, its (row, slot) pairs by row.
    sorted: Vec<(usize, usize)>,
}

/// One factorisation at θ: the terms' factors, the values of M's factor
/// and `M⁻¹W`, with the solution.
struct Factored {
    t: Vec<Vec<f64>>,
    l_values: Vec<f64>,
    v: Mat<f64>,
    solution: SparseSolution,
}

/// One evaluation's solution: the pieces, and what the estimates need.
pub(crate) struct SparseSolution {
    pub(crate) pieces: Pieces,
    /// β̂ for the centred response.
    pub(crate) beta: Vec<f64>,
    /// `S_XX⁻¹`, p×p row-major: cov(β̂) is σ² times it.
    pub(crate) sxx_inv: Vec<f64>,
    /// The spherical random effects u, by column of M.
    pub(crate) u: Vec<f64>,
}

impl SparseSystem {
    /// Gather the cross-products in one pass over the rows and analyse the
    /// pattern of M.
    ///
    /// # Errors
    /// [`Error::Numerical`] when the symbolic analysis fails (out of memory).
    pub(crate) fn new(problem: &MixedProblem) -> Result<SparseSystem> {
        let p = problem.p();
        let mut term_q = Vec::new();
        let mut term_block = Vec::new();
        let mut block_term = Vec::new();
        let mut block_col = Vec::new();
        let mut n_z = 0;
        for (k, t) in problem.terms.iter().enumerate() {
            term_q.push(t.q());
            term_block.push(block_term.len());
            for _ in 0..t.n_levels() {
                block_term.push(k);
                block_col.push(n_z);
                n_z += t.q();
            }
        }
        let (intercept, y_shift) = super::crossprod::centring(problem);
        let Gathered {
            pairs,
            pair_raw,
            raw,
            zxy,
            xy,
        } = gather(problem, &term_q, &term_block, &block_col, n_z, y_shift);
        let (slot, col_ptr, row_idx) =
            lower_pattern(&pairs, &pair_raw, raw.len(), &term_q, &block_term, &block_col, n_z);
        let failed = |what: String| Error::Numerical {
            step: "sparse route".into(),
            message: what,
        };
        if col_ptr.len() != n_z + 1 {
            return Err(failed("a random-effect level without rows".into()));
        }
        let pattern = SymbolicSparseColMatRef::new_checked(n_z, n_z, &col_ptr, None, &row_idx);
        // A simplicial factor, whose columns the selected inversion of the
        // gradient walks (notes/criterion.md, "The sparse route").
        let symbolic = factorize_symbolic_cholesky(
            pattern,
            Side::Lower,
            SymmetricOrdering::Amd,
            CholeskySymbolicParams {
                supernodal_flop_ratio_threshold: SupernodalThreshold::FORCE_SIMPLICIAL,
                ..Default::default()
            },
        )
        .map_err(|e| failed(format!("the symbolic analysis failed: {e:?}")))?;
        let mut sorted = Vec::new();
        if let SymbolicCholeskyRaw::Simplicial(sym) = symbolic.raw() {
            let (ptr, rows) = (sym.col_ptr(), sym.row_idx());
            sorted.reserve(rows.len());
            for j in 0..sym.ncols() {
                let from = sorted.len();
                sorted.extend((ptr[j]..ptr[j + 1]).map(|t| (rows[t], t)));
                sorted[from..].sort_unstable();
            }
        }
        Ok(SparseSystem {
            p,
            term_q,
            term_block,
            block_term,
            block_col,
            n_z,
            pairs,
            pair_raw,
            raw,
            slot,
            col_ptr,
            row_idx,
            zxy,
            xy,
            y_shift,
            intercept,
            symbolic,
            sorted,
        })
    }

    /// Each term's relative factor T (row-major q×q) at θ.
    fn factors(&self, theta: &[f64]) -> Vec<Vec<f64>> {
        let mut off = 0;
        self.term_q
            .iter()
            .map(|&q| {
                let t = unpack_factor(&theta[off..off + q * (q + 1) / 2], q);
                off += q * (q + 1) / 2;
                t
            })
            .collect()
    }

    /// The pieces at θ, with the solution when `solve` is set; `None` when
    /// a factorisation fails.
    pub(crate) fn evaluate(&self, theta: &[f64], solve: bool) -> Option<SparseSolution> {
        self.factor(theta, solve).map(|f| f.solution)
    }

    /// The factor of M at θ and everything the solution and the gradient
    /// need.
    fn factor(&self, theta: &[f64], solve: bool) -> Option<Factored> {
        let (p, c1) = (self.p, self.p + 1);
        let t = self.factors(theta);
        // M's values: Tᵢᵀ (Z_biᵀZ_bj) Tⱼ per block pair, plus I.
        let mut values = vec![0.0; self.row_idx.len()];
        for (k, &(bi, bj)) in self.pairs.iter().enumerate() {
            let (ki, kj) = (self.block_term[bi], self.block_term[bj]);
            let (qi, qj) = (self.term_q[ki], self.term_q[kj]);
            let (ti, tj) = (&t[ki], &t[kj]);
            let g = &self.raw[self.pair_raw[k]..self.pair_raw[k] + qi * qj];
            for ci in 0..qi {
                for cj in 0..qj {
                    let s = self.slot[self.pair_raw[k] + ci * qj + cj];
                    if s == usize::MAX {
                        continue;
                    }
                    let mut v = 0.0;
                    for a in ci..qi {
                        let ta = ti[a * qi + ci];
                        if ta == 0.0 {
                            continue;
                        }
                        for b in cj..qj {
                            v += ta * g[a * qj + b] * tj[b * qj + cj];
                        }
                    }
                    if bi == bj && ci == cj {
                        v += 1.0;
                    }
                    values[s] = v;
                }
            }
        }
        let par = faer::get_global_parallelism();
        let m = SparseColMatRef::new(
            SymbolicSparseColMatRef::new_checked(self.n_z, self.n_z, &self.col_ptr, None, &self.row_idx),
            &values,
        );
        let mut l_values = vec![0.0; self.symbolic.len_val()];
        let mut buf = MemBuffer::new(
            self.symbolic
                .factorize_numeric_llt_scratch::<f64>(par, Default::default()),
        );
        self.symbolic
            .factorize_numeric_llt(
                &mut l_values,
                m,
                Side::Lower,
                Default::default(),
                par,
                MemStack::new(&mut buf),
                Default::default(),
            )
            .ok()?;
        let logdet_z = 2.0 * log_diagonal(&self.symbolic, &l_values);
        // W = ΛᵀZᵀ[X y], then M⁻¹W.
        let mut w = Mat::<f64>::zeros(self.n_z, c1);
        for (b, &col) in self.block_col.iter().enumerate() {
            let k = self.block_term[b];
            let q = self.term_q[k];
            let tk = &t[k];
            for c in 0..q {
                for a in c..q {
                    let ta = tk[a * q + c];
                    if ta == 0.0 {
                        continue;
                    }
                    let src = &self.zxy[(col + a) * c1..(col + a + 1) * c1];
                    for j in 0..c1 {
                        w[(col + c, j)] += ta * src[j];
                    }
                }
            }
        }
        let mut v = w.clone();
        let mut sbuf = MemBuffer::new(self.symbolic.solve_in_place_scratch::<f64>(c1, par));
        LltRef::new(&self.symbolic, &l_values).solve_in_place_with_conj(
            Conj::No,
            v.as_mut(),
            par,
            MemStack::new(&mut sbuf),
        );
        // S = B − WᵀM⁻¹W.
        let mut s = self.xy.clone();
        for a in 0..c1 {
            for b in 0..=a {
                let mut acc = 0.0;
                for r in 0..self.n_z {
                    acc += w[(r, a)] * v[(r, b)];
                }
                s[a * c1 + b] -= acc;
                if a != b {
                    s[b * c1 + a] -= acc;
                }
            }
        }
        let sxx = Mat::from_fn(p, p, |i, j| s[i * c1 + j]);
        let sxx_llt = sxx.llt(Side::Lower).ok()?;
        let lx = sxx_llt.L();
        let logdet_x = 2.0 * (0..p).map(|i| lx[(i, i)].ln()).sum::<f64>();
        let mut beta = Mat::from_fn(p, 1, |i, _| s[i * c1 + p]);
        use faer::linalg::solvers::SolveCore;
        sxx_llt.solve_in_place_with_conj(Conj::No, beta.as_mut());
        let beta: Vec<f64> = (0..p).map(|i| beta[(i, 0)]).collect();
        let pwrss = s[p * c1 + p] - (0..p).map(|i| s[i * c1 + p] * beta[i]).sum::<f64>();
        if pwrss.is_nan() || pwrss <= 0.0 || !logdet_z.is_finite() || !logdet_x.is_finite() {
            return None;
        }
        let pieces = Pieces {
            logdet_z,
            logdet_x,
            pwrss,
        };
        let (sxx_inv, u) = if solve {
            use faer::linalg::solvers::DenseSolveCore;
            let inv = sxx_llt.inverse();
            // u = M⁻¹(W_y − W_X β̂).
            let u = (0..self.n_z)
                .map(|r| v[(r, p)] - (0..p).map(|j| v[(r, j)] * beta[j]).sum::<f64>())
                .collect();
            ((0..p * p).map(|k| inv[(k / p, k % p)]).collect(), u)
        } else {
            (Vec::new(), Vec::new())
        };
        Some(Factored {
            t,
            l_values,
            v,
            solution: SparseSolution {
                pieces,
                beta,
                sxx_inv,
                u,
            },
        })
    }

    /// The profiled deviance and its gradient in θ (notes/criterion.md,
    /// "The sparse route"); `None` when a factorisation fails or a term of
    /// several coefficients has a singular factor (a variance at zero).
    pub(crate) fn gradient(&self, theta: &[f64], method: Method, n: usize) -> Option<(f64, Vec<f64>)> {
        let p = self.p;
        let f = self.factor(theta, true)?;
        let SymbolicCholeskyRaw::Simplicial(sym) = self.symbolic.raw() else {
            return None;
        };
        let sigma = selected_inverse(sym, &self.sorted, &f.l_values)?;
        let inv_perm: Option<&[usize]> = self.symbolic.perm().map(|pm| pm.arrays().1);
        let new_index = |i: usize| inv_perm.map_or(i, |ip| ip[i]);
        let col_ptr = sym.col_ptr();
        // Entry (i, j) of M⁻¹ from the selected inverse of the permuted factor.
        let m_inv = |i: usize, j: usize| -> Option<f64> {
            let (a, b) = (new_index(i), new_index(j));
            let (r, c) = (a.max(b), a.min(b));
            let col = &self.sorted[col_ptr[c]..col_ptr[c + 1]];
            col.binary_search_by_key(&r, |&(row, _)| row)
                .ok()
                .map(|t| sigma[col[t].1])
        };
        let sol = &f.solution;
        let mut a_grad = vec![0.0; theta.len()];
        let mut r2_grad = vec![0.0; theta.len()];
        let mut at = 0;
        for (k, &q) in self.term_q.iter().enumerate() {
            let tk = &f.t[k];
            let from = self.term_block[k];
            let to = self.term_block.get(k + 1).copied().unwrap_or(self.block_col.len());
            let levels = to - from;
            let nt = q * (q + 1) / 2;
            if q == 1 && tk[0] == 0.0 {
                // The deviance is even in a lone θ: its derivative at 0 is 0.
                at += nt;
                continue;
            }
            // M_k = L·I − Σ_l N_l and R = Σ_l u_l u_lᵀ over the term's levels.
            let mut msum = vec![0.0; q * q];
            let mut r = vec![0.0; q * q];
            for b in from..to {
                let c0 = self.block_col[b];
                for x in 0..q {
                    for y in 0..=x {
                        let mut nv = m_inv(c0 + x, c0 + y)?;
                        if method == Method::Reml {
                            // (A₁⁻¹)_ZZ = M⁻¹ + V_X S_XX⁻¹ V_Xᵀ.
                            for i in 0..p {
                                for j in 0..p {
                                    nv += f.v[(c0 + x, i)] * sol.sxx_inv[i * p + j] * f.v[(c0 + y, j)];
                                }
                            }
                        }
                        msum[x * q + y] -= nv;
                        if x != y {
                            msum[y * q + x] -= nv;
                        }
                        let ru = sol.u[c0 + x] * sol.u[c0 + y];
                        r[x * q + y] += ru;
                        if x != y {
                            r[y * q + x] += ru;
                        }
                    }
                }
            }
            for x in 0..q {
                msum[x * q + x] += levels as f64;
            }
            factor_derivatives(tk, q, &msum, &r, &mut a_grad[at..at + nt], &mut r2_grad[at..at + nt])?;
            at += nt;
        }
        let nu = match method {
            Method::Reml => (n - p) as f64,
            Method::Ml => n as f64,
        };
        let pw = sol.pieces.pwrss;
        let grad = a_grad.iter().zip(&r2_grad).map(|(a, r)| a + nu * r / pw).collect();
        Some((sol.pieces.profiled_deviance(method, n, p), grad))
    }

    /// The spherical effects u split by term (level by level, q per level).
    pub(crate) fn u_by_term(&self, u: &[f64]) -> Vec<Vec<f64>> {
        (0..self.term_q.len())
            .map(|k| {
                let from = self.block_col[self.term_block[k]];
                let to = self.term_block.get(k + 1).map_or(self.n_z, |&b| self.block_col[b]);
                u[from..to].to_vec()
            })
            .collect()
    }
}

/// The cross-products of the one pass over the rows: each pair of levels
/// that share a row (bi ≥ bj) with its raw `Z_biᵀZ_bj` (q_bi × q_bj,
/// row-major, from `pair_raw[k]` in `raw`), `Zᵀ[X y]` and `[X y]ᵀ[X y]`.
struct Gathered {
    pairs: Vec<(usize, usize)>,
    pair_raw: Vec<usize>,
    raw: Vec<f64>,
    zxy: Vec<f64>,
    xy: Vec<f64>,
}

fn gather(
    problem: &MixedProblem,
    term_q: &[usize],
    term_block: &[usize],
    block_col: &[usize],
    n_z: usize,
    y_shift: f64,
) -> Gathered {
    let (n, p) = (problem.n(), problem.p());
    let c1 = p + 1;
    // One pass: the block pairs' cross-products, Zᵀ[X y] and [X y]ᵀ[X y].
    let mut index: HashMap<(usize, usize), usize> = HashMap::new();
    let mut pairs: Vec<(usize, usize)> = Vec::new();
    let mut pair_raw: Vec<usize> = Vec::new();
    let mut raw: Vec<f64> = Vec::new();
    let mut zxy = vec![0.0; n_z * c1];
    let mut xy = vec![0.0; c1 * c1];
    let mut row = vec![0.0; c1];
    let mut x_store = vec![0.0; p];
    let n_terms = problem.terms.len();
    let mut blocks = vec![0usize; n_terms];
    for r in 0..n {
        row[..p].copy_from_slice(problem.x_row(r, &mut x_store));
        row[p] = problem.y[r] - y_shift;
        for a in 0..c1 {
            for b in 0..c1 {
                xy[a * c1 + b] += row[a] * row[b];
            }
        }
        for (k, t) in problem.terms.iter().enumerate() {
            blocks[k] = term_block[k] + t.level[r] as usize;
            let col = block_col[blocks[k]];
            for (c, z) in t.z.iter().enumerate() {
                let zr = z.at(r);
                if zr != 0.0 {
                    let dst = &mut zxy[(col + c) * c1..(col + c + 1) * c1];
                    for (d, v) in dst.iter_mut().zip(&row) {
                        *d += zr * v;
                    }
                }
            }
        }
        for ki in 0..n_terms {
            for kj in 0..=ki {
                // Terms come in block order, so bi ≥ bj.
                let (bi, bj) = (blocks[ki], blocks[kj]);
                let (qi, qj) = (term_q[ki], term_q[kj]);
                let at = *index.entry((bi, bj)).or_insert_with(|| {
                    pairs.push((bi, bj));
                    pair_raw.push(raw.len());
                    raw.resize(raw.len() + qi * qj, 0.0);
                    pairs.len() - 1
                });
                let start = pair_raw[at];
                let (ti, tj) = (&problem.terms[ki], &problem.terms[kj]);
                for a in 0..qi {
                    let za = ti.z[a].at(r);
                    if za == 0.0 {
                        continue;
                    }
                    for b in 0..qj {
                        raw[start + a * qj + b] += za * tj.z[b].at(r);
                    }
                }
            }
        }
    }
    Gathered {
        pairs,
        pair_raw,
        raw,
        zxy,
        xy,
    }
}

/// The lower triangle of M in compressed columns (pairs by block column,
/// then block row), with the slot in its values of each raw entry
/// (`usize::MAX` above the diagonal of a diagonal block).
fn lower_pattern(
    pairs: &[(usize, usize)],
    pair_raw: &[usize],
    raw_len: usize,
    term_q: &[usize],
    block_term: &[usize],
    block_col: &[usize],
    n_z: usize,
) -> (Vec<usize>, Vec<usize>, Vec<usize>) {
    // The lower triangle of M in compressed columns: pairs by block
    // column, then block row.
    let mut order: Vec<usize> = (0..pairs.len()).collect();
    order.sort_unstable_by_key(|&k| (pairs[k].1, pairs[k].0));
    let mut slot = vec![usize::MAX; raw_len];
    let mut col_ptr = Vec::with_capacity(n_z + 1);
    let mut row_idx = Vec::new();
    col_ptr.push(0);
    let mut start = 0;
    while start < order.len() {
        let bj = pairs[order[start]].1;
        let mut end = start;
        while end < order.len() && pairs[order[end]].1 == bj {
            end += 1;
        }
        let qj = term_q[block_term[bj]];
        for cj in 0..qj {
            for &k in &order[start..end] {
                let bi = pairs[k].0;
                let qi = term_q[block_term[bi]];
                for ci in 0..qi {
                    if bi == bj && ci < cj {
                        continue;
                    }
                    slot[pair_raw[k] + ci * qj + cj] = row_idx.len();
                    row_idx.push(block_col[bi] + ci);
                }
            }
            col_ptr.push(row_idx.len());
        }
        start = end;
    }
    (slot, col_ptr, row_idx)
}

/// Fit `problem` on the sparse route, with `given` (a nearby model's θ)
/// as the start when it fits. The search and the Newton finish use the
/// analytic gradient; Satterthwaite's derivatives come from differences of
/// the same pieces as on the blocked route.
///
/// # Errors
/// [`Error::Spec`] when there are no more rows than fixed effects;
/// [`Error::Numerical`] when the fixed design is rank deficient or the
/// criterion fails at the start or the optimum.
pub(crate) fn fit(problem: &MixedProblem, options: FitOptions, given: Option<&[f64]>) -> Result<Fit> {
    let (n, p) = (problem.n(), problem.p());
    if n <= p {
        return Err(Error::Spec {
            parameter: "model".into(),
            message: format!("{n} usable rows for {p} fixed effects; simplify the model or supply more data"),
        });
    }
    let sys = SparseSystem::new(problem)?;
    let method = options.method;
    if sys.evaluate(&vec![0.0; problem.n_theta()], false).is_none() {
        return Err(Error::Numerical {
            step: "fixed-effect design".into(),
            message:
                "the fixed-effect columns are collinear (or one is constant beside the intercept); drop or recode one"
                    .into(),
        });
    }
    let dev = |th: &[f64]| {
        sys.evaluate(th, false)
            .map_or(f64::INFINITY, |s| s.pieces.profiled_deviance(method, n, p))
    };
    let base = base_start(problem);
    let start = best_start(&Subspace::of(problem), &base, given, || None, &dev)?;
    let theta_scale = row_scales(problem, &base);
    let space = SearchSpace::new(problem, &theta_scale);
    let sdev = |x: &[f64]| dev(&space.theta(x));
    // The analytic gradient in the scaled coordinates (None where a factor
    // is singular: differences are taken there).
    let sgrad = |x: &[f64]| -> Option<(f64, Vec<f64>)> {
        sys.gradient(&space.theta(x), method, n)
            .map(|(d, g)| (d, space.gradient(&g)))
    };
    let (current, (iterations, evaluations, restarts)) = search(
        &sdev,
        Some(&sgrad),
        None,
        &space.point(&start),
        None,
        &space.reduce(&problem.theta_lower()),
        &space.point(&base),
        options.optim,
    );
    let theta = space.theta(&current.theta);
    let (estimates, min_curvature, extra) = results(&sys, problem, options, theta, &theta_scale)?;
    let (boundary, _) = boundary_and_free(problem, &estimates.theta);
    let record = Record {
        polished: current.polished,
        iterations,
        // The start's candidates cost up to three evaluations.
        evaluations: evaluations + 3 + extra,
        restarts,
        min_curvature,
        boundary,
        inverse_hessian: None,
        route: Route::Sparse,
    };
    Ok(assemble(problem, method, estimates, record))
}

/// The estimates at the optimum `theta`, with the smallest curvature and
/// the evaluations that Satterthwaite's derivatives took.
fn results(
    sys: &SparseSystem,
    problem: &MixedProblem,
    options: FitOptions,
    theta: Vec<f64>,
    theta_scale: &[f64],
) -> Result<(Estimates, Option<f64>, usize)> {
    let (n, p) = (problem.n(), problem.p());
    let method = options.method;
    let sol = sys.evaluate(&theta, true).ok_or_else(|| Error::Numerical {
        step: "final evaluation".into(),
        message: "the criterion failed at the optimum; please report this with the data shape".into(),
    })?;
    let sigma2 = sol.pieces.sigma2(method, n, p);
    let (_, free) = boundary_and_free(problem, &theta);
    let mut beta = sol.beta.clone();
    if let Some(j) = sys.intercept {
        beta[j] += sys.y_shift;
    }
    let t = sys.factors(&theta);
    let conditional = values_per_row(problem, options.detail, &t, &beta, || sys.u_by_term(&sol.u));
    let random = problem
        .terms
        .iter()
        .zip(&t)
        .map(|(term, tk)| RandomComponent::from_factor(term, tk, sigma2))
        .collect();
    // Satterthwaite's derivatives and the curvature from differences of
    // the pieces, as on the blocked route without a gradient.
    let a_of = |pc: &Pieces| match method {
        Method::Reml => pc.logdet_z + pc.logdet_x,
        Method::Ml => pc.logdet_z,
    };
    let at = |th: &[f64]| {
        let s = sys.evaluate(th, true)?;
        Some((
            a_of(&s.pieces),
            s.pieces.pwrss,
            s.sxx_inv.iter().map(|v| sigma2 * v).collect(),
        ))
    };
    let h = stencil_steps(&theta, theta_scale, &free);
    let mut extra = 0;
    let derivs = piece_derivatives_by(at, &theta, &free, &h, &mut extra);
    let (sensitivity, min_curvature) = from_derivatives(derivs, n, p, free.len(), method, sigma2);
    let sensitivity = if options.detail.inference() {
        sensitivity
    } else {
        VarianceSensitivity::unknown(free.len() + 1, p)
    };
    let estimates = Estimates {
        theta,
        beta,
        cov_beta: sol.sxx_inv.iter().map(|v| sigma2 * v).collect(),
        sigma2,
        deviance: sol.pieces.profiled_deviance(method, n, p),
        random,
        conditional,
        sensitivity,
    };
    Ok((estimates, min_curvature, extra))
}

/// The entries of M⁻¹ on the pattern of its simplicial factor L (Takahashi's
/// recurrences, in the values' layout): for each column j from the last,
/// `Σ_ij = −(1/L_jj) Σ_k L_kj Σ_ik` over the column's rows i, k > j, then
/// `Σ_jj = 1/L_jj² − (1/L_jj) Σ_k L_kj Σ_kj`. The rows of a column's
/// pattern are pairwise in each other's columns (the factor's pattern is
/// chordal), so every Σ_ik needed is already computed. `sorted` lists each
/// column's (row, slot) pairs by row, diagonal first, so that the rows of a
/// column are found in another by one merge. `None` if one is not found (a
/// pattern that is not a Cholesky factor's).
fn selected_inverse(sym: &SymbolicSimplicialCholesky<usize>, sorted: &[(usize, usize)], l: &[f64]) -> Option<Vec<f64>> {
    let n = sym.nrows();
    let col_ptr = sym.col_ptr();
    let mut sigma = vec![0.0; l.len()];
    let mut acc: Vec<f64> = Vec::new();
    for j in (0..n).rev() {
        let (lo, hi) = (col_ptr[j], col_ptr[j + 1]);
        let ljj = l[lo];
        // The column's rows below the diagonal, ascending, with their slots.
        let below = &sorted[lo + 1..hi];
        acc.clear();
        acc.resize(below.len(), 0.0);
        for (b, &(k, kpos)) in below.iter().enumerate() {
            let col_k = &sorted[col_ptr[k]..col_ptr[k + 1]];
            let lkj = l[kpos];
            // Rows i ≥ k of this column, found in column k (both ascending).
            let mut t = 0;
            for (a, &(i, ipos)) in below.iter().enumerate().skip(b) {
                while t < col_k.len() && col_k[t].0 < i {
                    t += 1;
                }
                if t == col_k.len() || col_k[t].0 != i {
                    return None;
                }
                let sik = sigma[col_k[t].1];
                acc[a] += lkj * sik;
                if i != k {
                    acc[b] += l[ipos] * sik;
                }
            }
        }
        let mut diag = 1.0 / (ljj * ljj);
        for (a, v) in acc.iter().enumerate() {
            let slot = below[a].1;
            let sij = -v / ljj;
            sigma[slot] = sij;
            diag -= l[slot] * sij / ljj;
        }
        sigma[lo] = diag;
    }
    Some(sigma)
}

/// Σ log Lᵢᵢ of a numeric factor, whichever layout the analysis chose.
fn log_diagonal(symbolic: &SymbolicCholesky<usize>, values: &[f64]) -> f64 {
    match symbolic.raw() {
        SymbolicCholeskyRaw::Simplicial(s) => {
            // The diagonal is each column's first stored entry.
            let ptr = s.col_ptr();
            (0..s.ncols()).map(|j| values[ptr[j]].ln()).sum()
        }
        SymbolicCholeskyRaw::Supernodal(s) => {
            let l = SupernodalLltRef::new(s, values);
            (0..s.n_supernodes())
                .map(|k| {
                    let block = l.supernode(k).val();
                    (0..block.ncols()).map(|j| block[(j, j)].ln()).sum::<f64>()
                })
                .sum()
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::lmm::{Method, RandomTermData, criterion};

    // The sparse route's pieces equal the blocked route's at several θ
    // (closed-form identity: both are the same determinants and residual),
    // for pupils crossed with raters, with a participant slope, a
    // correlated rater slope and a diagonal term among them.
    #[test]
    fn sparse_pieces_equal_the_blocked_pieces() {
        let mut rng = crate::simulate::Rng::new(5);
        let (n_id, per, raters) = (60, 4, 9);
        let n = n_id * per;
        let (mut x, mut y, mut a_col, mut id, mut ra) = (vec![], vec![], vec![], vec![], vec![]);
        for i in 0..n_id {
            for w in 0..per {
                let a = w as f64 + rng.uniform() - 2.0;
                let r = (i * 3 + w * 5) % raters;
                x.extend([1.0, a]);
                y.push(3.0 + a + rng.normal() + 0.5 * r as f64);
                a_col.push(a);
                id.push(i as u32);
                ra.push(r as u32);
            }
        }
        let problem = MixedProblem {
            y: y.into(),
            x_names: vec!["1".into(), "a".into()],
            x: x.into(),
            terms: vec![
                RandomTermData::numbered("id", n_id, id, &["intercept", "a"], vec![vec![1.0; n], a_col.clone()]),
                RandomTermData::numbered("rater", raters, ra, &["intercept", "a"], vec![vec![1.0; n], a_col]),
            ],
        };
        let sparse = SparseSystem::new(&problem).unwrap();
        let cp = crate::lmm::crossprod::CrossProducts::new(&problem);
        for theta in [
            [1.2, 0.3, 0.5, 0.8, -0.2, 0.4],
            [0.7, 0.0, 0.2, 1.1, 0.0, 0.6],
            [0.9, -0.4, 0.6, 0.5, 0.3, 0.2],
        ] {
            let s = sparse.evaluate(&theta, true).unwrap().pieces;
            let b = criterion::evaluate(&cp, &theta, false).unwrap().pieces;
            for (x, y) in [(s.logdet_z, b.logdet_z), (s.logdet_x, b.logdet_x), (s.pwrss, b.pwrss)] {
                assert!((x - y).abs() < 1e-10 * (1.0 + y.abs()), "{x} vs {y}");
            }
            let (ds, db) = (
                s.profiled_deviance(Method::Reml, n, 2),
                b.profiled_deviance(Method::Reml, n, 2),
            );
            assert!((ds - db).abs() < 1e-10 * db.abs());
            // The gradient (selected inversion) against central differences
            // of the deviance, by REML and ML; a singular rater factor
            // (slope variance 0) is declined.
            for method in [Method::Reml, Method::Ml] {
                let dev = |th: &[f64]| {
                    sparse
                        .evaluate(th, false)
                        .unwrap()
                        .pieces
                        .profiled_deviance(method, n, 2)
                };
                let Some((d, g)) = sparse.gradient(&theta, method, n) else {
                    assert_eq!(theta[5], 0.0);
                    continue;
                };
                assert!((d - dev(&theta)).abs() < 1e-10 * d.abs());
                for k in 0..theta.len() {
                    let h = 1e-5;
                    let (mut tp, mut tm) = (theta, theta);
                    tp[k] += h;
                    tm[k] -= h;
                    let fd = (dev(&tp) - dev(&tm)) / (2.0 * h);
                    assert!(
                        (g[k] - fd).abs() < 1e-5 * (1.0 + fd.abs()),
                        "{method:?} θ{k}: {} vs {fd}",
                        g[k]
                    );
                }
            }
        }
        assert!(
            sparse
                .gradient(&[1.2, 0.3, 0.5, 0.8, -0.2, 0.0], Method::Reml, n)
                .is_none()
        );
    }
}
