//! A bounded quasi-Newton optimiser for a few smooth parameters.
//!
//! Projected BFGS (Bertsekas 1982, *SIAM J. Control Optim.* 20) with
//! central-difference gradients: variables at their lower bound whose gradient
//! points outward are held fixed, the inverse-Hessian approximation acts on
//! the free ones, and a backtracking Armijo search keeps iterates feasible.
//! The dimension of θ is small (a handful per random term), so finite
//! differences cost little next to one evaluation of the criterion.

/// Settings of the optimiser.
#[derive(Debug, Clone, Copy)]
pub struct OptimOptions {
    /// Stop when the largest projected gradient component is below this.
    pub gradient_tolerance: f64,
    /// Stop when an iteration improves the objective by less than this
    /// (absolute, in deviance units) twice in a row; the Newton finish then
    /// takes over.
    pub value_tolerance: f64,
    /// Upper limit on iterations.
    pub max_iterations: usize,
    /// With a scaled inverse-Hessian approximation H, stop when the Newton
    /// decrement `gᵀHg` falls below this (twice the decrease still
    /// predicted): the value test alone cannot see below the rounding of a
    /// large deviance.
    pub decrement_tolerance: Option<f64>,
}

impl Default for OptimOptions {
    fn default() -> Self {
        OptimOptions {
            gradient_tolerance: 1e-6,
            value_tolerance: 1e-5,
            max_iterations: 500,
            decrement_tolerance: None,
        }
    }
}

/// What the optimiser found.
#[derive(Debug, Clone)]
pub struct OptimResult {
    /// The minimiser.
    pub x: Vec<f64>,
    /// The objective there.
    pub value: f64,
    /// Iterations taken.
    pub iterations: usize,
    /// Objective evaluations (gradients included).
    pub evaluations: usize,
    /// Largest projected gradient component at the end.
    pub gradient_norm: f64,
    /// Whether a stopping rule other than the iteration limit was met.
    pub converged: bool,
    /// The Newton decrement `gᵀHg` at the end over the free coordinates,
    /// with H the quasi-Newton inverse Hessian (`None` when H is not yet
    /// scaled to the problem, so that it predicts nothing).
    pub decrement: Option<f64>,
    /// The quasi-Newton inverse Hessian at the end (d×d row-major), when it
    /// is scaled to the problem.
    pub inverse_hessian: Option<Vec<f64>>,
    /// The gradient at the end.
    pub gradient: Vec<f64>,
}

/// Central-difference step for coordinate `x`.
fn step(x: f64) -> f64 {
    1e-5 * x.abs().max(1e-2)
}

/// The gradient by central differences, one-sided at a lower bound.
pub fn gradient(f: &mut impl FnMut(&[f64]) -> f64, x: &[f64], fx: f64, lower: &[f64], evals: &mut usize) -> Vec<f64> {
    let mut g = vec![0.0; x.len()];
    let mut xt = x.to_vec();
    for i in 0..x.len() {
        let h = step(x[i]);
        if x[i] - h < lower[i] {
            xt[i] = x[i] + h;
            let f1 = f(&xt);
            xt[i] = x[i] + 2.0 * h;
            let f2 = f(&xt);
            *evals += 2;
            // Second-order one-sided difference.
            g[i] = (-3.0 * fx + 4.0 * f1 - f2) / (2.0 * h);
        } else {
            xt[i] = x[i] + h;
            let fp = f(&xt);
            xt[i] = x[i] - h;
            let fm = f(&xt);
            *evals += 2;
            g[i] = (fp - fm) / (2.0 * h);
        }
        xt[i] = x[i];
    }
    g
}

/// The gradient by forward differences (one evaluation per coordinate),
/// used during the search; the Newton finish uses central differences.
pub fn forward_gradient(f: &mut impl FnMut(&[f64]) -> f64, x: &[f64], fx: f64, evals: &mut usize) -> Vec<f64> {
    let mut xt = x.to_vec();
    (0..x.len())
        .map(|i| {
            let h = 1e-6 * x[i].abs().max(1e-2);
            xt[i] = x[i] + h;
            let fp = f(&xt);
            xt[i] = x[i];
            *evals += 1;
            (fp - fx) / h
        })
        .collect()
}

fn projected_norm(x: &[f64], g: &[f64], lower: &[f64]) -> f64 {
    x.iter()
        .zip(g)
        .zip(lower)
        .map(|((&xi, &gi), &li)| if xi <= li && gi > 0.0 { 0.0 } else { gi.abs() })
        .fold(0.0, f64::max)
}

