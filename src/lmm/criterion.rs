//! One evaluation of the profiled criterion for a given θ.
//!
//! With `Λ` built from θ, the augmented matrix
//! `A = [ΛᵀZᵀZΛ + I, ΛᵀZᵀX, ΛᵀZᵀy; ·, XᵀX, Xᵀy; ·, ·, yᵀy]` is factored as
//! `A = LLᵀ` in two stages (notes/criterion.md):
//! 1. the primary block is block-diagonal: `Lᵢ = chol(T₁ᵀGᵢT₁ + I)` per level,
//!    and `Wᵢ = Lᵢ⁻¹ T₁ᵀ Z₁ᵢᵀ[Z₂Λ₂ X y]`;
//! 2. the dense Schur complement `S = Λ̃ᵀ D Λ̃ + I₂ − Σᵢ WᵢᵀWᵢ` is factored by
//!    faer's dense Cholesky.
//!
//! From the factors: `log|L_Z|² = Σᵢ log|Lᵢ|² + log|L₂|²`, `log|R_X|²` from the
//! fixed block, and the penalized residual sum of squares `r² = L[m,m]²`.

// Index loops mirror the matrix notation of the derivation.
#![allow(clippy::needless_range_loop)]

use faer::{Mat, Side};

use super::crossprod::CrossProducts;
use super::{Method, unpack_factor};

/// The scalar pieces of one evaluation.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Pieces {
    /// `log|L_Z|²`, the log-determinant of `ΛᵀZᵀZΛ + I`.
    pub logdet_z: f64,
    /// `log|R_X|²`, the log-determinant of `XᵀV⁻¹X` (V relative to σ²).
    pub logdet_x: f64,
    /// Penalized weighted residual sum of squares `r²`.
    pub pwrss: f64,
}

impl Pieces {
    /// The profiled deviance (−2 × log-likelihood at the profiled σ²).
    pub fn profiled_deviance(&self, method: Method, n: usize, p: usize) -> f64 {
        let two_pi = 2.0 * std::f64::consts::PI;
        match method {
            Method::Ml => {
                let nf = n as f64;
                self.logdet_z + nf * (1.0 + (two_pi * self.pwrss / nf).ln())
            }
            Method::Reml => {
                let nu = (n - p) as f64;
                self.logdet_z + self.logdet_x + nu * (1.0 + (two_pi * self.pwrss / nu).ln())
            }
        }
    }

    /// The deviance at a given σ² (not profiled), used for the information matrix.
    pub fn deviance_at(&self, method: Method, n: usize, p: usize, sigma2: f64) -> f64 {
        let two_pi = 2.0 * std::f64::consts::PI;
        let (nu, extra) = match method {
            Method::Ml => (n as f64, 0.0),
            Method::Reml => ((n - p) as f64, self.logdet_x),
        };
        self.logdet_z + extra + nu * (two_pi * sigma2).ln() + self.pwrss / sigma2
    }

    /// The σ² that maximises the criterion for this θ.
    pub fn sigma2(&self, method: Method, n: usize, p: usize) -> f64 {
        match method {
            Method::Ml => self.pwrss / n as f64,
            Method::Reml => self.pwrss / (n - p) as f64,
        }
    }
}

/// Why an evaluation failed.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum EvalFailure {
    /// The dense Schur complement was not positive definite at this pivot
    /// (in the fixed block: the design is rank deficient).
    NotPositiveDefinite {
        /// The failing pivot in the dense part.
        pivot: usize,
    },
}

/// Everything a full evaluation produces, kept for post-fit quantities.
#[derive(Debug, Clone)]
pub struct Factor {
    /// The scalar pieces.
    pub pieces: Pieces,
    /// Lower Cholesky factor of the dense part, m×m.
    pub dense_l: Mat<f64>,
    /// Per primary level, `Lᵢ` (q₁×q₁ row-major), when kept.
    pub blocks_l: Vec<f64>,
    /// Per primary level, `Wᵢ` restricted to its own columns, when kept.
    pub blocks_w: KeptW,
}

