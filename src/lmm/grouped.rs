//! Random-effect covariances and residual variances that differ between
//! groups of the primary term's levels (cohorts, say, with each participant
//! in one cohort), while the fixed part and any other random term are shared.
//!
//! Group g has its own factor T_g and a row scale s_g (s₀ = 1): its rows'
//! residual variance is σ²/s_g². Scaling a group's rows by s_g turns the
//! model into one with a common residual variance σ², whose criterion the
//! engine already evaluates, and −2ℓ gains log|D| = −2 Σ_g n_g log s_g (the
//! Jacobian of the scaling; the same for ML and REML). Because a level lies in
//! one group, both changes act on its cross-products alone: with
//! M = s_g T_g, the level enters with `MᵀGᵢM`, `Mᵀ(s_g Zᵢᵀ[X y])` and
//! `Mᵀ(s_g Zᵢᵀ Z₂)` and the primary factor set to the identity, and the
//! dense part is Σ_g s_g² (its rows' part). The derivation is in
//! `notes/criterion.md`.

use std::cell::RefCell;

use super::criterion::grouped::{GroupedTheta, grouped_gradient};
use super::crossprod::CrossProducts;
use super::fit::RandomComponent;
use super::optimize::{self, OptimOptions};
use super::solution::factor_covariance;
use super::start::{base_start, row_scales};
use super::{Method, MixedProblem, Subspace, criterion, unpack_factor};
use crate::error::{Error, Result};

/// The group of each row; every level of the primary term must lie in one.
#[derive(Debug, Clone)]
pub struct Grouping {
    /// Group labels, in group-index order (the first is the reference).
    pub names: Vec<String>,
    /// Group index of each row.
    pub of_row: Vec<u32>,
}

/// One group's estimates.
#[derive(Debug, Clone)]
pub struct GroupComponent {
    /// The group's label.
    pub group: String,
    /// Levels of the primary term in the group.
    pub n_levels: usize,
    /// Rows in the group.
    pub n_obs: usize,
    /// Covariance of the primary term's coefficients in this group.
    pub covariance: Vec<Vec<f64>>,
    /// Their standard deviations.
    pub sd: Vec<f64>,
    /// The group's residual variance.
    pub residual_variance: f64,
}

/// A fit with group-specific covariances and residual variances.
#[derive(Debug, Clone)]
pub struct GroupedFit {
    /// REML or ML.
    pub method: Method,
    /// The maximised log-likelihood (REML or ML).
    pub loglik: f64,
    /// Fixed effects plus covariance parameters plus residual variances.
    pub n_params: usize,
    /// The primary term's factor name.
    pub factor: String,
    /// The primary term's coefficient names.
    pub terms: Vec<String>,
    /// Per group.
    pub groups: Vec<GroupComponent>,
    /// The other random terms, shared by all groups.
    pub others: Vec<RandomComponent>,
    /// Whether the search stopped at a small gradient.
    pub converged: bool,
    /// Evaluations of the criterion.
    pub evaluations: usize,
}

/// The search stops after two steps that each improve the deviance by less
/// than this.
const GROUPED_VALUE_TOLERANCE: f64 = 1e-8;

/// The fitted parameters φ = (T_g per group, other terms' θ, s₁..s_{G−1}).
struct Layout {
    k1: usize,
    nt1: usize,
    q1: usize,
    n_groups: usize,
    /// Per primary level, its group.
    level_group: Vec<u32>,
    /// Rows per group.
    n_rows: Vec<usize>,
}

impl Layout {
    fn n_phi(&self, cp: &CrossProducts) -> usize {
        let others: usize = (0..cp.term_q.len())
            .filter(|&k| k != self.k1)
            .map(|k| cp.term_q[k] * (cp.term_q[k] + 1) / 2)
            .sum();
        self.n_groups * self.nt1 + others + self.n_groups - 1
    }

