//! Age bases: a centred polynomial, or a natural cubic spline.
//!
//! The natural cubic spline uses the truncated-power construction of Hastie,
//! Tibshirani & Friedman (2009, *The Elements of Statistical Learning*, 2nd
//! ed., eqs. 5.4–5.5): with knots ξ₁ < … < ξ_K (the outer two at the ends of
//! the observed ages), the columns are `x` and `d_k(x) − d_{K−1}(x)` for
//! k = 1..K−2, where `d_k(x) = ((x−ξ_k)³₊ − (x−ξ_K)³₊)/(ξ_K − ξ_k)`. The
//! function is linear beyond the boundary knots. Every column is shifted so
//! that it is zero at the centre age, so the intercept is the mean at the
//! centre; the cubic columns are divided by the squared age range so that all
//! columns are of a similar size.

use serde::{Deserialize, Serialize};

/// Spline columns [`AgeBasis::fill_eval`] keeps on the stack (20 interior
/// knots make 21).
const SPLINE_COLUMNS_ON_STACK: usize = 32;

/// A fitted age basis: knows how to evaluate its columns and derivatives.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum AgeBasis {
    /// Powers 1..=degree of (age − centre).
    Polynomial {
        /// Degree, 1 to 4.
        degree: usize,
        /// The centre age.
        center: f64,
    },
    /// Natural cubic spline with these knots (boundary knots included).
    Spline {
        /// All knots in increasing order, boundary knots first and last.
        knots: Vec<f64>,
        /// The centre age.
        center: f64,
    },
}

fn cube_pos(v: f64) -> f64 {
    if v > 0.0 { v * v * v } else { 0.0 }
}
fn square_pos(v: f64) -> f64 {
    if v > 0.0 { v * v } else { 0.0 }
}
fn pos(v: f64) -> f64 {
    v.max(0.0)
}

impl AgeBasis {
    /// Number of columns (the intercept is not part of the basis).
    pub fn n_columns(&self) -> usize {
        match self {
            AgeBasis::Polynomial { degree, .. } => *degree,
            AgeBasis::Spline { knots, .. } => knots.len() - 1,
        }
    }

    /// The centre age.
    pub fn center(&self) -> f64 {
        match self {
            AgeBasis::Polynomial { center, .. } | AgeBasis::Spline { center, .. } => *center,
        }
    }

    /// Column names, built from the age column's name.
    pub fn names(&self, age: &str) -> Vec<String> {
        match self {
            AgeBasis::Polynomial { degree, .. } => (1..=*degree)
                .map(|k| if k == 1 { age.to_string() } else { format!("{age}^{k}") })
                .collect(),
            AgeBasis::Spline { knots, .. } => {
                let mut v = vec![age.to_string()];
                for k in 1..knots.len() - 1 {
                    v.push(format!("{age}:spline{k}"));
                }
                v
            }
        }
    }

    /// Raw spline columns at x (value, first or second derivative), before centring.
    fn spline_raw(knots: &[f64], x: f64, order: u8) -> Vec<f64> {
        let mut v = vec![0.0; knots.len() - 1];
        Self::spline_raw_into(knots, x, order, &mut v);
        v
    }

    /// [`AgeBasis::spline_raw`] into `out` (one entry per knot but the last).
    fn spline_raw_into(knots: &[f64], x: f64, order: u8, out: &mut [f64]) {
        let kk = knots.len();
        let last = knots[kk - 1];
        let range = last - knots[0];
        let scale = range * range;
        let d = |k: usize| -> f64 {
            let den = last - knots[k];
            match order {
                0 => (cube_pos(x - knots[k]) - cube_pos(x - last)) / den,
                1 => 3.0 * (square_pos(x - knots[k]) - square_pos(x - last)) / den,
                _ => 6.0 * (pos(x - knots[k]) - pos(x - last)) / den,
            }
        };
        out[0] = match order {
            0 => x,
            1 => 1.0,
            _ => 0.0,
        };
        let dlast = d(kk - 2);
        for k in 0..kk - 2 {
            out[k + 1] = (d(k) - dlast) / scale;
        }
    }

    /// The basis columns at `age`.
    pub fn eval(&self, age: f64) -> Vec<f64> {
        let mut v = vec![0.0; self.n_columns()];
        self.fill_eval(age, &mut v);
        v
    }

