//! The analytic gradient over the primary levels in one fused pass or in
//! two passes (notes/criterion.md, "The gradient in two passes" and "The
//! fused pass").
//!
//! The first pass is the value's: per level the solves with `Aᵢ`, `Σ BᵢᵀHᵢ`
//! (lower triangle) and `∂ log|Aᵢ|`. The dense part is then factored, which
//! gives ξ and the inverse whose trace enters `∂ log|A₁|`. The second pass
//! contracts each level's `uᵢₐ hᵢᵦᵀ` with them at once, instead of summing
//! one m×m matrix per θ entry: `ξᵀ(uₐhᵦᵀ)ξ = (uₐ·ξ)(hᵦ·ξ)` costs O(columns)
//! per level, and `tr(N uₐhᵦᵀ) = hᵦ·(N uₐ)` O(columns²) once per coefficient
//! a instead of once per θ entry. When levels have few non-zero columns
//! and the factor few entries, summing those m×m matrices in the first
//! pass costs less than opening every level again ([`is_fused`]).

// Index loops mirror the matrix notation of the derivation.
#![allow(clippy::needless_range_loop)]

use super::super::crossprod::CrossProducts;
use super::super::{Method, unpack_factor};
use super::gradient::{GradientEval, LevelSolver};
use super::primary::{CHUNKS, PARALLEL_LEVELS, level_block};
use super::secondary::{DenseSolve, Levels};
use super::{LogDet, factors, scaled_dense};

/// Whether the two-pass gradient applies: a primary term of 1 to 4
/// coefficients, alone or beside other terms (intercepts, or intercepts
/// and slopes).
pub fn applies(cp: &CrossProducts) -> bool {
    cp.primary.is_some() && (1..=4).contains(&cp.q1)
}

/// A level's non-zero columns of `Cᵢ = Z₁ᵢᵀ[Z₂Λ₂ X y]`, in increasing dense
/// index: its secondary blocks (each right-multiplied by its term's factor
/// T_s, row-major in `sec`), then X and y.
fn gather<const Q: usize>(
    cp: &CrossProducts,
    i: usize,
    sec: &[Vec<f64>],
    w: f64,
    cols: &mut Vec<usize>,
    c: &mut Vec<[f64; Q]>,
) {
    let c1 = cp.p + 1;
    cols.clear();
    c.clear();
    let (lo, hi) = cp.link_range(i);
    for link in &cp.links[lo..hi] {
        let ts = &sec[link.secondary()];
        if ts.len() == 1 {
            let v = &cp.link_values[link.start()..link.start() + Q];
            let th = ts[0] * w;
            let mut col = [0.0; Q];
            for r in 0..Q {
                col[r] = v[r] * th;
            }
            cols.push(link.offset());
            c.push(col);
            continue;
        }
        // A block of q_s columns: (Z₁ᵢᵀZ_s,l) T_s, T_s lower triangular.
        for b in 0..cp.term_q[cp.secondary[link.secondary()]] {
            cols.push(link.offset() + b);
            c.push(std::array::from_fn(|r| cp.link_entry(link, ts, r, b) * w));
        }
    }
    let zi = &cp.zxy[i * Q * c1..(i + 1) * Q * c1];
    for j in 0..c1 {
        let mut col = [0.0; Q];
        for r in 0..Q {
            col[r] = w * zi[r * c1 + j];
        }
        if col.iter().any(|v| *v != 0.0) {
            cols.push(cp.q2_total + j);
            c.push(col);
        }
    }
}

/// The first pass's sums over a range of levels.
pub(super) struct First {
    pub logdet: f64,
    /// Per group, per θ entry of its factor, Σ ∂log|Aᵢ|.
    pub dlog: Vec<f64>,
    /// Σ BᵢᵀHᵢ, m×m, lower triangle.
    pub bh: Vec<f64>,
    /// Grouped levels only: per group, Σ (q − tr Aᵢ⁻¹).
    pub tau: Vec<f64>,
    /// The fused pass only: per entry (r, c) of the lower triangle of an
    /// m×m matrix, packed row by row (entry r(r+1)/2 + c), 1 + θ entries
    /// values side by side: `Σ BᵢᵀHᵢ` and, per θ entry of the factor,
    /// `Σ (uᵢₐ hᵢᵦᵀ + hᵢᵦ uᵢₐᵀ)`. Each level touches the pairs of its
    /// non-zero columns; `bh` is filled from it after the pass.
    pub acc: Vec<f64>,
}