    /// The engine's θ for the transformed problem: the primary factor is the
    /// identity, the other terms' entries come from φ.
    fn engine_theta(&self, cp: &CrossProducts, phi: &[f64]) -> Vec<f64> {
        let mut theta = Vec::new();
        let mut at = self.n_groups * self.nt1;
        for (k, &q) in cp.term_q.iter().enumerate() {
            let nt = q * (q + 1) / 2;
            if k == self.k1 {
                for j in 0..q {
                    for i in j..q {
                        theta.push(if i == j { 1.0 } else { 0.0 });
                    }
                }
            } else {
                theta.extend_from_slice(&phi[at..at + nt]);
                at += nt;
            }
        }
        theta
    }

    fn scales(&self, phi: &[f64]) -> Vec<f64> {
        let start = phi.len() - (self.n_groups - 1);
        std::iter::once(1.0).chain(phi[start..].iter().copied()).collect()
    }

    fn factor(&self, phi: &[f64], g: usize) -> Vec<f64> {
        unpack_factor(&phi[g * self.nt1..(g + 1) * self.nt1], self.q1)
    }

    /// The deviance and its gradient in φ by the analytic kernel, `None`
    /// where it does not apply or fails.
    fn gradient(&self, base: &CrossProducts, phi: &[f64], method: Method) -> Option<(f64, Vec<f64>)> {
        let theta = self.engine_theta(base, phi);
        let at = GroupedTheta {
            level_group: &self.level_group,
            factor_theta: (0..self.n_groups)
                .map(|g| &phi[g * self.nt1..(g + 1) * self.nt1])
                .collect(),
            scale: self.scales(phi),
            n_rows: &self.n_rows,
            theta,
        };
        let e = grouped_gradient(base, &at, method)?;
        let mut grad: Vec<f64> = e.d_factor.concat();
        for (k, &q) in base.term_q.iter().enumerate().filter(|(k, _)| *k != self.k1) {
            let off = base.theta_offset[k];
            grad.extend_from_slice(&e.d_theta[off..off + q * (q + 1) / 2]);
        }
        grad.extend_from_slice(&e.d_scale[1..]);
        Some((e.deviance, grad))
    }
}

/// Overwrite `out`'s per-level and dense cross-products with those of the
/// transformed problem at φ; returns log|D|.
fn transform(base: &CrossProducts, out: &mut CrossProducts, lay: &Layout, phi: &[f64]) -> f64 {
    let q = lay.q1;
    let c1 = base.p + 1;
    let s = lay.scales(phi);
    let t: Vec<Vec<f64>> = (0..lay.n_groups).map(|g| lay.factor(phi, g)).collect();
    let mut mm = vec![0.0; q * q];
    let mut tmp = vec![0.0; q * q];
    for i in 0..base.n1 {
        let g = lay.level_group[i] as usize;
        let sg = s[g];
        for (v, tv) in mm.iter_mut().zip(&t[g]) {
            *v = sg * tv;
        }
        // G' = Mᵀ G M.
        let gi = &base.g[i * q * q..(i + 1) * q * q];
        for r in 0..q {
            for c in 0..q {
                tmp[r * q + c] = (0..q).map(|k| gi[r * q + k] * mm[k * q + c]).sum();
            }
        }
        let go = &mut out.g[i * q * q..(i + 1) * q * q];
        for r in 0..q {
            for c in 0..q {
                go[r * q + c] = (0..q).map(|k| mm[k * q + r] * tmp[k * q + c]).sum();
            }
        }
        // Zᵢᵀ[X y] and the links: Mᵀ (s · block).
        let zi = &base.zxy[i * q * c1..(i + 1) * q * c1];
        let zo = &mut out.zxy[i * q * c1..(i + 1) * q * c1];
        for r in 0..q {
            for c in 0..c1 {
                zo[r * c1 + c] = sg * (0..q).map(|k| mm[k * q + r] * zi[k * c1 + c]).sum::<f64>();
            }
        }
        let (lo, hi) = base.link_range(i);
        for link in &base.links[lo..hi] {
            let qs = base.term_q[base.secondary[link.secondary()]];
            let v = &base.link_values[link.start()..link.start() + q * qs];
            let vo = &mut out.link_values[link.start()..link.start() + q * qs];
            for r in 0..q {
                for c in 0..qs {
                    vo[r * qs + c] = sg * (0..q).map(|k| mm[k * q + r] * v[k * qs + c]).sum::<f64>();
                }
            }
        }
    }
    out.dense.iter_mut().for_each(|v| *v = 0.0);
    for (g, d) in base.dense_groups.iter().enumerate() {
        let w = s[g] * s[g];
        out.dense.iter_mut().zip(d).for_each(|(a, b)| *a += w * b);
    }
    -2.0 * lay
        .n_rows
        .iter()
        .zip(&s)
        .map(|(&n, &sg)| n as f64 * sg.ln())
        .sum::<f64>()
}

