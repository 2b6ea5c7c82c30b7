//! Start values: scale-aware relative SDs from the rows of each random term,
//! and a moment start from per-level least squares.

use faer::Mat;
use rayon::prelude::*;

use super::MixedProblem;
use super::crossprod::CrossProducts;
use super::optimize::{self};

/// Scale-aware start: diagonal factor with entries `0.5/(√q · rms(z))`.
pub(super) fn base_start(problem: &MixedProblem) -> Vec<f64> {
    let mut theta = Vec::with_capacity(problem.n_theta());
    for t in &problem.terms {
        let q = t.q();
        for j in 0..q {
            for i in j..q {
                if i == j {
                    let rms = t.z[i].rms(problem.n());
                    let rms = if rms > 0.0 { rms } else { 1.0 };
                    theta.push(0.5 / ((q as f64).sqrt() * rms));
                } else {
                    theta.push(0.0);
                }
            }
        }
    }
    theta
}

/// The search scale of each θ entry: the start value of its row's diagonal.
pub(super) fn row_scales(problem: &MixedProblem, base: &[f64]) -> Vec<f64> {
    let mut scales = Vec::with_capacity(base.len());
    let mut offset = 0;
    for t in &problem.terms {
        let q = t.q();
        // Position of diagonal (i, i) in the column-major lower triangle.
        let diag_pos = |i: usize| (0..i).map(|j| q - j).sum::<usize>();
        for j in 0..q {
            for i in j..q {
                scales.push(base[offset + diag_pos(i)].max(1e-12));
            }
        }
        offset += q * (q + 1) / 2;
    }
    scales
}

/// Moment start for the primary term (Swamy-type): per-level least-squares
/// coefficients b̂ᵢ of the OLS residuals on the term's columns, whose
/// covariance, less the average sampling covariance σ̂²·(ZᵢᵀZᵢ)⁻¹, estimates
/// the random-effect covariance. Other terms keep their scale-aware start.
/// `None` when too few levels have more rows than coefficients.
pub(super) fn moment_start(problem: &MixedProblem, cp: &CrossProducts, base: &[f64]) -> Option<Vec<f64>> {
    let k1 = cp.primary?;
    let q = cp.q1;
    let (p, m) = (cp.p, cp.m);
    let q2 = cp.q2_total;
    // OLS on the (shifted) response from the dense cross-products.
    let xtx = Mat::from_fn(p, p, |i, j| cp.dense[(q2 + i) * m + q2 + j]);
    let llt = xtx.llt(faer::Side::Lower).ok()?;
    let mut rhs = Mat::from_fn(p, 1, |i, _| cp.dense[(q2 + i) * m + m - 1]);
    use faer::linalg::solvers::SolveCore;
    llt.solve_in_place_with_conj(faer::Conj::No, rhs.as_mut());
    let beta: Vec<f64> = (0..p).map(|i| rhs[(i, 0)]).collect();
    let term = &problem.terms[k1];
    let levels = term.n_levels();
    let mut count = vec![0usize; levels];
    for &l in term.level.iter() {
        count[l as usize] += 1;
    }
    // Per chunk of levels (a fixed size, so the sums do not depend on the
    // number of threads), then added chunk by chunk in order.
    let sums: Vec<LevelMoments> = (0..levels.div_ceil(MOMENT_CHUNK))
        .into_par_iter()
        .map(|c| {
            let range = c * MOMENT_CHUNK..((c + 1) * MOMENT_CHUNK).min(levels);
            LevelMoments::over(cp, &beta, &count, range)
        })
        .collect();
    let mut total = LevelMoments::new(q, 0);
    for part in &sums {
        total.add(part);
    }
    let usable: Vec<bool> = sums.into_iter().flat_map(|s| s.usable).collect();
    let LevelMoments {
        sum_bb,
        sum_ginv,
        fitted,
        df,
        used,
        ..
    } = total;
    // The residual sum of squares within the levels used: with every level
    // used, the OLS residual sum of squares (yᵀy − β̂ᵀXᵀy, from the dense
    // part) less what the levels' coefficients take; otherwise summed over
    // the rows of the levels used.
    let rss = if used == levels {
        ols_rss(cp, &beta)
    } else {
        rss_over_rows(problem, cp, &beta, &usable)
    } - fitted;
    if used < 10 || df == 0 {
        return None;
    }
    let sigma2 = (rss / df as f64).max(f64::MIN_POSITIVE);
    let mut cov = Mat::from_fn(q, q, |a, c| {
        (sum_bb[a * q + c] - sigma2 * sum_ginv[a * q + c]) / used as f64 / sigma2
    });
    // Keep the estimate positive definite: floor the diagonal, then shrink
    // the off-diagonal part until the Cholesky factor exists.
    let floor: Vec<f64> = (0..q)
        .map(|a| (0.01 * sum_bb[a * q + a] / used as f64 / sigma2).max(1e-8))
        .collect();
    for a in 0..q {
        cov[(a, a)] = cov[(a, a)].max(floor[a]);
    }
    let mut factor = None;
    for _ in 0..20 {
        if let Ok(l) = cov.llt(faer::Side::Lower) {
            factor = Some(l.L().to_owned());
            break;
        }
        for a in 0..q {
            for c in 0..q {
                if a != c {
                    cov[(a, c)] *= 0.5;
                }
            }
        }
    }
    let factor = factor?;
    let mut start = base.to_vec();
    let off = cp.theta_offset[k1];
    let mut k = 0;
    for j in 0..q {
        for i in j..q {
            start[off + k] = factor[(i, j)];
            k += 1;
        }
    }
    Some(start)
}

