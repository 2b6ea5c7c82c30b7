//! Reliability of a set of keyed item responses: Cronbach's α with Feldt's
//! interval, standardized α, and each item's statistics.

use serde::Serialize;
use statrs::distribution::{ContinuousCDF, FisherSnedecor};

/// One item of a reliability table.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ItemStats {
    /// The item.
    pub item: String,
    /// Mean of the keyed responses of the respondents used.
    pub mean: f64,
    /// Their SD.
    pub sd: f64,
    /// Share of the group's rows where the item is blank.
    pub missing: f64,
    /// Correlation of the item with the sum of the other items.
    pub item_rest: f64,
    /// α of the other items.
    pub alpha_if_deleted: f64,
}

/// The reliability of one group of rows.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Reliability {
    /// The wave, for a per-wave or per-cohort × wave entry.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub wave: Option<String>,
    /// The cohort, for a per-cohort or per-cohort × wave entry.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub cohort: Option<String>,
    /// Respondents used: those who answered every item (listwise).
    pub n: usize,
    /// Rows in the group.
    pub n_rows: usize,
    /// Cronbach's α.
    pub alpha: f64,
    /// Lower end of Feldt's 95% interval.
    pub alpha_lower: f64,
    /// Upper end.
    pub alpha_upper: f64,
    /// α of the standardized items: k·r̄ / (1 + (k − 1)·r̄).
    pub alpha_standardized: f64,
    /// Each item.
    pub items: Vec<ItemStats>,
    /// Items with no variance among the respondents used.
    pub constant_items: Vec<String>,
    /// McDonald's ω_total from the one-factor model (without constant items).
    pub omega: Option<f64>,
    /// The one-factor ML model behind ω: loadings and fit.
    pub one_factor: Option<super::factor::OneFactor>,
}

/// Sample covariance matrix (divisor n − 1) of complete rows.
fn covariance(rows: &[&[f64]], k: usize) -> (Vec<f64>, Vec<f64>) {
    let n = rows.len() as f64;
    let mean: Vec<f64> = (0..k).map(|j| rows.iter().map(|r| r[j]).sum::<f64>() / n).collect();
    let mut c = vec![0.0; k * k];
    for r in rows {
        for a in 0..k {
            let da = r[a] - mean[a];
            for b in a..k {
                c[a * k + b] += da * (r[b] - mean[b]);
            }
        }
    }
    for a in 0..k {
        for b in a..k {
            c[a * k + b] /= n - 1.0;
            c[b * k + a] = c[a * k + b];
        }
    }
    (mean, c)
}

/// Cronbach's α of the items in `keep` from the covariance matrix.
fn alpha_of(c: &[f64], k: usize, keep: &[usize]) -> f64 {
    let m = keep.len() as f64;
    let items: f64 = keep.iter().map(|&j| c[j * k + j]).sum();
    let total: f64 = keep
        .iter()
        .flat_map(|&a| keep.iter().map(move |&b| (a, b)))
        .map(|(a, b)| c[a * k + b])
        .sum();
    m / (m - 1.0) * (1.0 - items / total)
}

/// Feldt's (1965) 95% interval: 1 − (1 − α)·F quantiles on (n − 1,
/// (n − 1)(k − 1)) df.
pub fn feldt(alpha: f64, n: usize, k: usize) -> (f64, f64) {
    let (d1, d2) = ((n - 1) as f64, ((n - 1) * (k - 1)) as f64);
    match FisherSnedecor::new(d1, d2) {
        Ok(f) => (
            1.0 - (1.0 - alpha) * f.inverse_cdf(0.975),
            1.0 - (1.0 - alpha) * f.inverse_cdf(0.025),
        ),
        Err(_) => (f64::NAN, f64::NAN),
    }
}

/// The reliability of the keyed responses `rows` (one per respondent, NaN
/// for a blank item) of the items `names`.
pub fn reliability(names: &[String], rows: &[&[f64]], wave: Option<String>, cohort: Option<String>) -> Reliability {
    let k = names.len();
    let mut blanks = vec![0usize; k];
    let mut complete: Vec<&[f64]> = Vec::with_capacity(rows.len());
    for r in rows {
        let mut whole = true;
        for (j, v) in r.iter().enumerate() {
            if !v.is_finite() {
                blanks[j] += 1;
                whole = false;
            }
        }
        if whole {
            complete.push(r);
        }
    }
    let n = complete.len();
    let all: Vec<usize> = (0..k).collect();
    let (mean, c) = if n >= 2 {
        covariance(&complete, k)
    } else {
        (vec![f64::NAN; k], vec![f64::NAN; k * k])
    };
    let alpha = alpha_of(&c, k, &all);
    let (alpha_lower, alpha_upper) = if n >= 2 {
        feldt(alpha, n, k)
    } else {
        (f64::NAN, f64::NAN)
    };
    // Mean inter-item correlation.
    let mut r_sum = 0.0;
    for a in 0..k {
        for b in a + 1..k {
            r_sum += c[a * k + b] / (c[a * k + a] * c[b * k + b]).sqrt();
        }
    }
    let r_bar = r_sum / (k * (k - 1) / 2) as f64;
    let items = (0..k)
        .map(|j| {
            let rest: Vec<usize> = (0..k).filter(|&i| i != j).collect();
            let rest_var: f64 = rest
                .iter()
                .flat_map(|&a| rest.iter().map(move |&b| (a, b)))
                .map(|(a, b)| c[a * k + b])
                .sum();
            let cov_rest: f64 = rest.iter().map(|&i| c[j * k + i]).sum();
            ItemStats {
                item: names[j].clone(),
                mean: mean[j],
                sd: c[j * k + j].sqrt(),
                missing: blanks[j] as f64 / rows.len().max(1) as f64,
                item_rest: cov_rest / (c[j * k + j] * rest_var).sqrt(),
                alpha_if_deleted: if k > 2 { alpha_of(&c, k, &rest) } else { f64::NAN },
            }
        })
        .collect();
    let constant_items: Vec<String> = (0..k)
        .filter(|&j| n >= 2 && c[j * k + j] == 0.0)
        .map(|j| names[j].clone())
        .collect();
    // ω from the items that vary.
    let varying: Vec<usize> = (0..k).filter(|&j| c[j * k + j] > 0.0).collect();
    let sub: Vec<f64> = varying
        .iter()
        .flat_map(|&a| varying.iter().map(move |&b| (a, b)))
        .map(|(a, b)| c[a * k + b])
        .collect();
    // Loadings back in item order; an item left out has none (NaN).
    let one_factor = super::factor::one_factor(&sub, varying.len(), n).map(|mut f| {
        let mut full = vec![f64::NAN; k];
        for (i, &j) in varying.iter().enumerate() {
            full[j] = f.loadings[i];
        }
        f.loadings = full;
        f
    });
    Reliability {
        omega: one_factor.as_ref().map(|f| f.omega),
        one_factor,
        wave,
        cohort,
        n,
        n_rows: rows.len(),
        alpha,
        alpha_lower,
        alpha_upper,
        alpha_standardized: k as f64 * r_bar / (1.0 + (k as f64 - 1.0) * r_bar),
        items,
        constant_items,
    }
}