/// An analytic gradient, when the criterion has one (`None` at a point where
/// it cannot be computed: finite differences are used there).
/// It returns the objective's value with the gradient (one evaluation gives
/// both), so the search takes its values from it too.
pub type Gradient<'a> = Option<&'a GradientFn<'a>>;

/// A function giving the value and gradient at a point (`None` where it
/// cannot be computed).
pub type GradientFn<'a> = dyn Fn(&[f64]) -> Option<(f64, Vec<f64>)> + 'a;

/// The gradient alone from a [`Gradient`] function.
fn gradient_only(g: &GradientFn<'_>, x: &[f64]) -> Option<Vec<f64>> {
    g(x).map(|(_, v)| v)
}

/// The gradient at `x`: analytic when available, else forward differences.
fn gradient_at(f: &mut impl FnMut(&[f64]) -> f64, grad: Gradient, x: &[f64], fx: f64, evals: &mut usize) -> Vec<f64> {
    if let Some(g) = grad.and_then(|g| gradient_only(g, x)) {
        *evals += 1;
        return g;
    }
    forward_gradient(f, x, fx, evals)
}

/// Minimise `f` subject to `x ≥ lower` from `x0`.
pub fn minimize(f: impl FnMut(&[f64]) -> f64, x0: &[f64], lower: &[f64], opts: OptimOptions) -> OptimResult {
    minimize_with(f, None, x0, lower, opts)
}

/// [`minimize`] with an analytic gradient when one is given.
pub fn minimize_with(
    f: impl FnMut(&[f64]) -> f64,
    grad: Gradient,
    x0: &[f64],
    lower: &[f64],
    opts: OptimOptions,
) -> OptimResult {
    minimize_from(f, grad, x0, lower, opts, None)
}

/// [`minimize_with`], whose first inverse Hessian is `first` when given
/// (d×d, finite; a nearby search's last one, say) instead of one from
/// differences of gradients.
pub fn minimize_from(
    mut f: impl FnMut(&[f64]) -> f64,
    grad: Gradient,
    x0: &[f64],
    lower: &[f64],
    opts: OptimOptions,
    first: Option<&[f64]>,
) -> OptimResult {
    let d = x0.len();
    let mut x: Vec<f64> = x0.iter().zip(lower).map(|(&a, &l)| a.max(l)).collect();
    let mut evals = 0usize;
    // With an analytic gradient one evaluation gives the value and the
    // gradient, at the start and at each trial point of the line search.
    let mut start = if d > 0 { grad.and_then(|gf| gf(&x)) } else { None };
    let mut fx = match &start {
        Some((v, _)) => *v,
        None => f(&x),
    };
    evals += 1;
    if d == 0 {
        return OptimResult {
            x,
            value: fx,
            iterations: 0,
            evaluations: evals,
            gradient_norm: 0.0,
            converged: true,
            decrement: Some(0.0),
            inverse_hessian: None,
            gradient: Vec::new(),
        };
    }
    let mut g = match start.take() {
        Some((_, g)) => g,
        None => gradient_at(&mut f, grad, &x, fx, &mut evals),
    };
    let (mut h, mut h_scaled) = first_inverse_hessian(&mut f, grad, first, &x, fx, &g, lower, &mut evals);
    let mut last_scaled: Option<Vec<f64>> = None;
    let mut small_steps = 0;
    let mut converged = false;
    let mut iterations = 0;
    for it in 0..opts.max_iterations {
        iterations = it + 1;
        let pg = projected_norm(&x, &g, lower);
        if pg < opts.gradient_tolerance * (1.0 + fx.abs()).sqrt().min(10.0) {
            converged = true;
            break;
        }
        let (free, mut dir) = projected_direction(&h, &g, &x, lower);
        let mut slope: f64 = dir.iter().zip(&g).map(|(a, b)| a * b).sum();
        if slope.is_nan() || slope >= 0.0 {
            h = identity(d);
            h_scaled = false;
            for i in 0..d {
                dir[i] = if free[i] { -g[i] } else { 0.0 };
            }
            slope = dir.iter().zip(&g).map(|(a, b)| a * b).sum();
        }
        if let Some(tol) = opts.decrement_tolerance.filter(|_| h_scaled)
            && -slope < tol
        {
            converged = true;
            break;
        }
        if !h_scaled {
            // First step: move at most 0.1 in the largest coordinate.
            let big = dir.iter().fold(0.0f64, |a, b| a.max(b.abs()));
            if big > 0.1 {
                let s = 0.1 / big;
                dir.iter_mut().for_each(|v| *v *= s);
                slope *= s;
            }
        }
        let Some((xn, fnew, gnew)) = line_search(&mut f, grad, &x, fx, &g, &dir, lower, &mut evals) else {
            // No descent along the direction: restart BFGS once, else stop.
            // The scaled H is kept for the caller: the values no longer
            // resolve a step here, but the gradient still does.
            if h_scaled {
                last_scaled = Some(std::mem::replace(&mut h, identity(d)));
                h_scaled = false;
                continue;
            }
            converged = projected_norm(&x, &g, lower) < 1e-3;
            break;
        };
        let gn = match gnew {
            Some(gv) => gv,
            None => gradient_at(&mut f, grad, &xn, fnew, &mut evals),
        };
        let s: Vec<f64> = (0..d).map(|i| xn[i] - x[i]).collect();
        let yv: Vec<f64> = (0..d).map(|i| gn[i] - g[i]).collect();
        let sy: f64 = s.iter().zip(&yv).map(|(a, b)| a * b).sum();
        if sy > 1e-14 {
            if !h_scaled {
                let yy: f64 = yv.iter().map(|v| v * v).sum();
                let scale = sy / yy;
                h = identity(d);
                h.iter_mut().for_each(|v| *v *= scale);
                h_scaled = true;
            }
            bfgs_update(&mut h, &s, &yv, sy);
        }
        let improvement = fx - fnew;
        x = xn;
        fx = fnew;
        g = gn;
        if improvement < opts.value_tolerance {
            small_steps += 1;
            if small_steps >= 2 {
                converged = projected_norm(&x, &g, lower) < 1e-3;
                break;
            }
        } else {
            small_steps = 0;
        }
    }
    let gradient_norm = projected_norm(&x, &g, lower);
    let decrement = h_scaled.then(|| {
        let (_, dir) = projected_direction(&h, &g, &x, lower);
        -dir.iter().zip(&g).map(|(a, b)| a * b).sum::<f64>()
    });
    OptimResult {
        x,
        value: fx,
        iterations,
        evaluations: evals,
        gradient_norm,
        converged,
        decrement,
        inverse_hessian: if h_scaled { Some(h) } else { last_scaled },
        gradient: g,
    }
}

