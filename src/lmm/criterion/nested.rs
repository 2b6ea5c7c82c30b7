//! The fused pass ([`super::twopass`]) and the value kernel
//! ([`super::primary::primary_range`]) with [`LANES`] primary levels side by
//! side, for levels that each meet the same few secondary columns (a
//! participant nested in one school; notes/criterion.md, "Levels nested in
//! clusters").
//!
//! Every level then has S secondary columns and the C = p + 1 columns of
//! `[X y]`, both compile-time sizes, so each per-level quantity is an array
//! over the lanes and each arithmetic step one vector operation, as in the
//! kernels of a primary term alone. The pairs among the `[X y]` columns sit
//! at the same place for every level and are summed per lane; the pairs
//! that meet a secondary column sit where the level's cluster is, and are
//! added lane by lane.

// Index loops mirror the matrix notation of the derivation.
#![allow(clippy::needless_range_loop)]

use super::super::crossprod::CrossProducts;
use super::gradient::LevelSolver;
use super::primary::{LANES, lane_backward, lane_block, lane_forward, lane_load, vectorised};
use super::twopass::First;

/// Secondary columns per level this kernel takes (a school intercept, or a
/// school intercept and slope).
pub const MAX_SECONDARY: usize = 2;

/// Columns of `[X y]` this kernel takes.
pub const MAX_COLUMNS: usize = 12;

/// `$kernel::<Q, S, C>(args)` run through [`vectorised`] for the run-time
/// width S (1 or 2) and C = p + 1 columns (1 to 12) as compile-time sizes;
/// returns `None` from the calling function outside those sizes.
macro_rules! sized {
    ($width:expr, $c:expr, $kernel:ident::<$q:ident> $args:tt) => {
        sized!(@ $width, $c, $kernel::<$q> $args; 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12)
    };
    (@ $width:expr, $c:expr, $kernel:ident::<$q:ident> $args:tt; $($cols:literal),*) => {
        match ($width, $c) {
            $((1, $cols) => vectorised(|| $kernel::<$q, 1, $cols> $args),)*
            $((2, $cols) => vectorised(|| $kernel::<$q, 2, $cols> $args),)*
            _ => return None,
        }
    };
}

/// The secondary columns per level when [`first`] serves `cp`: a primary
/// term of 1 to 4 coefficients, every level meeting the same 1 to
/// [`MAX_SECONDARY`] secondary columns, and at most [`MAX_COLUMNS`]
/// columns of `[X y]`.
pub(super) fn serves(cp: &CrossProducts) -> Option<usize> {
    if cp.primary.is_none() || !(1..=4).contains(&cp.q1) || cp.p >= MAX_COLUMNS || cp.n1 == 0 {
        return None;
    }
    cp.link_width.filter(|s| (1..=MAX_SECONDARY).contains(s))
}

/// The fused pass's sums over `range` (see [`First`]) for one shared
/// factor, with the sizes as compile-time constants, `width` secondary
/// columns per level (as [`serves`] found); `None` outside those sizes.
pub(super) fn first<const Q: usize>(
    cp: &CrossProducts,
    solver: &LevelSolver<Q>,
    sec: &[Vec<f64>],
    width: usize,
    range: std::ops::Range<usize>,
) -> Option<First> {
    Some(sized!(width, cp.p + 1, lanes::<Q>(cp, solver, sec, range)))
}

/// Packed position of the pair (r, c), r ≥ c, of an m×m lower triangle.
#[inline(always)]
fn packed(r: usize, c: usize) -> usize {
    r * (r + 1) / 2 + c
}

type V = [f64; LANES];

/// A column's `b`, `h` and `u` for the lanes (see [`column`]).
#[derive(Clone, Copy)]
struct Solved<const Q: usize> {
    b: [V; Q],
    h: [V; Q],
    u: [V; Q],
}

