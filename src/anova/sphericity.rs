//! Sphericity of the within-participant errors: the pooled within-cohort
//! covariance of orthonormal wave contrasts, its Greenhouse–Geisser and
//! Huynh–Feldt epsilons, Mauchly's test, and Box's M test of equal
//! covariance matrices across cohorts.

use faer::Mat;
use serde::Serialize;

use super::table::Complete;
use crate::infer::hypothesis::chi2_sf;
use crate::stats::log_det;

/// Mauchly's test of sphericity.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Sphericity {
    /// Mauchly's W.
    pub w: f64,
    /// The χ² statistic.
    pub chi2: f64,
    /// Its df.
    pub df: f64,
    /// p, with the second-order term of Anderson (2003, §10.7.4).
    pub p: f64,
}

/// Box's M test of equal covariance matrices across cohorts.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BoxM {
    /// Box's M.
    pub m: f64,
    /// The χ² approximation (Box 1949).
    pub chi2: f64,
    /// Its df.
    pub df: f64,
    /// p.
    pub p: f64,
}

/// The covariance, divided by its df, of the residuals of each participant's
/// waves from the cohort's wave means: pooled over cohorts, or one cohort's.
pub fn within_covariance(c: &Complete, only: Option<usize>) -> (Vec<f64>, f64) {
    let k = c.k;
    let cells = c.cell_means();
    let mut s = vec![0.0; k * k];
    let mut count = 0usize;
    for (i, &g) in c.cohort.iter().enumerate() {
        if only.is_some_and(|o| o != g) {
            continue;
        }
        count += 1;
        for a in 0..k {
            let ra = c.y[i * k + a] - cells[g * k + a];
            for b in 0..k {
                s[a * k + b] += ra * (c.y[i * k + b] - cells[g * k + b]);
            }
        }
    }
    let df = match only {
        Some(_) => count as f64 - 1.0,
        None => (count - c.groups) as f64,
    };
    s.iter_mut().for_each(|v| *v /= df);
    (s, df)
}

/// Orthonormal contrasts of k waves (normalised Helmert), k × (k − 1):
/// every orthonormal basis of the contrasts gives the same W and epsilons.
fn contrasts(k: usize) -> Mat<f64> {
    Mat::from_fn(k, k - 1, |r, c| {
        let j = c + 1;
        let norm = ((j * (j + 1)) as f64).sqrt();
        if r < j {
            1.0 / norm
        } else if r == j {
            -(j as f64) / norm
        } else {
            0.0
        }
    })
}

/// Cᵀ S C for a k × k covariance S.
pub fn contrast_covariance(s: &[f64], k: usize) -> Mat<f64> {
    let c = contrasts(k);
    let sm = Mat::from_fn(k, k, |r, q| s[r * k + q]);
    c.transpose() * &sm * &c
}

fn trace(m: &Mat<f64>) -> f64 {
    (0..m.nrows()).map(|i| m[(i, i)]).sum()
}

/// Greenhouse–Geisser epsilon: tr(M)² / (d · tr(M²)), at most 1.
pub fn epsilon_gg(m: &Mat<f64>) -> f64 {
    let d = m.nrows() as f64;
    if m.nrows() <= 1 {
        return 1.0;
    }
    let m2 = m * m;
    (trace(m).powi(2) / (d * trace(&m2))).min(1.0)
}

/// Huynh–Feldt epsilon with Lecoutre's (1991, *J. Educ. Stat.* 16:371–372)
/// correction for several groups: ((N − G + 1)·d·ε̂ − 2) / (d·(N − G − d·ε̂)),
/// at most 1 (N participants, G cohorts, d = k − 1 contrasts, ε̂ the GG
/// epsilon).
pub fn epsilon_hf(gg: f64, n: usize, groups: usize, d: usize) -> f64 {
    let (n, g, d) = (n as f64, groups as f64, d as f64);
    let num = (n - g + 1.0) * d * gg - 2.0;
    let den = d * (n - g - d * gg);
    if den <= 0.0 { 1.0 } else { (num / den).min(1.0) }
}

