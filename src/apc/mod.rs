//! What age–period–cohort data can and cannot identify.
//!
//! Age i = 1..a, period j = 1..p and cohort k = a − i + j (1..K, K = a + p − 1)
//! enter as factors, each coded sum-to-zero with its last level dropped
//! (Kupper, Janis, Karmous & Greenberg 1985, *J. Chronic Dis.* 38). Because
//! cohort = period − age, the design X = [1, A, P, C] has rank deficiency one;
//! its null vector v is Kupper's closed form ([`null_vector`]). Every
//! solution of the normal equations is b₀ + t·v (Holford 1983, *Biometrics*
//! 39; O'Brien 2011, *Sociol. Methods Res.* 40), with b₀ the minimum-norm
//! solution (the "intrinsic estimator"); a just-identifying constraint picks
//! one t. Fitted values, second differences, deviations from linearity and
//! the combinations age + period, age − cohort and period + cohort of the
//! linear trends do not depend on t; everything else does.
//!
//! braid fits in the coordinates of an orthonormal basis B of v⊥ (X·B has
//! full rank), so b₀ = Bγ̂ and cov(b₀) = B cov(γ̂) Bᵀ.

pub mod analysis;
mod bounds;
mod constraints;
pub mod exact;
pub mod glm;
pub mod hierarchical;
mod identified;
pub mod identify;
pub mod intake;
mod split;

pub use identify::{ApcColumns, ApcInput, ApcOptions, identify};

use serde::Serialize;

use crate::error::{Error, Result};

/// Which of the three dimensions.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Dimension {
    /// Age groups.
    Age,
    /// Periods.
    Period,
    /// Birth cohorts.
    Cohort,
}

impl Dimension {
    /// In words.
    pub fn name(self) -> &'static str {
        match self {
            Dimension::Age => "age",
            Dimension::Period => "period",
            Dimension::Cohort => "cohort",
        }
    }
    /// Parse a name.
    pub fn parse(s: &str) -> Option<Dimension> {
        match s {
            "age" => Some(Dimension::Age),
            "period" => Some(Dimension::Period),
            "cohort" => Some(Dimension::Cohort),
            _ => None,
        }
    }
}

/// The shape of an age × period table and its parameter layout:
/// [intercept, age 1..a−1, period 1..p−1, cohort 1..K−1].
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize)]
pub struct Shape {
    /// Age groups.
    #[serde(rename = "age_groups")]
    pub a: usize,
    /// Periods.
    #[serde(rename = "periods")]
    pub p: usize,
    /// The first observed cohort, in the full indexing k = a − i + j (1-based).
    #[serde(rename = "first_observed_cohort")]
    pub k0: usize,
    /// Observed cohorts (a + p − 1 for a full table; fewer when the corner
    /// cohorts of a sparse design have no observations).
    #[serde(rename = "observed_cohorts")]
    pub kn: usize,
}

impl Shape {
    /// A full table: every cohort from 1 to a + p − 1.
    pub fn full(a: usize, p: usize) -> Shape {
        Shape {
            a,
            p,
            k0: 1,
            kn: a + p - 1,
        }
    }
    /// Cohorts.
    pub fn k(&self) -> usize {
        self.kn
    }
    /// Number of coded parameters, 1 + (a − 1) + (p − 1) + (K − 1).
    pub fn n_params(&self) -> usize {
        self.a + self.p + self.k() - 2
    }
    /// Levels of a dimension.
    pub fn levels(&self, d: Dimension) -> usize {
        match d {
            Dimension::Age => self.a,
            Dimension::Period => self.p,
            Dimension::Cohort => self.k(),
        }
    }
    /// Offset of a dimension's coded parameters.
    pub fn offset(&self, d: Dimension) -> usize {
        match d {
            Dimension::Age => 1,
            Dimension::Period => self.a,
            Dimension::Cohort => self.a + self.p - 1,
        }
    }
    /// Cohort index (1-based, among the observed cohorts) of age i and period j (1-based).
    pub fn cohort(&self, i: usize, j: usize) -> usize {
        self.a + j - i + 1 - self.k0
    }
    /// The coded design row of cell (i, j), 1-based indices.
    pub fn row(&self, i: usize, j: usize) -> Vec<f64> {
        let mut x = vec![0.0; self.n_params()];
        x[0] = 1.0;
        for (d, level) in [
            (Dimension::Age, i),
            (Dimension::Period, j),
            (Dimension::Cohort, self.cohort(i, j)),
        ] {
            let l = self.levels(d);
            let off = self.offset(d);
            if level == l {
                for c in 0..l - 1 {
                    x[off + c] = -1.0;
                }
            } else {
                x[off + level - 1] = 1.0;
            }
        }
        x
    }
    /// The linear map from coded parameters to one dimension's level
    /// effects (sum to zero): rows are levels, length n_params each.
    pub fn effect_rows(&self, d: Dimension) -> Vec<Vec<f64>> {
        let l = self.levels(d);
        let off = self.offset(d);
        (0..l)
            .map(|level| {
                let mut r = vec![0.0; self.n_params()];
                if level + 1 == l {
                    for c in 0..l - 1 {
                        r[off + c] = -1.0;
                    }
                } else {
                    r[off + level] = 1.0;
                }
                r
            })
            .collect()
    }
}

