//! Every tolerance the tests use, named and kept in one place, with the
//! reason for its size.

/// Closed-form identities that only the optimiser's precision limits
/// (the issue asks for 1e-8 relative).
pub const CLOSED_FORM_REL: f64 = 1e-8;

/// Satterthwaite df against a − 1 in the balanced case: the df come from
/// finite-difference derivatives of cov(β̂) and of the deviance, good to
/// about six digits.
pub const SATTERTHWAITE_REL: f64 = 1e-5;

/// Log-likelihood against a reference optimum, absolute.
pub const LOGLIK_ABS: f64 = 1e-6;

/// Fixed effects and their SEs against a reference, relative.
pub const FIXED_REL: f64 = 1e-4;

/// Variance components against a reference, relative.
pub const VARIANCE_REL: f64 = 1e-3;

/// Identities that hold to rounding error after a fresh optimisation:
/// two fits reach the same optimum only to the optimiser's precision.
pub const REFIT_LOGLIK_ABS: f64 = 1e-7;

/// Parameters after a fresh optimisation, relative.
pub const REFIT_PARAM_REL: f64 = 1e-5;

/// Relative difference, with a floor on the scale so that values near zero
/// are compared on the scale `floor`.
pub fn rel(a: f64, b: f64, floor: f64) -> f64 {
    (a - b).abs() / b.abs().max(floor)
}