/// Levels per chunk of the moment start's parallel sums.
const MOMENT_CHUNK: usize = 4096;

/// The moment start's sums over a range of primary levels with more rows
/// than coefficients and a positive definite `ZᵢᵀZᵢ`: `Σ b̂ᵢb̂ᵢᵀ`,
/// `Σ (ZᵢᵀZᵢ)⁻¹`, the residual sum of squares the levels' own coefficients
/// take (`Σ b̂ᵢᵀZᵢᵀe`), their residual degrees of freedom, how many levels
/// were used, and which.
struct LevelMoments {
    sum_bb: Vec<f64>,
    sum_ginv: Vec<f64>,
    fitted: f64,
    df: usize,
    used: usize,
    usable: Vec<bool>,
}

impl LevelMoments {
    fn new(q: usize, levels: usize) -> LevelMoments {
        LevelMoments {
            sum_bb: vec![0.0; q * q],
            sum_ginv: vec![0.0; q * q],
            fitted: 0.0,
            df: 0,
            used: 0,
            usable: vec![false; levels],
        }
    }

    /// The sums over the levels in `range`, with the OLS coefficients
    /// `beta` and each level's row count.
    fn over(cp: &CrossProducts, beta: &[f64], count: &[usize], range: std::ops::Range<usize>) -> LevelMoments {
        let (q, p) = (cp.q1, cp.p);
        let c1 = p + 1;
        let mut out = LevelMoments::new(q, range.len());
        let mut ginv = vec![0.0; q * q];
        let mut work = vec![0.0; q * q];
        let (mut b, mut zte) = (vec![0.0; q], vec![0.0; q]);
        for (k, l) in range.enumerate() {
            if count[l] <= q || !spd_inverse(&cp.g[l * q * q..(l + 1) * q * q], q, &mut ginv, &mut work) {
                continue;
            }
            // Zᵢᵀe of the OLS residuals e from the level block Zᵢᵀ[X y].
            for (a, v) in zte.iter_mut().enumerate() {
                let zi = &cp.zxy[(l * q + a) * c1..(l * q + a + 1) * c1];
                *v = zi[p] - (0..p).map(|j| zi[j] * beta[j]).sum::<f64>();
            }
            for a in 0..q {
                b[a] = (0..q).map(|c| ginv[a * q + c] * zte[c]).sum();
            }
            // b̂ᵀZᵢᵀe: the part of the level's residual sum of squares that
            // its own coefficients take.
            out.fitted += (0..q).map(|a| b[a] * zte[a]).sum::<f64>();
            out.usable[k] = true;
            out.df += count[l] - q;
            out.used += 1;
            for a in 0..q {
                for c in 0..q {
                    out.sum_bb[a * q + c] += b[a] * b[c];
                    out.sum_ginv[a * q + c] += ginv[a * q + c];
                }
            }
        }
        out
    }

