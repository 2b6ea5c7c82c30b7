//! Inference on a fitted model: Wald tests with Satterthwaite degrees of
//! freedom, and the mean trajectory with its rate of change and turning point.
//!
//! Satterthwaite's approximation (Satterthwaite 1946; for mixed models, Giesbrecht
//! & Burns 1985, *Biometrics* 41): for a contrast `c`, with `v(φ) = cᵀC(φ)c`,
//! `df = 2 v² / (gᵀ A g)`, where `g = ∂v/∂φ` and `A` is the asymptotic
//! covariance of the variance parameters φ. The derivation is in
//! `notes/criterion.md`.

pub mod hypothesis;
pub mod trajectory;

use serde::Serialize;
use statrs::distribution::{ContinuousCDF, Normal, StudentsT};

pub use trajectory::{AgeEstimate, Extremum, Trajectory, TrajectoryPoint, TrajectoryRequest, trajectory};

use crate::lmm::Fit;

/// Confidence level of every interval braid reports.
pub const LEVEL: f64 = 0.95;

/// One fixed effect's row of the coefficient table.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct FixedEffect {
    /// Term name.
    pub term: String,
    /// Estimate.
    pub estimate: f64,
    /// Standard error (GLS, at the estimates).
    pub se: f64,
    /// Satterthwaite degrees of freedom.
    pub df: f64,
    /// Wald t statistic.
    pub t: f64,
    /// Two-sided p-value from t(df).
    pub p: f64,
    /// Lower end of the 95% interval.
    pub lower: f64,
    /// Upper end of the 95% interval.
    pub upper: f64,
}

/// A linear contrast's estimate, variance and Satterthwaite df.
#[derive(Debug, Clone, Copy, Serialize, PartialEq)]
pub struct Contrast {
    /// `cᵀβ̂`.
    pub estimate: f64,
    /// Standard error `√(cᵀCc)`.
    pub se: f64,
    /// Satterthwaite degrees of freedom.
    pub df: f64,
}

impl Contrast {
    /// The two-sided interval at [`LEVEL`].
    pub fn interval(&self) -> (f64, f64) {
        let q = t_quantile(0.5 + LEVEL / 2.0, self.df);
        (self.estimate - q * self.se, self.estimate + q * self.se)
    }
    /// The two-sided p-value of `cᵀβ = 0`.
    pub fn p_value(&self) -> f64 {
        let t = self.estimate / self.se;
        2.0 * t_sf(t.abs(), self.df)
    }
}

/// Above this many degrees of freedom the t distribution is replaced by the normal.
const NORMAL_DF: f64 = 1e7;

/// Quantile of t(df) (normal for very large or undefined df).
pub fn t_quantile(prob: f64, df: f64) -> f64 {
    if df.is_finite() && df > 0.0 && df < NORMAL_DF {
        StudentsT::new(0.0, 1.0, df)
            .map(|t| t.inverse_cdf(prob))
            .unwrap_or(f64::NAN)
    } else {
        Normal::standard().inverse_cdf(prob)
    }
}

/// Upper tail of Student's t (the normal above `NORMAL_DF`), as the lower
/// tail at −x: by symmetry exact, and a tiny p-value is kept rather than
/// rounded from 1 − cdf to zero.
pub fn t_sf(x: f64, df: f64) -> f64 {
    t_cdf(-x, df)
}

/// Distribution function of t(df) (normal for very large or undefined df).
pub fn t_cdf(x: f64, df: f64) -> f64 {
    // statrs panics outside the support; a zero SE gives ±∞ or NaN here.
    if x.is_nan() {
        return f64::NAN;
    }
    if x.is_infinite() {
        return if x > 0.0 { 1.0 } else { 0.0 };
    }
    if df.is_finite() && df > 0.0 && df < NORMAL_DF {
        StudentsT::new(0.0, 1.0, df).map(|t| t.cdf(x)).unwrap_or(f64::NAN)
    } else {
        Normal::standard().cdf(x)
    }
}

/// Estimate, SE and Satterthwaite df of the contrast `cᵀβ`.
pub fn contrast(fit: &Fit, c: &[f64]) -> Contrast {
    let p = fit.p();
    let quad = |m: &[f64]| -> f64 {
        let mut acc = 0.0;
        for i in 0..p {
            if c[i] == 0.0 {
                continue;
            }
            for j in 0..p {
                acc += c[i] * m[i * p + j] * c[j];
            }
        }
        acc
    };
    let estimate: f64 = c.iter().zip(&fit.beta).map(|(a, b)| a * b).sum();
    let v = quad(&fit.cov_beta);
    let g: Vec<f64> = fit.sensitivity.dcov.iter().map(|d| quad(d)).collect();
    let k = g.len();
    let a = &fit.sensitivity.acov;
    let mut gag = 0.0;
    for i in 0..k {
        for j in 0..k {
            gag += g[i] * a[i * k + j] * g[j];
        }
    }
    let df = 2.0 * v * v / gag;
    let df = if df.is_finite() && df > 0.0 {
        df
    } else {
        (fit.n_obs - p) as f64
    };
    Contrast {
        estimate,
        se: v.max(0.0).sqrt(),
        df,
    }
}

/// The coefficient table: one row per fixed effect.
pub fn fixed_effects(fit: &Fit) -> Vec<FixedEffect> {
    let p = fit.p();
    (0..p)
        .map(|i| {
            let mut c = vec![0.0; p];
            c[i] = 1.0;
            let k = contrast(fit, &c);
            let (lower, upper) = k.interval();
            FixedEffect {
                term: fit.x_names[i].clone(),
                estimate: k.estimate,
                se: k.se,
                df: k.df,
                t: k.estimate / k.se,
                p: k.p_value(),
                lower,
                upper,
            }
        })
        .collect()
}

#[cfg(test)]
mod tail_tests {
    // The upper tail keeps tiny p-values: for t = 40 on 1,000 df the two-sided
    // p is about 1e-206 (it underflowed to 0 as 1 − cdf), and the normal tail
    // at 10 is 7.6e-24 (Abramowitz & Stegun 26.2.12, asymptotic series).
    #[test]
    fn upper_tails_keep_tiny_p_values() {
        let p = super::t_sf(40.0, 1000.0);
        assert!(p > 0.0 && p < 1e-150, "{p}");
        let z = super::t_sf(10.0, f64::INFINITY);
        assert!((z / 7.619853e-24 - 1.0).abs() < 1e-5, "{z}");
        assert!((super::t_sf(1.0, 10.0) + super::t_cdf(1.0, 10.0) - 1.0).abs() < 1e-15);
    }
}
