//! A natural cubic spline in one exact time scale (age, period or birth
//! time), split into its linear part and the rest.
//!
//! The spline is the one braid fits in age ([`crate::spec::AgeBasis`]):
//! knots at quantiles of the records' values, linear beyond the boundary
//! knots. Its columns are `x` and K − 2 cubic columns. Each cubic column is
//! replaced by its residual from a least-squares line in `x` over the
//! records, divided by that residual's SD. The nonlinear columns are then
//! orthogonal to 1 and `x` over the data, so the curve they carry has no
//! level and no slope: it is the deviation from linearity, identified
//! whatever is assumed about the three linear slopes (notes/apc-exact.md).

use serde::Serialize;

/// Knots per time scale when the data allow (4 nonlinear columns).
pub const EXACT_KNOTS: usize = 6;

/// Two knots closer than this share of the range between the outer knots
/// become one (fieldwork clustered in a few weeks of each year gives one
/// period knot per wave, not several inside a wave).
const KNOT_GAP: f64 = 0.5;

/// A spline in one time scale, split into linear and nonlinear parts.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SplitSpline {
    /// Knots, boundary knots first and last (fewer than 3: no nonlinear part).
    pub knots: Vec<f64>,
    /// Mean of the values over the records: the linear part is `x − mean`.
    pub mean: f64,
    /// For each nonlinear column: the intercept and slope of its line in `x`
    /// over the records, and the SD of its residual.
    #[serde(skip)]
    detrend: Vec<(f64, f64, f64)>,
}

impl SplitSpline {
    /// The spline for these values, with at most `max_knots` knots.
    pub fn fit(x: &[f64], max_knots: usize) -> SplitSpline {
        let n = x.len().max(1) as f64;
        let mean = x.iter().sum::<f64>() / n;
        let mut sorted = x.to_vec();
        sorted.sort_unstable_by(f64::total_cmp);
        let mut knots: Vec<f64> = Vec::new();
        if !sorted.is_empty() && max_knots >= 2 {
            let range = sorted[sorted.len() - 1] - sorted[0];
            let gap = KNOT_GAP * range / (max_knots - 1) as f64;
            for k in 0..max_knots {
                let v = crate::spec::basis::quantile_sorted(&sorted, k as f64 / (max_knots - 1) as f64);
                match knots.last() {
                    Some(&last) if v - last < gap => {
                        // Keep the outer knot at the end of the data.
                        if k == max_knots - 1 && knots.len() > 1 {
                            *knots.last_mut().expect("non-empty") = v;
                        }
                    }
                    _ => knots.push(v),
                }
            }
        }
        let mut s = SplitSpline {
            knots,
            mean,
            detrend: Vec::new(),
        };
        s.detrend = s.fit_detrend(x);
        s
    }

    /// Number of nonlinear columns.
    pub fn n_nonlinear(&self) -> usize {
        self.knots.len().saturating_sub(2)
    }

    /// The raw cubic columns at `x` (before detrending): the truncated-power
    /// columns of [`crate::spec::AgeBasis::Spline`] without its linear column, appended
    /// to `out` without allocating (they are evaluated for every record).
    fn raw(&self, x: f64, out: &mut Vec<f64>) {
        let k = &self.knots;
        let kk = k.len();
        let last = k[kk - 1];
        let scale = (last - k[0]) * (last - k[0]);
        let cube = |v: f64| if v > 0.0 { v * v * v } else { 0.0 };
        let tail = cube(x - last);
        let d = |j: usize| (cube(x - k[j]) - tail) / (last - k[j]);
        let dlast = d(kk - 2);
        out.extend((0..kk - 2).map(|j| (d(j) - dlast) / scale));
    }