/// The second pass's sums over a range of levels, per group and θ entry of
/// its factor: Σ (uₐ·ξ)(hᵦ·ξ) and Σ hᵦ·(N uₐ); for grouped levels also,
/// per group, ξᵀEξ and tr(N E) of `E = Σ (BᵢᵀHᵢ + HᵢᵀHᵢ)`.
pub(super) struct Second {
    pub quad: Vec<f64>,
    pub trace: Vec<f64>,
    pub e_quad: Vec<f64>,
    pub e_trace: Vec<f64>,
}

/// Sum per-range results in chunk order (in parallel above
/// [`PARALLEL_LEVELS`]), so that the sums do not depend on the threads.
fn over_levels<T: Send>(
    cp: &CrossProducts,
    per_range: &(dyn Fn(std::ops::Range<usize>) -> T + Sync),
    add: impl Fn(&mut T, T),
) -> T {
    if cp.n1 < PARALLEL_LEVELS {
        return per_range(0..cp.n1);
    }
    use rayon::prelude::*;
    let parts: Vec<T> = (0..CHUNKS)
        .into_par_iter()
        .map(|c| per_range(c * cp.n1 / CHUNKS..(c + 1) * cp.n1 / CHUNKS))
        .collect();
    let mut it = parts.into_iter();
    let mut total = it.next().expect("CHUNKS > 0");
    for pt in it {
        add(&mut total, pt);
    }
    total
}

pub(super) fn first<const Q: usize>(
    cp: &CrossProducts,
    shared: &Levels<Q>,
    sec: &[Vec<f64>],
    range: std::ops::Range<usize>,
    fused: bool,
) -> First {
    let m = cp.m;
    let nt = shared.solvers[0].nt;
    let n_groups = shared.solvers.len();
    let grouped = shared.group.is_some();
    let mut logdet = LogDet::new();
    let mut out = First {
        logdet: 0.0,
        dlog: vec![0.0; n_groups * nt],
        bh: vec![0.0; m * m],
        tau: vec![0.0; if grouped { n_groups } else { 0 }],
        acc: vec![0.0; if fused { (1 + nt) * m * (m + 1) / 2 } else { 0 }],
    };
    let (mut cols, mut c) = (Vec::new(), Vec::new());
    let mut b: Vec<[f64; Q]> = Vec::new();
    let mut h: Vec<[f64; Q]> = Vec::new();
    let mut u: Vec<[f64; Q]> = Vec::new();
    let (mut ua, mut hb): (Vec<[f64; 10]>, Vec<[f64; 10]>) = (Vec::new(), Vec::new());
    for i in range {
        let (g, solver, (gt, l, inv)) = open_level(cp, shared, sec, i, &mut cols, &mut c, &mut logdet);
        let nc = cols.len();
        b.resize(nc, [0.0; Q]);
        h.resize(nc, [0.0; Q]);
        u.resize(nc, [0.0; Q]);
        for j in 0..nc {
            (b[j], h[j], u[j]) = solver.column(&gt, &l, &inv, &c[j]);
        }
        solver.add_dlog(&gt, &l, &inv, &mut out.dlog[g * nt..(g + 1) * nt]);
        if fused {
            // Per pair of columns (packed lower triangle), Bᵢᵀ Hᵢ and, per θ
            // entry, the symmetric uₐhᵦᵀ + hᵦuₐᵀ, side by side.
            let ntc = Q * (Q + 1) / 2;
            let w = 1 + ntc;
            ua.resize(nc, [0.0; 10]);
            hb.resize(nc, [0.0; 10]);
            for j in 0..nc {
                for (k, &(ia, ib)) in solver.pairs[..ntc].iter().enumerate() {
                    ua[j][k] = u[j][ia];
                    hb[j][k] = h[j][ib];
                }
            }
            for x in 0..nc {
                let base = cols[x] * (cols[x] + 1) / 2;
                for y in 0..=x {
                    let at = (base + cols[y]) * w;
                    let e = &mut out.acc[at..at + 1 + ntc];
                    let mut s = 0.0;
                    for r in 0..Q {
                        s += b[x][r] * h[y][r];
                    }
                    e[0] += s;
                    for k in 0..ntc {
                        e[1 + k] += ua[x][k] * hb[y][k] + ua[y][k] * hb[x][k];
                    }
                }
            }
            continue;
        }
        for x in 0..nc {
            let row = &mut out.bh[cols[x] * m..(cols[x] + 1) * m];
            for y in 0..=x {
                let mut s = 0.0;
                for r in 0..Q {
                    s += b[x][r] * h[y][r];
                }
                row[cols[y]] += s;
            }
        }
        if grouped {
            let mut trace = 0.0;
            for r in 0..Q {
                let mut e = [0.0f64; Q];
                e[r] = 1.0;
                LevelSolver::<Q>::solve(&l, &inv, &mut e);
                trace += e[r];
            }
            out.tau[g] += Q as f64 - trace;
        }
    }
    out.logdet = logdet.total();
    out
}

