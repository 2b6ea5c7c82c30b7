//! The expected Fisher information of a design for the fixed effects, given
//! the assumed variance components and missingness, and Wald power from it.
//!
//! Each participant contributes Xᵢᵀ Vᵢ⁻¹ Xᵢ with Vᵢ = Zᵢ G Zᵢᵀ + σ² I over the
//! waves they are seen at. braid averages that over the patterns of
//! monotone dropout and intermittent missed waves (exactly: every pattern
//! with its probability) and over the spread of entry ages (5-point
//! Gauss–Legendre). A cluster intercept of variance τ² is added by
//! Woodbury's identity with every cluster's participants replaced by the
//! average participant: a cluster of m takes away
//! m² ū ūᵀ / (1/τ² + m s̄), with ū = E[Xᵢᵀ Vᵢ⁻¹ 1] and s̄ = E[1ᵀ Vᵢ⁻¹ 1]
//! (exact when every participant has the same pattern). Timing jitter is
//! left out: it moves ages by a few weeks. Derivation: notes/plan.md.

use faer::Mat;

use super::{Candidate, Population};
use crate::infer::hypothesis::chi2_sf;

/// Nodes and weights of 5-point Gauss–Legendre quadrature on [−1, 1]
/// (Abramowitz & Stegun 1964, table 25.4).
const LEGENDRE_5: [(f64, f64); 5] = [
    (-0.906_179_845_938_664, 0.236_926_885_056_189_1),
    (-0.538_469_310_105_683_1, 0.478_628_670_499_366_5),
    (0.0, 0.568_888_888_888_888_9),
    (0.538_469_310_105_683_1, 0.478_628_670_499_366_5),
    (0.906_179_845_938_664, 0.236_926_885_056_189_1),
];

/// One cohort's expected contribution per participant.
#[derive(Debug, Clone)]
struct PerParticipant {
    /// E[Xᵀ V⁻¹ X], p × p row-major.
    a: Vec<f64>,
    /// E[Xᵀ V⁻¹ 1].
    u: Vec<f64>,
    /// E[1ᵀ V⁻¹ 1].
    s: f64,
}

/// A design's expected information, per cohort and per participant, from
/// which the information at any n follows.
#[derive(Debug, Clone)]
pub struct Expected {
    /// Names of the fixed effects: intercept, age terms, retest.
    pub names: Vec<String>,
    cohorts: Vec<PerParticipant>,
    /// Mean of the retest column over assessments (the fit's reference
    /// value for the mean curve), when there is one.
    pub retest_mean: Option<f64>,
    center: f64,
    degree: usize,
    sd_cluster: f64,
}

/// A fixed-effect covariance from the expected information.
#[derive(Debug, Clone)]
pub struct Covariance {
    p: usize,
    m: Vec<f64>,
}

impl Covariance {
    /// The variance of the contrast cᵀβ.
    pub fn var(&self, c: &[f64]) -> f64 {
        let mut acc = 0.0;
        for i in 0..self.p {
            for j in 0..self.p {
                acc += c[i] * self.m[i * self.p + j] * c[j];
            }
        }
        acc
    }

    /// The SE of the contrast cᵀβ.
    pub fn se(&self, c: &[f64]) -> f64 {
        self.var(c).max(0.0).sqrt()
    }

    /// The SE of coefficient `k`.
    pub fn se_of(&self, k: usize) -> f64 {
        self.m[k * self.p + k].max(0.0).sqrt()
    }
}

