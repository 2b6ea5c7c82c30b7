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
use statrs::distribution::{Continuous, ContinuousCDF, Normal, StudentsT};

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
///
/// statrs 0.19.1's inverse of the t distribution function drifts for large
/// df: from about df = 6.7·10⁴ its quantiles miss their probability by more
/// than 1e-6, and at df = 5.1·10⁶ its 97.5% point has a probability of
/// 0.734 (a Satterthwaite df of that size is usual for a rate of change on
/// ten million rows). From [`CORNISH_FISHER_DF`] on, the quantile is the
/// Cornish–Fisher expansion about the normal quantile z in powers of 1/ν
/// (Abramowitz & Stegun 1964, 26.7.5, four terms), whose first omitted
/// term is below 1e-12 there for the usual levels; below it, statrs'
/// inverse, polished by Newton steps on the distribution function. Checked
/// against scipy's quantiles in tests/suite/distributions.rs
/// (notes/decisions.md, "t quantiles").
pub fn t_quantile(prob: f64, df: f64) -> f64 {
    let z = Normal::standard().inverse_cdf(prob);
    if !(df.is_finite() && df > 0.0 && df < NORMAL_DF) {
        return z;
    }
    if df >= CORNISH_FISHER_DF {
        let (z2, v) = (z * z, 1.0 / df);
        let g1 = z * (z2 + 1.0) / 4.0;
        let g2 = z * ((5.0 * z2 + 16.0) * z2 + 3.0) / 96.0;
        let g3 = z * (((3.0 * z2 + 19.0) * z2 + 17.0) * z2 - 15.0) / 384.0;
        let g4 = z * ((((79.0 * z2 + 776.0) * z2 + 1482.0) * z2 - 1920.0) * z2 - 945.0) / 92160.0;
        return z + v * (g1 + v * (g2 + v * (g3 + v * g4)));
    }
    let Ok(t) = StudentsT::new(0.0, 1.0, df) else {
        return f64::NAN;
    };
    let mut q = t.inverse_cdf(prob);
    if !(prob > 0.0 && prob < 1.0) {
        return q;
    }
    let mut miss = t.cdf(q) - prob;
    for _ in 0..QUANTILE_STEPS {
        let next = q - miss / t.pdf(q);
        if !next.is_finite() {
            break;
        }
        let next_miss = t.cdf(next) - prob;
        // Keep a step only while it brings the probability closer.
        if next_miss.abs() >= miss.abs() {
            break;
        }
        (q, miss) = (next, next_miss);
    }
    q
}

/// From this many df the quantile is the Cornish–Fisher expansion rather
/// than statrs' inverse.
const CORNISH_FISHER_DF: f64 = 1e3;

/// Newton steps on the distribution function below [`CORNISH_FISHER_DF`],
/// at most; from statrs' inverse one or two suffice.
const QUANTILE_STEPS: usize = 4;

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