/// For the column `cz` of the lanes' `Cᵢ`, into `out`: `b = Tᵀc`,
/// `h = Aᵢ⁻¹b` and `u = c − GᵢT h`.
#[inline(always)]
fn column<const Q: usize>(
    tq: &[[f64; Q]; Q],
    gt: &[[V; Q]; Q],
    lf: &[[V; Q]; Q],
    inv: &[V; Q],
    cz: &[V; Q],
    out: &mut Solved<Q>,
) {
    for r in 0..Q {
        out.b[r] = [0.0; LANES];
        for x in r..Q {
            for l in 0..LANES {
                out.b[r][l] += tq[x][r] * cz[x][l];
            }
        }
    }
    out.h = out.b;
    lane_forward(lf, inv, &mut out.h);
    lane_backward(lf, inv, &mut out.h);
    out.u = *cz;
    for r in 0..Q {
        for x in 0..Q {
            for l in 0..LANES {
                out.u[r][l] -= gt[r][x][l] * out.h[x][l];
            }
        }
    }
}

/// Adds the pair (x, y) of columns to `e`: `b_x·h_y` to `e[0]` and, per θ
/// entry (a, b) in the order of [`LevelSolver::pairs`] (column by column of
/// T), `u_x[a] h_y[b] + u_y[a] h_x[b]` to `e[1 + k]`.
#[inline(always)]
fn add_pair<const Q: usize>(x: &Solved<Q>, y: &Solved<Q>, e: &mut [V; 11]) {
    let (bx, hx, ux) = (&x.b, &x.h, &x.u);
    let (hy, uy) = (&y.h, &y.u);
    for r in 0..Q {
        for l in 0..LANES {
            e[0][l] += bx[r][l] * hy[r][l];
        }
    }
    let mut k = 1;
    for ib in 0..Q {
        for ia in ib..Q {
            for l in 0..LANES {
                e[k][l] += ux[ia][l] * hy[ib][l] + uy[ia][l] * hx[ib][l];
            }
            k += 1;
        }
    }
}

/// The fused pass over `range` with S secondary columns and C columns of
/// `[X y]` per level, [`LANES`] levels at a time (lanes past the range stay
/// zero: `Aᵢ = I` and zero columns, which add exact zeros).
#[inline(always)]
fn lanes<const Q: usize, const S: usize, const C: usize>(
    cp: &CrossProducts,
    solver: &LevelSolver<Q>,
    sec: &[Vec<f64>],
    range: std::ops::Range<usize>,
) -> First {
    const L: usize = LANES;
    let nt = Q * (Q + 1) / 2;
    debug_assert_eq!(nt, solver.nt);
    let (m, q2) = (cp.m, cp.q2_total);
    let tq = solver.tq;
    let w = 1 + nt;
    let mut acc = vec![0.0f64; w * m * (m + 1) / 2];
    let mut product: V = [1.0; L];
    let mut log_sum = 0.0;
    let mut dlog = [[0.0f64; L]; 10];
    // The pairs among the columns of [X y], lower triangle, in the layout
    // of `add_pair`.
    let mut xy = [[[[0.0f64; L]; 11]; C]; C];
    let zero = Solved {
        b: [[0.0; L]; Q],
        h: [[0.0; L]; Q],
        u: [[0.0; L]; Q],
    };
    let (mut sc, mut xc) = ([zero; S], [zero; C]);
    let mut first = range.start;
    while first < range.end {
        let lanes_here = L.min(range.end - first);
        let (g, cs, cx, at) = load::<Q, S, C>(cp, |k| &sec[k], first, lanes_here);
        first += L;
        let (gt, lf, inv) = lane_block::<Q, L>(&g, &tq, &mut product, &mut log_sum);
        for j in 0..S {
            column(&tq, &gt, &lf, &inv, &cs[j], &mut sc[j]);
        }
        for j in 0..C {
            column(&tq, &gt, &lf, &inv, &cx[j], &mut xc[j]);
        }
        // ∂ log|Aᵢ| / ∂T_ab = 2 (Aᵢ⁻¹ (GᵢT)ᵀ)_ba.
        for col in 0..Q {
            let mut v = gt[col];
            lane_forward(&lf, &inv, &mut v);
            lane_backward(&lf, &inv, &mut v);
            let mut k = 0;
            for ib in 0..Q {
                for ia in ib..Q {
                    if ia == col {
                        for l in 0..L {
                            dlog[k][l] += 2.0 * v[ib][l];
                        }
                    }
                    k += 1;
                }
            }
        }
        for x in 0..C {
            for y in 0..=x {
                add_pair(&xc[x], &xc[y], &mut xy[x][y]);
            }
        }
        // Pairs that meet a secondary column, added where the level's
        // cluster sits (secondary columns come before [X y], in increasing
        // dense index).
        let mut scatter = |e: &[V; 11], l: usize, r: usize, c: usize| {
            let base = packed(r, c) * w;
            for (slot, v) in acc[base..base + w].iter_mut().zip(e) {
                *slot += v[l];
            }
        };
        for x in 0..S {
            for y in 0..=x {
                let mut e = [[0.0f64; L]; 11];
                add_pair(&sc[x], &sc[y], &mut e);
                for l in 0..lanes_here {
                    scatter(&e, l, at[l][x], at[l][y]);
                }
            }
        }
        for x in 0..C {
            for y in 0..S {
                let mut e = [[0.0f64; L]; 11];
                add_pair(&xc[x], &sc[y], &mut e);
                for l in 0..lanes_here {
                    scatter(&e, l, q2 + x, at[l][y]);
                }
            }
        }
    }
    let lanes = |v: &V| v.iter().sum::<f64>();
    for x in 0..C {
        for y in 0..=x {
            let base = packed(q2 + x, q2 + y) * w;
            for k in 0..w {
                acc[base + k] += lanes(&xy[x][y][k]);
            }
        }
    }
    let log_product: f64 = product.iter().map(|x| x.ln()).sum();
    First {
        logdet: 2.0 * (log_sum + log_product),
        dlog: dlog[..nt].iter().map(lanes).collect(),
        bh: vec![0.0; m * m],
        tau: Vec::new(),
        acc,
    }
}