    /// [`AgeBasis::eval`] into the first [`AgeBasis::n_columns`] entries of
    /// `out`, without allocation (the model frame calls it once per row and
    /// pass).
    pub fn fill_eval(&self, age: f64, out: &mut [f64]) {
        match self {
            AgeBasis::Polynomial { degree, center } => {
                let a = age - center;
                for (k, o) in out[..*degree].iter_mut().enumerate() {
                    *o = a.powi(k as i32 + 1);
                }
            }
            AgeBasis::Spline { knots, center } => {
                let m = knots.len() - 1;
                let mut on_stack = [0.0; SPLINE_COLUMNS_ON_STACK];
                let mut on_heap = Vec::new();
                let c = if m <= SPLINE_COLUMNS_ON_STACK {
                    &mut on_stack[..m]
                } else {
                    on_heap.resize(m, 0.0);
                    &mut on_heap[..]
                };
                Self::spline_raw_into(knots, *center, 0, c);
                Self::spline_raw_into(knots, age, 0, &mut out[..m]);
                for (o, b) in out[..m].iter_mut().zip(c.iter()) {
                    *o -= b;
                }
            }
        }
    }

    /// First derivatives of the columns with respect to age.
    pub fn deriv(&self, age: f64) -> Vec<f64> {
        match self {
            AgeBasis::Polynomial { degree, center } => {
                let a = age - center;
                (1..=*degree).map(|k| k as f64 * a.powi(k as i32 - 1)).collect()
            }
            AgeBasis::Spline { knots, .. } => Self::spline_raw(knots, age, 1),
        }
    }

    /// Second derivatives of the columns with respect to age.
    pub fn deriv2(&self, age: f64) -> Vec<f64> {
        match self {
            AgeBasis::Polynomial { degree, center } => {
                let a = age - center;
                (1..=*degree)
                    .map(|k| {
                        if k >= 2 {
                            (k * (k - 1)) as f64 * a.powi(k as i32 - 2)
                        } else {
                            0.0
                        }
                    })
                    .collect()
            }
            AgeBasis::Spline { knots, .. } => Self::spline_raw(knots, age, 2),
        }
    }

    /// A short description in words.
    pub fn describe(&self, age: &str) -> String {
        match self {
            AgeBasis::Polynomial { degree, center } => {
                let word = match degree {
                    1 => "linear",
                    2 => "quadratic",
                    3 => "cubic",
                    _ => "quartic",
                };
                format!("{word} polynomial in {age}, centred at {center:.2}")
            }
            AgeBasis::Spline { knots, center } => {
                let inner: Vec<String> = knots[1..knots.len() - 1].iter().map(|k| format!("{k:.2}")).collect();
                format!(
                    "natural cubic spline in {age} with boundary knots {:.2} and {:.2} and interior knots [{}], centred at {center:.2}",
                    knots[0],
                    knots[knots.len() - 1],
                    inner.join(", ")
                )
            }
        }
    }
}

/// Quantiles of sorted data by linear interpolation (the usual "type 7" rule,
/// common practice).
pub fn quantile_sorted(sorted: &[f64], prob: f64) -> f64 {
    let n = sorted.len();
    if n == 1 {
        return sorted[0];
    }
    let h = (n - 1) as f64 * prob;
    let lo = h.floor() as usize;
    let hi = (lo + 1).min(n - 1);
    sorted[lo] + (h - lo as f64) * (sorted[hi] - sorted[lo])
}

#[cfg(test)]
mod tests {
    use super::*;

    // Closed form: a natural cubic spline is linear beyond its boundary knots,
    // so its second derivative is zero there and at the knots themselves.
    #[test]
    fn spline_is_linear_outside_boundary_knots() {
        let b = AgeBasis::Spline {
            knots: vec![10.0, 13.0, 16.0, 19.0, 22.0],
            center: 15.0,
        };
        for x in [22.0, 23.5, 30.0] {
            assert!(b.deriv2(x).iter().all(|v| v.abs() < 1e-12), "{x}: {:?}", b.deriv2(x));
        }
        for x in [5.0, 9.0, 10.0] {
            assert!(b.deriv2(x).iter().all(|v| v.abs() < 1e-12));
        }
        assert!(b.eval(15.0).iter().all(|v| v.abs() < 1e-12));
    }

    // The derivative columns agree with central differences of the values.
    #[test]
    fn derivatives_match_differences() {
        for b in [
            AgeBasis::Polynomial {
                degree: 4,
                center: 15.0,
            },
            AgeBasis::Spline {
                knots: vec![10.0, 12.5, 16.0, 22.0],
                center: 14.0,
            },
        ] {
            for x in [11.0, 14.2, 17.9, 21.0] {
                let h = 1e-5;
                let (p, m) = (b.eval(x + h), b.eval(x - h));
                let d = b.deriv(x);
                for k in 0..d.len() {
                    assert!((d[k] - (p[k] - m[k]) / (2.0 * h)).abs() < 1e-6);
                }
                let (p, m) = (b.deriv(x + h), b.deriv(x - h));
                let d2 = b.deriv2(x);
                for k in 0..d2.len() {
                    assert!((d2[k] - (p[k] - m[k]) / (2.0 * h)).abs() < 1e-5);
                }
            }
        }
    }
}
