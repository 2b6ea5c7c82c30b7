//! Sensitivity of the fixed-effect covariance to the variance parameters,
//! from a stencil of criterion evaluations (the input of Satterthwaite's df).

use faer::Mat;

use super::Method;
use super::criterion::{self, Factor};
use super::crossprod::CrossProducts;
use super::fit::HESSIAN_STEP;
use super::fit::VarianceSensitivity;
use super::solution::fixed_cov;

/// Derivatives at θ of the θ-dependent pieces, over the free coordinates, by
/// central differences with steps `h`: the gradient and Hessian of
/// A(θ) (= log|L_Z|², plus log|R_X|² for REML) and of r²(θ), and ∂cov(β̂)/∂θ
/// at a fixed σ².
pub(super) struct PieceDerivatives {
    pub(super) c0: Vec<f64>,
    pub(super) a_hess: Vec<f64>,
    pub(super) r2_grad: Vec<f64>,
    pub(super) r2_hess: Vec<f64>,
    pub(super) dcov: Vec<Vec<f64>>,
}

pub(super) fn piece_derivatives(
    cp: &CrossProducts,
    theta: &[f64],
    free: &[usize],
    h: &[f64],
    method: Method,
    sigma2: f64,
    evals: &mut usize,
) -> Option<PieceDerivatives> {
    let p = cp.p;
    let a_of = |f: &Factor| match method {
        Method::Reml => f.pieces.logdet_z + f.pieces.logdet_x,
        Method::Ml => f.pieces.logdet_z,
    };
    let at = |th: &[f64]| -> Option<PointPieces> {
        let f = criterion::evaluate(cp, th, false).ok()?;
        Some((a_of(&f), f.pieces.pwrss, fixed_cov(&f, cp.q2_total, p, sigma2)))
    };
    piece_derivatives_by(at, theta, free, h, evals)
}

/// A(θ), r²(θ) and cov(β̂) at a fixed σ², at one θ.
pub(super) type PointPieces = (f64, f64, Vec<f64>);

/// [`piece_derivatives`] for any route that evaluates the pieces at a θ.
pub(super) fn piece_derivatives_by(
    eval: impl Fn(&[f64]) -> Option<PointPieces>,
    theta: &[f64],
    free: &[usize],
    h: &[f64],
    evals: &mut usize,
) -> Option<PieceDerivatives> {
    let d = free.len();
    let mut at = |moves: &[(usize, f64)]| -> Option<PointPieces> {
        let mut th = theta.to_vec();
        for &(j, v) in moves {
            th[free[j]] += v;
        }
        *evals += 1;
        eval(&th)
    };
    let (a0, r0, c0) = at(&[])?;
    let mut a_hess = vec![0.0; d * d];
    let mut r2_hess = vec![0.0; d * d];
    let mut r2_grad = vec![0.0; d];
    let mut dcov = Vec::with_capacity(d);
    for i in 0..d {
        let (ap, rp, cp_) = at(&[(i, h[i])])?;
        let (am, rm, cm_) = at(&[(i, -h[i])])?;
        a_hess[i * d + i] = (ap - 2.0 * a0 + am) / (h[i] * h[i]);
        r2_hess[i * d + i] = (rp - 2.0 * r0 + rm) / (h[i] * h[i]);
        r2_grad[i] = (rp - rm) / (2.0 * h[i]);
        dcov.push(cp_.iter().zip(&cm_).map(|(x, y)| (x - y) / (2.0 * h[i])).collect());
        for j in 0..i {
            let mut av = [0.0; 4];
            let mut rv = [0.0; 4];
            for (k, (si, sj)) in [(1.0, 1.0), (1.0, -1.0), (-1.0, 1.0), (-1.0, -1.0)].iter().enumerate() {
                let (a, r, _) = at(&[(i, si * h[i]), (j, sj * h[j])])?;
                av[k] = a;
                rv[k] = r;
            }
            let den = 4.0 * h[i] * h[j];
            let va = (av[0] - av[1] - av[2] + av[3]) / den;
            let vr = (rv[0] - rv[1] - rv[2] + rv[3]) / den;
            a_hess[i * d + j] = va;
            a_hess[j * d + i] = va;
            r2_hess[i * d + j] = vr;
            r2_hess[j * d + i] = vr;
        }
    }
    Some(PieceDerivatives {
        c0,
        a_hess,
        r2_grad,
        r2_hess,
        dcov,
    })
}