/// Level i's group, its solver and its factored block `Aᵢ` (with its
/// log-determinant added to `logdet`), its non-zero columns gathered into
/// `cols` and `c`, all weighted by its group's weight.
#[inline]
#[allow(clippy::type_complexity)]
fn open_level<'s, const Q: usize>(
    cp: &CrossProducts,
    shared: &'s Levels<Q>,
    sec: &[Vec<f64>],
    i: usize,
    cols: &mut Vec<usize>,
    c: &mut Vec<[f64; Q]>,
    logdet: &mut LogDet,
) -> (usize, &'s LevelSolver<Q>, ([[f64; Q]; Q], [[f64; Q]; Q], [f64; Q])) {
    let g = shared.group.map_or(0, |lg| lg[i] as usize);
    let (solver, w) = (&shared.solvers[g], shared.weight[g]);
    gather::<Q>(cp, i, sec, w, cols, c);
    let gi = &cp.g[i * Q * Q..(i + 1) * Q * Q];
    let block = if w == 1.0 {
        level_block::<Q>(gi, &solver.tq, logdet)
    } else {
        let mut gw = [0.0; 16];
        for (a, v) in gw.iter_mut().zip(gi) {
            *a = w * v;
        }
        level_block::<Q>(&gw[..Q * Q], &solver.tq, logdet)
    };
    (g, solver, block)
}

