//! The split-plot table of a complete cohort × wave design: sums of squares,
//! F tests and effect sizes (Maxwell & Delaney 2004, ch. 12; Kirk 2013,
//! ch. 12), cohort between participants and wave within.

use serde::Serialize;

use crate::infer::hypothesis::f_sf;

/// Complete cases: one row per participant, one column per wave.
#[derive(Debug, Clone, PartialEq)]
pub struct Complete {
    /// Outcomes, row-major: participant × wave.
    pub y: Vec<f64>,
    /// Exact ages at those assessments, in the same layout.
    pub age: Vec<f64>,
    /// Waves (columns).
    pub k: usize,
    /// Each participant's cohort, 0-based.
    pub cohort: Vec<usize>,
    /// Cohorts.
    pub groups: usize,
}

impl Complete {
    /// Participants.
    pub fn n(&self) -> usize {
        self.cohort.len()
    }
    /// Participants per cohort.
    pub fn sizes(&self) -> Vec<usize> {
        let mut n = vec![0; self.groups];
        for &g in &self.cohort {
            n[g] += 1;
        }
        n
    }
    /// Cohort × wave cell means, row-major.
    pub fn cell_means(&self) -> Vec<f64> {
        self.cell_means_of(&self.y)
    }

    /// Cohort × wave cell means of `values` (laid out as `y`), row-major.
    pub fn cell_means_of(&self, values: &[f64]) -> Vec<f64> {
        let (k, sizes) = (self.k, self.sizes());
        let mut m = vec![0.0; self.groups * k];
        for (i, &g) in self.cohort.iter().enumerate() {
            for j in 0..k {
                m[g * k + j] += values[i * k + j];
            }
        }
        for g in 0..self.groups {
            for j in 0..k {
                m[g * k + j] /= sizes[g] as f64;
            }
        }
        m
    }
}

/// One row of the table.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Effect {
    /// `cohort`, `wave` or `cohort × wave`.
    pub effect: String,
    /// Sum of squares.
    pub ss: f64,
    /// Numerator df.
    pub df1: f64,
    /// Denominator df (of its error term).
    pub df2: f64,
    /// Mean square.
    pub ms: f64,
    /// F.
    pub f: f64,
    /// p, uncorrected.
    pub p: f64,
    /// Greenhouse–Geisser epsilon (within effects).
    pub epsilon_gg: Option<f64>,
    /// p with the GG-corrected df.
    pub p_gg: Option<f64>,
    /// Huynh–Feldt epsilon, with Lecoutre's correction (within effects).
    pub epsilon_hf: Option<f64>,
    /// p with the HF-corrected df.
    pub p_hf: Option<f64>,
    /// SS / (SS + SS of its error term).
    pub partial_eta2: f64,
    /// Olejnik & Algina's generalized η², cohort treated as a measured factor.
    pub generalized_eta2: f64,
}

/// An error term of the table.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ErrorTerm {
    /// What it is.
    pub term: String,
    /// Sum of squares.
    pub ss: f64,
    /// Degrees of freedom.
    pub df: f64,
    /// Mean square.
    pub ms: f64,
}

/// The sums of squares of the table.
pub struct Sums {
    pub cohort: f64,
    pub wave: f64,
    pub interaction: f64,
    pub error_between: f64,
    pub error_within: f64,
}

