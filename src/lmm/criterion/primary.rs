//! The primary term's block-diagonal factorisation, level by level: a kernel
//! for each small fixed number of coefficients, a general one, and the
//! parallel split over levels.

// Index loops mirror the matrix notation of the derivation.
#![allow(clippy::needless_range_loop)]

use super::super::crossprod::CrossProducts;
use super::*;

/// The primary levels for q₁ = Q, with fixed-size arrays so the small
/// products unroll.
pub(super) fn primary_fixed<const Q: usize>(cp: &CrossProducts, t1: &[f64], t: &[Vec<f64>], e: &mut [f64]) -> f64 {
    let m = cp.m;
    let p = cp.p;
    let q2 = cp.q2_total;
    let tq = factor_array::<Q>(t1);
    // A primary term alone with few columns of [X y] takes the kernel
    // whose column count is a compile-time size.
    let alone = cp.links.is_empty() && q2 == 0;
    // Levels that each meet the same few secondary columns take the
    // kernel with levels side by side.
    let nested = super::nested::serves(cp);
    let range_sums = |e: &mut [f64], range: std::ops::Range<usize>| -> (f64, Vec<f64>) {
        if alone && let Some(sums) = alone_dispatch::<Q>(cp, &tq, range.clone()) {
            return sums;
        }
        if let Some(s) = nested
            && let Some(sums) = super::nested::value::<Q>(cp, &tq, t, s, e, range.clone())
        {
            return sums;
        }
        primary_range::<Q>(cp, &tq, t, e, range)
    };
    let (logdet, xy) = if cp.n1 < PARALLEL_LEVELS {
        range_sums(e, 0..cp.n1)
    } else {
        // Fixed chunks, summed in chunk order: the result does not depend on
        // how many threads run them.
        use rayon::prelude::*;
        let linked = !cp.links.is_empty();
        let parts: Vec<(f64, Vec<f64>, Vec<f64>)> = (0..CHUNKS)
            .into_par_iter()
            .map(|c| {
                let range = c * cp.n1 / CHUNKS..(c + 1) * cp.n1 / CHUNKS;
                let mut local = if linked { vec![0.0; m * m] } else { Vec::new() };
                let (ld, xy) = range_sums(&mut local, range);
                (ld, xy, local)
            })
            .collect();
        let mut logdet = 0.0;
        let mut xy = vec![0.0f64; (p + 1) * (p + 2) / 2];
        for (ld, part_xy, local) in parts {
            logdet += ld;
            xy.iter_mut().zip(&part_xy).for_each(|(a, b)| *a += b);
            e.iter_mut().zip(&local).for_each(|(a, b)| *a += b);
        }
        (logdet, xy)
    };
    for a in 0..=p {
        for b in 0..=a {
            e[(q2 + a) * m + q2 + b] -= xy[a * (a + 1) / 2 + b];
        }
    }
    logdet
}

/// [`primary_alone`] for `p + 1 ≤ 12` columns of `[X y]`; `None` for wider
/// models, which take [`primary_range`].
fn alone_dispatch<const Q: usize>(
    cp: &CrossProducts,
    tq: &[[f64; Q]; Q],
    range: std::ops::Range<usize>,
) -> Option<(f64, Vec<f64>)> {
    macro_rules! columns {
        ($($c:literal),*) => {
            match cp.p + 1 {
                $($c => vectorised(|| primary_alone::<Q, $c>(cp, tq, range)),)*
                _ => return None,
            }
        };
    }
    Some(columns!(1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12))
}