    /// Add another range's sums (not its `usable` marks).
    fn add(&mut self, other: &LevelMoments) {
        self.sum_bb.iter_mut().zip(&other.sum_bb).for_each(|(a, b)| *a += b);
        self.sum_ginv.iter_mut().zip(&other.sum_ginv).for_each(|(a, b)| *a += b);
        self.fitted += other.fitted;
        self.df += other.df;
        self.used += other.used;
    }
}

/// The OLS residual sum of squares `yᵀy − β̂ᵀXᵀy` from the dense part.
fn ols_rss(cp: &CrossProducts, beta: &[f64]) -> f64 {
    let (m, q2) = (cp.m, cp.q2_total);
    let xy: f64 = beta
        .iter()
        .enumerate()
        .map(|(j, b)| b * cp.dense[(q2 + j) * m + m - 1])
        .sum();
    cp.dense[(m - 1) * m + m - 1] - xy
}

/// The sum of squared OLS residuals over the rows of the primary levels
/// marked `usable`.
fn rss_over_rows(problem: &MixedProblem, cp: &CrossProducts, beta: &[f64], usable: &[bool]) -> f64 {
    let (p, term) = (cp.p, &problem.terms[cp.primary.expect("a primary term")]);
    let mut x_store = vec![0.0; p];
    (0..cp.n)
        .filter(|&r| usable[term.level[r] as usize])
        .map(|r| {
            let xb: f64 = problem
                .x_row(r, &mut x_store)
                .iter()
                .zip(beta)
                .map(|(a, b)| a * b)
                .sum();
            let e = problem.y[r] - cp.y_shift - xb;
            e * e
        })
        .sum()
}

/// The inverse of a small symmetric positive definite q×q matrix (row-major)
/// into `out`, through its Cholesky factor in `work`; `false` when it is not
/// positive definite. No allocation: the moment start calls it per level.
pub(super) fn spd_inverse(g: &[f64], q: usize, out: &mut [f64], work: &mut [f64]) -> bool {
    let l = work;
    if !optimize::small_cholesky(g, q, l) {
        return false;
    }
    // Column c of the inverse solves L Lᵀ x = e_c.
    for c in 0..q {
        for i in 0..q {
            let mut v = if i == c { 1.0 } else { 0.0 };
            for k in 0..i {
                v -= l[i * q + k] * out[k * q + c];
            }
            out[i * q + c] = v / l[i * q + i];
        }
        for i in (0..q).rev() {
            let mut v = out[i * q + c];
            for k in i + 1..q {
                v -= l[k * q + i] * out[k * q + c];
            }
            out[i * q + c] = v / l[i * q + i];
        }
    }
    true
}

#[cfg(test)]
mod small_inverse_tests {
    use super::spd_inverse;

    // The OLS residual sum of squares from the cross-products equals the
    // sum over the rows (closed-form identity: eᵀe = yᵀy − β̂ᵀXᵀy at the
    // normal equations' solution), with a school term beside the primary.
    #[test]
    fn residual_sum_of_squares_from_cross_products_is_the_row_sum() {
        use super::super::{MixedProblem, RandomTermData};
        let mut rng = crate::simulate::Rng::new(8);
        let n = 600;
        let age: Vec<f64> = (0..n).map(|r| (r % 3) as f64 + rng.uniform()).collect();
        let problem = MixedProblem {
            y: age.iter().map(|a| 40.0 + 2.0 * a + 3.0 * rng.normal()).collect(),
            x_names: vec!["1".into(), "age".into()],
            x: age.iter().flat_map(|&a| [1.0, a]).collect(),
            terms: vec![
                RandomTermData::numbered(
                    "id",
                    n / 3,
                    (0..n).map(|r| (r / 3) as u32).collect(),
                    &["intercept", "age"],
                    vec![vec![1.0; n], age.clone()],
                ),
                RandomTermData::numbered(
                    "school",
                    5,
                    (0..n).map(|r| (r / 3 % 5) as u32).collect(),
                    &["intercept"],
                    vec![vec![1.0; n]],
                ),
            ],
        };
        let cp = super::CrossProducts::new(&problem);
        let (m, q2, p) = (cp.m, cp.q2_total, cp.p);
        let xtx = faer::Mat::from_fn(p, p, |i, j| cp.dense[(q2 + i) * m + q2 + j]);
        let mut rhs = faer::Mat::from_fn(p, 1, |i, _| cp.dense[(q2 + i) * m + m - 1]);
        use faer::linalg::solvers::SolveCore;
        xtx.llt(faer::Side::Lower)
            .unwrap()
            .solve_in_place_with_conj(faer::Conj::No, rhs.as_mut());
        let beta: Vec<f64> = (0..p).map(|i| rhs[(i, 0)]).collect();
        let closed = super::ols_rss(&cp, &beta);
        let rows = super::rss_over_rows(&problem, &cp, &beta, &vec![true; n / 3]);
        assert!((closed - rows).abs() < 1e-9 * rows, "{closed} vs {rows}");
        assert!(rows > 0.0);
    }