/// Sums of squares of the split-plot design with unequal cohort sizes: the
/// between part from participant means, the within part from cell means
/// (each participant has every wave, so wave is orthogonal to participants).
pub fn sums(c: &Complete) -> Sums {
    let (n, k) = (c.n(), c.k);
    let total_n = (n * k) as f64;
    let grand = c.y.iter().sum::<f64>() / total_n;
    let sizes = c.sizes();
    let cells = c.cell_means();
    let ss_total: f64 = c.y.iter().map(|v| (v - grand).powi(2)).sum();
    // Cohort means and wave means over all participants.
    let cohort_mean: Vec<f64> = (0..c.groups)
        .map(|g| cells[g * k..(g + 1) * k].iter().sum::<f64>() / k as f64)
        .collect();
    let mut wave_mean = vec![0.0; k];
    for i in 0..n {
        for (j, w) in wave_mean.iter_mut().enumerate() {
            *w += c.y[i * k + j];
        }
    }
    wave_mean.iter_mut().for_each(|w| *w /= n as f64);
    let ss_cohort: f64 = (0..c.groups)
        .map(|g| (sizes[g] * k) as f64 * (cohort_mean[g] - grand).powi(2))
        .sum();
    let ss_wave: f64 = wave_mean.iter().map(|w| n as f64 * (w - grand).powi(2)).sum();
    let ss_cells_resid: f64 = (0..n)
        .map(|i| {
            let g = c.cohort[i];
            (0..k).map(|j| (c.y[i * k + j] - cells[g * k + j]).powi(2)).sum::<f64>()
        })
        .sum();
    let ss_interaction = ss_total - ss_cells_resid - ss_wave - ss_cohort;
    let ss_subjects: f64 = (0..n)
        .map(|i| {
            let m = c.y[i * k..(i + 1) * k].iter().sum::<f64>() / k as f64;
            k as f64 * (m - grand).powi(2)
        })
        .sum();
    let error_between = ss_subjects - ss_cohort;
    let error_within = ss_total - ss_wave - ss_subjects - ss_interaction;
    Sums {
        cohort: ss_cohort,
        wave: ss_wave,
        interaction: ss_interaction,
        error_between,
        error_within,
    }
}

/// The three effects and two error terms, with the within effects corrected
/// by `epsilon_gg` and `epsilon_hf`.
pub fn table(c: &Complete, s: &Sums, epsilon_gg: f64, epsilon_hf: f64) -> (Vec<Effect>, Vec<ErrorTerm>) {
    let (n, k, g) = (c.n() as f64, c.k as f64, c.groups as f64);
    let df_between = n - g;
    let df_within = (k - 1.0) * (n - g);
    let errors = vec![
        ErrorTerm {
            term: "participants (error)".into(),
            ss: s.error_between,
            df: df_between,
            ms: s.error_between / df_between,
        },
        ErrorTerm {
            term: "wave × participants (error)".into(),
            ss: s.error_within,
            df: df_within,
            ms: s.error_within / df_within,
        },
    ];
    let errors_ss = s.error_between + s.error_within;
    let row = |effect: &str, ss: f64, df1: f64, err: &ErrorTerm, within: bool, generalized: f64| {
        let ms = ss / df1;
        let f = ms / err.ms;
        let corrected = |eps: f64| f_sf(f, (df1 * eps).max(1.0), (err.df * eps).max(1.0));
        Effect {
            effect: effect.into(),
            ss,
            df1,
            df2: err.df,
            ms,
            f,
            p: f_sf(f, df1, err.df),
            epsilon_gg: within.then_some(epsilon_gg),
            p_gg: within.then(|| corrected(epsilon_gg)),
            epsilon_hf: within.then_some(epsilon_hf),
            p_hf: within.then(|| corrected(epsilon_hf)),
            partial_eta2: ss / (ss + err.ss),
            generalized_eta2: generalized,
        }
    };
    // Generalized η² (Olejnik & Algina 2003): the denominator holds every
    // error term and every source that involves a measured factor; cohort
    // is measured (participants are not assigned to birth cohorts).
    let measured = s.cohort + s.interaction;
    let effects = vec![
        row(
            "cohort",
            s.cohort,
            g - 1.0,
            &errors[0],
            false,
            s.cohort / (s.cohort + errors_ss),
        ),
        row(
            "wave",
            s.wave,
            k - 1.0,
            &errors[1],
            true,
            s.wave / (s.wave + measured + errors_ss),
        ),
        row(
            "cohort × wave",
            s.interaction,
            (g - 1.0) * (k - 1.0),
            &errors[1],
            true,
            s.interaction / (measured + errors_ss),
        ),
    ];
    (effects, errors)
}