/// Per primary level, `Wᵢ` restricted to its own columns, in flat arrays:
/// the dense column index of each column and the values (q₁ × ncols
/// row-major), one allocation for all levels.
#[derive(Debug, Clone, Default)]
pub struct KeptW {
    q1: usize,
    /// Level i's columns are `cols[start[i]..start[i + 1]]`.
    start: Vec<usize>,
    cols: Vec<usize>,
    vals: Vec<f64>,
}

impl KeptW {
    fn with_capacity(q1: usize, levels: usize, cols_per_level: usize) -> KeptW {
        let mut start = Vec::with_capacity(levels + 1);
        start.push(0);
        KeptW {
            q1,
            start,
            cols: Vec::with_capacity(levels * cols_per_level),
            vals: Vec::with_capacity(levels * cols_per_level * q1),
        }
    }

    /// Append a level: its columns, and `fill` writes its q₁ × ncols values.
    fn push_with(&mut self, cols: &[usize], fill: impl FnOnce(&mut [f64])) {
        let at = self.vals.len();
        self.vals.resize(at + self.q1 * cols.len(), 0.0);
        fill(&mut self.vals[at..]);
        self.cols.extend_from_slice(cols);
        self.start.push(self.cols.len());
    }

    /// Level `i`'s dense column indices and values (q₁ × ncols row-major).
    pub fn level(&self, i: usize) -> (&[usize], &[f64]) {
        let (a, b) = (self.start[i], self.start[i + 1]);
        (&self.cols[a..b], &self.vals[self.q1 * a..self.q1 * b])
    }

    /// Number of kept levels.
    pub fn len(&self) -> usize {
        self.start.len().saturating_sub(1)
    }

    /// Whether no level is kept.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }
}

/// Build the per-term lower-triangular factors `T_k` (row-major) from θ.
pub fn factors(cp: &CrossProducts, theta: &[f64]) -> Vec<Vec<f64>> {
    cp.term_q
        .iter()
        .zip(&cp.theta_offset)
        .map(|(&q, &off)| unpack_factor(&theta[off..off + q * (q + 1) / 2], q))
        .collect()
}

