//! The model columns of the cohort sequence: a level indicator per cohort
//! (treatment coding against the youngest), and each cohort's copy of the
//! age terms, appended to M0's design.

use crate::lmm::MixedProblem;
use crate::spec::ModelFrame;

/// The columns that M1 and M2 add to M0.
#[derive(Debug, Clone)]
pub(super) struct CohortColumns {
    /// "cohort B", one per cohort after the first.
    pub level_names: Vec<String>,
    /// Their indicators.
    pub level_cols: Vec<Vec<f64>>,
    /// "cohort B × age term", per cohort after the first and age term.
    pub slope_names: Vec<String>,
    /// Those columns: the age term inside the cohort, 0 elsewhere.
    pub slope_cols: Vec<Vec<f64>>,
}

impl CohortColumns {
    /// The columns for cohorts `cohorts` (the first is the reference), with
    /// `k_of[r]` the cohort index of row r.
    pub fn new(frame: &ModelFrame, cohorts: &[String], k_of: &[usize]) -> CohortColumns {
        let n = k_of.len();
        let p0 = frame.problem.p();
        let mut x_store = vec![0.0; p0];
        let nb = frame.basis.n_columns();
        let indicator = |k: usize| -> Vec<f64> { (0..n).map(|r| f64::from(u8::from(k_of[r] == k))).collect() };
        let mut c = CohortColumns {
            level_names: Vec::new(),
            level_cols: Vec::new(),
            slope_names: Vec::new(),
            slope_cols: Vec::new(),
        };
        for (k, name) in cohorts.iter().enumerate().skip(1) {
            c.level_names.push(format!("cohort {name}"));
            c.level_cols.push(indicator(k));
        }
        for name in cohorts.iter().skip(1) {
            for j in 0..nb {
                c.slope_names
                    .push(format!("cohort {name} × {}", frame.problem.x_names[1 + j]));
                c.slope_cols.push(vec![0.0; n]);
            }
        }
        // Each row's basis columns, once, into its cohort's slope columns
        // (the reference cohort, k = 0, has none).
        for (r, &k) in k_of.iter().enumerate() {
            if k > 0 {
                let xr = frame.problem.x_row(r, &mut x_store);
                for j in 0..nb {
                    c.slope_cols[(k - 1) * nb + j][r] = xr[1 + j];
                }
            }
        }
        c
    }

    /// M2's problem: M0's with every level and slope column appended.
    pub fn full_problem(&self, m0: &MixedProblem) -> MixedProblem {
        let names: Vec<String> = self.level_names.iter().chain(&self.slope_names).cloned().collect();
        let cols: Vec<Vec<f64>> = self.level_cols.iter().chain(&self.slope_cols).cloned().collect();
        with_columns(m0, &names, &cols)
    }
}

/// A problem with extra fixed-effect columns appended to X.
pub(super) fn with_columns(problem: &MixedProblem, names: &[String], cols: &[Vec<f64>]) -> MixedProblem {
    let n = problem.n();
    let p = problem.p();
    let k = cols.len();
    let mut x = Vec::with_capacity(n * (p + k));
    let mut x_store = vec![0.0; p];
    for r in 0..n {
        x.extend_from_slice(problem.x_row(r, &mut x_store));
        x.extend(cols.iter().map(|c| c[r]));
    }
    let mut x_names = problem.x_names.clone();
    x_names.extend(names.iter().cloned());
    MixedProblem {
        y: problem.y.clone(),
        x_names,
        x: x.into(),
        terms: problem.terms.clone(),
    }
}
