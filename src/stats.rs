//! Descriptive helpers that several analyses share: the mean and sample
//! variance, the R² of a least-squares regression, and the log determinant
//! of a covariance matrix. One home each, so the
//! design report, the retest check and the convergence tests agree.

use faer::linalg::solvers::DenseSolveCore;
use faer::{Mat, Side};

/// The arithmetic mean (NaN for an empty slice).
pub fn mean(v: &[f64]) -> f64 {
    v.iter().sum::<f64>() / v.len() as f64
}

/// The mean and the sample variance (divisor n − 1; NaN for fewer than two values).
pub fn mean_var(v: &[f64]) -> (f64, f64) {
    let m = mean(v);
    let var = if v.len() > 1 {
        v.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (v.len() as f64 - 1.0)
    } else {
        f64::NAN
    };
    (m, var)
}

/// Relative size below which an eigenvalue of the centred cross-product
/// counts as zero: the regressors are then collinear in that direction.
const RANK_TOLERANCE: f64 = 1e-12;

/// R² of the least-squares regression of `y` on the columns `x` with an
/// intercept: the share of the variance of `y` in the span of the centred
/// columns. Collinear columns are handled by projecting on their span (a
/// pseudo-inverse), so two collinear regressors give the R² of either. A
/// constant `y` gives 1 (it is fitted exactly).
pub fn r_squared(y: &[f64], x: &[&[f64]]) -> f64 {
    let n = y.len();
    let my = mean(y);
    let syy: f64 = y.iter().map(|v| (v - my).powi(2)).sum();
    if syy == 0.0 {
        return 1.0;
    }
    let means: Vec<f64> = x.iter().map(|c| mean(c)).collect();
    let p = x.len();
    let xtx = Mat::from_fn(p, p, |a, b| {
        (0..n).map(|r| (x[a][r] - means[a]) * (x[b][r] - means[b])).sum::<f64>()
    });
    let xty: Vec<f64> = (0..p)
        .map(|a| (0..n).map(|r| (x[a][r] - means[a]) * (y[r] - my)).sum::<f64>())
        .collect();
    let Ok(eig) = xtx.self_adjoint_eigen(Side::Lower) else {
        return f64::NAN;
    };
    let (u, s) = (eig.U(), eig.S().column_vector());
    let largest = (0..p).map(|k| s[k]).fold(0.0, f64::max);
    // Explained sum of squares = Σ_k (u_kᵀ Xᵀy)² / λ_k over the nonzero λ_k.
    let explained: f64 = (0..p)
        .filter(|&k| s[k] > RANK_TOLERANCE * largest)
        .map(|k| {
            let proj: f64 = (0..p).map(|a| u[(a, k)] * xty[a]).sum();
            proj * proj / s[k]
        })
        .sum();
    (explained / syy).clamp(0.0, 1.0)
}

/// A count with thousands separators (1,200), as every screen and model
/// description writes counts.
pub fn thousands(n: usize) -> String {
    let s = n.to_string();
    let mut out = String::new();
    for (i, ch) in s.chars().enumerate() {
        if i > 0 && (s.len() - i).is_multiple_of(3) {
            out.push(',');
        }
        out.push(ch);
    }
    out
}

/// A p-value for a table cell: ".0123", "<.0001" when tiny, "—" when not
/// computable; the one form of every screen (the JSON keeps the full double).
pub fn p_cell(p: f64) -> String {
    if !p.is_finite() {
        "—".into()
    } else if p < 0.0001 {
        "<.0001".into()
    } else {
        format!("{p:.4}").trim_start_matches('0').to_string()
    }
}

/// The same p-value in words for a sentence: "p = .0123", "p < .0001".
pub fn p_words(p: f64) -> String {
    match p_cell(p).as_str() {
        "—" => "p not computable".into(),
        "<.0001" => "p < .0001".into(),
        v => format!("p = {v}"),
    }
}

/// log det of a symmetric positive definite matrix, from its Cholesky
/// factor (None when the matrix is not positive definite).
pub fn log_det(m: &Mat<f64>) -> Option<f64> {
    let llt = m.llt(Side::Lower).ok()?;
    let l = llt.L();
    Some((0..m.nrows()).map(|i| 2.0 * l[(i, i)].ln()).sum())
}

/// Lower Cholesky factor of a small k × k row-major matrix (None when it is
/// not positive definite): for the few-by-few blocks of planning and
/// simulation, where a dense library factorisation costs more than it saves.
pub fn small_cholesky(v: &[f64], k: usize) -> Option<Vec<f64>> {
    let mut l = vec![0.0; k * k];
    for i in 0..k {
        for j in 0..=i {
            let s: f64 = (0..j).map(|m| l[i * k + m] * l[j * k + m]).sum();
            if i == j {
                let d = v[i * k + i] - s;
                if d <= 0.0 || !d.is_finite() {
                    return None;
                }
                l[i * k + i] = d.sqrt();
            } else {
                l[i * k + j] = (v[i * k + j] - s) / l[j * k + j];
            }
        }
    }
    Some(l)
}

/// A number with no needless decimals: 12 rather than 12.0, 2031.5 as is,
/// and never "-0" (six decimals at most).
pub fn plain_number(v: f64) -> String {
    let text = format!("{v:.6}");
    let text = text.trim_end_matches('0').trim_end_matches('.');
    if text == "-0" { "0".into() } else { text.to_string() }
}

/// The inverse of a symmetric positive definite matrix, from its Cholesky
/// factor (None when the matrix is not positive definite).
pub fn spd_inverse(m: &Mat<f64>) -> Option<Mat<f64>> {
    Some(m.llt(Side::Lower).ok()?.inverse())
}

#[cfg(test)]
mod tests {
    use super::*;

    // Closed-form identities: y on itself has R² 1; y = 2a + b with b
    // orthogonal to a (and both centred) has R² on a of 4·Saa / (4·Saa + Sbb);
    // a duplicated regressor changes nothing.
    #[test]
    fn r_squared_meets_closed_forms() {
        let a = [-1.0, 0.0, 1.0, -1.0, 0.0, 1.0];
        let b = [1.0, -2.0, 1.0, 1.0, -2.0, 1.0];
        let y: Vec<f64> = a.iter().zip(&b).map(|(a, b)| 2.0 * a + b).collect();
        assert!((r_squared(&y, &[&y]) - 1.0).abs() < 1e-12);
        let (saa, sbb) = (4.0, 12.0);
        let expected = 4.0 * saa / (4.0 * saa + sbb);
        assert!((r_squared(&y, &[&a]) - expected).abs() < 1e-12);
        assert!((r_squared(&y, &[&a, &a]) - expected).abs() < 1e-12);
        assert!((r_squared(&y, &[&a, &b]) - 1.0).abs() < 1e-12);
        assert_eq!(thousands(1_234_567), "1,234,567");
        assert_eq!(thousands(999), "999");
        assert_eq!(p_words(0.01234), "p = .0123");
        assert_eq!(p_words(1e-30), "p < .0001");
        assert_eq!(p_words(1.0), "p = 1.0000");
        let (m, v) = mean_var(&[1.0, 2.0, 3.0, 4.0]);
        assert_eq!((m, v), (2.5, 5.0 / 3.0));
    }
}
