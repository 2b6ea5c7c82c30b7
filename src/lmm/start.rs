//! Start values: scale-aware relative SDs from the rows of each random term,
//! and a moment start from per-level least squares.

use faer::Mat;

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
                    let z = &t.z[i];
                    let rms = (z.iter().map(|v| v * v).sum::<f64>() / z.len().max(1) as f64).sqrt();
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
    // Zᵢᵀe of the OLS residuals e from the level blocks Zᵢᵀ[X y].
    let c1 = p + 1;
    let zte: Vec<f64> = (0..levels * q)
        .map(|lc| {
            let zi = &cp.zxy[lc * c1..(lc + 1) * c1];
            zi[p] - (0..p).map(|j| zi[j] * beta[j]).sum::<f64>()
        })
        .collect();
    let mut sum_bb = vec![0.0; q * q];
    let mut sum_ginv = vec![0.0; q * q];
    let (mut fitted, mut df, mut used) = (0.0f64, 0usize, 0usize);
    let mut ginv = vec![0.0; q * q];
    let mut work = vec![0.0; q * q];
    let mut b = vec![0.0; q];
    let mut usable = vec![false; levels];
    for l in 0..levels {
        if count[l] <= q || !spd_inverse(&cp.g[l * q * q..(l + 1) * q * q], q, &mut ginv, &mut work) {
            continue;
        }
        for a in 0..q {
            b[a] = (0..q).map(|c| ginv[a * q + c] * zte[l * q + c]).sum();
        }
        // b̂ᵀZᵢᵀe: the part of the level's residual sum of squares that its
        // own coefficients take.
        fitted += (0..q).map(|a| b[a] * zte[l * q + a]).sum::<f64>();
        usable[l] = true;
        df += count[l] - q;
        used += 1;
        for a in 0..q {
            for c in 0..q {
                sum_bb[a * q + c] += b[a] * b[c];
                sum_ginv[a * q + c] += ginv[a * q + c];
            }
        }
    }
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
    (0..cp.n)
        .filter(|&r| usable[term.level[r] as usize])
        .map(|r| {
            let xb: f64 = problem.x[r * p..(r + 1) * p].iter().zip(beta).map(|(a, b)| a * b).sum();
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