/// `n` is the inverse whose trace enters `∂ log|A₁|`, of order `nd`, row-major.
#[allow(clippy::too_many_arguments)]
fn second<const Q: usize>(
    cp: &CrossProducts,
    shared: &Levels<Q>,
    sec: &[Vec<f64>],
    xi: &[f64],
    n: &[f64],
    nd: usize,
    range: std::ops::Range<usize>,
) -> Second {
    let nt = shared.solvers[0].nt;
    let n_groups = shared.solvers.len();
    let grouped = shared.group.is_some();
    let ng = if grouped { n_groups } else { 0 };
    let mut out = Second {
        quad: vec![0.0; n_groups * nt],
        trace: vec![0.0; n_groups * nt],
        e_quad: vec![0.0; ng],
        e_trace: vec![0.0; ng],
    };
    let mut discard = LogDet::new();
    let (mut cols, mut c) = (Vec::new(), Vec::new());
    let mut b: Vec<[f64; Q]> = Vec::new();
    let mut h: Vec<[f64; Q]> = Vec::new();
    let mut u: Vec<[f64; Q]> = Vec::new();
    let mut nu: Vec<[f64; Q]> = Vec::new();
    let mut nbh: Vec<[f64; Q]> = Vec::new();
    for i in range {
        let (g, solver, (gt, l, inv)) = open_level(cp, shared, sec, i, &mut cols, &mut c, &mut discard);
        let nc = cols.len();
        b.resize(nc, [0.0; Q]);
        h.resize(nc, [0.0; Q]);
        u.resize(nc, [0.0; Q]);
        let (mut ux, mut hx, mut bx) = ([0.0f64; Q], [0.0f64; Q], [0.0f64; Q]);
        for j in 0..nc {
            (b[j], h[j], u[j]) = solver.column(&gt, &l, &inv, &c[j]);
            let v = xi[cols[j]];
            for r in 0..Q {
                ux[r] += u[j][r] * v;
                hx[r] += h[j][r] * v;
                bx[r] += b[j][r] * v;
            }
        }
        // The columns inside the trace's block come first (increasing index).
        let nct = cols.iter().take_while(|&&cj| cj < nd).count();
        nu.clear();
        nu.resize(nct, [0.0; Q]);
        nbh.clear();
        nbh.resize(if grouped { nct } else { 0 }, [0.0; Q]);
        for y in 0..nct {
            let row = &n[cols[y] * nd..(cols[y] + 1) * nd];
            let mut acc = [0.0f64; Q];
            let mut acc_e = [0.0f64; Q];
            for x in 0..nct {
                let v = row[cols[x]];
                for a in 0..Q {
                    acc[a] += v * u[x][a];
                }
                if grouped {
                    for a in 0..Q {
                        acc_e[a] += v * (b[x][a] + h[x][a]);
                    }
                }
            }
            nu[y] = acc;
            if grouped {
                nbh[y] = acc_e;
            }
        }
        for (k, &(ia, ib)) in solver.pairs[..nt].iter().enumerate() {
            out.quad[g * nt + k] += ux[ia] * hx[ib];
            let mut t = 0.0;
            for y in 0..nct {
                t += h[y][ib] * nu[y][ia];
            }
            out.trace[g * nt + k] += t;
        }
        if grouped {
            let mut eq = 0.0;
            let mut et = 0.0;
            for r in 0..Q {
                eq += (bx[r] + hx[r]) * hx[r];
                for y in 0..nct {
                    et += h[y][r] * nbh[y][r];
                }
            }
            out.e_quad[g] += eq;
            out.e_trace[g] += et;
        }
    }
    out
}

/// Whether the sums of the second pass are gathered in the first one, as
/// one m×m matrix `Σ uᵢₐ hᵢᵦᵀ` per θ entry (each level touching the pairs
/// of its non-zero columns), instead of a second pass that opens every
/// level again. Per level this costs about θ entries × columns² / 2, and
/// θ entries × m² / 2 of memory per chunk of levels; so it serves one
/// shared factor, a dense part of order at most [`FUSED_MAX_ORDER`], and
/// levels whose θ entries × non-zero columns (at most; on average over the
/// levels) is at most [`FUSED_MAX_WORK`].
fn is_fused<const Q: usize>(cp: &CrossProducts, shared: &Levels<Q>) -> bool {
    let columns = cp.link_values.len() / (Q * cp.n1.max(1)) + cp.p + 1;
    let work = Q * (Q + 1) / 2 * columns;
    shared.group.is_none() && cp.m <= FUSED_MAX_ORDER && work <= FUSED_MAX_WORK
}

/// See [`is_fused`].
pub const FUSED_MAX_ORDER: usize = 256;

/// See [`is_fused`]. Measured (notes/benchmarks.md, eleventh session):
/// the fused pass is faster up to about 96 with 1 to 4 coefficients.
pub const FUSED_MAX_WORK: usize = 96;