/// The search's first inverse Hessian, and whether it is scaled to the
/// problem: `first` when given (d×d, finite); with an analytic gradient the
/// inverse of forward differences of the gradient (one gradient per
/// coordinate), so that the search starts with Newton steps; otherwise the
/// reciprocal diagonal curvatures from second differences (2 evaluations per
/// coordinate), so that the first steps are on the right scale in every
/// coordinate; the identity, unscaled, when those are not all positive.
#[allow(clippy::too_many_arguments)]
fn first_inverse_hessian(
    f: &mut impl FnMut(&[f64]) -> f64,
    grad: Gradient,
    first: Option<&[f64]>,
    x: &[f64],
    fx: f64,
    g: &[f64],
    lower: &[f64],
    evals: &mut usize,
) -> (Vec<f64>, bool) {
    let d = x.len();
    let given = first.filter(|h| h.len() == d * d && h.iter().all(|v| v.is_finite()));
    if let Some(inv) = given
        .map(<[f64]>::to_vec)
        .or_else(|| grad.and_then(|gf| forward_inverse_hessian(gf, x, g, evals)))
    {
        return (inv, true);
    }
    let diag = diagonal_curvatures(f, x, fx, lower, evals);
    let mut h = identity(d);
    if !diag.iter().all(|c| c.is_finite() && *c > 0.0) {
        return (h, false);
    }
    for i in 0..d {
        h[i * d + i] = 1.0 / diag[i];
    }
    (h, true)
}

