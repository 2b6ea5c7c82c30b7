//! Cohort differences at shared ages: for each pair of neighbouring cohorts,
//! the later minus the earlier cohort's mean under M2 at evenly spaced ages
//! inside their overlap, with pointwise and simultaneous (max-|z|) intervals,
//! Holm-adjusted p-values and two one-sided equivalence tests.

use serde::Serialize;

use crate::design::Overlap;
use crate::infer::hypothesis::holm;
use crate::infer::{self, Contrast, LEVEL};
use crate::lmm::Fit;
use crate::spec::ModelFrame;

/// Draws for the simultaneous critical value (max-|z| over the shared ages).
const SIMULTANEOUS_DRAWS: usize = 20_000;

/// Seed of those draws, fixed so that reports are reproducible.
pub const SIMULTANEOUS_SEED: u64 = 1953;

/// The difference between two neighbouring cohorts' predicted means at one
/// shared age (later cohort minus earlier), from the REML fit of M2.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct SharedAge {
    /// The younger cohort of the pair.
    pub cohort_a: String,
    /// The older cohort.
    pub cohort_b: String,
    /// Age.
    pub age: f64,
    /// Mean of cohort b minus mean of cohort a.
    pub difference: f64,
    /// Its standard error.
    pub se: f64,
    /// Satterthwaite df.
    pub df: f64,
    /// Pointwise 95% interval.
    pub lower: f64,
    /// Pointwise 95% interval.
    pub upper: f64,
    /// Simultaneous 95% interval over all shared ages (max-|z| critical value).
    pub lower_simultaneous: f64,
    /// Simultaneous 95% interval over all shared ages.
    pub upper_simultaneous: f64,
    /// Two-sided p of no difference.
    pub p: f64,
    /// Holm-adjusted p over all shared ages.
    pub p_holm: f64,
    /// p of the two one-sided tests against ±margin (the larger of the two).
    pub p_equivalence: f64,
    /// Whether the difference lies within ±margin by the two one-sided tests
    /// at the 5% level (its 90% interval inside the margin).
    pub equivalent: bool,
}

/// The differences at `per_pair` shared ages of each linked pair, from the
/// REML fit of M2 (`m2r`), and the simultaneous critical value.
pub(super) fn differences(
    m2r: &Fit,
    frame: &ModelFrame,
    cohorts: &[String],
    linked: &[Overlap],
    per_pair: usize,
    margin: f64,
) -> (Vec<SharedAge>, f64) {
    let kc = cohorts.len() - 1;
    let index = |label: &str| cohorts.iter().position(|c| c == label);
    // Cohort-specific mean rows under M2.
    let row_of = |k: usize, age: f64| -> Vec<f64> {
        let mut v = frame.mean_row(age);
        let basis = frame.basis.eval(age);
        v.extend((1..=kc).map(|j| if j == k { 1.0 } else { 0.0 }));
        for j in 1..=kc {
            for b in &basis {
                v.push(if j == k { *b } else { 0.0 });
            }
        }
        v
    };
    let mut diffs: Vec<(String, String, f64, Vec<f64>, Contrast)> = Vec::new();
    for o in linked {
        let (Some(ka), Some(kb)) = (index(&o.cohort_a), index(&o.cohort_b)) else {
            continue;
        };
        let g = per_pair.max(1);
        for i in 0..g {
            let age = if g == 1 {
                (o.age_from + o.age_to) / 2.0
            } else {
                o.age_from + (o.age_to - o.age_from) * i as f64 / (g - 1) as f64
            };
            let c: Vec<f64> = row_of(kb, age)
                .iter()
                .zip(row_of(ka, age))
                .map(|(b, a)| b - a)
                .collect();
            let k = infer::contrast(m2r, &c);
            diffs.push((o.cohort_a.clone(), o.cohort_b.clone(), age, c, k));
        }
    }
    let crit = simultaneous_critical(m2r, &diffs.iter().map(|d| d.3.clone()).collect::<Vec<_>>());
    let p_raw: Vec<f64> = diffs.iter().map(|d| d.4.p_value()).collect();
    let p_adj = holm(&p_raw);
    let shared_ages: Vec<SharedAge> = diffs
        .iter()
        .zip(p_raw.iter().zip(&p_adj))
        .map(|((a, b, age, _, k), (&p, &ph))| {
            let (lower, upper) = k.interval();
            let t_lo = (k.estimate + margin) / k.se;
            let t_hi = (margin - k.estimate) / k.se;
            let p_lo = infer::t_sf(t_lo, k.df);
            let p_hi = infer::t_sf(t_hi, k.df);
            let p_equivalence = p_lo.max(p_hi);
            SharedAge {
                cohort_a: a.clone(),
                cohort_b: b.clone(),
                age: *age,
                difference: k.estimate,
                se: k.se,
                df: k.df,
                lower,
                upper,
                lower_simultaneous: k.estimate - crit * k.se,
                upper_simultaneous: k.estimate + crit * k.se,
                p,
                p_holm: ph,
                p_equivalence,
                equivalent: p_equivalence < 1.0 - LEVEL,
            }
        })
        .collect();
    (shared_ages, crit)
}

/// The 95% critical value of max |zᵢ| for the standardized differences,
/// z ~ N(0, R) with R their correlation under cov(β̂), by seeded simulation.
/// Falls back to Bonferroni when R cannot be decomposed.
fn simultaneous_critical(fit: &Fit, rows: &[Vec<f64>]) -> f64 {
    let m = rows.len();
    let p = fit.p();
    if m == 0 {
        return f64::NAN;
    }
    let cov = |a: &[f64], b: &[f64]| -> f64 {
        let mut acc = 0.0;
        for (i, ai) in a.iter().enumerate().filter(|(_, ai)| **ai != 0.0) {
            let row = &fit.cov_beta[i * p..(i + 1) * p];
            acc += ai * row.iter().zip(b).map(|(c, bj)| c * bj).sum::<f64>();
        }
        acc
    };
    let sd: Vec<f64> = rows.iter().map(|r| cov(r, r).max(0.0).sqrt()).collect();
    let corr = faer::Mat::from_fn(m, m, |i, j| cov(&rows[i], &rows[j]) / (sd[i] * sd[j]));
    let bonferroni = infer::t_quantile(1.0 - (1.0 - LEVEL) / (2.0 * m as f64), f64::INFINITY);
    let Ok(eig) = corr.self_adjoint_eigen(faer::Side::Lower) else {
        return bonferroni;
    };
    let s = eig.S().column_vector();
    let u = eig.U();
    let roots: Vec<f64> = (0..m).map(|k| s[k].max(0.0).sqrt()).collect();
    let mut rng = crate::simulate::Rng::new(SIMULTANEOUS_SEED);
    let mut maxima = Vec::with_capacity(SIMULTANEOUS_DRAWS);
    let mut e = vec![0.0; m];
    for _ in 0..SIMULTANEOUS_DRAWS {
        for (k, ek) in e.iter_mut().enumerate() {
            *ek = roots[k] * rng.normal();
        }
        let mut top: f64 = 0.0;
        for i in 0..m {
            let z: f64 = (0..m).map(|k| u[(i, k)] * e[k]).sum();
            top = top.max(z.abs());
        }
        maxima.push(top);
    }
    maxima.sort_by(f64::total_cmp);
    crate::spec::basis::quantile_sorted(&maxima, LEVEL)
}
