//! Invariance identities (closed form): permuting rows, recoding ids and
//! shifting age leave the log-likelihood and fitted values unchanged;
//! rescaling age leaves the ML log-likelihood and the fitted values unchanged
//! and moves the REML log-likelihood by exactly −log|det S|, where S is the
//! change of basis of the fixed design (REML's log|XᵀV⁻¹X| term).

use braid::data::Panel;
use braid::lmm::Method;
use braid::simulate::{Design, simulate};
use braid::spec::{AgeSpec, ModelSpec};

use crate::tolerance::{REFIT_LOGLIK_ABS, REFIT_PARAM_REL, rel};

fn panel() -> Panel {
    let mut d = Design::demo();
    d.per_cohort = 60;
    d.seed = 99;
    simulate(&d).panel(true)
}

fn spec(method: Method, center: Option<f64>) -> ModelSpec {
    ModelSpec {
        method,
        age: AgeSpec::Polynomial { degree: 2 },
        center,
        random: None,
    }
}

/// A copy of the panel with rows in the order `order`.
fn reorder(p: &Panel, order: &[usize]) -> Panel {
    p.reordered(order).unwrap()
}

fn fitted_by_original_row(p: &Panel, fitted: &[f64]) -> Vec<f64> {
    let mut out = vec![0.0; fitted.len()];
    for (k, &r) in p.rows().iter().enumerate() {
        out[r - 1] = fitted[k];
    }
    out
}

fn assert_close(a: &[f64], b: &[f64], what: &str) {
    assert!(
        !a.is_empty() && a.len() == b.len(),
        "{what}: {} vs {} values",
        a.len(),
        b.len()
    );
    for (x, y) in a.iter().zip(b) {
        assert!(rel(*x, *y, 1.0) < REFIT_PARAM_REL, "{what}: {x} vs {y}");
    }
}

#[test]
fn row_order_and_id_recoding_leave_the_fit_unchanged() {
    let p = panel();
    let base = crate::common::fit(
        &p,
        &spec(Method::Reml, None),
        &braid::infer::TrajectoryRequest::grid(11),
    )
    .unwrap();
    let n = p.n();
    // A deterministic shuffle: stride through the rows by a unit coprime to n.
    let stride = (1..).map(|k| 7919 * k + 1).find(|s| gcd(*s, n) == 1).unwrap();
    let order: Vec<usize> = (0..n).map(|i| (i * stride) % n).collect();
    let shuffled = reorder(&p, &order);
    let labels: Vec<String> = (0..p.id().n_levels())
        .map(|k| format!("child-{}", 100_000 - k))
        .collect();
    let recoded = p.with_id_labels(&labels).unwrap();
    for (what, q) in [("row order", shuffled), ("id recoding", recoded)] {
        let f = crate::common::fit(
            &q,
            &spec(Method::Reml, None),
            &braid::infer::TrajectoryRequest::grid(11),
        )
        .unwrap();
        assert!(
            (f.fit.loglik - base.fit.loglik).abs() < REFIT_LOGLIK_ABS,
            "{what}: {} vs {}",
            f.fit.loglik,
            base.fit.loglik
        );
        assert_close(&f.fit.beta, &base.fit.beta, what);
        assert_close(
            &fitted_by_original_row(&q, &f.fit.fitted),
            &fitted_by_original_row(&p, &base.fit.fitted),
            what,
        );
    }
}

fn gcd(a: usize, b: usize) -> usize {
    if b == 0 { a } else { gcd(b, a % b) }
}

#[test]
fn shifting_age_or_moving_the_centre_leaves_the_fit_unchanged() {
    let p = panel();
    for method in [Method::Reml, Method::Ml] {
        let base = crate::common::fit(
            &p,
            &spec(method, Some(16.0)),
            &braid::infer::TrajectoryRequest::grid(11),
        )
        .unwrap();
        let shifted = p.with_ages(p.age().iter().map(|a| a + 100.0).collect()).unwrap();
        let f = crate::common::fit(
            &shifted,
            &spec(method, Some(116.0)),
            &braid::infer::TrajectoryRequest::grid(11),
        )
        .unwrap();
        assert!((f.fit.loglik - base.fit.loglik).abs() < REFIT_LOGLIK_ABS);
        assert_close(&f.fit.fitted, &base.fit.fitted, "shifted age");
        // Another centre is a unit-triangular change of basis: det S = 1.
        let g = crate::common::fit(
            &p,
            &spec(method, Some(13.5)),
            &braid::infer::TrajectoryRequest::grid(11),
        )
        .unwrap();
        assert!(
            (g.fit.loglik - base.fit.loglik).abs() < REFIT_LOGLIK_ABS,
            "{} vs {}",
            g.fit.loglik,
            base.fit.loglik
        );
        assert_close(&g.fit.fitted, &base.fit.fitted, "moved centre");
    }
}

#[test]
fn rescaling_age_moves_only_the_reml_constant() {
    let p = panel();
    let months = p.with_ages(p.age().iter().map(|a| a * 12.0).collect()).unwrap();
    for method in [Method::Reml, Method::Ml] {
        let years = crate::common::fit(
            &p,
            &spec(method, Some(16.0)),
            &braid::infer::TrajectoryRequest::grid(11),
        )
        .unwrap();
        let m = crate::common::fit(
            &months,
            &spec(method, Some(192.0)),
            &braid::infer::TrajectoryRequest::grid(11),
        )
        .unwrap();
        // Quadratic basis: S = diag(1, 12, 144), log|det S| = ln 1728.
        let shift = match method {
            Method::Reml => -(1728.0f64).ln(),
            Method::Ml => 0.0,
        };
        assert!(
            (m.fit.loglik - years.fit.loglik - shift).abs() < REFIT_LOGLIK_ABS,
            "{}: {} vs {} + {shift}",
            method.label(),
            m.fit.loglik,
            years.fit.loglik
        );
        assert_close(&m.fit.fitted, &years.fit.fitted, "months");
        assert!(rel(m.fit.beta[1] * 12.0, years.fit.beta[1], 1.0) < REFIT_PARAM_REL);
        assert!(rel(m.fit.sigma2, years.fit.sigma2, 1.0) < REFIT_PARAM_REL);
    }
}

#[test]
fn spline_with_quantile_knots_is_invariant_to_the_unit_of_age() {
    let p = panel();
    let months = p.with_ages(p.age().iter().map(|a| a * 12.0).collect()).unwrap();
    let spline = |center| ModelSpec {
        method: Method::Ml,
        age: AgeSpec::Spline {
            interior_knots: Some(3),
            knots: None,
        },
        center: Some(center),
        random: None,
    };
    let years = crate::common::fit(&p, &spline(16.0), &braid::infer::TrajectoryRequest::grid(11)).unwrap();
    let m = crate::common::fit(&months, &spline(192.0), &braid::infer::TrajectoryRequest::grid(11)).unwrap();
    assert!(
        (m.fit.loglik - years.fit.loglik).abs() < REFIT_LOGLIK_ABS,
        "{} vs {}",
        m.fit.loglik,
        years.fit.loglik
    );
    assert_close(&m.fit.fitted, &years.fit.fitted, "spline in months");
}