/// Refine a quasi-Newton search's end point by full steps `−Hg` with its
/// final inverse Hessian H and the exact gradient, while each step at least
/// halves the decrement `gᵀHg` and the value does not rise beyond its
/// rounding, until the decrement is below `target` or after `max_steps`.
/// Returns the point, its value and the evaluations used.
///
/// The line search decides on values, which stop resolving a step long
/// before the gradient does (a deviance of 6·10⁶ rounds at about 1e-9);
/// these steps decide on the gradient, so the point handed to the Newton
/// finish is already where its stencil's Newton step is negligible
/// (notes/criterion.md, "One stencil for the finish and Satterthwaite").
pub fn refine_by_gradient(
    gf: &GradientFn<'_>,
    result: &OptimResult,
    lower: &[f64],
    target: f64,
    max_steps: usize,
) -> (Vec<f64>, f64, usize) {
    let mut x = result.x.clone();
    let mut fx = result.value;
    let mut evals = 0;
    let Some(h) = result.inverse_hessian.as_ref() else {
        return (x, fx, evals);
    };
    let decrement = |g: &[f64], x: &[f64]| {
        let (_, dir) = projected_direction(h, g, x, lower);
        (-dir.iter().zip(g).map(|(a, b)| a * b).sum::<f64>(), dir)
    };
    let (mut dec, mut dir) = decrement(&result.gradient, &x);
    for _ in 0..max_steps {
        if dec.is_nan() || dec <= target {
            break;
        }
        let xn: Vec<f64> = (0..x.len()).map(|i| (x[i] + dir[i]).max(lower[i])).collect();
        let Some((fnew, gnew)) = gf(&xn) else { break };
        evals += 1;
        let (dn, dirn) = decrement(&gnew, &xn);
        let accepted = fnew <= fx + VALUE_ROUNDING * (1.0 + fx.abs()) && dn < 0.5 * dec;
        if !accepted {
            break;
        }
        (x, fx, dec, dir) = (xn, fnew, dn, dirn);
    }
    (x, fx, evals)
}

/// The relative rounding of a deviance summed over many rows and levels:
/// 64 ulps (a margin of common practice). In the search traces on the
/// 1,000,005-row file the last "improvements" of a deviance of 5.8·10⁶ were
/// 1e-9 to 1e-8 (1 to 8 ulps), after which the line search halved its step
/// up to 40 times on noise.
const VALUE_ROUNDING: f64 = 64.0 * f64::EPSILON;

/// A point along `dir` from `x`, projected on the bounds, meeting the
/// Armijo condition: the full step first, then halved steps (backtracking).
/// The full step usually succeeds, so its gradient is taken with its value;
/// shorter steps are tried on the value alone.
#[allow(clippy::too_many_arguments)]
fn line_search(
    f: &mut impl FnMut(&[f64]) -> f64,
    grad: Gradient,
    x: &[f64],
    fx: f64,
    g: &[f64],
    dir: &[f64],
    lower: &[f64],
    evals: &mut usize,
) -> Option<(Vec<f64>, f64, Option<Vec<f64>>)> {
    let d = x.len();
    let mut alpha = 1.0;
    // The full step is always tried; a shorter one whose decrease would
    // lie below the rounding of f itself cannot be seen, so the halving
    // stops there instead of spending evaluations on noise.
    let noise = VALUE_ROUNDING * fx.abs();
    for _ in 0..40 {
        let xn: Vec<f64> = (0..d).map(|i| (x[i] + alpha * dir[i]).max(lower[i])).collect();
        let predicted: f64 = (0..d).map(|i| g[i] * (xn[i] - x[i])).sum();
        if alpha < 1.0 && -predicted < noise {
            return None;
        }
        let joint = if alpha == 1.0 {
            grad.and_then(|gf| gf(&xn))
        } else {
            None
        };
        let (fnew, gnew) = match joint {
            Some((v, gv)) => (v, Some(gv)),
            None => (f(&xn), None),
        };
        *evals += 1;
        if fnew.is_finite() && fnew <= fx + 1e-4 * predicted.min(0.0) {
            return Some((xn, fnew, gnew));
        }
        alpha *= 0.5;
    }
    None
}

/// Second differences along each coordinate (2 evaluations each), stepping
/// up instead of down where the lower bound is near.
fn diagonal_curvatures(
    f: &mut impl FnMut(&[f64]) -> f64,
    x: &[f64],
    fx: f64,
    lower: &[f64],
    evals: &mut usize,
) -> Vec<f64> {
    let mut diag = Vec::with_capacity(x.len());
    let mut xt = x.to_vec();
    for i in 0..x.len() {
        let step = 1e-3 * x[i].abs().max(1e-1);
        let lo = if x[i] - step >= lower[i] {
            x[i] - step
        } else {
            x[i] + 2.0 * step
        };
        xt[i] = x[i] + step;
        let f1 = f(&xt);
        xt[i] = lo;
        let f2 = f(&xt);
        xt[i] = x[i];
        *evals += 2;
        let c = if lo < x[i] {
            (f1 - 2.0 * fx + f2) / (step * step)
        } else {
            (fx - 2.0 * f1 + f2) / (step * step)
        };
        diag.push(c);
    }
    diag
}

