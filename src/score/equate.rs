//! Alternate forms on one scale: linear (mean–sigma) equating under a
//! random-groups design (Kolen & Brennan 2014, *Test Equating, Scaling, and
//! Linking*, 3rd ed., ch. 2). At a wave where the reference form and another
//! form were each taken by a random group of respondents, a score x on the
//! other form is placed on the reference form's scale by
//! l(x) = μ_ref + (σ_ref/σ_form)·(x − μ_form), that is intercept + slope·x.
//! When the forms share anchor items and were given to groups that need not
//! be equivalent (for example at different waves), chained linear equating
//! (Kolen & Brennan 2014, §4.3) links the form to the anchor score in the
//! form's group and the anchor to the reference form in the reference
//! group. Standard errors of the two constants come from a seeded bootstrap
//! that resamples respondents within each form's group.

use serde::Serialize;

use crate::simulate::Rng;

/// Bootstrap replicates for the SEs of the equating constants.
pub const BOOTSTRAP_REPLICATES: usize = 1000;

/// One form's equating onto the reference form.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Equating {
    /// The form equated.
    pub form: String,
    /// The reference form.
    pub reference: String,
    /// "random groups" or "common items".
    pub design: &'static str,
    /// The wave whose random groups were used (random groups), or "all".
    pub wave: String,
    /// Respondents of the form and of the reference at that wave.
    pub n_form: usize,
    /// Of the reference form.
    pub n_reference: usize,
    /// Equated score = intercept + slope × score.
    pub slope: f64,
    /// The intercept.
    pub intercept: f64,
    /// Bootstrap SE of the slope.
    pub slope_se: f64,
    /// Bootstrap SE of the intercept.
    pub intercept_se: f64,
}

fn mean_sd(v: &[f64]) -> (f64, f64) {
    let (m, var) = crate::stats::mean_var(v);
    (m, var.sqrt())
}

/// The mean–sigma constants placing `form` scores on the `reference` scale.
pub fn constants(form: &[f64], reference: &[f64]) -> (f64, f64) {
    let (mf, sf) = mean_sd(form);
    let (mr, sr) = mean_sd(reference);
    let slope = sr / sf;
    (slope, mr - slope * mf)
}

/// Chained linear constants: form → anchor in the form's group (scores
/// `form`, anchor scores `form_anchor`), anchor → reference in the reference
/// group.
pub fn chained(form: &[(f64, f64)], reference: &[(f64, f64)]) -> (f64, f64) {
    let split = |v: &[(f64, f64)]| -> (Vec<f64>, Vec<f64>) { v.iter().copied().unzip() };
    let ((x, v1), (y, v2)) = (split(form), split(reference));
    // x → v: v = b1·x + a1; v → y: y = b2·v + a2.
    let (b1, a1) = constants(&x, &v1);
    let (b2, a2) = constants(&v2, &y);
    (b2 * b1, b2 * a1 + a2)
}

/// Resample respondents with replacement.
fn draw<T: Copy>(rng: &mut Rng, v: &[T]) -> Vec<T> {
    (0..v.len())
        .map(|_| v[((rng.uniform() * v.len() as f64) as usize).min(v.len() - 1)])
        .collect()
}

/// Bootstrap SEs of constants computed by `f` from the two groups.
fn bootstrap<T: Copy>(form: &[T], reference: &[T], seed: u64, f: impl Fn(&[T], &[T]) -> (f64, f64)) -> (f64, f64) {
    let mut rng = Rng::new(seed);
    let (mut slopes, mut intercepts) = (
        Vec::with_capacity(BOOTSTRAP_REPLICATES),
        Vec::with_capacity(BOOTSTRAP_REPLICATES),
    );
    for _ in 0..BOOTSTRAP_REPLICATES {
        let (b, a) = f(&draw(&mut rng, form), &draw(&mut rng, reference));
        slopes.push(b);
        intercepts.push(a);
    }
    (mean_sd(&slopes).1, mean_sd(&intercepts).1)
}

/// The random-groups constants with bootstrap SEs (seeded: the same seed
/// gives the same SEs).
pub fn equate(form: &[f64], reference: &[f64], seed: u64) -> (f64, f64, f64, f64) {
    let (slope, intercept) = constants(form, reference);
    let (slope_se, intercept_se) = bootstrap(form, reference, seed, constants);
    (slope, intercept, slope_se, intercept_se)
}

/// The common-items (chained linear) constants with bootstrap SEs; each
/// respondent is a (score, anchor score) pair.
pub fn equate_chained(form: &[(f64, f64)], reference: &[(f64, f64)], seed: u64) -> (f64, f64, f64, f64) {
    let (slope, intercept) = chained(form, reference);
    let (slope_se, intercept_se) = bootstrap(form, reference, seed, chained);
    (slope, intercept, slope_se, intercept_se)
}

#[cfg(test)]
mod tests {
    use super::*;

    // Closed form: identical score distributions give the identity, and a
    // form that is exactly a + b·reference is undone exactly.
    #[test]
    fn identical_forms_give_the_identity_and_a_linear_form_is_undone() {
        let r: Vec<f64> = (0..200).map(|i| (i as f64 * 0.37).sin() * 3.0 + 10.0).collect();
        let (b, a) = constants(&r, &r);
        assert!((b - 1.0).abs() < 1e-12 && a.abs() < 1e-12);
        let form: Vec<f64> = r.iter().map(|x| 2.0 + 0.5 * x).collect();
        let (b, a) = constants(&form, &r);
        assert!((b - 2.0).abs() < 1e-12 && (a + 4.0).abs() < 1e-12);
    }
}