/// The value kernel's sums over `range` for levels that each meet `width`
/// secondary columns (as [`serves`] found), levels side by side: subtracts
/// the pairs that meet a secondary column from `e` (lower triangle) and
/// returns log|L|² of the range with its packed X–y block of Σ WᵢᵀWᵢ (not
/// yet subtracted), as [`super::primary::primary_range`] does; `None`
/// outside the compile-time sizes.
pub(super) fn value<const Q: usize>(
    cp: &CrossProducts,
    tq: &[[f64; Q]; Q],
    t: &[Vec<f64>],
    width: usize,
    e: &mut [f64],
    range: std::ops::Range<usize>,
) -> Option<(f64, Vec<f64>)> {
    Some(sized!(width, cp.p + 1, value_lanes::<Q>(cp, tq, t, e, range)))
}

/// `L⁻¹Tᵀc` for the column `cz` of the lanes' `Cᵢ`.
#[inline(always)]
fn forward_column<const Q: usize>(tq: &[[f64; Q]; Q], lf: &[[V; Q]; Q], inv: &[V; Q], cz: &[V; Q], out: &mut [V; Q]) {
    for r in 0..Q {
        out[r] = [0.0; LANES];
        for x in r..Q {
            for l in 0..LANES {
                out[r][l] += tq[x][r] * cz[x][l];
            }
        }
    }
    lane_forward(lf, inv, out);
}

/// `Σ_r a[r] b[r]`, lanes side by side.
#[inline(always)]
fn lane_dot<const Q: usize>(a: &[V; Q], b: &[V; Q]) -> V {
    let mut s = [0.0f64; LANES];
    for r in 0..Q {
        for l in 0..LANES {
            s[l] += a[r][l] * b[r][l];
        }
    }
    s
}