/// The free set (not at a bound with an outward gradient) and the
/// quasi-Newton direction −H g restricted to it.
fn projected_direction(h: &[f64], g: &[f64], x: &[f64], lower: &[f64]) -> (Vec<bool>, Vec<f64>) {
    let d = x.len();
    let free: Vec<bool> = (0..d).map(|i| !(x[i] <= lower[i] && g[i] > 0.0)).collect();
    let mut dir = vec![0.0; d];
    for i in 0..d {
        if !free[i] {
            continue;
        }
        let mut acc = 0.0;
        for j in 0..d {
            if free[j] {
                acc -= h[i * d + j] * g[j];
            }
        }
        dir[i] = acc;
    }
    (free, dir)
}

/// The inverse of the Hessian from forward differences of the gradient
/// (upward steps, so always inside the lower bounds), symmetrised; `None`
/// when a gradient fails or the matrix is not positive definite.
fn forward_inverse_hessian(gf: &GradientFn<'_>, x: &[f64], g: &[f64], evals: &mut usize) -> Option<Vec<f64>> {
    let d = x.len();
    let mut hm = vec![0.0; d * d];
    let mut xt = x.to_vec();
    for i in 0..d {
        let s = 1e-3 * x[i].abs().max(1e-1);
        xt[i] = x[i] + s;
        let gi = gradient_only(gf, &xt);
        xt[i] = x[i];
        *evals += 1;
        let gi = gi?;
        for j in 0..d {
            hm[j * d + i] = (gi[j] - g[j]) / s;
        }
    }
    for i in 0..d {
        for j in 0..i {
            let v = 0.5 * (hm[i * d + j] + hm[j * d + i]);
            hm[i * d + j] = v;
            hm[j * d + i] = v;
        }
    }
    inverse_of(&hm, d).or_else(|| modified_inverse(&hm, d))
}

/// The inverse of the symmetric `hm` (d×d) when it is positive definite.
fn inverse_of(hm: &[f64], d: usize) -> Option<Vec<f64>> {
    // Invert column by column through Newton directions of unit vectors.
    let mut inv = vec![0.0; d * d];
    for j in 0..d {
        let mut e = vec![0.0; d];
        e[j] = -1.0;
        let col = newton_direction(hm, &e)?;
        for i in 0..d {
            inv[i * d + j] = col[i];
        }
    }
    inv.iter().all(|v| v.is_finite()).then_some(inv)
}

/// The smallest eigenvalue kept by [`modified_inverse`], relative to the
/// largest in absolute value (common practice for a modified Newton start).
const EIGEN_FLOOR: f64 = 1e-6;

/// An inverse of the symmetric `hm` with each eigenvalue replaced by its
/// absolute value, floored at [`EIGEN_FLOOR`] of the largest: a positive
/// definite start for the quasi-Newton updates where differences of
/// gradients are indefinite (far from the optimum, or along a flat
/// direction), on the scale of the curvature in every other direction.
fn modified_inverse(hm: &[f64], d: usize) -> Option<Vec<f64>> {
    use faer::{Mat, Side};
    let m = Mat::from_fn(d, d, |i, j| hm[i * d + j]);
    let eig = m.self_adjoint_eigen(Side::Lower).ok()?;
    let (u, s) = (eig.U(), eig.S().column_vector());
    let largest = (0..d).map(|k| s[k].abs()).fold(0.0, f64::max);
    if !(largest.is_finite() && largest > 0.0) {
        return None;
    }
    let lam: Vec<f64> = (0..d).map(|k| s[k].abs().max(EIGEN_FLOOR * largest)).collect();
    let mut inv = vec![0.0; d * d];
    for i in 0..d {
        for j in 0..d {
            inv[i * d + j] = (0..d).map(|k| u[(i, k)] * u[(j, k)] / lam[k]).sum();
        }
    }
    inv.iter().all(|v| v.is_finite()).then_some(inv)
}

fn identity(d: usize) -> Vec<f64> {
    let mut h = vec![0.0; d * d];
    for i in 0..d {
        h[i * d + i] = 1.0;
    }
    h
}

/// Inverse BFGS update `H ← (I − ρsyᵀ)H(I − ρysᵀ) + ρssᵀ`.
fn bfgs_update(h: &mut [f64], s: &[f64], y: &[f64], sy: f64) {
    let d = s.len();
    let rho = 1.0 / sy;
    let hy: Vec<f64> = (0..d).map(|i| (0..d).map(|j| h[i * d + j] * y[j]).sum()).collect();
    let yhy: f64 = y.iter().zip(&hy).map(|(a, b)| a * b).sum();
    for i in 0..d {
        for j in 0..d {
            h[i * d + j] += -rho * (hy[i] * s[j] + s[i] * hy[j]) + (rho * rho * yhy + rho) * s[i] * s[j];
        }
    }
}