    // The moment sums over the levels split in two ranges add up to the
    // sums over all of them (to rounding), with the same levels used; a
    // level with as many rows as coefficients is left out.
    #[test]
    fn level_moments_add_over_ranges() {
        use super::super::{MixedProblem, RandomTermData};
        let mut rng = crate::simulate::Rng::new(3);
        let per = |i: usize| if i.is_multiple_of(7) { 2 } else { 4 };
        let id: Vec<u32> = (0..50u32)
            .flat_map(|i| std::iter::repeat_n(i, per(i as usize)))
            .collect();
        let n = id.len();
        let age: Vec<f64> = (0..n).map(|_| 10.0 * rng.uniform()).collect();
        let problem = MixedProblem {
            y: age.iter().map(|a| 5.0 + a + rng.normal()).collect(),
            x_names: vec!["1".into(), "age".into()],
            x: age.iter().flat_map(|&a| [1.0, a]).collect(),
            terms: vec![RandomTermData::numbered(
                "id",
                50,
                id.clone(),
                &["intercept", "age"],
                vec![vec![1.0; n], age.clone()],
            )],
        };
        let cp = super::CrossProducts::new(&problem);
        let mut count = vec![0; 50];
        id.iter().for_each(|&l| count[l as usize] += 1);
        let beta = [5.0, 1.0];
        let all = super::LevelMoments::over(&cp, &beta, &count, 0..50);
        let mut parts = super::LevelMoments::over(&cp, &beta, &count, 0..17);
        let rest = super::LevelMoments::over(&cp, &beta, &count, 17..50);
        parts.add(&rest);
        assert_eq!((parts.used, parts.df), (all.used, all.df));
        assert_eq!(
            all.used,
            50 - 8,
            "levels 0, 7, …, 49 have two rows for two coefficients"
        );
        let close = |a: f64, b: f64| (a - b).abs() <= 1e-12 * (1.0 + a.abs());
        assert!(close(parts.fitted, all.fitted));
        for k in 0..4 {
            assert!(close(parts.sum_bb[k], all.sum_bb[k]) && close(parts.sum_ginv[k], all.sum_ginv[k]));
        }
        let marks: Vec<bool> = parts.usable.iter().chain(&rest.usable).copied().collect();
        assert_eq!(marks, all.usable);
    }

    // Closed-form identity: G · G⁻¹ = I, and a matrix that is not positive
    // definite is refused.
    #[test]
    pub(super) fn spd_inverse_gives_the_inverse() {
        let g = [4.0, 1.0, 0.5, 1.0, 3.0, 0.2, 0.5, 0.2, 2.0];
        let (mut inv, mut work) = ([0.0; 9], [0.0; 9]);
        assert!(spd_inverse(&g, 3, &mut inv, &mut work));
        for i in 0..3 {
            for j in 0..3 {
                let v: f64 = (0..3).map(|k| g[i * 3 + k] * inv[k * 3 + j]).sum();
                let want = if i == j { 1.0 } else { 0.0 };
                assert!((v - want).abs() < 1e-14, "({i},{j}) {v}");
            }
        }
        assert!(!spd_inverse(&[1.0, 2.0, 2.0, 1.0], 2, &mut inv, &mut work));
    }
}