/// See [`value`]: S secondary columns and C columns of `[X y]` per level.
#[inline(always)]
fn value_lanes<const Q: usize, const S: usize, const C: usize>(
    cp: &CrossProducts,
    tq: &[[f64; Q]; Q],
    t: &[Vec<f64>],
    e: &mut [f64],
    range: std::ops::Range<usize>,
) -> (f64, Vec<f64>) {
    const L: usize = LANES;
    let (m, q2) = (cp.m, cp.q2_total);
    let mut product: V = [1.0; L];
    let mut log_sum = 0.0;
    let mut xy = [[[0.0f64; L]; C]; C];
    let (mut ws, mut wx) = ([[[0.0f64; L]; Q]; S], [[[0.0f64; L]; Q]; C]);
    let mut first = range.start;
    while first < range.end {
        let lanes_here = L.min(range.end - first);
        let (g, cs, cx, at) = load::<Q, S, C>(cp, |link| &t[cp.secondary[link]], first, lanes_here);
        first += L;
        let (_, lf, inv) = lane_block::<Q, L>(&g, tq, &mut product, &mut log_sum);
        for j in 0..S {
            forward_column(tq, &lf, &inv, &cs[j], &mut ws[j]);
        }
        for j in 0..C {
            forward_column(tq, &lf, &inv, &cx[j], &mut wx[j]);
        }
        for a in 0..C {
            for b in 0..=a {
                let v = lane_dot(&wx[a], &wx[b]);
                for l in 0..L {
                    xy[a][b][l] += v[l];
                }
            }
        }
        for x in 0..S {
            for y in 0..=x {
                let v = lane_dot(&ws[x], &ws[y]);
                for l in 0..lanes_here {
                    e[at[l][x] * m + at[l][y]] -= v[l];
                }
            }
        }
        for a in 0..C {
            for y in 0..S {
                let v = lane_dot(&wx[a], &ws[y]);
                for l in 0..lanes_here {
                    e[(q2 + a) * m + at[l][y]] -= v[l];
                }
            }
        }
    }
    let packed = (0..C)
        .flat_map(|a| (0..=a).map(move |b| (a, b)))
        .map(|(a, b)| xy[a][b].iter().sum())
        .collect();
    let log_product: f64 = product.iter().map(|x| x.ln()).sum();
    (2.0 * (log_sum + log_product), packed)
}

/// The lanes' `Gᵢ`, their secondary columns `Z₁ᵢᵀZ_s,l T_s` (`factor` gives
/// T_s of a secondary term by its index in [`CrossProducts::secondary`]),
/// their columns of `Zᵢᵀ[X y]` (column by column) and the dense index of
/// each secondary column, for the levels `first..first + lanes_here`;
/// lanes past those stay zero.
#[inline(always)]
#[allow(clippy::type_complexity)]
fn load<'t, const Q: usize, const S: usize, const C: usize>(
    cp: &CrossProducts,
    factor: impl Fn(usize) -> &'t Vec<f64>,
    first: usize,
    lanes_here: usize,
) -> ([[V; Q]; Q], [[V; Q]; S], [[V; Q]; C], [[usize; S]; LANES]) {
    let (g, cz) = lane_load::<Q, C, LANES>(cp, first, first + lanes_here);
    let cx: [[V; Q]; C] = std::array::from_fn(|c| std::array::from_fn(|r| cz[r][c]));
    let mut cs = [[[0.0f64; LANES]; Q]; S];
    let mut at = [[0usize; S]; LANES];
    for l in 0..lanes_here {
        let i = first + l;
        let (lo, hi) = cp.link_range(i);
        let mut j = 0;
        for link in &cp.links[lo..hi] {
            let ts = factor(link.secondary());
            for b in 0..cp.term_q[cp.secondary[link.secondary()]] {
                at[l][j] = link.offset() + b;
                for r in 0..Q {
                    cs[j][r][l] = cp.link_entry(link, ts, r, b);
                }
                j += 1;
            }
        }
    }
    (g, cs, cx, at)
}

#[cfg(test)]
mod tests {
    use super::super::gradient::SUMMATION_ORDER_REL;
    use super::super::primary::{factor_array, primary_range};
    use super::super::secondary::Levels;
    use super::super::{factors, twopass};
    use super::*;
    use crate::lmm::{MixedProblem, RandomTermData};
    use crate::simulate::Rng;