#[cfg(test)]
mod tests {
    // An indefinite Hessian: [[1, 2], [2, 1]] has eigenvalues 3 and −1, so
    // the modified matrix is [[2, 1], [1, 2]] and its inverse
    // [[2, −1], [−1, 2]]/3 (closed form).
    #[test]
    fn modified_inverse_takes_absolute_eigenvalues() {
        let inv = modified_inverse(&[1.0, 2.0, 2.0, 1.0], 2).unwrap();
        let want = [2.0 / 3.0, -1.0 / 3.0, -1.0 / 3.0, 2.0 / 3.0];
        for (a, b) in inv.iter().zip(want) {
            assert!((a - b).abs() < 1e-14, "{inv:?}");
        }
        assert!(inverse_of(&[1.0, 2.0, 2.0, 1.0], 2).is_none());
    }

    use super::*;

    // Closed form: the minimiser of a convex quadratic with a bound.
    #[test]
    fn quadratic_with_active_bound() {
        let f = |x: &[f64]| (x[0] - 2.0).powi(2) + 3.0 * (x[1] + 1.0).powi(2) + x[0] * x[1];
        let r = minimize(f, &[0.5, 0.5], &[f64::NEG_INFINITY, 0.0], OptimOptions::default());
        // With x1 = 0 active, the minimiser of (x0-2)² + 3 is x0 = 2.
        assert!((r.x[0] - 2.0).abs() < 1e-5, "{:?}", r);
        assert!(r.x[1].abs() < 1e-12, "{:?}", r);
        assert!(r.converged);
    }

    // Rosenbrock's function has its minimum at (1, 1) (closed form).
    #[test]
    fn rosenbrock() {
        let f = |x: &[f64]| 100.0 * (x[1] - x[0] * x[0]).powi(2) + (1.0 - x[0]).powi(2);
        let free = [f64::NEG_INFINITY; 2];
        let r = minimize(f, &[-1.2, 1.0], &free, OptimOptions::default());
        // The search gets close; the Newton finish completes it.
        assert!((r.x[0] - 1.0).abs() < 1e-2 && (r.x[1] - 1.0).abs() < 1e-2, "{:?}", r);
        let p = newton_polish(f, &r.x, r.value, &free);
        assert!((p.x[0] - 1.0).abs() < 1e-7 && (p.x[1] - 1.0).abs() < 1e-7, "{:?}", p);
    }
}

/// The gradient and Hessian over the coordinates `free` by central
/// differences, with the stencil kept inside the bounds. The Hessian is
/// row-major `free.len()²`.
pub fn hessian(
    f: &mut impl FnMut(&[f64]) -> f64,
    x: &[f64],
    fx: f64,
    lower: &[f64],
    free: &[usize],
    evals: &mut usize,
) -> (Vec<f64>, Vec<f64>) {
    let k = free.len();
    let mut grad = vec![0.0; k];
    let h: Vec<f64> = free
        .iter()
        .map(|&i| {
            let base = 1e-4 * x[i].abs().max(1e-2);
            if lower[i].is_finite() {
                base.min(0.5 * (x[i] - lower[i])).max(1e-12)
            } else {
                base
            }
        })
        .collect();
    let mut out = vec![0.0; k * k];
    let mut xt = x.to_vec();
    for a in 0..k {
        let ia = free[a];
        xt[ia] = x[ia] + h[a];
        let fp = f(&xt);
        xt[ia] = x[ia] - h[a];
        let fm = f(&xt);
        xt[ia] = x[ia];
        *evals += 2;
        out[a * k + a] = (fp - 2.0 * fx + fm) / (h[a] * h[a]);
        grad[a] = (fp - fm) / (2.0 * h[a]);
        for b in 0..a {
            let ib = free[b];
            let mut v = [0.0; 4];
            for (idx, (sa, sb)) in [(1.0, 1.0), (1.0, -1.0), (-1.0, 1.0), (-1.0, -1.0)].iter().enumerate() {
                xt[ia] = x[ia] + sa * h[a];
                xt[ib] = x[ib] + sb * h[b];
                v[idx] = f(&xt);
            }
            xt[ia] = x[ia];
            xt[ib] = x[ib];
            *evals += 4;
            let val = (v[0] - v[1] - v[2] + v[3]) / (4.0 * h[a] * h[b]);
            out[a * k + b] = val;
            out[b * k + a] = val;
        }
    }
    (grad, out)
}