/// Evaluate the pieces of the criterion; `keep` retains the block factors
/// needed for BLUPs.
pub fn evaluate(cp: &CrossProducts, theta: &[f64], keep: bool) -> Result<Factor, EvalFailure> {
    let m = cp.m;
    let p = cp.p;
    let q2 = cp.q2_total;
    let t = factors(cp, theta);

    // S = Λ̃ᵀ D Λ̃ + I₂, Λ̃ = blockdiag(T_s per secondary level, I_{p+1}).
    let mut e = cp.dense.clone();
    // Right-multiply column blocks by T_s.
    for (s, &kt) in cp.secondary.iter().enumerate() {
        let qs = cp.term_q[kt];
        let ts = &t[kt];
        let n_levels = (if s + 1 < cp.secondary.len() {
            cp.secondary_offset[s + 1]
        } else {
            q2
        } - cp.secondary_offset[s])
            / qs;
        let mut tmp = vec![0.0; qs];
        for lvl in 0..n_levels {
            let base = cp.secondary_offset[s] + lvl * qs;
            for row in 0..m {
                let r = &mut e[row * m + base..row * m + base + qs];
                for (c, tc) in tmp.iter_mut().enumerate() {
                    let mut acc = 0.0;
                    for a in c..qs {
                        acc += r[a] * ts[a * qs + c];
                    }
                    *tc = acc;
                }
                r.copy_from_slice(&tmp);
            }
            // Left-multiply row block by T_sᵀ.
            for col in 0..m {
                for (c, tc) in tmp.iter_mut().enumerate() {
                    let mut acc = 0.0;
                    for a in c..qs {
                        acc += ts[a * qs + c] * e[(base + a) * m + col];
                    }
                    *tc = acc;
                }
                for c in 0..qs {
                    e[(base + c) * m + col] = tmp[c];
                }
            }
        }
    }
    for k in 0..q2 {
        e[k * m + k] += 1.0;
    }

    let mut logdet_z = 0.0;
    let mut blocks_l = Vec::new();
    let mut blocks_w = KeptW::default();
    if let Some(k1) = cp.primary {
        let out = match cp.q1 {
            1 => primary_fixed::<1>(cp, &t[k1], &t, &mut e, keep),
            2 => primary_fixed::<2>(cp, &t[k1], &t, &mut e, keep),
            3 => primary_fixed::<3>(cp, &t[k1], &t, &mut e, keep),
            4 => primary_fixed::<4>(cp, &t[k1], &t, &mut e, keep),
            _ => primary_general(cp, &t[k1], &t, &mut e, keep),
        };
        logdet_z = out.0;
        blocks_l = out.1;
        blocks_w = out.2;
    }

    let s = Mat::from_fn(m, m, |i, j| if i >= j { e[i * m + j] } else { e[j * m + i] });
    let llt = s.llt(Side::Lower).map_err(|_| EvalFailure::NotPositiveDefinite {
        pivot: first_bad_pivot(&s),
    })?;
    let dense_l = llt.L().to_owned();
    for k in 0..q2 {
        logdet_z += 2.0 * dense_l[(k, k)].ln();
    }
    let mut logdet_x = 0.0;
    for k in q2..q2 + p {
        logdet_x += 2.0 * dense_l[(k, k)].ln();
    }
    let r = dense_l[(m - 1, m - 1)];
    Ok(Factor {
        pieces: Pieces {
            logdet_z,
            logdet_x,
            pwrss: r * r,
        },
        dense_l,
        blocks_l,
        blocks_w,
    })
}

/// The first pivot at which a plain Cholesky of `s` breaks down.
fn first_bad_pivot(s: &Mat<f64>) -> usize {
    let m = s.nrows();
    let mut l = Mat::<f64>::zeros(m, m);
    for j in 0..m {
        let mut d = s[(j, j)];
        for k in 0..j {
            d -= l[(j, k)] * l[(j, k)];
        }
        if d <= 1e-12 * s[(j, j)].abs().max(1e-300) {
            return j;
        }
        let d = d.sqrt();
        l[(j, j)] = d;
        for i in j + 1..m {
            let mut v = s[(i, j)];
            for k in 0..j {
                v -= l[(i, k)] * l[(j, k)];
            }
            l[(i, j)] = v / d;
        }
    }
    m
}

/// The profiled deviance at θ, or +∞ where the evaluation fails.
pub fn deviance(cp: &CrossProducts, theta: &[f64], method: Method) -> f64 {
    match evaluate(cp, theta, false) {
        Ok(f) => f.pieces.profiled_deviance(method, cp.n, cp.p),
        Err(_) => f64::INFINITY,
    }
}

/// Per-level results: log|L₁|², and when kept the blocks Lᵢ and Wᵢ.
type PrimaryOut = (f64, Vec<f64>, KeptW);

/// Accumulates Σ 2·ln(dᵢ) for pivots dᵢ ≥ 1 with few logarithms: the pivots
/// are multiplied together and the logarithm taken when the product is large.
struct LogDet {
    sum: f64,
    product: f64,
}

impl LogDet {
    fn new() -> LogDet {
        LogDet { sum: 0.0, product: 1.0 }
    }
    #[inline]
    fn push(&mut self, d: f64) {
        self.product *= d;
        if self.product > 1e250 || self.product < 1e-250 {
            self.sum += self.product.ln();
            self.product = 1.0;
        }
    }
    fn total(&self) -> f64 {
        2.0 * (self.sum + self.product.ln())
    }
}