    fn fit_detrend(&self, x: &[f64]) -> Vec<(f64, f64, f64)> {
        let q = self.n_nonlinear();
        if q == 0 {
            return Vec::new();
        }
        let n = x.len() as f64;
        let (mut sx, mut sxx) = (0.0, 0.0);
        let (mut sy, mut sxy, mut syy) = (vec![0.0; q], vec![0.0; q], vec![0.0; q]);
        let mut row = Vec::with_capacity(q);
        for &v in x {
            let d = v - self.mean;
            sx += d;
            sxx += d * d;
            row.clear();
            self.raw(v, &mut row);
            for j in 0..q {
                sy[j] += row[j];
                sxy[j] += d * row[j];
                syy[j] += row[j] * row[j];
            }
        }
        let vxx = sxx - sx * sx / n;
        (0..q)
            .map(|j| {
                let b = if vxx > 0.0 {
                    (sxy[j] - sx * sy[j] / n) / vxx
                } else {
                    0.0
                };
                let a = sy[j] / n - b * sx / n;
                // Residual sum of squares of the column about its line.
                let rss = (syy[j] - sy[j] * sy[j] / n) - b * (sxy[j] - sx * sy[j] / n);
                let sd = (rss.max(0.0) / n).sqrt();
                (a, b, if sd > 0.0 { sd } else { 1.0 })
            })
            .collect()
    }

    /// The nonlinear columns at `x`, appended to `out`.
    pub fn nonlinear(&self, x: f64, out: &mut Vec<f64>) {
        let start = out.len();
        if self.n_nonlinear() == 0 {
            return;
        }
        self.raw(x, out);
        let d = x - self.mean;
        for (j, &(a, b, sd)) in self.detrend.iter().enumerate() {
            out[start + j] = (out[start + j] - a - b * d) / sd;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::spec::AgeBasis;

    fn values() -> Vec<f64> {
        (0..400)
            .map(|i| 10.0 + (i as f64 * 0.618_034).fract() * 8.0 + (i % 7) as f64 * 0.1)
            .collect()
    }

    // Closed form: least-squares residuals are orthogonal to the regressors,
    // so every nonlinear column sums to zero and has zero cross-product with
    // x over the data; dividing by the SD leaves a mean square of one.
    #[test]
    fn nonlinear_columns_have_no_level_and_no_slope_over_the_data() {
        let x = values();
        let s = SplitSpline::fit(&x, EXACT_KNOTS);
        assert_eq!(s.knots.len(), EXACT_KNOTS);
        let q = s.n_nonlinear();
        let (mut sum, mut cross, mut sq) = (vec![0.0; q], vec![0.0; q], vec![0.0; q]);
        for &v in &x {
            let mut row = Vec::new();
            s.nonlinear(v, &mut row);
            for j in 0..q {
                sum[j] += row[j];
                cross[j] += row[j] * (v - s.mean);
                sq[j] += row[j] * row[j];
            }
        }
        for j in 0..q {
            assert!(
                sum[j].abs() < 1e-8 && cross[j].abs() < 1e-8,
                "column {j}: {} {}",
                sum[j],
                cross[j]
            );
            assert!((sq[j] / x.len() as f64 - 1.0).abs() < 1e-10);
        }
    }

    // The columns are those of braid's age spline (its linear column
    // dropped; a constant shift does not matter after detrending).
    #[test]
    fn raw_columns_are_the_age_splines_cubic_columns() {
        let s = SplitSpline::fit(&values(), EXACT_KNOTS);
        let basis = AgeBasis::Spline {
            knots: s.knots.clone(),
            center: s.knots[0],
        };
        for x in [10.0, 11.3, 14.9, 17.99, 19.5] {
            let mut raw = Vec::new();
            s.raw(x, &mut raw);
            let want: Vec<f64> = basis.eval(x).into_iter().skip(1).collect();
            for (a, b) in raw.iter().zip(&want) {
                assert!((a - b).abs() < 1e-12, "{x}: {a} {b}");
            }
        }
    }

    // Fieldwork in four annual waves, each inside a few weeks: one knot per
    // wave, two nonlinear columns (common practice: knots where data are).
    #[test]
    fn clustered_values_get_one_knot_per_cluster() {
        let x: Vec<f64> = (0..400)
            .map(|i| 2019.7 + (i % 4) as f64 + (i % 13) as f64 * 0.01)
            .collect();
        let s = SplitSpline::fit(&x, EXACT_KNOTS);
        assert_eq!(s.knots.len(), 4, "{:?}", s.knots);
        assert_eq!(s.n_nonlinear(), 2);
        let two: Vec<f64> = (0..100).map(|i| 2020.0 + (i % 2) as f64).collect();
        assert_eq!(SplitSpline::fit(&two, EXACT_KNOTS).n_nonlinear(), 0);
    }
}