/// Mauchly's test on the contrast covariance `m` with `df` residual degrees
/// of freedom, for `k` waves: W = det(M) / (tr(M)/d)^d, χ² = −df·f·ln W with
/// f = 1 − (2d² + d + 2)/(6d·df), on d(d+1)/2 − 1 df, and the second-order
/// term ω₂ = (d+2)(d−1)(d−2)(2d³+6d²+3k+2) / (288 (df·d·f)²) (Anderson 2003,
/// eq. 10.7.4 form, with k in the cubic as in common implementations).
pub fn mauchly(m: &Mat<f64>, df: f64, k: usize) -> Option<Sphericity> {
    let d = m.nrows();
    if d < 2 {
        return None;
    }
    let df_test = (d * (d + 1)) as f64 / 2.0 - 1.0;
    let dd = d as f64;
    let log_w = log_det(m).map_or(f64::NEG_INFINITY, |ld| ld - dd * (trace(m) / dd).ln());
    let f = 1.0 - (2.0 * dd * dd + dd + 2.0) / (6.0 * dd * df);
    let w2 = (dd + 2.0) * (dd - 1.0) * (dd - 2.0) * (2.0 * dd.powi(3) + 6.0 * dd * dd + 3.0 * k as f64 + 2.0)
        / (288.0 * (df * dd * f).powi(2));
    let chi2 = -df * f * log_w;
    let p1 = chi2_sf(chi2, df_test);
    let p2 = chi2_sf(chi2, df_test + 4.0);
    Some(Sphericity {
        w: log_w.exp(),
        chi2,
        df: df_test,
        p: (p1 + w2 * (p2 - p1)).clamp(0.0, 1.0),
    })
}

/// Box's (1949) M test: M = (N − G) ln|S| − Σ (n_g − 1) ln|S_g|, χ² = M(1 − c)
/// with c = (2k² + 3k − 1)/(6(k + 1)(G − 1)) · (Σ 1/(n_g − 1) − 1/(N − G)),
/// on k(k + 1)(G − 1)/2 df. None when a cohort's covariance is singular
/// (fewer participants than waves).
pub fn box_m(c: &Complete) -> Option<BoxM> {
    let k = c.k;
    let kf = k as f64;
    let g = c.groups as f64;
    let as_mat = |s: &[f64]| Mat::from_fn(k, k, |r, q| s[r * k + q]);
    let (pooled, df_pooled) = within_covariance(c, None);
    let mut m = df_pooled * log_det(&as_mat(&pooled))?;
    let mut inv_sum = 0.0;
    for grp in 0..c.groups {
        let (s, df) = within_covariance(c, Some(grp));
        if df < kf {
            return None;
        }
        m -= df * log_det(&as_mat(&s))?;
        inv_sum += 1.0 / df;
    }
    let corr = (2.0 * kf * kf + 3.0 * kf - 1.0) / (6.0 * (kf + 1.0) * (g - 1.0)) * (inv_sum - 1.0 / df_pooled);
    let chi2 = m * (1.0 - corr);
    let df = kf * (kf + 1.0) * (g - 1.0) / 2.0;
    Some(BoxM {
        m,
        chi2,
        df,
        p: chi2_sf(chi2, df),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    // Closed form: the normalised Helmert contrasts are orthonormal and
    // orthogonal to the constant.
    #[test]
    fn contrasts_are_orthonormal() {
        for k in 2..7 {
            let c = contrasts(k);
            let ctc = c.transpose() * &c;
            for i in 0..k - 1 {
                let sum: f64 = (0..k).map(|r| c[(r, i)]).sum();
                assert!(sum.abs() < 1e-12);
                for j in 0..k - 1 {
                    let want = if i == j { 1.0 } else { 0.0 };
                    assert!((ctc[(i, j)] - want).abs() < 1e-12);
                }
            }
        }
    }

    // Closed form: a compound-symmetric covariance is spherical, so both
    // epsilons are 1 and Mauchly's W is 1.
    #[test]
    fn compound_symmetry_is_spherical() {
        let k = 4;
        let s: Vec<f64> = (0..k * k).map(|i| if i / k == i % k { 3.0 } else { 1.2 }).collect();
        let m = contrast_covariance(&s, k);
        assert!((epsilon_gg(&m) - 1.0).abs() < 1e-12);
        let w = mauchly(&m, 40.0, k).unwrap();
        assert!((w.w - 1.0).abs() < 1e-12 && w.chi2.abs() < 1e-9);
    }
}