impl Expected {
    /// The expectations of a design under a population.
    pub fn new(design: &Candidate, population: &Population) -> Expected {
        let degree = population.degree();
        let with_retest = population.retest != 0.0 && design.wave_times.len() > 1;
        let mut names = vec!["intercept".to_string(), "age".to_string()];
        names.extend((2..=degree).map(|k| format!("age^{k}")));
        if with_retest {
            names.push("retest".into());
        }
        let p = names.len();
        let g = [
            population.sd_intercept.powi(2),
            population.correlation * population.sd_intercept * population.sd_slope,
            population.sd_slope.powi(2),
        ];
        let sigma2 = population.sd_residual.powi(2);
        let nodes: Vec<(f64, f64)> = if design.age_spread > 0.0 {
            LEGENDRE_5
                .iter()
                .map(|&(x, w)| (x * design.age_spread / 2.0, w / 2.0))
                .collect()
        } else {
            vec![(0.0, 1.0)]
        };
        let patterns = patterns(design);
        let cohorts = design
            .entry_ages
            .iter()
            .map(|&entry| {
                let mut acc = PerParticipant {
                    a: vec![0.0; p * p],
                    u: vec![0.0; p],
                    s: 0.0,
                };
                for &(shift, weight) in &nodes {
                    for (waves, prob) in &patterns {
                        let rows: Vec<(f64, bool)> = waves
                            .iter()
                            .enumerate()
                            .map(|(k, &w)| (entry + shift + design.wave_times[w], k > 0))
                            .collect();
                        add_pattern(
                            &mut acc,
                            &rows,
                            weight * prob,
                            population.center,
                            degree,
                            with_retest,
                            &g,
                            sigma2,
                        );
                    }
                }
                acc
            })
            .collect();
        let retest_mean = with_retest.then(|| {
            let probs = design.wave_probabilities();
            let total: f64 = probs.iter().sum();
            (total - 1.0) / total
        });
        Expected {
            names,
            cohorts,
            retest_mean,
            center: population.center,
            degree,
            sd_cluster: population.sd_cluster,
        }
    }

    /// Number of fixed effects of the analysis model.
    pub fn p(&self) -> usize {
        self.names.len()
    }

    /// The information with `n` per cohort and `clusters` clusters (0:
    /// none), with a level column per cohort after the first when
    /// `with_cohorts`.
    fn information(&self, n: usize, clusters: usize, with_cohorts: bool) -> Mat<f64> {
        let p = self.p();
        let kc = if with_cohorts { self.cohorts.len() - 1 } else { 0 };
        let q = p + kc;
        let nf = n as f64;
        let mut info = Mat::<f64>::zeros(q, q);
        // w_c: the participant's E[X_augᵀ V⁻¹ 1].
        let mut w_bar = vec![0.0; q];
        let mut s_bar = 0.0;
        let share = 1.0 / self.cohorts.len() as f64;
        for (c, pp) in self.cohorts.iter().enumerate() {
            for i in 0..p {
                for j in 0..p {
                    info[(i, j)] += nf * pp.a[i * p + j];
                }
            }
            if with_cohorts && c > 0 {
                let k = p + c - 1;
                for i in 0..p {
                    info[(i, k)] += nf * pp.u[i];
                    info[(k, i)] += nf * pp.u[i];
                }
                info[(k, k)] += nf * pp.s;
                w_bar[k] += share * pp.s;
            }
            for (w, u) in w_bar.iter_mut().zip(&pp.u) {
                *w += share * u;
            }
            s_bar += share * pp.s;
        }
        if clusters > 0 && self.sd_cluster > 0.0 {
            let k = clusters as f64;
            let m = nf * self.cohorts.len() as f64 / k;
            let scale = k * m * m / (1.0 / self.sd_cluster.powi(2) + m * s_bar);
            for i in 0..q {
                for j in 0..q {
                    info[(i, j)] -= scale * w_bar[i] * w_bar[j];
                }
            }
        }
        info
    }

    /// The fixed-effect covariance with `n` per cohort (None when the design
    /// does not identify the model).
    pub fn covariance(&self, n: usize, clusters: usize, with_cohorts: bool) -> Option<Covariance> {
        let info = self.information(n, clusters, with_cohorts);
        let inv = crate::stats::spd_inverse(&info)?;
        let q = info.nrows();
        let m: Vec<f64> = (0..q * q).map(|k| inv[(k / q, k % q)]).collect();
        m.iter().all(|v| v.is_finite()).then_some(Covariance { p: q, m })
    }

    /// The contrast giving the mean at `age` (retest at its mean, as the fit has it).
    pub fn mean_row(&self, age: f64) -> Vec<f64> {
        let a = age - self.center;
        let mut v: Vec<f64> = (0..=self.degree).map(|k| a.powi(k as i32)).collect();
        v.extend(self.retest_mean);
        v
    }