/// Central differences of analytic gradient evaluations at θ over the free
/// coordinates (one random term only): the stencil both the Newton finish
/// (the Hessian of the profiled deviance) and Satterthwaite's derivatives
/// ([`PieceDerivatives`]) are built from, 1 + 2d evaluations.
pub(super) struct Stencil {
    pub(super) theta: Vec<f64>,
    pub(super) free: Vec<usize>,
    pub(super) h: Vec<f64>,
    pub(super) centre: criterion::GradientEval,
    pub(super) plus: Vec<criterion::GradientEval>,
    pub(super) minus: Vec<criterion::GradientEval>,
}

/// The stencil's steps: [`HESSIAN_STEP`] relative to |θᵢ| or, when smaller,
/// to the coordinate's scale.
pub(super) fn stencil_steps(theta: &[f64], theta_scale: &[f64], free: &[usize]) -> Vec<f64> {
    free.iter()
        .map(|&i| HESSIAN_STEP * theta[i].abs().max(theta_scale[i]))
        .collect()
}

/// A kept stencil serves a final point that lies within this share of each
/// step from where it was taken (a move of at most 3e-7 relative to θ or to
/// its scale). Measured on the balanced closed form: at this share the df
/// stay within 4e-7 of a − 1; at 1e-2 one of them moved to 8e-6.
const STENCIL_REUSE: f64 = 1e-3;

impl Stencil {
    /// `centre`, when given, is the evaluation at `theta` itself (the
    /// search's last gradient, at the point the finish starts from), which
    /// then is not repeated.
    #[allow(clippy::too_many_arguments)]
    pub(super) fn new(
        cp: &CrossProducts,
        theta: &[f64],
        free: &[usize],
        h: &[f64],
        method: Method,
        evals: &mut usize,
        centre: Option<criterion::GradientEval>,
    ) -> Option<Stencil> {
        let mut at = |i: Option<(usize, f64)>| {
            let mut th = theta.to_vec();
            if let Some((j, v)) = i {
                th[free[j]] += v;
            }
            *evals += 1;
            criterion::gradient_eval(cp, &th, method)
        };
        let centre = match centre {
            Some(c) => c,
            None => at(None)?,
        };
        let mut plus = Vec::with_capacity(free.len());
        let mut minus = Vec::with_capacity(free.len());
        for (i, &hi) in h.iter().enumerate() {
            plus.push(at(Some((i, hi)))?);
            minus.push(at(Some((i, -hi)))?);
        }
        Some(Stencil {
            theta: theta.to_vec(),
            free: free.to_vec(),
            h: h.to_vec(),
            centre,
            plus,
            minus,
        })
    }

    /// Whether this stencil stands for one taken at `theta` over `free`.
    pub(super) fn serves(&self, theta: &[f64], free: &[usize]) -> bool {
        self.free == free
            && self.theta.len() == theta.len()
            && self
                .free
                .iter()
                .zip(&self.h)
                .all(|(&i, h)| (theta[i] - self.theta[i]).abs() <= STENCIL_REUSE * h)
            && (0..theta.len())
                .filter(|i| !free.contains(i))
                .all(|i| theta[i] == self.theta[i])
    }

    /// The gradient and the symmetrised Hessian of the profiled deviance
    /// over the free coordinates, in the search's scaled coordinates
    /// (θ = x · scale).
    pub(super) fn scaled_gradient_hessian(&self, scale: &[f64]) -> (Vec<f64>, Vec<f64>) {
        let d = self.free.len();
        let g: Vec<f64> = self.free.iter().map(|&i| self.centre.grad[i] * scale[i]).collect();
        let mut hess = vec![0.0; d * d];
        for a in 0..d {
            let den = 2.0 * self.h[a];
            for (b, &fb) in self.free.iter().enumerate() {
                hess[b * d + a] =
                    (self.plus[a].grad[fb] - self.minus[a].grad[fb]) / den * scale[self.free[a]] * scale[fb];
            }
        }
        symmetrise(&mut hess, d);
        (g, hess)
    }

    /// The piece derivatives at a fixed σ².
    pub(super) fn derivatives(&self, sigma2: f64) -> PieceDerivatives {
        let d = self.free.len();
        let c0: Vec<f64> = self.centre.sxx_inv.iter().map(|v| sigma2 * v).collect();
        let r2_grad: Vec<f64> = self.free.iter().map(|&i| self.centre.r2_grad[i]).collect();
        let mut a_hess = vec![0.0; d * d];
        let mut r2_hess = vec![0.0; d * d];
        let mut dcov = Vec::with_capacity(d);
        for i in 0..d {
            let (gp, gm) = (&self.plus[i], &self.minus[i]);
            let den = 2.0 * self.h[i];
            for (j, &fj) in self.free.iter().enumerate() {
                a_hess[j * d + i] = (gp.a_grad[fj] - gm.a_grad[fj]) / den;
                r2_hess[j * d + i] = (gp.r2_grad[fj] - gm.r2_grad[fj]) / den;
            }
            dcov.push(
                gp.sxx_inv
                    .iter()
                    .zip(&gm.sxx_inv)
                    .map(|(x, y)| sigma2 * (x - y) / den)
                    .collect(),
            );
        }
        symmetrise(&mut a_hess, d);
        symmetrise(&mut r2_hess, d);
        PieceDerivatives {
            c0,
            a_hess,
            r2_grad,
            r2_hess,
            dcov,
        }
    }
}