/// [`primary_range`] for a primary term alone (no links to other terms)
/// and C = p + 1 columns of `[X y]`: log|L|² of the range and its packed
/// X–y block of Σ WᵢᵀWᵢ, with every loop of a fixed size and [`LANES`]
/// levels side by side (each lane sums its own levels; the lanes are added
/// at the end).
#[inline(always)]
fn primary_alone<const Q: usize, const C: usize>(
    cp: &CrossProducts,
    tq: &[[f64; Q]; Q],
    range: std::ops::Range<usize>,
) -> (f64, Vec<f64>) {
    const L: usize = LANES;
    let mut product = [1.0f64; L];
    let mut log_sum = 0.0;
    let mut xy = [[[0.0f64; L]; C]; C];
    let mut first = range.start;
    while first < range.end {
        let (g, cz) = lane_load::<Q, C, L>(cp, first, range.end);
        first += L;
        let (_, lf, inv) = lane_block::<Q, L>(&g, tq, &mut product, &mut log_sum);
        // W = L⁻¹ Tᵀ Cᵢ, column by column.
        let w: [[[f64; L]; Q]; C] = std::array::from_fn(|c| {
            let mut wc = lane_t_column(tq, &cz, c);
            lane_forward(&lf, &inv, &mut wc);
            wc
        });
        for a in 0..C {
            for b in 0..=a {
                for x in 0..Q {
                    for l in 0..L {
                        xy[a][b][l] += w[a][x][l] * w[b][x][l];
                    }
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

/// Above this many primary levels a search evaluation runs in parallel.
pub(super) const PARALLEL_LEVELS: usize = 2000;

/// The number of chunks the primary levels are split into when in parallel.
pub(super) const CHUNKS: usize = 4;

/// The primary levels in `range`: subtracts each level's link-column terms
/// from `e` and returns log|L|² of the range, the range's X–y block of
/// Σ WᵢᵀWᵢ (packed lower triangle, not yet subtracted).
pub(super) fn primary_range<const Q: usize>(
    cp: &CrossProducts,
    tq: &[[f64; Q]; Q],
    t: &[Vec<f64>],
    e: &mut [f64],
    range: std::ops::Range<usize>,
) -> (f64, Vec<f64>) {
    let m = cp.m;
    let p = cp.p;
    let q2 = cp.q2_total;
    let tq = *tq;
    let mut logdet = LogDet::new();
    // The X–y block of Σ WᵢᵀWᵢ, packed lower triangle.
    let mut xy = vec![0.0f64; (p + 1) * (p + 2) / 2];
    let mut cols: Vec<usize> = Vec::with_capacity(p + 8);
    let mut w: Vec<[f64; Q]> = Vec::with_capacity(p + 8);
    // The X–y columns present at this level (ascending within 0..=p).
    let mut present: Vec<usize> = Vec::with_capacity(p + 1);
    for i in range {
        level_w::<Q>(cp, &tq, t, i, &mut cols, &mut w, &mut present, &mut logdet);
        // S −= WᵀW on the lower triangle; `cols` ascend, the last columns
        // are the X and y columns present, whose block is summed locally.
        let n_link = cols.len() - present.len();
        for a in 0..n_link {
            let row = &mut e[cols[a] * m..cols[a] * m + m];
            let wa = w[a];
            for b in 0..=a {
                row[cols[b]] -= dot::<Q>(&wa, &w[b]);
            }
        }
        for (ia, &a) in present.iter().enumerate() {
            let wa = w[n_link + ia];
            if n_link > 0 {
                let row = &mut e[(q2 + a) * m..(q2 + a) * m + m];
                for b in 0..n_link {
                    row[cols[b]] -= dot::<Q>(&wa, &w[b]);
                }
            }
            let acc = &mut xy[a * (a + 1) / 2..a * (a + 1) / 2 + a + 1];
            for (ib, &b) in present[..=ia].iter().enumerate() {
                acc[b] += dot::<Q>(&wa, &w[n_link + ib]);
            }
        }
    }
    (logdet.total(), xy)
}

/// Level i's factor `L` of `Aᵢ = TᵀGᵢT + I` (with its reciprocal pivots,
/// which go into `logdet`), and the non-zero columns of
/// `Wᵢ = L⁻¹ Tᵀ Z₁ᵢᵀ[Z₂Λ₂ X y]`: their dense indices in `cols` (ascending)
/// and values in `w`; `present` lists the columns of `[X y]` among them.
#[inline(always)]
#[allow(clippy::too_many_arguments)]
pub(super) fn level_w<const Q: usize>(
    cp: &CrossProducts,
    tq: &[[f64; Q]; Q],
    t: &[Vec<f64>],
    i: usize,
    cols: &mut Vec<usize>,
    w: &mut Vec<[f64; Q]>,
    present: &mut Vec<usize>,
    logdet: &mut LogDet,
) -> ([[f64; Q]; Q], [f64; Q]) {
    let (p, q2) = (cp.p, cp.q2_total);
    let gi = &cp.g[i * Q * Q..(i + 1) * Q * Q];
    let (_, l, inv) = level_block::<Q>(gi, tq, logdet);
    // Columns of B = Tᵀ Z₁ᵢᵀ [Z₂Λ₂ X y], then W = L⁻¹ B.
    cols.clear();
    w.clear();
    let (lo, hi) = cp.link_range(i);
    for link in &cp.links[lo..hi] {
        let kt = cp.secondary[link.secondary()];
        for c in 0..cp.term_q[kt] {
            cols.push(link.offset() + c);
            w.push(std::array::from_fn(|r| cp.link_entry(link, &t[kt], r, c)));
        }
    }
    let zi = &cp.zxy[i * Q * (p + 1)..(i + 1) * Q * (p + 1)];
    // A column of Zᵢᵀ[X y] that is exactly zero (an indicator of another
    // cohort, say) adds nothing to WᵀW, so it is left out.
    present.clear();
    for c in 0..=p {
        let mut raw = [0.0f64; Q];
        for (r, rv) in raw.iter_mut().enumerate() {
            *rv = zi[r * (p + 1) + c];
        }
        if raw.iter().all(|v| *v == 0.0) {
            continue;
        }
        present.push(c);
        cols.push(q2 + c);
        w.push(raw);
    }
    for col in w.iter_mut() {
        // b = Tᵀ raw (T lower, so Tᵀ upper).
        let mut b = [0.0f64; Q];
        for r in 0..Q {
            let mut acc = 0.0;
            for s in r..Q {
                acc += tq[s][r] * col[s];
            }
            b[r] = acc;
        }
        // Forward substitution L x = b.
        for r in 0..Q {
            let mut acc = b[r];
            for k in 0..r {
                acc -= l[r][k] * b[k];
            }
            b[r] = acc * inv[r];
        }
        *col = b;
    }
    (l, inv)
}

/// One primary level's block: `GT = Gᵢ T`, and `L`, the Cholesky factor of
/// `A = TᵀGᵢT + I` (positive definite, since A ≥ I), with its reciprocal
/// pivots; the pivots go into `logdet`.
#[inline(always)]
pub(super) fn level_block<const Q: usize>(
    gi: &[f64],
    tq: &[[f64; Q]; Q],
    logdet: &mut LogDet,
) -> ([[f64; Q]; Q], [[f64; Q]; Q], [f64; Q]) {
    let mut gt = [[0.0f64; Q]; Q];
    for r in 0..Q {
        for c in 0..Q {
            let mut acc = 0.0;
            for s in c..Q {
                acc += gi[r * Q + s] * tq[s][c];
            }
            gt[r][c] = acc;
        }
    }
    let mut l = [[0.0f64; Q]; Q];
    // Reciprocal pivots: divisions are replaced by multiplications.
    let mut inv = [0.0f64; Q];
    for j in 0..Q {
        for r in j..Q {
            let mut acc = if r == j { 1.0 } else { 0.0 };
            for s in r..Q {
                acc += tq[s][r] * gt[s][j];
            }
            // acc = A[r][j]; Cholesky column j.
            for k in 0..j {
                acc -= l[r][k] * l[j][k];
            }
            if r == j {
                let d = acc.sqrt();
                l[j][j] = d;
                inv[j] = 1.0 / d;
                logdet.push(d);
            } else {
                l[r][j] = acc * inv[j];
            }
        }
    }
    (gt, l, inv)
}

/// Levels taken side by side in the kernels of a primary term alone: every
/// per-level quantity is an array over this many levels (lanes), so each
/// arithmetic step runs on all of them at once in the processor's vector
/// registers. Measured on 30,000 participants (q = 2, p = 3): one gradient
/// evaluation took 0.9 ms one level at a time, 0.75 ms with 2 lanes,
/// 0.58 ms with 4 and 0.94 ms with 8 (notes/benchmarks.md).
pub(super) const LANES: usize = 4;

/// Runs `kernel` compiled for 256-bit vector registers (AVX2) when the
/// processor has them, so that each step on [`LANES`] levels is one
/// instruction instead of two; otherwise as compiled for the baseline.
/// Only wider registers are enabled, not fused multiply–add, so both give
/// the same numbers to the bit (notes/criterion.md, "Wider vectors").
/// The kernels it runs are `#[inline(always)]`, so that their bodies are
/// compiled inside the wider function.
#[inline(always)]
pub(super) fn vectorised<R>(kernel: impl FnOnce() -> R) -> R {
    #[cfg(target_arch = "x86_64")]
    {
        #[target_feature(enable = "avx2")]
        fn wide<R>(kernel: impl FnOnce() -> R) -> R {
            kernel()
        }
        if std::arch::is_x86_feature_detected!("avx2") {
            // SAFETY: `wide` only needs AVX2, which the processor has.
            return unsafe { wide(kernel) };
        }
    }
    kernel()
}

/// [`level_block`] for `L` levels side by side (lane innermost): `GT`, the
/// factor `L` and its reciprocal pivots. The pivots multiply into
/// `product`, one per lane, folded into `log_sum` before they overflow (they
/// are at least 1). A lane of zeros gives A = I: pivots 1, adding nothing.
#[inline(always)]
#[allow(clippy::type_complexity)]
pub(super) fn lane_block<const Q: usize, const L: usize>(
    g: &[[[f64; L]; Q]; Q],
    tq: &[[f64; Q]; Q],
    product: &mut [f64; L],
    log_sum: &mut f64,
) -> ([[[f64; L]; Q]; Q], [[[f64; L]; Q]; Q], [[f64; L]; Q]) {
    let mut gt = [[[0.0f64; L]; Q]; Q];
    for r in 0..Q {
        for c in 0..Q {
            for s in c..Q {
                for l in 0..L {
                    gt[r][c][l] += g[r][s][l] * tq[s][c];
                }
            }
        }
    }
    let mut lf = [[[0.0f64; L]; Q]; Q];
    let mut inv = [[0.0f64; L]; Q];
    for j in 0..Q {
        for r in j..Q {
            let mut a = [if r == j { 1.0 } else { 0.0 }; L];
            for s in r..Q {
                for l in 0..L {
                    a[l] += tq[s][r] * gt[s][j][l];
                }
            }
            for k in 0..j {
                for l in 0..L {
                    a[l] -= lf[r][k][l] * lf[j][k][l];
                }
            }
            if r == j {
                for l in 0..L {
                    let d = a[l].sqrt();
                    lf[j][j][l] = d;
                    inv[j][l] = 1.0 / d;
                    product[l] *= d;
                }
            } else {
                for l in 0..L {
                    lf[r][j][l] = a[l] * inv[j][l];
                }
            }
        }
    }
    if product.iter().any(|&x| x > 1e250) {
        for x in product.iter_mut() {
            *log_sum += x.ln();
            *x = 1.0;
        }
    }
    (gt, lf, inv)
}

/// `Tᵀc` for column `col` of the lanes' `Cᵢ` (T lower, so Tᵀ upper).
#[inline(always)]
pub(super) fn lane_t_column<const Q: usize, const C: usize, const L: usize>(
    tq: &[[f64; Q]; Q],
    cz: &[[[f64; L]; C]; Q],
    col: usize,
) -> [[f64; L]; Q] {
    let mut b = [[0.0f64; L]; Q];
    for r in 0..Q {
        for x in r..Q {
            for l in 0..L {
                b[r][l] += tq[x][r] * cz[x][col][l];
            }
        }
    }
    b
}

/// Forward substitution `L x = w` in place, lanes side by side (`inv`: the
/// reciprocal pivots).
#[inline(always)]
pub(super) fn lane_forward<const Q: usize, const L: usize>(
    lf: &[[[f64; L]; Q]; Q],
    inv: &[[f64; L]; Q],
    w: &mut [[f64; L]; Q],
) {
    for r in 0..Q {
        for x in 0..r {
            for l in 0..L {
                w[r][l] -= lf[r][x][l] * w[x][l];
            }
        }
        for l in 0..L {
            w[r][l] *= inv[r][l];
        }
    }
}

/// Back substitution `Lᵀ x = w` in place, lanes side by side.
#[inline(always)]
pub(super) fn lane_backward<const Q: usize, const L: usize>(
    lf: &[[[f64; L]; Q]; Q],
    inv: &[[f64; L]; Q],
    w: &mut [[f64; L]; Q],
) {
    for r in (0..Q).rev() {
        for x in r + 1..Q {
            for l in 0..L {
                w[r][l] -= lf[x][r][l] * w[x][l];
            }
        }
        for l in 0..L {
            w[r][l] *= inv[r][l];
        }
    }
}

/// `Gᵢ` and `Cᵢ = Zᵢᵀ[X y]` of the levels `first..first + L` that lie
/// below `end`, lane innermost; lanes past `end` stay zero.
#[inline(always)]
#[allow(clippy::type_complexity)]
pub(super) fn lane_load<const Q: usize, const C: usize, const L: usize>(
    cp: &CrossProducts,
    first: usize,
    end: usize,
) -> ([[[f64; L]; Q]; Q], [[[f64; L]; C]; Q]) {
    let mut g = [[[0.0f64; L]; Q]; Q];
    let mut cz = [[[0.0f64; L]; C]; Q];
    for l in 0..L.min(end - first) {
        let i = first + l;
        let gi = &cp.g[i * Q * Q..(i + 1) * Q * Q];
        let ci = &cp.zxy[i * Q * C..(i + 1) * Q * C];
        for r in 0..Q {
            for c in 0..Q {
                g[r][c][l] = gi[r * Q + c];
            }
            for c in 0..C {
                cz[r][c][l] = ci[r * C + c];
            }
        }
    }
    (g, cz)
}

#[inline(always)]
pub(super) fn dot<const Q: usize>(a: &[f64; Q], b: &[f64; Q]) -> f64 {
    let mut acc = 0.0;
    for r in 0..Q {
        acc += a[r] * b[r];
    }
    acc
}

/// Scratch space of one general-q₁ level: `A`, `GᵢT`, `L` (q₁×q₁
/// row-major), the level's dense columns, `B` and `W` (q₁ × columns).
#[derive(Default)]
pub(super) struct GeneralLevel {
    a: Vec<f64>,
    tmp: Vec<f64>,
    pub l: Vec<f64>,
    pub cols: Vec<usize>,
    bt: Vec<f64>,
    pub wv: Vec<f64>,
}

/// Level i for any q₁: `L` of `Aᵢ = T₁ᵀGᵢT₁ + I` (its pivots go into
/// `logdet`) and `W = L⁻¹ T₁ᵀ [Vᵢ T_s … | Zᵢᵀ X y]` with its dense column
/// indices, in `sc`.
pub(super) fn level_w_general(
    cp: &CrossProducts,
    t1: &[f64],
    t: &[Vec<f64>],
    i: usize,
    sc: &mut GeneralLevel,
    logdet: &mut LogDet,
) {
    let (p, q2, q1) = (cp.p, cp.q2_total, cp.q1);
    sc.a.resize(q1 * q1, 0.0);
    sc.tmp.resize(q1 * q1, 0.0);
    sc.l.resize(q1 * q1, 0.0);
    // A = T₁ᵀ Gᵢ T₁ + I.
    let gi = &cp.g[i * q1 * q1..(i + 1) * q1 * q1];
    for r in 0..q1 {
        for c in 0..q1 {
            let mut acc = 0.0;
            for s in c..q1 {
                acc += gi[r * q1 + s] * t1[s * q1 + c];
            }
            sc.tmp[r * q1 + c] = acc;
        }
    }
    for r in 0..q1 {
        for c in 0..=r {
            let mut acc = 0.0;
            for s in r..q1 {
                acc += t1[s * q1 + r] * sc.tmp[s * q1 + c];
            }
            sc.a[r * q1 + c] = acc + if r == c { 1.0 } else { 0.0 };
        }
    }
    // Small Cholesky; A ≥ I so it cannot fail.
    for j in 0..q1 {
        let mut d = sc.a[j * q1 + j];
        for s in 0..j {
            d -= sc.l[j * q1 + s] * sc.l[j * q1 + s];
        }
        let d = d.sqrt();
        sc.l[j * q1 + j] = d;
        logdet.push(d);
        for r in j + 1..q1 {
            let mut v = sc.a[r * q1 + j];
            for s in 0..j {
                v -= sc.l[r * q1 + s] * sc.l[j * q1 + s];
            }
            sc.l[r * q1 + j] = v / d;
        }
        for r in 0..j {
            sc.l[r * q1 + j] = 0.0;
        }
    }
    // B = T₁ᵀ [Vᵢ T_s ... | Zᵢᵀ X y], columns gathered with their dense index.
    sc.cols.clear();
    sc.bt.clear();
    let (lo, hi) = cp.link_range(i);
    let mut ncols = 0;
    for link in &cp.links[lo..hi] {
        ncols += cp.term_q[cp.secondary[link.secondary()]];
    }
    ncols += p + 1;
    sc.bt.resize(q1 * ncols, 0.0);
    let mut col = 0;
    for link in &cp.links[lo..hi] {
        let kt = cp.secondary[link.secondary()];
        let qs = cp.term_q[kt];
        for c in 0..qs {
            sc.cols.push(link.offset() + c);
            for r in 0..q1 {
                sc.bt[r * ncols + col + c] = cp.link_entry(link, &t[kt], r, c);
            }
        }
        col += qs;
    }
    let zi = &cp.zxy[i * q1 * (p + 1)..(i + 1) * q1 * (p + 1)];
    for c in 0..=p {
        sc.cols.push(q2 + c);
        for r in 0..q1 {
            sc.bt[r * ncols + col + c] = zi[r * (p + 1) + c];
        }
    }
    // Left-multiply by T₁ᵀ (upper triangular), in place row by row.
    sc.wv.clear();
    sc.wv.resize(q1 * ncols, 0.0);
    for r in 0..q1 {
        for s in r..q1 {
            let f = t1[s * q1 + r];
            if f != 0.0 {
                for c in 0..ncols {
                    sc.wv[r * ncols + c] += f * sc.bt[s * ncols + c];
                }
            }
        }
    }
    // W = L⁻¹ B (forward substitution).
    for r in 0..q1 {
        for s in 0..r {
            let f = sc.l[r * q1 + s];
            if f != 0.0 {
                for c in 0..ncols {
                    sc.wv[r * ncols + c] -= f * sc.wv[s * ncols + c];
                }
            }
        }
        let d = sc.l[r * q1 + r];
        for c in 0..ncols {
            sc.wv[r * ncols + c] /= d;
        }
    }
}

/// The primary levels for any q₁.
pub(super) fn primary_general(cp: &CrossProducts, t1: &[f64], t: &[Vec<f64>], e: &mut [f64]) -> f64 {
    let m = cp.m;
    let mut logdet = LogDet::new();
    let mut sc = GeneralLevel::default();
    let q1 = cp.q1;
    for i in 0..cp.n1 {
        level_w_general(cp, t1, t, i, &mut sc, &mut logdet);
        let (cols, wv) = (&sc.cols, &sc.wv);
        let ncols = cols.len();
        // S −= WᵀW on the lower triangle.
        for ca in 0..ncols {
            let ia = cols[ca];
            for cb in 0..ncols {
                let ib = cols[cb];
                if ib > ia {
                    continue;
                }
                let mut acc = 0.0;
                for r in 0..q1 {
                    acc += wv[r * ncols + ca] * wv[r * ncols + cb];
                }
                e[ia * m + ib] -= acc;
            }
        }
    }
    logdet.total()
}

/// The primary term's spherical effects at the solution `x = [u₂, β]` of
/// the dense system (dense order, without y), q₁ per level: level by
/// level, `Lᵢᵀuᵢ = Wᵢ,y − Σ_c Wᵢ,c x_c` over its non-zero columns c. `L`
/// and `W` are formed again as the evaluation forms them, so nothing is
/// kept from it; the levels are independent, so chunks run in parallel and
/// the result does not depend on the threads.
pub fn primary_effects(cp: &CrossProducts, t: &[Vec<f64>], x: &[f64]) -> Vec<f64> {
    let Some(k1) = cp.primary else {
        return Vec::new();
    };
    let q1 = cp.q1;
    let mut u = vec![0.0; cp.n1 * q1];
    let per_chunk = cp.n1.div_ceil(CHUNKS).max(1);
    let run = |c: usize, out: &mut [f64]| {
        let range = c * per_chunk..(c * per_chunk + out.len() / q1);
        match q1 {
            1 => effects_fixed::<1>(cp, &t[k1], t, x, range, out),
            2 => effects_fixed::<2>(cp, &t[k1], t, x, range, out),
            3 => effects_fixed::<3>(cp, &t[k1], t, x, range, out),
            4 => effects_fixed::<4>(cp, &t[k1], t, x, range, out),
            _ => effects_general(cp, &t[k1], t, x, range, out),
        }
    };
    if cp.n1 < PARALLEL_LEVELS {
        run(0, &mut u);
    } else {
        use rayon::prelude::*;
        u.par_chunks_mut(per_chunk * q1)
            .enumerate()
            .for_each(|(c, out)| run(c, out));
    }
    u
}

/// The right-hand side `Wᵢ,y − Σ_c Wᵢ,c x_c` of one level's effects, added
/// to `rhs` (zeroed by the caller): `cols` are the level's dense columns,
/// `y` the response's, and `w(c, r)` entry r of column c of W.
#[inline(always)]
fn effects_rhs(cols: &[usize], y: usize, x: &[f64], w: impl Fn(usize, usize) -> f64, rhs: &mut [f64]) {
    for (r, v) in rhs.iter_mut().enumerate() {
        for (c, &dc) in cols.iter().enumerate() {
            if dc == y {
                *v += w(c, r);
            } else {
                *v -= w(c, r) * x[dc];
            }
        }
    }
}

/// The factor T (Q×Q, row-major) as an array.
#[inline(always)]
pub(super) fn factor_array<const Q: usize>(t: &[f64]) -> [[f64; Q]; Q] {
    std::array::from_fn(|r| std::array::from_fn(|c| t[r * Q + c]))
}

/// Back substitution `Lᵀu = rhs` for one level (L lower, row-major q×q).
#[inline(always)]
fn back_substitute(l: impl Fn(usize, usize) -> f64, rhs: &[f64], u: &mut [f64]) {
    let q = rhs.len();
    for r in (0..q).rev() {
        let mut v = rhs[r];
        for s in r + 1..q {
            v -= l(s, r) * u[s];
        }
        u[r] = v / l(r, r);
    }
}

fn effects_fixed<const Q: usize>(
    cp: &CrossProducts,
    t1: &[f64],
    t: &[Vec<f64>],
    x: &[f64],
    range: std::ops::Range<usize>,
    out: &mut [f64],
) {
    let tq = factor_array::<Q>(t1);
    let y = cp.m - 1;
    let mut logdet = LogDet::new();
    let (mut cols, mut w, mut present) = (Vec::new(), Vec::new(), Vec::new());
    let start = range.start;
    for i in range {
        let (l, _) = level_w::<Q>(cp, &tq, t, i, &mut cols, &mut w, &mut present, &mut logdet);
        let mut rhs = [0.0f64; Q];
        effects_rhs(&cols, y, x, |c, r| w[c][r], &mut rhs);
        let at = (i - start) * Q;
        back_substitute(|a, b| l[a][b], &rhs, &mut out[at..at + Q]);
    }
}

fn effects_general(
    cp: &CrossProducts,
    t1: &[f64],
    t: &[Vec<f64>],
    x: &[f64],
    range: std::ops::Range<usize>,
    out: &mut [f64],
) {
    let (q1, y) = (cp.q1, cp.m - 1);
    let mut logdet = LogDet::new();
    let mut sc = GeneralLevel::default();
    let mut rhs = vec![0.0; q1];
    let start = range.start;
    for i in range {
        level_w_general(cp, t1, t, i, &mut sc, &mut logdet);
        let nc = sc.cols.len();
        rhs.iter_mut().for_each(|v| *v = 0.0);
        effects_rhs(&sc.cols, y, x, |c, r| sc.wv[r * nc + c], &mut rhs);
        let at = (i - start) * q1;
        back_substitute(|a, b| sc.l[a * q1 + b], &rhs, &mut out[at..at + q1]);
    }
}

#[cfg(test)]
pub(super) mod tests {
    use super::super::gradient::SUMMATION_ORDER_REL;
    use super::*;
    use crate::lmm::{MixedProblem, RandomTermData};
    use crate::simulate::Rng;

    fn problem(q1: usize) -> MixedProblem {
        let mut rng = Rng::new(5);
        let n = 300;
        let mut y = Vec::new();
        let mut x = Vec::new();
        let mut z1 = vec![Vec::new(); q1];
        let mut lvl1 = Vec::new();
        let mut lvl2 = Vec::new();
        for r in 0..n {
            y.push(rng.normal());
            x.extend([1.0, rng.normal()]);
            for c in 0..q1 {
                z1[c].push(if c == 0 { 1.0 } else { rng.normal() });
            }
            lvl1.push((r / 3) as u32);
            lvl2.push((rng.uniform() * 7.0) as u32);
        }
        MixedProblem {
            y: y.into(),
            x_names: vec!["a".into(), "b".into()],
            x: x.into(),
            terms: vec![
                RandomTermData {
                    factor: "p".into(),
                    level_names: (0..100).map(|i| i.to_string()).collect(),
                    level: lvl1.into(),
                    columns: (0..q1).map(|c| c.to_string()).collect(),
                    z: z1.into_iter().map(Into::into).collect(),
                    covariance: Default::default(),
                },
                RandomTermData {
                    factor: "s".into(),
                    level_names: (0..7).map(|i| i.to_string()).collect(),
                    level: lvl2.into(),
                    columns: vec!["i".into()],
                    z: vec![vec![1.0; n].into()],
                    covariance: Default::default(),
                },
            ],
        }
    }

    // The fixed-size kernel and the general kernel are two codings of one
    // algorithm: they must agree to rounding on every output.
    #[test]
    fn fixed_and_general_kernels_agree() {
        for q1 in 1..=4 {
            let prob = problem(q1);
            let cp = CrossProducts::new(&prob);
            let mut rng = Rng::new(9);
            let theta: Vec<f64> = (0..prob.n_theta()).map(|_| 0.2 + rng.uniform()).collect();
            let t = factors(&cp, &theta);
            let k1 = cp.primary.unwrap();
            let mut e1 = cp.dense.clone();
            let mut e2 = cp.dense.clone();
            let a = match q1 {
                1 => primary_fixed::<1>(&cp, &t[k1], &t, &mut e1),
                2 => primary_fixed::<2>(&cp, &t[k1], &t, &mut e1),
                3 => primary_fixed::<3>(&cp, &t[k1], &t, &mut e1),
                _ => primary_fixed::<4>(&cp, &t[k1], &t, &mut e1),
            };
            let b = primary_general(&cp, &t[k1], &t, &mut e2);
            assert!((a - b).abs() < 1e-9 * b.abs().max(1.0), "q1 {q1}: {a} vs {b}");
            // The effects at some solution x of the dense system.
            let x: Vec<f64> = (0..cp.m - 1).map(|_| rng.normal()).collect();
            let mut u1 = vec![0.0; cp.n1 * q1];
            let mut u2 = vec![0.0; cp.n1 * q1];
            match q1 {
                1 => effects_fixed::<1>(&cp, &t[k1], &t, &x, 0..cp.n1, &mut u1),
                2 => effects_fixed::<2>(&cp, &t[k1], &t, &x, 0..cp.n1, &mut u1),
                3 => effects_fixed::<3>(&cp, &t[k1], &t, &x, 0..cp.n1, &mut u1),
                _ => effects_fixed::<4>(&cp, &t[k1], &t, &x, 0..cp.n1, &mut u1),
            }
            effects_general(&cp, &t[k1], &t, &x, 0..cp.n1, &mut u2);
            for (v1, v2) in u1.iter().zip(&u2) {
                assert!((v1 - v2).abs() < 1e-9 * v2.abs().max(1.0), "q1 {q1}: u {v1} vs {v2}");
            }
            let m = cp.m;
            for i in 0..m {
                for j in 0..=i {
                    assert!((e1[i * m + j] - e2[i * m + j]).abs() < 1e-9, "q1 {q1} S[{i},{j}]");
                }
            }
        }
    }

    // The primary term alone with p fixed columns, one of them an indicator
    // that is zero for half the levels (so the general kernel skips it there).
    pub(in crate::lmm::criterion) fn alone_problem(q1: usize, p: usize) -> MixedProblem {
        let mut rng = Rng::new(17);
        let n = 240;
        let mut x = Vec::new();
        let mut z1 = vec![Vec::new(); q1];
        for r in 0..n {
            x.push(1.0);
            for c in 1..p {
                x.push(if c == 1 {
                    f64::from(u8::from(r / 3 % 2 == 0))
                } else {
                    rng.normal()
                });
            }
            for (c, col) in z1.iter_mut().enumerate() {
                col.push(if c == 0 { 1.0 } else { rng.normal() });
            }
        }
        MixedProblem {
            y: (0..n).map(|_| rng.normal()).collect(),
            x_names: (0..p).map(|c| c.to_string()).collect(),
            x: x.into(),
            terms: vec![RandomTermData::numbered(
                "p",
                n / 3,
                (0..n).map(|r| (r / 3) as u32).collect(),
                &["intercept", "a", "b", "c"][..q1],
                z1,
            )],
        }
    }

    // The kernel for a primary term alone (fixed sizes, levels side by
    // side) and the kernel with links are two codings of the same sums,
    // added in another order: they agree to rounding.
    #[test]
    fn kernel_for_a_term_alone_matches_the_linked_kernel() {
        fn both<const Q: usize>(cp: &CrossProducts, t1: &[f64]) -> ((f64, Vec<f64>), (f64, Vec<f64>)) {
            let tq = factor_array::<Q>(t1);
            let mut e = vec![0.0; cp.m * cp.m];
            let linked = primary_range::<Q>(cp, &tq, &[t1.to_vec()], &mut e, 0..cp.n1);
            (alone_dispatch::<Q>(cp, &tq, 0..cp.n1).unwrap(), linked)
        }
        for q1 in 1..=4 {
            for p in 1..=7 {
                let prob = alone_problem(q1, p);
                let cp = CrossProducts::new(&prob);
                let mut rng = Rng::new(3);
                let theta: Vec<f64> = (0..prob.n_theta()).map(|_| 0.2 + rng.uniform()).collect();
                let t = factors(&cp, &theta);
                let (alone, linked) = match q1 {
                    1 => both::<1>(&cp, &t[0]),
                    2 => both::<2>(&cp, &t[0]),
                    3 => both::<3>(&cp, &t[0]),
                    _ => both::<4>(&cp, &t[0]),
                };
                let close = |x: f64, y: f64| (x - y).abs() <= SUMMATION_ORDER_REL * (1.0 + x.abs());
                assert!(close(alone.0, linked.0), "q1 {q1}, p {p}: {alone:?} vs {linked:?}");
                assert!(
                    alone.1.len() == linked.1.len() && alone.1.iter().zip(&linked.1).all(|(x, y)| close(*x, *y)),
                    "q1 {q1}, p {p}: {alone:?} vs {linked:?}"
                );
            }
        }
    }
}