/// Kupper et al. (1985): the null vector of the coded APC design, 0 for the
/// intercept, i − (a+1)/2 for age, (p+1)/2 − j for period and k − (a+p)/2 for
/// cohort (each over the coded levels 1..L−1). With only cohorts k0..k0+K−1
/// observed, the cohort entries are k − (K+1)/2 and the intercept takes the
/// constant −(a − k0 + 1 − (a+1)/2 + (p+1)/2 − (K+1)/2), which is 0 for a full
/// table (derivation in notes/decisions.md).
pub fn null_vector(shape: Shape) -> Vec<f64> {
    let (a, p, kn) = (shape.a as f64, shape.p as f64, shape.kn as f64);
    let c = a - shape.k0 as f64 + 1.0;
    let mut v = vec![-(c - (a + 1.0) / 2.0 + (p + 1.0) / 2.0 - (kn + 1.0) / 2.0)];
    v.extend((1..shape.a).map(|i| i as f64 - (a + 1.0) / 2.0));
    v.extend((1..shape.p).map(|j| (p + 1.0) / 2.0 - j as f64));
    v.extend((1..shape.k()).map(|k| k as f64 - (kn + 1.0) / 2.0));
    v
}

/// An orthonormal basis of the complement of `v` (the columns of a
/// Householder reflection that maps e₁ to v/|v|, without the first): an
/// n × (n − 1) matrix, row-major.
pub fn complement_basis(v: &[f64]) -> Vec<f64> {
    let n = v.len();
    let norm = v.iter().map(|x| x * x).sum::<f64>().sqrt();
    let u: Vec<f64> = v.iter().map(|x| x / norm).collect();
    // w = u − e₁ (u₁ < 1 since v has more than one nonzero entry).
    let mut w = u.clone();
    w[0] -= 1.0;
    let ww: f64 = w.iter().map(|x| x * x).sum();
    let mut b = vec![0.0; n * (n - 1)];
    for r in 0..n {
        for c in 1..n {
            let h = f64::from(u8::from(r == c)) - 2.0 * w[r] * w[c] / ww;
            b[r * (n - 1) + c - 1] = h;
        }
    }
    b
}

/// Check a shape.
///
/// # Errors
/// [`Error::Spec`] with fewer than 3 age groups or periods.
pub fn check_shape(shape: Shape) -> Result<()> {
    if shape.a < 3 || shape.p < 3 || shape.kn < 3 {
        return Err(Error::Spec {
            parameter: "width".into(),
            message: format!(
                "{} age groups, {} periods and {} cohorts: an age–period–cohort model needs at least 3 of each; choose a narrower `width`",
                shape.a, shape.p, shape.kn
            ),
        });
    }
    Ok(())
}

#[cfg(test)]
mod unit {
    use super::*;

    // Kupper et al. (1985): X v = 0 for every cell (closed form, 5×4).
    #[test]
    fn null_vector_annihilates_every_row() {
        let s = Shape::full(5, 4);
        let v = null_vector(s);
        for i in 1..=s.a {
            for j in 1..=s.p {
                let x = s.row(i, j);
                let dot: f64 = x.iter().zip(&v).map(|(a, b)| a * b).sum();
                assert!(dot.abs() < 1e-12, "cell ({i},{j}): {dot}");
            }
        }
    }

    // The complement basis is orthonormal and orthogonal to v (identity).
    // With corner cohorts missing (cohorts 3..8 of 10 observed, a = 5, p = 6)
    // the trimmed null vector still annihilates every observed cell.
    #[test]
    fn trimmed_null_vector_annihilates_the_observed_cells() {
        let s = Shape {
            a: 5,
            p: 6,
            k0: 3,
            kn: 6,
        };
        let v = null_vector(s);
        for i in 1..=s.a {
            for j in 1..=s.p {
                let k = s.a + j - i;
                if !(3..=8).contains(&k) {
                    continue;
                }
                let dot: f64 = s.row(i, j).iter().zip(&v).map(|(a, b)| a * b).sum();
                assert!(dot.abs() < 1e-12, "cell ({i},{j}): {dot}");
            }
        }
    }

    #[test]
    fn complement_basis_is_orthonormal() {
        let v = null_vector(Shape::full(4, 3));
        let n = v.len();
        let b = complement_basis(&v);
        for c1 in 0..n - 1 {
            let dv: f64 = (0..n).map(|r| b[r * (n - 1) + c1] * v[r]).sum();
            assert!(dv.abs() < 1e-12);
            for c2 in 0..n - 1 {
                let d: f64 = (0..n).map(|r| b[r * (n - 1) + c1] * b[r * (n - 1) + c2]).sum();
                assert!((d - f64::from(u8::from(c1 == c2))).abs() < 1e-12);
            }
        }
    }
}