impl Layout {
    /// The layout of the groups over the primary term's levels; each level
    /// must lie in one group and each group must have rows.
    fn new(base: &CrossProducts, k1: usize, term: &super::RandomTermData, grouping: &Grouping) -> Result<Layout> {
        let n_groups = grouping.names.len();
        let mut level_group = vec![u32::MAX; base.n1];
        let mut n_rows = vec![0usize; n_groups];
        for (r, &g) in grouping.of_row.iter().enumerate() {
            let l = term.level[r] as usize;
            n_rows[g as usize] += 1;
            if level_group[l] == u32::MAX {
                level_group[l] = g;
            } else if level_group[l] != g {
                return Err(spec_error(format!(
                    "'{}' level '{}' has rows in groups '{}' and '{}'; each level must lie in one group",
                    term.factor,
                    term.level_names[l],
                    grouping.names[level_group[l] as usize],
                    grouping.names[g as usize]
                )));
            }
        }
        if let Some(g) = n_rows.iter().position(|&c| c == 0) {
            return Err(spec_error(format!("group '{}' has no rows", grouping.names[g])));
        }
        level_group.iter_mut().filter(|g| **g == u32::MAX).for_each(|g| *g = 0);
        let q1 = base.q1;
        let nt1 = q1 * (q1 + 1) / 2;
        let lay = Layout {
            k1,
            nt1,
            q1,
            n_groups,
            level_group,
            n_rows,
        };
        Ok(lay)
    }
}

/// The start (the shared estimate, or `start`), lower bounds and search
/// scales of φ, term by term as the plain fit does: the primary term's
/// parameters once per group, the other terms', then a residual scale per
/// group after the first.
fn start_bounds_scales(
    problem: &MixedProblem,
    base: &CrossProducts,
    lay: &Layout,
    start: Option<&[f64]>,
) -> (Vec<f64>, Vec<f64>, Vec<f64>) {
    let (k1, nt1, n_groups) = (lay.k1, lay.nt1, lay.n_groups);
    let n_phi = lay.n_phi(base);
    let shared = start.map(<[f64]>::to_vec).unwrap_or_else(|| base_start(problem));
    let plain_scale = row_scales(problem, &base_start(problem));
    let mut phi0 = Vec::with_capacity(n_phi);
    let mut lower = Vec::with_capacity(n_phi);
    let mut scale = Vec::with_capacity(n_phi);
    let lower_plain = problem.theta_lower();
    let off1 = base.theta_offset[k1];
    for _ in 0..n_groups {
        phi0.extend_from_slice(&shared[off1..off1 + nt1]);
        lower.extend_from_slice(&lower_plain[off1..off1 + nt1]);
        scale.extend_from_slice(&plain_scale[off1..off1 + nt1]);
    }
    for (k, &q) in base.term_q.iter().enumerate().filter(|(k, _)| *k != k1) {
        let off = base.theta_offset[k];
        let nt = q * (q + 1) / 2;
        phi0.extend_from_slice(&shared[off..off + nt]);
        lower.extend_from_slice(&lower_plain[off..off + nt]);
        scale.extend_from_slice(&plain_scale[off..off + nt]);
    }
    for _ in 1..n_groups {
        phi0.push(1.0);
        lower.push(0.0);
        scale.push(1.0);
    }
    (phi0, lower, scale)
}