/// The second pass's sums from the fused pass's `acc` (see [`First::acc`]):
/// per θ entry k, with `S_k = M_k + M_kᵀ`, `ξᵀ M_k ξ = ½ ξᵀ S_k ξ` and
/// `tr(N M_k) = ½ tr(N S_k)` over the trace's block of order `nd` (N is
/// symmetric).
fn contract(acc: &[f64], m: usize, xi: &[f64], n: &[f64], nd: usize) -> Second {
    let w = acc.len() / (m * (m + 1) / 2);
    let nt = w - 1;
    let mut out = Second {
        quad: vec![0.0; nt],
        trace: vec![0.0; nt],
        e_quad: Vec::new(),
        e_trace: Vec::new(),
    };
    for r in 0..m {
        for c in 0..=r {
            let at = (r * (r + 1) / 2 + c) * w;
            let e = &acc[at..at + w];
            // Off-diagonal pairs count twice in the full sums, and the ½.
            let half = if r == c { 0.5 } else { 1.0 };
            let xx = half * xi[r] * xi[c];
            let nn = if r < nd { half * n[r * nd + c] } else { 0.0 };
            for k in 0..nt {
                out.quad[k] += xx * e[1 + k];
                out.trace[k] += nn * e[1 + k];
            }
        }
    }
    out
}

/// Both passes for `shared` over every level: the first pass's sums, the
/// dense solve of `s − Σ BᵢᵀHᵢ` (`s` the scaled dense part) with its pieces,
/// and the second pass's sums.
pub(super) fn passes<const Q: usize>(
    cp: &CrossProducts,
    shared: &Levels<Q>,
    sec: &[Vec<f64>],
    mut s: Vec<f64>,
    method: Method,
    fused: bool,
) -> Option<(First, DenseSolve, super::Pieces, Second)> {
    // One shared factor and levels that each meet the same few secondary
    // columns take the fused pass with levels side by side.
    let width = (fused && shared.group.is_none() && shared.weight[0] == 1.0)
        .then(|| super::nested::serves(cp))
        .flatten();
    let per_range = |range: std::ops::Range<usize>| {
        if let Some(s) = width
            && let Some(part) = super::nested::first::<Q>(cp, &shared.solvers[0], sec, s, range.clone())
        {
            return part;
        }
        first::<Q>(cp, shared, sec, range, fused)
    };
    let mut part = over_levels(cp, &per_range, |a, b| {
        a.logdet += b.logdet;
        a.dlog.iter_mut().zip(&b.dlog).for_each(|(x, y)| *x += y);
        a.bh.iter_mut().zip(&b.bh).for_each(|(x, y)| *x += y);
        a.tau.iter_mut().zip(&b.tau).for_each(|(x, y)| *x += y);
        a.acc.iter_mut().zip(&b.acc).for_each(|(x, y)| *x += y);
    });
    let m = cp.m;
    if fused {
        let w = part.acc.len() / (m * (m + 1) / 2);
        for r in 0..m {
            for c in 0..=r {
                part.bh[r * m + c] = part.acc[(r * (r + 1) / 2 + c) * w];
            }
        }
    }
    for (v, d) in s.iter_mut().zip(&part.bh) {
        *v -= d;
    }
    let dense = DenseSolve::new(cp, &s, method)?;
    let pieces = super::Pieces {
        logdet_z: part.logdet + dense.logdet_dense_z,
        logdet_x: dense.logdet_x,
        pwrss: dense.r2,
    };
    let nd = dense.nt_dim;
    let n: Vec<f64> = (0..nd * nd).map(|k| dense.inv_t[(k / nd, k % nd)]).collect();
    if fused {
        let sums = contract(&part.acc, cp.m, &dense.xi, &n, nd);
        return Some((part, dense, pieces, sums));
    }
    let sums = over_levels(
        cp,
        &|range| second::<Q>(cp, shared, sec, &dense.xi, &n, nd, range),
        |a, b| {
            for (x, y) in [
                (&mut a.quad, &b.quad),
                (&mut a.trace, &b.trace),
                (&mut a.e_quad, &b.e_quad),
                (&mut a.e_trace, &b.e_trace),
            ] {
                x.iter_mut().zip(y).for_each(|(p, q)| *p += q);
            }
        },
    );
    Some((part, dense, pieces, sums))
}