/// The lower Cholesky factor of a small symmetric k×k matrix (row-major,
/// lower triangle read) into `l` (its strict upper triangle is left as it
/// was); `false` when the matrix is not positive definite.
pub(super) fn small_cholesky(h: &[f64], k: usize, l: &mut [f64]) -> bool {
    for j in 0..k {
        let mut d = h[j * k + j];
        for s in 0..j {
            d -= l[j * k + s] * l[j * k + s];
        }
        if d.is_nan() || d <= 0.0 {
            return false;
        }
        let d = d.sqrt();
        l[j * k + j] = d;
        for i in j + 1..k {
            let mut v = h[i * k + j];
            for s in 0..j {
                v -= l[i * k + s] * l[j * k + s];
            }
            l[i * k + j] = v / d;
        }
    }
    true
}

/// Solve `H d = −g` by Cholesky; `None` when H is not positive definite.
fn newton_direction(h: &[f64], g: &[f64]) -> Option<Vec<f64>> {
    let k = g.len();
    let mut l = vec![0.0; k * k];
    if !small_cholesky(h, k, &mut l) {
        return None;
    }
    let mut y = vec![0.0; k];
    for i in 0..k {
        let mut v = -g[i];
        for s in 0..i {
            v -= l[i * k + s] * y[s];
        }
        y[i] = v / l[i * k + i];
    }
    let mut d = vec![0.0; k];
    for i in (0..k).rev() {
        let mut v = y[i];
        for s in i + 1..k {
            v -= l[s * k + i] * d[s];
        }
        d[i] = v / l[i * k + i];
    }
    Some(d)
}

/// Result of the Newton polish.
#[derive(Debug, Clone)]
pub struct Polished {
    /// The final point.
    pub x: Vec<f64>,
    /// The objective there.
    pub value: f64,
    /// Newton decrement `gᵀH⁻¹g` over the free coordinates at the end
    /// (the predicted remaining decrease, ×2); `None` when H is not positive definite.
    pub decrement: Option<f64>,
    /// Largest projected gradient component at the end.
    pub gradient_norm: f64,
    /// Evaluations used.
    pub evaluations: usize,
}

/// A few safeguarded Newton steps with finite-difference derivatives, to
/// finish a quasi-Newton run to full precision and to certify the minimum
/// through the decrement and the curvature.
pub fn newton_polish(f: impl FnMut(&[f64]) -> f64, x0: &[f64], f0: f64, lower: &[f64]) -> Polished {
    newton_polish_with(f, None, None, x0, f0, lower)
}

/// The Hessian over `free` by central differences of an analytic gradient
/// (forward differences next to a bound), symmetrised.
fn gradient_hessian(
    gf: &GradientFn<'_>,
    g0: &[f64],
    x: &[f64],
    lower: &[f64],
    free: &[usize],
    evals: &mut usize,
) -> Option<Vec<f64>> {
    let k = free.len();
    let mut out = vec![0.0; k * k];
    let mut xt = x.to_vec();
    for (a, &ia) in free.iter().enumerate() {
        let h = 1e-4 * x[ia].abs().max(1e-2);
        xt[ia] = x[ia] + h;
        let gp = gradient_only(gf, &xt)?;
        let (gm, den) = if x[ia] - h >= lower[ia] {
            xt[ia] = x[ia] - h;
            (gradient_only(gf, &xt)?, 2.0 * h)
        } else {
            (g0.to_vec(), h)
        };
        xt[ia] = x[ia];
        *evals += 2;
        for (b, &ib) in free.iter().enumerate() {
            out[b * k + a] = (gp[ib] - gm[ib]) / den;
        }
    }
    for a in 0..k {
        for b in 0..a {
            let v = 0.5 * (out[a * k + b] + out[b * k + a]);
            out[a * k + b] = v;
            out[b * k + a] = v;
        }
    }
    Some(out)
}

/// A caller's own gradient-and-Hessian stencil over the free coordinates
/// (row-major `free.len()²`), with the number of evaluations it took, used
/// in place of [`gradient_hessian`] when it gives one; the caller may keep
/// what it computed there.
pub type HessianAt<'a> = Option<&'a dyn Fn(&[f64], &[usize]) -> Option<(Vec<f64>, Vec<f64>, usize)>>;