/// The estimated entries of φ: the primary term's estimated θ entries once
/// per group, the other terms' estimated entries, and every residual scale.
fn phi_subspace(problem: &MixedProblem, k1: usize, n_groups: usize, n_phi: usize) -> Subspace {
    let mut estimated: Vec<bool> = Vec::with_capacity(n_phi);
    for _ in 0..n_groups {
        estimated.extend(problem.terms[k1].estimated());
    }
    for (_, t) in problem.terms.iter().enumerate().filter(|(k, _)| *k != k1) {
        estimated.extend(t.estimated());
    }
    estimated.resize(n_phi, true);
    let index = estimated
        .iter()
        .enumerate()
        .filter_map(|(k, &e)| e.then_some(k))
        .collect();
    Subspace::new(index, n_phi)
}

fn spec_error(message: String) -> Error {
    Error::Spec {
        parameter: "groups".into(),
        message,
    }
}

/// Fit `problem` with the primary term's covariance and the residual
/// variance specific to each group of `grouping`. `start` is the θ of the
/// same model with shared parameters (its fit is the natural start: every
/// group begins at the shared estimate).
///
/// # Errors
/// [`Error::Spec`] when there is no random term, a level of the primary term
/// has rows in two groups, or a group has no rows.
pub fn fit_grouped(
    problem: &MixedProblem,
    grouping: &Grouping,
    method: Method,
    start: Option<&[f64]>,
) -> Result<GroupedFit> {
    let n_groups = grouping.names.len();
    if grouping.of_row.len() != problem.n() || n_groups == 0 {
        return Err(spec_error("one group per row is needed".into()));
    }
    let base = CrossProducts::with_row_groups(problem, &grouping.of_row, n_groups);
    let Some(k1) = base.primary else {
        return Err(spec_error("group-specific covariances need a random term".into()));
    };
    let term = &problem.terms[k1];
    let lay = Layout::new(&base, k1, term, grouping)?;
    let q1 = lay.q1;
    let n_phi = lay.n_phi(&base);

    let (phi0, lower, scale) = start_bounds_scales(problem, &base, &lay, start);
    let work = RefCell::new(base.clone());
    let (n, p) = (problem.n(), problem.p());
    let deviance_at = |phi: &[f64]| -> f64 {
        if lay.scales(phi).iter().any(|&s| s <= 0.0) {
            return f64::INFINITY;
        }
        let mut cp = work.borrow_mut();
        let logdet_r = transform(&base, &mut cp, &lay, phi);
        match criterion::evaluate(&cp, &lay.engine_theta(&cp, phi), false) {
            Ok(f) => f.pieces.profiled_deviance(method, n, p) + logdet_r,
            Err(_) => f64::INFINITY,
        }
    };
    // The search runs over φ's estimated entries: a diagonal structure
    // holds the entries off a factor's diagonal at zero, in every group.
    let sub = phi_subspace(problem, k1, n_groups, n_phi);
    let scale_sub = sub.reduce(&scale);
    let unscale = |x: &[f64]| -> Vec<f64> {
        let phi: Vec<f64> = x.iter().zip(&scale_sub).map(|(a, s)| a * s).collect();
        sub.expand(&phi)
    };
    let sdev = |x: &[f64]| deviance_at(&unscale(x));
    let start_x: Vec<f64> = sub.reduce(&phi0).iter().zip(&scale_sub).map(|(a, s)| a / s).collect();
    if !sdev(&start_x).is_finite() {
        return Err(Error::Numerical {
            step: "group-specific start".into(),
            message: "the criterion cannot be evaluated at the shared estimate".into(),
        });
    }
    // A quasi-Newton search. Where the grouped kernel applies (a primary
    // term of 1 to 4 coefficients, other terms beside it) it uses the analytic
    // gradient (notes/criterion.md, "Grouped levels: the analytic
    // gradient"), its first inverse Hessian from differences of gradients,
    // and stops on the Newton decrement; elsewhere forward-difference
    // gradients and the value test. There is no Newton finish: a
    // likelihood-ratio statistic needs the optimum's value, which the search
    // reaches to about 1e-6 (tests/suite/grouped.rs checks it against the
    // separable case).
    let sgrad = |x: &[f64]| -> Option<(f64, Vec<f64>)> {
        let (d, g) = lay.gradient(&base, &unscale(x), method)?;
        Some((d, sub.reduce(&g).iter().zip(&scale_sub).map(|(a, s)| a * s).collect()))
    };
    let analytic: &optimize::GradientFn = &sgrad;
    let found = optimize::minimize_with(
        sdev,
        criterion::grouped::applies(&base).then_some(analytic),
        &start_x,
        &sub.reduce(&lower),
        OptimOptions {
            value_tolerance: GROUPED_VALUE_TOLERANCE,
            decrement_tolerance: Some(super::fit::NEWTON_DECREMENT_TOLERANCE),
            ..OptimOptions::default()
        },
    );
    let evaluations = found.evaluations;
    let phi = unscale(&found.x);
    let deviance = found.value;
    let converged = found.converged;

    // σ² (the reference group's residual variance) from the final pieces.
    let mut cp = work.borrow_mut();
    transform(&base, &mut cp, &lay, &phi);
    let theta_engine = lay.engine_theta(&cp, &phi);
    let factor = criterion::evaluate(&cp, &theta_engine, false).map_err(|_| Error::Numerical {
        step: "group-specific fit".into(),
        message: "the criterion failed at the optimum; please report this with the data shape".into(),
    })?;
    let sigma2 = factor.pieces.sigma2(method, n, p);
    let s = lay.scales(&phi);
    let mut levels_in = vec![0usize; n_groups];
    for &g in &lay.level_group {
        levels_in[g as usize] += 1;
    }
    let groups = (0..n_groups)
        .map(|g| {
            let covariance = factor_covariance(&lay.factor(&phi, g), q1, sigma2);
            GroupComponent {
                group: grouping.names[g].clone(),
                n_levels: levels_in[g],
                n_obs: lay.n_rows[g],
                sd: (0..q1).map(|i| covariance[i][i].max(0.0).sqrt()).collect(),
                covariance,
                residual_variance: sigma2 / (s[g] * s[g]),
            }
        })
        .collect();
    let others = problem
        .terms
        .iter()
        .enumerate()
        .filter(|(k, _)| *k != k1)
        .map(|(k, t)| {
            let q = t.q();
            let off = base.theta_offset[k];
            RandomComponent::from_factor(t, &unpack_factor(&theta_engine[off..off + q * (q + 1) / 2], q), sigma2)
        })
        .collect();
    Ok(GroupedFit {
        method,
        loglik: -deviance / 2.0,
        n_params: p + sub.dim() + 1,
        factor: term.factor.clone(),
        terms: term.columns.clone(),
        groups,
        others,
        converged,
        evaluations,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::lmm::RandomTermData;
    use crate::simulate::Rng;

    /// Three groups of participants with an intercept and a slope each, a
    /// school intercept (and with `slope` a school slope) crossing the
    /// groups, and a covariate column that is zero outside the first group.
    fn problem(schools: usize, slope: bool) -> (MixedProblem, Grouping) {
        let mut rng = Rng::new(17);
        let (mut x, mut y, mut z1, mut level, mut school, mut group) = (vec![], vec![], vec![], vec![], vec![], vec![]);
        let per = 30;
        for c in 0..3usize {
            for i in 0..per {
                let id = c * per + i;
                let (b0, b1) = ((1.0 + c as f64) * rng.normal(), 0.4 * rng.normal());
                for w in 0..4 {
                    let a = c as f64 + w as f64 + 0.3 * rng.uniform() - 3.0;
                    x.extend([1.0, a, if c == 0 { a * a } else { 0.0 }]);
                    y.push(5.0 + a + b0 + b1 * a + (0.5 + c as f64) * rng.normal() + (id % 5) as f64 * 0.3);
                    z1.push(a);
                    level.push(id as u32);
                    school.push((id % schools.max(1)) as u32);
                    group.push(c as u32);
                }
            }
        }
        let n = y.len();
        let mut terms = vec![RandomTermData {
            factor: "id".into(),
            level_names: (0..3 * per).map(|i| i.to_string()).collect(),
            level: level.into(),
            columns: vec!["intercept".into(), "a".into()],
            z: vec![vec![1.0; n].into(), z1.into()],
            covariance: Default::default(),
        }];
        if schools > 0 {
            let (columns, z) = if slope {
                (vec!["intercept", "a"], vec![vec![1.0; n], terms[0].z[1].to_vec(n)])
            } else {
                (vec!["intercept"], vec![vec![1.0; n]])
            };
            terms.push(RandomTermData::numbered("school", schools, school, &columns, z));
        }
        let grouping = Grouping {
            names: vec!["a".into(), "b".into(), "c".into()],
            of_row: group,
        };
        (
            MixedProblem {
                y: y.into(),
                x_names: vec!["1".into(), "a".into(), "a2".into()],
                x: x.into(),
                terms,
            },
            grouping,
        )
    }

    // The analytic gradient of the grouped deviance against central
    // differences of the deviance of the transformed cross-products (two
    // codings of one criterion; closed-form identity: they agree to the
    // differences' truncation), by REML and ML, with and without a school
    // term, with a school θ at 0 as well, and with a correlated school slope.
    #[test]
    fn grouped_gradient_matches_central_differences_of_the_transformed_criterion() {
        for (schools, slope) in [(0, false), (6, false), (6, true)] {
            let (problem, grouping) = problem(schools, slope);
            let base = CrossProducts::with_row_groups(&problem, &grouping.of_row, 3);
            let k1 = base.primary.unwrap();
            let lay = Layout::new(&base, k1, &problem.terms[k1], &grouping).unwrap();
            let (n, p) = (problem.n(), problem.p());
            let work = RefCell::new(base.clone());
            for method in [Method::Reml, Method::Ml] {
                let dev = |phi: &[f64]| {
                    let mut cp = work.borrow_mut();
                    let logdet_r = transform(&base, &mut cp, &lay, phi);
                    criterion::evaluate(&cp, &lay.engine_theta(&cp, phi), false)
                        .unwrap()
                        .pieces
                        .profiled_deviance(method, n, p)
                        + logdet_r
                };
                let mut points = vec![vec![1.2, 0.1, 0.3, 0.8, -0.2, 0.5, 1.5, 0.05, 0.2]];
                if slope {
                    points[0].extend([0.6, 0.1, 0.3]);
                } else if schools > 0 {
                    points[0].push(0.6);
                    let mut at_zero = points[0].clone();
                    at_zero[9] = 0.0;
                    points.push(at_zero);
                }
                for pt in &mut points {
                    pt.extend([1.4, 0.7]);
                }
                for phi in points {
                    let (d, g) = lay.gradient(&base, &phi, method).unwrap();
                    assert!((d - dev(&phi)).abs() < 1e-9 * d.abs(), "{d} vs {}", dev(&phi));
                    for k in 0..phi.len() {
                        if phi[k] == 0.0 {
                            continue;
                        }
                        let h = 1e-5;
                        let (mut up, mut down) = (phi.clone(), phi.clone());
                        up[k] += h;
                        down[k] -= h;
                        let fd = (dev(&up) - dev(&down)) / (2.0 * h);
                        assert!(
                            (g[k] - fd).abs() < 1e-5 * (1.0 + fd.abs()),
                            "schools {schools} {method:?} φ{k}: {} vs {fd}",
                            g[k]
                        );
                    }
                }
            }
        }
    }
}