/// The gradient with one shared factor; `fused` as [`is_fused`] decides
/// when `None`.
fn two_pass<const Q: usize>(
    cp: &CrossProducts,
    theta: &[f64],
    method: Method,
    fused: Option<bool>,
) -> Option<GradientEval> {
    let k1 = cp.primary?;
    let nt = Q * (Q + 1) / 2;
    let off = cp.theta_offset[k1];
    let t = unpack_factor(&theta[off..off + nt], Q);
    let all = factors(cp, theta);
    let sec: Vec<Vec<f64>> = cp.secondary.iter().map(|&kt| all[kt].clone()).collect();
    let shared = Levels::<Q> {
        solvers: vec![LevelSolver::<Q>::new(&t)],
        group: None,
        weight: vec![1.0],
    };
    let fused = fused.unwrap_or_else(|| is_fused(cp, &shared));
    let (part, dense, pieces, sums) = passes(cp, &shared, &sec, scaled_dense(cp, &all), method, fused)?;
    let mut a_grad = vec![0.0; theta.len()];
    let mut r2_grad = vec![0.0; theta.len()];
    for k in 0..nt {
        // ∂S = −(M + Mᵀ) with M = Σ uₐhᵦᵀ.
        a_grad[off + k] = part.dlog[k] - 2.0 * sums.trace[k];
        r2_grad[off + k] = -2.0 * sums.quad[k];
    }
    if !dense.secondary_derivatives(cp, &sec, &mut a_grad, &mut r2_grad) {
        return None;
    }
    Some(dense.gradient_eval(cp, &pieces, method, a_grad, r2_grad))
}

/// The deviance, its gradient and its pieces in two passes; `None` when
/// [`applies`] does not hold or a factorisation fails.
pub fn gradient_eval(cp: &CrossProducts, theta: &[f64], method: Method) -> Option<GradientEval> {
    if !applies(cp) {
        return None;
    }
    match cp.q1 {
        1 => two_pass::<1>(cp, theta, method, None),
        2 => two_pass::<2>(cp, theta, method, None),
        3 => two_pass::<3>(cp, theta, method, None),
        _ => two_pass::<4>(cp, theta, method, None),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::lmm::{MixedProblem, RandomTermData};

    // The fused pass and the two passes sum the same quantities in a
    // different order (closed-form identity: equal to rounding), with a
    // school intercept, a school slope and a fixed column that is zero for
    // half the participants, by REML and ML.
    #[test]
    fn the_fused_pass_agrees_with_two_passes() {
        let mut rng = crate::simulate::Rng::new(21);
        let (n_id, per, schools) = (300, 3, 9);
        let n = n_id * per;
        let (mut x, mut y, mut a_col, mut id, mut sc) = (vec![], vec![], vec![], vec![], vec![]);
        for i in 0..n_id {
            let (b0, b1) = (2.0 * rng.normal(), 0.5 * rng.normal());
            for w in 0..per {
                let a = w as f64 + rng.uniform() - 1.0;
                x.extend([1.0, a, a * a, if i % 2 == 0 { a } else { 0.0 }]);
                y.push(10.0 + a + b0 + b1 * a + (i % schools) as f64 * 0.2 + rng.normal());
                a_col.push(a);
                id.push(i as u32);
                sc.push((i % schools) as u32);
            }
        }
        let problem = MixedProblem {
            y: y.into(),
            x_names: vec!["1".into(), "a".into(), "a2".into(), "a_even".into()],
            x: x.into(),
            terms: vec![
                RandomTermData::numbered("id", n_id, id, &["intercept", "a"], vec![vec![1.0; n], a_col.clone()]),
                RandomTermData::numbered("school", schools, sc, &["intercept", "a"], vec![vec![1.0; n], a_col]),
            ],
        };
        let cp = CrossProducts::new(&problem);
        let theta = [1.2, 0.1, 0.5, 0.6, -0.1, 0.3];
        for method in [Method::Reml, Method::Ml] {
            let one = two_pass::<2>(&cp, &theta, method, Some(true)).unwrap();
            let two = two_pass::<2>(&cp, &theta, method, Some(false)).unwrap();
            one.assert_same_as(&two, &format!("{method:?}"));
        }
    }
}