    /// The contrast giving the rate of change at `age`.
    pub fn rate_row(&self, age: f64) -> Vec<f64> {
        let a = age - self.center;
        let mut v: Vec<f64> = (0..=self.degree)
            .map(|k| if k == 0 { 0.0 } else { k as f64 * a.powi(k as i32 - 1) })
            .collect();
        v.extend(self.retest_mean.map(|_| 0.0));
        v
    }

    /// Wald power of the M1-vs-M0 level test with cohort offsets `delta`
    /// (per cohort, in entry order), from the information with cohort columns.
    pub fn level_power(&self, n: usize, clusters: usize, delta: &[f64], alpha: f64) -> Option<f64> {
        let cov = self.covariance(n, clusters, true)?;
        let p = self.p();
        let kc = self.cohorts.len() - 1;
        let d: Vec<f64> = (1..=kc).map(|c| delta[c] - delta[0]).collect();
        // λ = dᵀ [Cov_block]⁻¹ d.
        let mut block = Mat::<f64>::zeros(kc, kc);
        for i in 0..kc {
            for j in 0..kc {
                block[(i, j)] = cov.m[(p + i) * cov.p + p + j];
            }
        }
        let inv = crate::stats::spd_inverse(&block)?;
        let mut lambda = 0.0;
        for i in 0..kc {
            for j in 0..kc {
                lambda += d[i] * inv[(i, j)] * d[j];
            }
        }
        Some(noncentral_chi2_power(lambda, kc as f64, alpha))
    }
}

/// Every pattern of observed waves with its probability: wave 1 always,
/// monotone dropout after each wave, then each later wave missed
/// independently while in the study.
fn patterns(design: &Candidate) -> Vec<(Vec<usize>, f64)> {
    let w = design.wave_times.len();
    let (d, s) = (design.dropout, design.missed);
    let mut out = Vec::new();
    for last in 0..w {
        let stay = (1.0 - d).powi(last as i32) * if last + 1 < w { d } else { 1.0 };
        if stay == 0.0 {
            continue;
        }
        for mask in 0..(1usize << last) {
            let mut waves = vec![0];
            let mut prob = stay;
            for k in 1..=last {
                if mask & (1 << (k - 1)) != 0 {
                    waves.push(k);
                    prob *= 1.0 - s;
                } else {
                    prob *= s;
                }
            }
            if prob > 0.0 {
                out.push((waves, prob));
            }
        }
    }
    out
}

/// Add one pattern's Xᵀ V⁻¹ X, Xᵀ V⁻¹ 1 and 1ᵀ V⁻¹ 1, weighted.
#[allow(clippy::too_many_arguments)]
fn add_pattern(
    acc: &mut PerParticipant,
    rows: &[(f64, bool)],
    weight: f64,
    center: f64,
    degree: usize,
    with_retest: bool,
    g: &[f64; 3],
    sigma2: f64,
) {
    let k = rows.len();
    let p = acc.u.len();
    // V = Z G Zᵀ + σ² I with Z = [1, age − centre].
    let mut v = vec![0.0; k * k];
    for i in 0..k {
        let ai = rows[i].0 - center;
        for j in 0..k {
            let aj = rows[j].0 - center;
            v[i * k + j] = g[0] + g[1] * (ai + aj) + g[2] * ai * aj + if i == j { sigma2 } else { 0.0 };
        }
    }
    let Some(l) = crate::stats::small_cholesky(&v, k) else {
        return;
    };
    // Columns of X and the ones vector, each solved against V.
    let mut x = vec![0.0; k * p];
    for (i, &(age, later)) in rows.iter().enumerate() {
        let a = age - center;
        for d in 0..=degree {
            x[i * p + d] = a.powi(d as i32);
        }
        if with_retest {
            x[i * p + degree + 1] = f64::from(u8::from(later));
        }
    }
    let ones = vec![1.0; k];
    let vinv_1 = solve(&l, k, &ones);
    let mut vinv_x = vec![0.0; k * p];
    for c in 0..p {
        let col: Vec<f64> = (0..k).map(|i| x[i * p + c]).collect();
        let s = solve(&l, k, &col);
        for i in 0..k {
            vinv_x[i * p + c] = s[i];
        }
    }
    for a in 0..p {
        for b in 0..p {
            acc.a[a * p + b] += weight * (0..k).map(|i| x[i * p + a] * vinv_x[i * p + b]).sum::<f64>();
        }
        acc.u[a] += weight * (0..k).map(|i| x[i * p + a] * vinv_1[i]).sum::<f64>();
    }
    acc.s += weight * vinv_1.iter().sum::<f64>();
}