    /// 101 participants (a last group of lanes short of four) with three
    /// rows each, nested in 7 schools; p fixed columns, the second an
    /// indicator that is zero for every other participant; a school
    /// intercept, with a school slope when `school_q` is 2. With `crossed`,
    /// participant 5 changes school between waves.
    fn nested_problem(q1: usize, p: usize, school_q: usize, crossed: bool) -> MixedProblem {
        let mut rng = Rng::new(23);
        let (n_id, per) = (101, 3);
        let n = n_id * per;
        let (mut x, mut z1, mut zs) = (Vec::new(), vec![Vec::new(); q1], vec![Vec::new(); school_q]);
        let (mut id, mut school) = (Vec::new(), Vec::new());
        for r in 0..n {
            let i = r / per;
            let a = (r % per) as f64 + rng.uniform();
            x.push(1.0);
            for c in 1..p {
                x.push(if c == 1 {
                    f64::from(u8::from(i % 2 == 0)) * a
                } else {
                    rng.normal()
                });
            }
            for (c, col) in z1.iter_mut().enumerate() {
                col.push(if c == 0 { 1.0 } else { a.powi(c as i32) });
            }
            for (c, col) in zs.iter_mut().enumerate() {
                col.push(if c == 0 { 1.0 } else { a });
            }
            id.push(i as u32);
            let moved = crossed && i == 5 && r % per == 2;
            school.push(((i + usize::from(moved)) % 7) as u32);
        }
        MixedProblem {
            y: (0..n).map(|_| rng.normal()).collect(),
            x_names: (0..p).map(|c| c.to_string()).collect(),
            x: x.into(),
            terms: vec![
                RandomTermData::numbered("id", n_id, id, &["intercept", "a", "b", "c"][..q1], z1),
                RandomTermData::numbered("school", 7, school, &["intercept", "a"][..school_q], zs),
            ],
        }
    }

    fn close(x: f64, y: f64) -> bool {
        (x - y).abs() <= SUMMATION_ORDER_REL * (1.0 + x.abs().max(y.abs()))
    }

    fn theta_for(problem: &MixedProblem) -> Vec<f64> {
        let mut rng = Rng::new(4);
        (0..problem.n_theta()).map(|_| 0.2 + rng.uniform()).collect()
    }

    // A participant who changes school meets two schools: the levels no
    // longer each meet the same columns, and the kernels here stand aside.
    #[test]
    fn only_nested_levels_are_served() {
        for school_q in 1..=2 {
            let nested = CrossProducts::new(&nested_problem(2, 3, school_q, false));
            assert_eq!(serves(&nested), Some(school_q));
            let crossed = CrossProducts::new(&nested_problem(2, 3, school_q, true));
            assert_eq!(crossed.link_width, None);
            assert_eq!(serves(&crossed), None);
        }
    }

    // The value kernel with levels side by side and the kernel one level at
    // a time are two codings of the same sums, added in another order
    // (closed-form identity: equal to rounding), at every q₁, width and
    // column count the kernel takes.
    #[test]
    fn value_kernel_matches_the_one_level_kernel() {
        fn both<const Q: usize>(cp: &CrossProducts, t: &[Vec<f64>], width: usize) {
            let tq = factor_array::<Q>(&t[cp.primary.unwrap()]);
            let (mut e1, mut e2) = (cp.dense.clone(), cp.dense.clone());
            let lanes = value::<Q>(cp, &tq, t, width, &mut e1, 0..cp.n1).unwrap();
            let one = primary_range::<Q>(cp, &tq, t, &mut e2, 0..cp.n1);
            let what = format!("q1 {Q}, width {width}, p {}", cp.p);
            assert!(close(lanes.0, one.0), "{what}: {} vs {}", lanes.0, one.0);
            assert_eq!(lanes.1.len(), one.1.len(), "{what}");
            for (a, b) in lanes.1.iter().zip(&one.1) {
                assert!(close(*a, *b), "{what}: X–y block {a} vs {b}");
            }
            let m = cp.m;
            for r in 0..m {
                for c in 0..=r {
                    let (a, b) = (e1[r * m + c], e2[r * m + c]);
                    assert!(close(a, b), "{what}: S[{r},{c}] {a} vs {b}");
                }
            }
        }
        for q1 in 1..=4 {
            for school_q in 1..=2 {
                for p in 1..MAX_COLUMNS {
                    let problem = nested_problem(q1, p, school_q, false);
                    let cp = CrossProducts::new(&problem);
                    let t = factors(&cp, &theta_for(&problem));
                    let width = serves(&cp).unwrap();
                    match q1 {
                        1 => both::<1>(&cp, &t, width),
                        2 => both::<2>(&cp, &t, width),
                        3 => both::<3>(&cp, &t, width),
                        _ => both::<4>(&cp, &t, width),
                    }
                }
            }
        }
    }

