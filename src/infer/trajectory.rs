//! The mean trajectory over a grid of ages, its rate of change, and the age at
//! a peak or trough with a delta-method interval.
//!
//! For the turning point a*, where the rate `r(a; β) = ∂μ/∂a` is zero, the
//! implicit-function theorem gives `∂a*/∂β = −(∂r/∂β)/(∂r/∂a)`, so
//! `Var(â*) ≈ gᵀ cov(β̂) g` with `g = −rate_row(a*)/r'(a*)` (delta method;
//! notes/criterion.md).

use serde::Serialize;

use super::{LEVEL, contrast, t_quantile};
use crate::lmm::Fit;
use crate::spec::ModelFrame;

/// One age on the trajectory grid.
#[derive(Debug, Clone, Copy, Serialize, PartialEq)]
pub struct TrajectoryPoint {
    /// Age, years.
    pub age: f64,
    /// Fitted mean outcome.
    pub mean: f64,
    /// Lower end of the pointwise 95% interval of the mean.
    pub lower: f64,
    /// Upper end.
    pub upper: f64,
    /// Rate of change, outcome units per year.
    pub rate: f64,
    /// Lower end of the pointwise 95% interval of the rate.
    pub rate_lower: f64,
    /// Upper end.
    pub rate_upper: f64,
}

/// A peak or trough of the mean trajectory inside the observed ages.
#[derive(Debug, Clone, Copy, Serialize, PartialEq)]
pub struct Extremum {
    /// `"peak"` or `"trough"`.
    pub kind: &'static str,
    /// Age at the turning point, years.
    pub age: f64,
    /// Delta-method standard error of that age.
    pub se: f64,
    /// Lower end of the 95% interval.
    pub lower: f64,
    /// Upper end.
    pub upper: f64,
    /// Mean outcome at the turning point.
    pub mean: f64,
}

/// What to evaluate the trajectory at.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct TrajectoryRequest {
    /// Number of equally spaced ages over the observed range (at least 2).
    pub grid: usize,
    /// Further ages at which to report the mean and rate in full.
    pub at: Vec<f64>,
}

impl TrajectoryRequest {
    /// A grid of `n` ages and no extra ages.
    pub fn grid(n: usize) -> TrajectoryRequest {
        TrajectoryRequest {
            grid: n,
            at: Vec::new(),
        }
    }
}

impl Default for TrajectoryRequest {
    fn default() -> Self {
        TrajectoryRequest::grid(101)
    }
}

/// The mean and rate at one requested age, with SEs and Satterthwaite df.
#[derive(Debug, Clone, Copy, Serialize, PartialEq)]
pub struct AgeEstimate {
    /// Age, years.
    pub age: f64,
    /// Whether the age lies outside the observed ages (an extrapolation).
    pub extrapolated: bool,
    /// Mean outcome.
    pub mean: f64,
    /// Its standard error.
    pub se: f64,
    /// Its Satterthwaite df.
    pub df: f64,
    /// Lower end of the 95% interval.
    pub lower: f64,
    /// Upper end.
    pub upper: f64,
    /// Rate of change per year.
    pub rate: f64,
    /// Its standard error.
    pub rate_se: f64,
    /// Its Satterthwaite df.
    pub rate_df: f64,
    /// Lower end of the 95% interval of the rate.
    pub rate_lower: f64,
    /// Upper end.
    pub rate_upper: f64,
}

/// The trajectory with its turning points.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct Trajectory {
    /// Grid points from the youngest to the oldest observed age.
    pub points: Vec<TrajectoryPoint>,
    /// Peaks and troughs strictly inside the observed range.
    pub extrema: Vec<Extremum>,
    /// Estimates at the requested ages.
    pub at_ages: Vec<AgeEstimate>,
}

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

/// Evaluate the trajectory on the requested grid over the observed range and
/// at the requested ages.
pub fn trajectory(fit: &Fit, frame: &ModelFrame, request: &TrajectoryRequest) -> Trajectory {
    let (lo, hi) = frame.age_range;
    let n_grid = request.grid.max(2);
    let points: Vec<TrajectoryPoint> = (0..n_grid)
        .map(|i| {
            let age = lo + (hi - lo) * i as f64 / (n_grid - 1) as f64;
            let m = contrast(fit, &frame.mean_row(age));
            let r = contrast(fit, &frame.rate_row(age));
            let (lower, upper) = m.interval();
            let (rate_lower, rate_upper) = r.interval();
            TrajectoryPoint {
                age,
                mean: m.estimate,
                lower,
                upper,
                rate: r.estimate,
                rate_lower,
                rate_upper,
            }
        })
        .collect();
    let extrema = extrema(fit, frame, &points);
    let at_ages = request
        .at
        .iter()
        .map(|&age| {
            let m = contrast(fit, &frame.mean_row(age));
            let r = contrast(fit, &frame.rate_row(age));
            let (lower, upper) = m.interval();
            let (rate_lower, rate_upper) = r.interval();
            AgeEstimate {
                age,
                extrapolated: age < lo || age > hi,
                mean: m.estimate,
                se: m.se,
                df: m.df,
                lower,
                upper,
                rate: r.estimate,
                rate_se: r.se,
                rate_df: r.df,
                rate_lower,
                rate_upper,
            }
        })
        .collect();
    Trajectory {
        points,
        extrema,
        at_ages,
    }
}

fn extrema(fit: &Fit, frame: &ModelFrame, points: &[TrajectoryPoint]) -> Vec<Extremum> {
    let rate = |a: f64| dot(&frame.rate_row(a), &fit.beta);
    let mut out = Vec::new();
    for w in points.windows(2) {
        let (a0, a1) = (w[0].age, w[1].age);
        let (r0, r1) = (rate(a0), rate(a1));
        if r0 == 0.0 || r0.signum() == r1.signum() {
            continue;
        }
        // Bisection to machine precision on the bracket.
        let (mut lo, mut hi, mut rlo) = (a0, a1, r0);
        for _ in 0..200 {
            let mid = 0.5 * (lo + hi);
            let rm = rate(mid);
            if rm.signum() == rlo.signum() {
                lo = mid;
                rlo = rm;
            } else {
                hi = mid;
            }
            if hi - lo < 1e-13 * (1.0 + mid.abs()) {
                break;
            }
        }
        let a = 0.5 * (lo + hi);
        let slope = dot(&frame.curvature_row(a), &fit.beta);
        if slope == 0.0 {
            continue;
        }
        let g: Vec<f64> = frame.rate_row(a).iter().map(|v| -v / slope).collect();
        let k = contrast(fit, &g);
        let q = t_quantile(0.5 + LEVEL / 2.0, k.df);
        out.push(Extremum {
            kind: if slope < 0.0 { "peak" } else { "trough" },
            age: a,
            se: k.se,
            lower: a - q * k.se,
            upper: a + q * k.se,
            mean: dot(&frame.mean_row(a), &fit.beta),
        });
    }
    out
}
