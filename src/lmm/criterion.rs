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
    /// Per primary level, `Wᵢ` restricted to its own columns, when kept:
    /// values (q₁ × ncols row-major) and the dense column index of each column.
    pub blocks_w: Vec<(Vec<usize>, Vec<f64>)>,
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
    let mut blocks_w = Vec::new();
    if let Some(k1) = cp.primary {
        let q1 = cp.q1;
        let t1 = &t[k1];
        let mut a = vec![0.0; q1 * q1];
        let mut tmp = vec![0.0; q1 * q1];
        let mut l = vec![0.0; q1 * q1];
        let mut cols: Vec<usize> = Vec::new();
        let mut wv: Vec<f64> = Vec::new();
        let mut bt: Vec<f64> = Vec::new();
        if keep {
            blocks_l.reserve(cp.n1 * q1 * q1);
            blocks_w.reserve(cp.n1);
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
                logdet_z += 2.0 * d.ln();
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
                blocks_w.push((cols.clone(), wv.clone()));
            }
        }
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