/// Replace a d×d row-major matrix by the mean of it and its transpose.
pub(super) fn symmetrise(m: &mut [f64], d: usize) {
    for i in 0..d {
        for j in 0..i {
            let v = 0.5 * (m[i * d + j] + m[j * d + i]);
            m[i * d + j] = v;
            m[j * d + i] = v;
        }
    }
}

/// The deviance Hessian over φ = (θ_free, σ²), its inverse (×2) and the
/// derivatives of cov(β̂), for Satterthwaite df. The θ-derivatives of the
/// pieces are central differences; the σ² derivatives are exact, since
/// D(θ, σ²) = A(θ) + ν log(2πσ²) + r²(θ)/σ². Returns the sensitivity with the
/// number of evaluations, and the smallest eigenvalue of the θ_free block.
pub(super) fn sensitivity(
    cp: &CrossProducts,
    theta: &[f64],
    theta_scale: &[f64],
    free: &[usize],
    method: Method,
    sigma2: f64,
    kept: Option<Stencil>,
) -> ((VarianceSensitivity, usize), Option<f64>) {
    let (n, p, d) = (cp.n, cp.p, free.len());
    let mut evals = 0usize;
    let h = stencil_steps(theta, theta_scale, free);
    let stencil = kept.or_else(|| {
        criterion::has_gradient(cp)
            .then(|| Stencil::new(cp, theta, free, &h, method, &mut evals, None))
            .flatten()
    });
    let derivs = match stencil {
        Some(st) => Some(st.derivatives(sigma2)),
        None => piece_derivatives(cp, theta, free, &h, method, sigma2, &mut evals),
    };
    let (sens, min_curvature) = from_derivatives(derivs, n, p, d, method, sigma2);
    ((sens, evals), min_curvature)
}

/// The deviance Hessian over φ = (θ_free, σ²), its inverse (×2) and the
/// derivatives of cov(β̂) from the pieces' derivatives (unknown when there
/// are none), with the smallest eigenvalue of the θ_free block.
pub(super) fn from_derivatives(
    derivs: Option<PieceDerivatives>,
    n: usize,
    p: usize,
    d: usize,
    method: Method,
    sigma2: f64,
) -> (VarianceSensitivity, Option<f64>) {
    let k = d + 1;
    let nu = match method {
        Method::Reml => (n - p) as f64,
        Method::Ml => n as f64,
    };
    let Some(derivs) = derivs else {
        return (VarianceSensitivity::unknown(k, p), None);
    };
    let PieceDerivatives {
        c0,
        a_hess,
        r2_grad,
        r2_hess,
        mut dcov,
    } = derivs;
    let r2 = sigma2 * nu;
    let s2 = sigma2 * sigma2;
    let mut hess = vec![0.0; k * k];
    for i in 0..d {
        for j in 0..d {
            hess[i * k + j] = a_hess[i * d + j] + r2_hess[i * d + j] / sigma2;
        }
        let v = -r2_grad[i] / s2;
        hess[i * k + d] = v;
        hess[d * k + i] = v;
    }
    hess[d * k + d] = -nu / s2 + 2.0 * r2 / (s2 * sigma2);
    // ∂cov(β̂)/∂σ² = cov(β̂)/σ² exactly.
    dcov.push(c0.iter().map(|v| v / sigma2).collect());
    let hm = Mat::from_fn(k, k, |i, j| hess[i * k + j]);
    let min_curvature = if d > 0 {
        let sub = Mat::from_fn(d, d, |i, j| hess[i * k + j]);
        sub.self_adjoint_eigenvalues(faer::Side::Lower)
            .ok()
            .and_then(|e| e.into_iter().reduce(f64::min))
    } else {
        None
    };
    let acov = match hm.llt(faer::Side::Lower) {
        Ok(llt) => {
            use faer::linalg::solvers::DenseSolveCore;
            let inv = llt.inverse();
            (0..k * k).map(|i| 2.0 * inv[(i / k, i % k)]).collect()
        }
        Err(_) => vec![f64::NAN; k * k],
    };
    (VarianceSensitivity { acov, dcov }, min_curvature)
}