    // At θ = 0 the levels add nothing (every block the identity, every
    // column zero), which is why `evaluate` does not visit them there: the
    // kernels leave the dense part as it is and add a log-determinant of 0.
    #[test]
    fn levels_add_nothing_at_zero() {
        for school_q in 1..=2 {
            let problem = nested_problem(2, 3, school_q, false);
            let cp = CrossProducts::new(&problem);
            let t = factors(&cp, &vec![0.0; problem.n_theta()]);
            let mut e = super::super::scaled_dense(&cp, &t);
            let before = e.clone();
            let logdet = super::super::primary::primary_fixed::<2>(&cp, &t[0], &t, &mut e);
            assert_eq!(logdet, 0.0);
            assert!(e.iter().zip(&before).all(|(a, b)| a == b));
        }
    }

    // The kernels compiled for wider vector registers and for the baseline
    // give the same numbers to the bit (no fused multiply–add is enabled,
    // and every sum keeps its order).
    #[test]
    fn wider_registers_give_the_same_numbers() {
        let problem = nested_problem(2, 3, 1, false);
        let cp = CrossProducts::new(&problem);
        let t = factors(&cp, &theta_for(&problem));
        let tq = factor_array::<2>(&t[cp.primary.unwrap()]);
        let (mut e1, mut e2) = (cp.dense.clone(), cp.dense.clone());
        let wide = vectorised(|| value_lanes::<2, 1, 4>(&cp, &tq, &t, &mut e1, 0..cp.n1));
        let narrow = value_lanes::<2, 1, 4>(&cp, &tq, &t, &mut e2, 0..cp.n1);
        assert_eq!(wide, narrow);
        assert_eq!(e1, e2);
        let solver = LevelSolver::<2>::new(&t[cp.primary.unwrap()]);
        let sec: Vec<Vec<f64>> = cp.secondary.iter().map(|&kt| t[kt].clone()).collect();
        let wide = vectorised(|| lanes::<2, 1, 4>(&cp, &solver, &sec, 0..cp.n1));
        let narrow = lanes::<2, 1, 4>(&cp, &solver, &sec, 0..cp.n1);
        assert_eq!(
            (wide.logdet, &wide.dlog, &wide.acc),
            (narrow.logdet, &narrow.dlog, &narrow.acc)
        );
    }

    // The fused pass with levels side by side against the fused pass one
    // level at a time (closed-form identity: equal to rounding).
    #[test]
    fn fused_pass_matches_the_one_level_pass() {
        fn both<const Q: usize>(cp: &CrossProducts, t: &[Vec<f64>], width: usize) {
            let solver = LevelSolver::<Q>::new(&t[cp.primary.unwrap()]);
            let sec: Vec<Vec<f64>> = cp.secondary.iter().map(|&kt| t[kt].clone()).collect();
            let lanes = first::<Q>(cp, &solver, &sec, width, 0..cp.n1).unwrap();
            let shared = Levels::<Q> {
                solvers: vec![LevelSolver::<Q>::new(&t[cp.primary.unwrap()])],
                group: None,
                weight: vec![1.0],
            };
            let one = twopass::first::<Q>(cp, &shared, &sec, 0..cp.n1, true);
            let what = format!("q1 {Q}, width {width}, p {}", cp.p);
            assert!(
                close(lanes.logdet, one.logdet),
                "{what}: {} vs {}",
                lanes.logdet,
                one.logdet
            );
            assert_eq!(lanes.dlog.len(), one.dlog.len(), "{what}");
            for (a, b) in lanes.dlog.iter().zip(&one.dlog) {
                assert!(close(*a, *b), "{what}: dlog {a} vs {b}");
            }
            assert_eq!(lanes.acc.len(), one.acc.len(), "{what}");
            for (k, (a, b)) in lanes.acc.iter().zip(&one.acc).enumerate() {
                assert!(close(*a, *b), "{what}: entry {k} {a} vs {b}");
            }
        }
        for q1 in 1..=4 {
            for school_q in 1..=2 {
                for p in 1..MAX_COLUMNS {
                    let problem = nested_problem(q1, p, school_q, false);
                    let cp = CrossProducts::new(&problem);
                    let t = factors(&cp, &theta_for(&problem));
                    let width = serves(&cp).unwrap();
                    match q1 {
                        1 => both::<1>(&cp, &t, width),
                        2 => both::<2>(&cp, &t, width),
                        3 => both::<3>(&cp, &t, width),
                        _ => both::<4>(&cp, &t, width),
                    }
                }
            }
        }
    }
}