/// [`newton_polish`] with an analytic gradient when one is given: the
/// gradient is exact and the Hessian comes from differences of gradients
/// (from `hess_at` when that is given and succeeds).
pub fn newton_polish_with(
    mut f: impl FnMut(&[f64]) -> f64,
    grad: Gradient,
    hess_at: HessianAt,
    x0: &[f64],
    f0: f64,
    lower: &[f64],
) -> Polished {
    let d = x0.len();
    let mut x = x0.to_vec();
    let mut fx = f0;
    let mut evals = 0;
    let mut decrement = None;
    let mut g = vec![0.0; d];
    // The Hessian is computed once and reused while its steps succeed
    // (a chord method); a failed step with a reused one triggers a fresh one.
    let mut hess: Option<(Vec<usize>, Vec<f64>)> = None;
    for _ in 0..8 {
        // Coordinates on their bound stay there: whether the interior is
        // better is decided by the caller's boundary check, not by a
        // one-sided difference quotient at the bound.
        let free: Vec<usize> = (0..d).filter(|&i| x[i] > lower[i]).collect();
        if free.is_empty() {
            decrement = Some(0.0);
            break;
        }
        let fresh = hess.as_ref().is_none_or(|(f_prev, _)| *f_prev != free);
        // The caller's stencil gives the gradient with the Hessian.
        let stencil = if fresh {
            hess_at.and_then(|hf| hf(&x, &free))
        } else {
            None
        };
        if let Some((gs, h, used)) = stencil {
            evals += used;
            g = vec![0.0; d];
            for (k, &i) in free.iter().enumerate() {
                g[i] = gs[k];
            }
            hess = Some((free.clone(), h));
        } else {
            // The gradient always comes from the fine central differences; the
            // Hessian stencil's coarser one would bias the Newton steps.
            let analytic = grad.and_then(|gf| gradient_only(gf, &x));
            g = match analytic {
                Some(v) => {
                    evals += 1;
                    v
                }
                None => gradient(&mut f, &x, fx, lower, &mut evals),
            };
            if fresh {
                let h = match grad.and_then(|gf| gradient_hessian(gf, &g, &x, lower, &free, &mut evals)) {
                    Some(h) => h,
                    None => hessian(&mut f, &x, fx, lower, &free, &mut evals).1,
                };
                hess = Some((free.clone(), h));
            }
        }
        // Set above: either fresh (computed now) or kept from a step with the same free set.
        let Some((_, h)) = hess.as_ref() else {
            break;
        };
        let gf: Vec<f64> = free.iter().map(|&i| g[i]).collect();
        let Some(step) = newton_direction(h, &gf) else {
            decrement = None;
            break;
        };
        let dec: f64 = -gf.iter().zip(&step).map(|(a, b)| a * b).sum::<f64>();
        let previous = decrement.unwrap_or(f64::INFINITY);
        decrement = Some(dec);
        // Stop at the target, or when the decrement has stopped shrinking:
        // the finite-difference gradient has reached its rounding floor.
        if dec < POLISH_DECREMENT * fx.abs().max(1.0) || (!fresh && dec > 0.1 * previous) {
            // With an exact gradient the last Newton step is worth taking: it
            // squares the remaining error (kept only if f does not rise
            // beyond its rounding).
            if grad.is_some() && dec >= 0.0 {
                let xn: Vec<f64> = (0..d)
                    .map(|i| match free.iter().position(|&j| j == i) {
                        Some(k) => (x[i] + step[k]).max(lower[i]),
                        None => x[i],
                    })
                    .collect();
                let fnew = f(&xn);
                evals += 1;
                if fnew <= fx + 1e-13 * (1.0 + fx.abs()) {
                    x = xn;
                    fx = fnew;
                }
            }
            break;
        }
        let mut alpha = 1.0;
        let mut moved = false;
        for _ in 0..12 {
            let mut xn = x.clone();
            for (j, &i) in free.iter().enumerate() {
                xn[i] = (x[i] + alpha * step[j]).max(lower[i]);
            }
            let fnew = f(&xn);
            evals += 1;
            // Near the optimum the predicted decrease is below the rounding
            // of f itself; a full Newton step is then accepted when f does not
            // rise beyond that rounding, since the gradient, not f, locates it.
            let within_rounding = dec < 1e-6 && alpha == 1.0 && fnew <= fx + 1e-13 * (1.0 + fx.abs());
            if fnew < fx || within_rounding {
                x = xn;
                fx = fnew;
                moved = true;
                break;
            }
            alpha *= 0.5;
        }
        if !moved {
            if fresh {
                break;
            }
            hess = None;
        }
    }
    let gradient_norm = projected_norm(&x, &g, lower);
    Polished {
        x,
        value: fx,
        decrement,
        gradient_norm,
        evaluations: evals,
    }
}

/// The Newton finish stops when the decrement falls below this share of |f|
/// (the rounding of f itself): a parameter error of about
/// √(decrement / curvature), far below any reported digit.
pub(super) const POLISH_DECREMENT: f64 = 1e-16;
