//! The search: quasi-Newton descent from each start, with restarts from the
//! interior when an optimum lies on the boundary.

use super::fit::{
    BOUNDARY_SNAP, EXACT_GRADIENT_TIGHTENING, MAX_RESTARTS, NEWTON_DECREMENT_TOLERANCE, REFINE_STEPS, REFINE_TARGET,
};
use super::optimize::{self, OptimOptions};

/// Descents from `start` (scaled coordinates) until a boundary optimum
/// survives the interior check. Returns the last accepted descent with the
/// iterations, evaluations and restarts used.
///
/// A zero diagonal entry of T is a stationary point of the criterion (it is
/// even in that entry), so a boundary optimum is only accepted when moving
/// back into the interior along each boundary coordinate does not lower the
/// deviance. Otherwise the search restarts from the best interior point found.
#[allow(clippy::too_many_arguments)]
pub(super) fn search(
    sdev: &impl Fn(&[f64]) -> f64,
    grad: optimize::Gradient,
    hess_at: optimize::HessianAt,
    start: &[f64],
    first_inverse: Option<&[f64]>,
    lower: &[f64],
    unit: &[f64],
    optim: OptimOptions,
) -> (Descent, (usize, usize, usize)) {
    let mut current = descend(sdev, grad, hess_at, start, first_inverse, lower, unit, optim);
    let mut iterations = current.iterations;
    let mut evaluations = current.evaluations;
    let mut restarts = 0;
    for _ in 0..MAX_RESTARTS {
        let mut candidate: Option<(Vec<f64>, f64)> = None;
        for i in (0..current.theta.len()).filter(|&i| current.theta[i] <= lower[i]) {
            for scale in [0.01, 0.1, 0.5, 1.0, 2.0] {
                let mut trial = current.theta.clone();
                trial[i] = scale;
                let d = sdev(&trial);
                evaluations += 1;
                if d < current.value - 1e-9 && candidate.as_ref().is_none_or(|c| d < c.1) {
                    candidate = Some((trial, d));
                }
            }
        }
        let Some((from, _)) = candidate else { break };
        let next = descend(sdev, grad, hess_at, &from, None, lower, unit, optim);
        iterations += next.iterations;
        evaluations += next.evaluations;
        restarts += 1;
        if next.value < current.value - 1e-10 {
            current = next;
        } else {
            break;
        }
    }
    (current, (iterations, evaluations, restarts))
}

/// One descent: quasi-Newton search, Newton finish, and snapping of
/// diagonal entries that sit a hair inside the boundary.
pub(super) struct Descent {
    pub(super) theta: Vec<f64>,
    pub(super) value: f64,
    pub(super) polished: optimize::Polished,
    pub(super) iterations: usize,
    pub(super) evaluations: usize,
    /// The last quasi-Newton search's inverse Hessian, scaled coordinates.
    pub(super) inverse_hessian: Option<Vec<f64>>,
}

/// `first_inverse`, when given, is the first round's starting inverse
/// Hessian (scaled coordinates).
#[allow(clippy::too_many_arguments)]
pub(super) fn descend(
    dev: &impl Fn(&[f64]) -> f64,
    grad: optimize::Gradient,
    hess_at: optimize::HessianAt,
    start: &[f64],
    first_inverse: Option<&[f64]>,
    lower: &[f64],
    base: &[f64],
    optim: OptimOptions,
) -> Descent {
    // The search stops early and hands over to the Newton finish; when the
    // finish cannot certify a minimum (the point is not yet in the region of
    // positive curvature), the search resumes with a tighter tolerance.
    let mut evaluations = 0;
    let mut iterations = 0;
    // With an exact gradient a search iteration is cheap and converges
    // superlinearly, so the search goes on until the finish needs only its
    // certifying stencil (which Satterthwaite's derivatives then reuse).
    let first = if grad.is_some() {
        optim.value_tolerance * EXACT_GRADIENT_TIGHTENING
    } else {
        optim.value_tolerance
    };
    let mut inverse_hessian: Option<Vec<f64>> = None;
    let mut round = |from: &[f64], tolerance: f64, first: Option<&[f64]>| {
        let mut result = optimize::minimize_from(
            dev,
            grad,
            from,
            lower,
            OptimOptions {
                value_tolerance: tolerance,
                ..optim
            },
            first,
        );
        iterations += result.iterations;
        evaluations += result.evaluations;
        if let (Some(gf), Some(_)) = (grad, hess_at) {
            let target = REFINE_TARGET * optimize::POLISH_DECREMENT * result.value.abs().max(1.0);
            let (x, value, used) = optimize::refine_by_gradient(gf, &result, lower, target, REFINE_STEPS);
            evaluations += used;
            (result.x, result.value) = (x, value);
        }
        inverse_hessian = result.inverse_hessian.take().or(inverse_hessian.take());
        if hess_at.is_none() && optim.decrement_tolerance.is_some() {
            // A likelihood-only fit: the quasi-Newton search itself stops
            // on its decrement, and there is no finish to certify it.
            return optimize::Polished {
                x: result.x,
                value: result.value,
                decrement: result.decrement,
                gradient_norm: result.gradient_norm,
                evaluations: 0,
            };
        }
        let p = optimize::newton_polish_with(dev, grad, hess_at, &result.x, result.value, lower);
        evaluations += p.evaluations;
        p
    };
    let done = |p: &optimize::Polished| p.decrement.is_some_and(|d| d < NEWTON_DECREMENT_TOLERANCE);
    let mut polished = round(start, first, first_inverse);
    for tolerance in [optim.value_tolerance * 1e-3, optim.value_tolerance * 1e-6] {
        if done(&polished) {
            break;
        }
        polished = round(&polished.x.clone(), tolerance, None);
    }
    let mut theta = polished.x.clone();
    // The criterion is even in each diagonal entry of T near zero, so a zero
    // variance is approached smoothly and the optimiser stops a hair inside
    // the bound; snap such entries to the boundary when that costs nothing.
    let mut value = polished.value;
    for i in 0..theta.len() {
        if lower[i] == 0.0 && theta[i] > 0.0 && theta[i] < BOUNDARY_SNAP * base[i].max(f64::MIN_POSITIVE) {
            let mut trial = theta.clone();
            trial[i] = 0.0;
            let d = dev(&trial);
            evaluations += 1;
            if d <= value + 1e-9 {
                theta = trial;
                value = value.min(d);
            }
        }
    }
    if theta != polished.x && hess_at.is_none() && optim.decrement_tolerance.is_some() {
        polished.x = theta.clone();
        polished.value = value;
    } else if theta != polished.x {
        // Certify the snapped point over the coordinates still free.
        polished = optimize::newton_polish_with(dev, grad, hess_at, &theta, value, lower);
        evaluations += polished.evaluations;
        theta = polished.x.clone();
        value = polished.value;
    }
    Descent {
        theta,
        value,
        polished,
        iterations,
        evaluations,
        inverse_hessian,
    }
}