/// Solve (L Lᵀ) x = b.
fn solve(l: &[f64], k: usize, b: &[f64]) -> Vec<f64> {
    let mut y = vec![0.0; k];
    for i in 0..k {
        y[i] = (b[i] - (0..i).map(|m| l[i * k + m] * y[m]).sum::<f64>()) / l[i * k + i];
    }
    let mut x = vec![0.0; k];
    for i in (0..k).rev() {
        x[i] = (y[i] - (i + 1..k).map(|m| l[m * k + i] * x[m]).sum::<f64>()) / l[i * k + i];
    }
    x
}

/// Power of a two-sided Wald z test of an effect with standard error `se`:
/// Φ(|δ|/se − z) + Φ(−|δ|/se − z), z the upper α/2 point.
pub fn wald_power(effect: f64, se: f64, alpha: f64) -> f64 {
    use crate::infer::{t_cdf, t_quantile};
    // Infinite df: the standard normal.
    let z = t_quantile(1.0 - alpha / 2.0, f64::INFINITY);
    let r = effect.abs() / se;
    t_cdf(r - z, f64::INFINITY) + t_cdf(-r - z, f64::INFINITY)
}

/// Power of a χ²(df) test at level α when the statistic is noncentral χ²
/// with noncentrality λ: the Poisson mixture of central χ² tails
/// Σⱼ e^{−λ/2}(λ/2)ʲ/j! · P(χ²(df + 2j) > c) (Johnson, Kotz & Balakrishnan
/// 1995, ch. 29).
pub fn noncentral_chi2_power(lambda: f64, df: f64, alpha: f64) -> f64 {
    use statrs::distribution::{ChiSquared, ContinuousCDF};
    let Ok(central) = ChiSquared::new(df) else {
        return f64::NAN;
    };
    let crit = central.inverse_cdf(1.0 - alpha);
    let half = lambda / 2.0;
    let mut weight = (-half).exp();
    let mut total = 0.0;
    let mut mass = 0.0;
    for j in 0..100_000 {
        if j > 0 {
            weight *= half / j as f64;
        }
        total += weight * chi2_sf(crit, df + 2.0 * j as f64);
        mass += weight;
        if mass > 1.0 - 1e-14 || (j as f64 > half && weight < 1e-16) {
            break;
        }
    }
    total
}

#[cfg(test)]
mod tests {
    use super::*;

    // Closed form: the noncentral χ² with λ = 0 is the central one, so the
    // power is the level; with 1 df it is the two-sided z test of √λ.
    #[test]
    fn noncentral_power_meets_its_closed_forms() {
        assert!((noncentral_chi2_power(0.0, 3.0, 0.05) - 0.05).abs() < 1e-10);
        for lambda in [0.5_f64, 4.0, 10.0] {
            let z = wald_power(lambda.sqrt(), 1.0, 0.05);
            assert!((noncentral_chi2_power(lambda, 1.0, 0.05) - z).abs() < 1e-8, "{lambda}");
        }
    }

    // The patterns' probabilities sum to one.
    #[test]
    fn missingness_patterns_are_a_distribution() {
        let design = crate::plan::CandidateSpec {
            name: "d".into(),
            entry_ages: vec![10.0],
            cohorts: None,
            first_age: None,
            spacing: None,
            wave_times: vec![0.0, 1.0, 2.0, 3.5],
            waves: None,
            interval: None,
            per_cohort: None,
            dropout: 0.15,
            missed: 0.1,
            clusters: None,
            per_cluster: None,
            jitter: 0.0,
            age_spread: 0.0,
        }
        .resolve()
        .unwrap();
        let total: f64 = patterns(&design).iter().map(|(_, p)| p).sum();
        assert!((total - 1.0).abs() < 1e-12);
    }
}