/// The primary levels for q₁ = Q, with fixed-size arrays so the small
/// products unroll.
fn primary_fixed<const Q: usize>(
    cp: &CrossProducts,
    t1: &[f64],
    t: &[Vec<f64>],
    e: &mut [f64],
    keep: bool,
) -> PrimaryOut {
    let m = cp.m;
    let p = cp.p;
    let q2 = cp.q2_total;
    let mut tq = [[0.0f64; Q]; Q];
    for r in 0..Q {
        for c in 0..Q {
            tq[r][c] = t1[r * Q + c];
        }
    }
    let (logdet, xy, blocks_l, blocks_w) = if keep || cp.n1 < PARALLEL_LEVELS {
        primary_range::<Q>(cp, &tq, t, e, 0..cp.n1, keep)
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
                let (ld, xy, _, _) = primary_range::<Q>(cp, &tq, t, &mut local, range, false);
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
        (logdet, xy, Vec::new(), KeptW::default())
    };
    for a in 0..=p {
        for b in 0..=a {
            e[(q2 + a) * m + q2 + b] -= xy[a * (a + 1) / 2 + b];
        }
    }
    (logdet, blocks_l, blocks_w)
}

/// Above this many primary levels a search evaluation runs in parallel.
const PARALLEL_LEVELS: usize = 2000;

/// The number of chunks the primary levels are split into when in parallel.
const CHUNKS: usize = 4;

/// Blocks L and W of the kept primary levels.
type Kept = (Vec<f64>, KeptW);

/// log|L|² of a range of levels, its X–y block, and its kept blocks.
type RangeOut = (f64, Vec<f64>, Vec<f64>, KeptW);

/// The primary levels in `range`: subtracts each level's link-column terms
/// from `e` and returns log|L|² of the range, the range's X–y block of
/// Σ WᵢᵀWᵢ (packed lower triangle, not yet subtracted) and the kept blocks.
fn primary_range<const Q: usize>(
    cp: &CrossProducts,
    tq: &[[f64; Q]; Q],
    t: &[Vec<f64>],
    e: &mut [f64],
    range: std::ops::Range<usize>,
    keep: bool,
) -> RangeOut {
    let m = cp.m;
    let p = cp.p;
    let q2 = cp.q2_total;
    let tq = *tq;
    let mut logdet = LogDet::new();
    let (mut blocks_l, mut blocks_w): Kept = (Vec::new(), KeptW::default());
    if keep {
        blocks_l.reserve(range.len() * Q * Q);
        blocks_w = KeptW::with_capacity(Q, range.len(), p + 2);
    }
    // The X–y block of Σ WᵢᵀWᵢ, packed lower triangle.
    let mut xy = vec![0.0f64; (p + 1) * (p + 2) / 2];
    let mut cols: Vec<usize> = Vec::with_capacity(p + 8);
    let mut w: Vec<[f64; Q]> = Vec::with_capacity(p + 8);
    // The X–y columns present at this level (ascending within 0..=p).
    let mut present: Vec<usize> = Vec::with_capacity(p + 1);
    for i in range {
        let gi = &cp.g[i * Q * Q..(i + 1) * Q * Q];
        let (_, l, inv) = level_block::<Q>(gi, &tq, &mut logdet);
        // Columns of B = Tᵀ Z₁ᵢᵀ [Z₂Λ₂ X y], then W = L⁻¹ B.
        cols.clear();
        w.clear();
        let (lo, hi) = cp.link_ranges[i];
        for link in &cp.links[lo..hi] {
            let kt = cp.secondary[link.secondary];
            let qs = cp.term_q[kt];
            let ts = &t[kt];
            let v = &cp.link_values[link.start..link.start + Q * qs];
            for c in 0..qs {
                let mut raw = [0.0f64; Q];
                for (r, rv) in raw.iter_mut().enumerate() {
                    let mut acc = 0.0;
                    for s in c..qs {
                        acc += v[r * qs + s] * ts[s * qs + c];
                    }
                    *rv = acc;
                }
                cols.push(link.offset + c);
                w.push(raw);
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
        if keep {
            for r in 0..Q {
                for c in 0..Q {
                    blocks_l.push(l[r][c]);
                }
            }
            let nc = cols.len();
            blocks_w.push_with(&cols, |vals| {
                for (c, col) in w.iter().enumerate() {
                    for r in 0..Q {
                        vals[r * nc + c] = col[r];
                    }
                }
            });
        }
    }
    (logdet.total(), xy, blocks_l, blocks_w)
}

/// One primary level's block: `GT = Gᵢ T`, and `L`, the Cholesky factor of
/// `A = TᵀGᵢT + I` (positive definite, since A ≥ I), with its reciprocal
/// pivots; the pivots go into `logdet`.
#[inline(always)]
fn level_block<const Q: usize>(
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

#[inline(always)]
fn dot<const Q: usize>(a: &[f64; Q], b: &[f64; Q]) -> f64 {
    let mut acc = 0.0;
    for r in 0..Q {
        acc += a[r] * b[r];
    }
    acc
}

/// The primary levels for any q₁.
fn primary_general(cp: &CrossProducts, t1: &[f64], t: &[Vec<f64>], e: &mut [f64], keep: bool) -> PrimaryOut {
    let m = cp.m;
    let p = cp.p;
    let q2 = cp.q2_total;
    let mut logdet = LogDet::new();
    let mut blocks_l = Vec::new();
    let mut blocks_w = KeptW::default();
    {
        let q1 = cp.q1;
        let mut a = vec![0.0; q1 * q1];
        let mut tmp = vec![0.0; q1 * q1];
        let mut l = vec![0.0; q1 * q1];
        let mut cols: Vec<usize> = Vec::new();
        let mut wv: Vec<f64> = Vec::new();
        let mut bt: Vec<f64> = Vec::new();
        if keep {
            blocks_l.reserve(cp.n1 * q1 * q1);
            blocks_w = KeptW::with_capacity(q1, cp.n1, cp.p + 2);
        }
        for i in 0..cp.n1 {
            // A = T₁ᵀ Gᵢ T₁ + I.
            let gi = &cp.g[i * q1 * q1..(i + 1) * q1 * q1];
            for r in 0..q1 {
                for c in 0..q1 {
                    let mut acc = 0.0;
                    for s in c..q1 {
                        acc += gi[r * q1 + s] * t1[s * q1 + c];
                    }
                    tmp[r * q1 + c] = acc;
                }
            }
            for r in 0..q1 {
                for c in 0..=r {
                    let mut acc = 0.0;
                    for s in r..q1 {
                        acc += t1[s * q1 + r] * tmp[s * q1 + c];
                    }
                    a[r * q1 + c] = acc + if r == c { 1.0 } else { 0.0 };
                }
            }
            // Small Cholesky; A ≥ I so it cannot fail.
            for j in 0..q1 {
                let mut d = a[j * q1 + j];
                for s in 0..j {
                    d -= l[j * q1 + s] * l[j * q1 + s];
                }
                let d = d.sqrt();
                l[j * q1 + j] = d;
                logdet.push(d);
                for r in j + 1..q1 {
                    let mut v = a[r * q1 + j];
                    for s in 0..j {
                        v -= l[r * q1 + s] * l[j * q1 + s];
                    }
                    l[r * q1 + j] = v / d;
                }
                for r in 0..j {
                    l[r * q1 + j] = 0.0;
                }
            }
            // B = T₁ᵀ [Vᵢ T_s ... | Zᵢᵀ X y], columns gathered with their dense index.
            cols.clear();
            bt.clear();
            let (lo, hi) = cp.link_ranges[i];
            let mut ncols = 0;
            for link in &cp.links[lo..hi] {
                ncols += cp.term_q[cp.secondary[link.secondary]];
            }
            ncols += p + 1;
            bt.resize(q1 * ncols, 0.0);
            let mut col = 0;
            for link in &cp.links[lo..hi] {
                let kt = cp.secondary[link.secondary];
                let qs = cp.term_q[kt];
                let ts = &t[kt];
                let v = &cp.link_values[link.start..link.start + q1 * qs];
                for c in 0..qs {
                    cols.push(link.offset + c);
                    for r in 0..q1 {
                        // (V T_s)[r, c]
                        let mut acc = 0.0;
                        for s in c..qs {
                            acc += v[r * qs + s] * ts[s * qs + c];
                        }
                        bt[r * ncols + col + c] = acc;
                    }
                }
                col += qs;
            }
            let zi = &cp.zxy[i * q1 * (p + 1)..(i + 1) * q1 * (p + 1)];
            for c in 0..=p {
                cols.push(q2 + c);
                for r in 0..q1 {
                    bt[r * ncols + col + c] = zi[r * (p + 1) + c];
                }
            }
            // Left-multiply by T₁ᵀ (upper triangular), in place row by row.
            wv.clear();
            wv.resize(q1 * ncols, 0.0);
            for r in 0..q1 {
                for s in r..q1 {
                    let f = t1[s * q1 + r];
                    if f != 0.0 {
                        for c in 0..ncols {
                            wv[r * ncols + c] += f * bt[s * ncols + c];
                        }
                    }
                }
            }
            // W = L⁻¹ B (forward substitution).
            for r in 0..q1 {
                for s in 0..r {
                    let f = l[r * q1 + s];
                    if f != 0.0 {
                        for c in 0..ncols {
                            wv[r * ncols + c] -= f * wv[s * ncols + c];
                        }
                    }
                }
                let d = l[r * q1 + r];
                for c in 0..ncols {
                    wv[r * ncols + c] /= d;
                }
            }
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
            if keep {
                blocks_l.extend_from_slice(&l);
                blocks_w.push_with(&cols, |vals| vals.copy_from_slice(&wv));
            }
        }
    }
    (logdet.total(), blocks_l, blocks_w)
}

#[cfg(test)]
mod tests {
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
            y,
            x_names: vec!["a".into(), "b".into()],
            x,
            terms: vec![
                RandomTermData {
                    factor: "p".into(),
                    level_names: (0..100).map(|i| i.to_string()).collect(),
                    level: lvl1,
                    columns: (0..q1).map(|c| c.to_string()).collect(),
                    z: z1,
                },
                RandomTermData {
                    factor: "s".into(),
                    level_names: (0..7).map(|i| i.to_string()).collect(),
                    level: lvl2,
                    columns: vec!["i".into()],
                    z: vec![vec![1.0; n]],
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
                1 => primary_fixed::<1>(&cp, &t[k1], &t, &mut e1, true),
                2 => primary_fixed::<2>(&cp, &t[k1], &t, &mut e1, true),
                3 => primary_fixed::<3>(&cp, &t[k1], &t, &mut e1, true),
                _ => primary_fixed::<4>(&cp, &t[k1], &t, &mut e1, true),
            };
            let b = primary_general(&cp, &t[k1], &t, &mut e2, true);
            assert!(
                (a.0 - b.0).abs() < 1e-9 * b.0.abs().max(1.0),
                "q1 {q1}: {} vs {}",
                a.0,
                b.0
            );
            let m = cp.m;
            for i in 0..m {
                for j in 0..=i {
                    assert!((e1[i * m + j] - e2[i * m + j]).abs() < 1e-9, "q1 {q1} S[{i},{j}]");
                }
            }
        }
    }
}

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

/// Whether [`gradient_eval`] applies: one random term (the primary one),
/// with 1 to 4 coefficients per level.
pub fn has_gradient(cp: &CrossProducts) -> bool {
    cp.secondary.is_empty() && cp.q2_total == 0 && cp.primary.is_some() && (1..=4).contains(&cp.q1)
}

/// See [`deviance_gradient`]; `None` under the same conditions.
pub fn gradient_eval(cp: &CrossProducts, theta: &[f64], method: Method) -> Option<GradientEval> {
    if !has_gradient(cp) {
        return None;
    }
    let k1 = cp.primary?;
    let q = cp.q1;
    let p = cp.p;
    let m = cp.m;
    let c1 = p + 1;
    let nt = q * (q + 1) / 2;
    let off = cp.theta_offset[k1];
    let t = unpack_factor(&theta[off..off + nt], q);
    let per_range = |range: std::ops::Range<usize>| -> Option<GradPart> {
        match q {
            1 => grad_levels::<1>(cp, &t, range),
            2 => grad_levels::<2>(cp, &t, range),
            3 => grad_levels::<3>(cp, &t, range),
            4 => grad_levels::<4>(cp, &t, range),
            _ => None,
        }
    };
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

#[cfg(test)]
mod gradient_tests {
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

/// One range of primary levels' contributions to the gradient.
struct GradPart {
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

/// The per-level sums of [`deviance_gradient`] over `range`, with Q×Q
/// blocks in fixed-size arrays.
fn grad_levels<const Q: usize>(cp: &CrossProducts, t: &[f64], range: std::ops::Range<usize>) -> Option<GradPart> {
    let c1 = cp.p + 1;
    let nt = Q * (Q + 1) / 2;
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
    let mut logdet = LogDet::new();
    let mut dlog = vec![0.0; nt];
    let mut bh = vec![0.0; c1 * c1];
    let mut acc = vec![0.0; nt * c1 * c1];
    let mut b: Vec<[f64; Q]> = vec![[0.0; Q]; c1];
    let mut h: Vec<[f64; Q]> = vec![[0.0; Q]; c1];
    let mut u: Vec<[f64; Q]> = vec![[0.0; Q]; c1];
    for i in range {
        let gi = &cp.g[i * Q * Q..(i + 1) * Q * Q];
        let ci = &cp.zxy[i * Q * c1..(i + 1) * Q * c1];
        let (gt, l, inv) = level_block::<Q>(gi, &tq, &mut logdet);
        // Solve A v = w in place (forward then backward with L).
        let solve = |w: &mut [f64; Q]| {
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
        };
        // Columns: b = Tᵀ c, h = A⁻¹ b, u = c − G T h.
        for col in 0..c1 {
            let mut bc = [0.0f64; Q];
            for r in 0..Q {
                let mut s = 0.0;
                for x in r..Q {
                    s += tq[x][r] * ci[x * c1 + col];
                }
                bc[r] = s;
            }
            let mut hc = bc;
            solve(&mut hc);
            let mut uc = [0.0f64; Q];
            for r in 0..Q {
                let mut s = ci[r * c1 + col];
                for x in 0..Q {
                    s -= gt[r][x] * hc[x];
                }
                uc[r] = s;
            }
            b[col] = bc;
            h[col] = hc;
            u[col] = uc;
        }
        // Mi = A⁻¹ (G T)ᵀ, column by column; ∂log|A| / ∂T_ab = 2 Mi[b][a].
        for col in 0..Q {
            let mut w = gt[col];
            solve(&mut w);
            for (k, &(ia, ib)) in pairs[..nt].iter().enumerate() {
                if ia == col {
                    dlog[k] += 2.0 * w[ib];
                }
            }
        }
        for r in 0..c1 {
            for c in 0..=r {
                let mut s = 0.0;
                for x in 0..Q {
                    s += b[r][x] * h[c][x];
                }
                bh[r * c1 + c] += s;
            }
        }
        for (k, &(ia, ib)) in pairs[..nt].iter().enumerate() {
            let blk = &mut acc[k * c1 * c1..(k + 1) * c1 * c1];
            for r in 0..c1 {
                let ur = u[r][ia];
                let row = &mut blk[r * c1..(r + 1) * c1];
                for (c, v) in row.iter_mut().enumerate() {
                    *v += ur * h[c][ib];
                }
            }
        }
    }
    Some(GradPart {
        logdet: logdet.total(),
        dlog,
        bh,
        acc,
    })
}
