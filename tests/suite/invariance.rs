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

/// Closed-form identity: a model frame makes X's rows on demand from the
/// panel's columns and takes Z's columns from the panel without copying;
/// the same problem with X and Z stored gives the same fit to the bit
/// (same arithmetic in the same order). The model has every kind of
/// column: a spline in age, a numeric and a categorical covariate, and
/// random terms with an age slope and a covariate slope.
#[test]
fn rows_made_on_demand_fit_as_stored_rows() {
    use braid::lmm::{FitOptions, Fixed, ZColumn};
    use braid::spec::RandomSpec;
    let text = std::fs::read_to_string(crate::common::data_dir().join("sim_school.csv")).unwrap();
    let mut csv = String::new();
    for (k, line) in text.lines().enumerate() {
        if k == 0 {
            csv.push_str(&format!("{line},dose,site\n"));
        } else {
            let dose = ((k * 37) % 11) as f64 / 4.0;
            csv.push_str(&format!("{line},{dose},{}\n", ["north", "east", "west"][k % 3]));
        }
    }
    let path = crate::common::temp_dir("made_rows").join("with_covariates.csv");
    std::fs::write(&path, csv).unwrap();
    let mut roles = crate::common::roles("pupil", "age", "score");
    roles.cluster = Some("school".into());
    roles.covariates = vec!["dose".into(), "site".into()];
    let panel = braid::data::load(&path, &roles, Default::default()).unwrap();
    let term = |factor: &str, slopes: &[&str]| RandomSpec {
        factor: factor.into(),
        intercept: true,
        slopes: slopes.iter().map(|s| (*s).to_string()).collect(),
        covariance: Default::default(),
    };
    let spec = ModelSpec {
        method: Method::Reml,
        age: AgeSpec::Spline {
            interior_knots: Some(2),
            knots: None,
        },
        center: None,
        random: Some(vec![term("pupil", &["age"]), term("school", &["dose"])]),
    };
    let frame = braid::spec::build_frame(&panel, &spec).unwrap();
    let made = &frame.problem;
    assert!(matches!(made.x, Fixed::Made(_)), "the frame makes its rows");
    // Each made row is [1, basis at age, dose, site indicators]: the
    // intercept, the order of the columns and the coding of the factor.
    let (dose, site) = match panel.covariates() {
        [d, s] => (&d.values, &s.values),
        _ => unreachable!("two covariates"),
    };
    let mut buf = vec![0.0; made.p()];
    for r in 0..made.n() {
        let mut want = vec![1.0];
        want.extend(frame.basis.eval(panel.age()[r]));
        match (dose, site) {
            (braid::data::CovariateValues::Numeric(d), braid::data::CovariateValues::Categorical(c)) => {
                want.push(d[r]);
                let label = c.label(r);
                want.extend(
                    made.x_names[5..]
                        .iter()
                        .map(|n| f64::from(u8::from(*n == format!("site={label}")))),
                );
            }
            _ => unreachable!("dose is numeric, site categorical"),
        }
        assert_eq!(made.x_row(r, &mut buf), &want[..], "row {r}");
        assert_eq!(made.y[r], panel.outcome()[r]);
    }
    let mut stored = made.clone();
    stored.x = Fixed::Stored(made.x_rows().into_owned());
    for t in &mut stored.terms {
        for z in &mut t.z {
            *z = ZColumn::from(z.to_vec(made.n()));
        }
    }
    let a = braid::lmm::fit(made, FitOptions::default()).unwrap();
    let b = braid::lmm::fit(&stored, FitOptions::default()).unwrap();
    assert_eq!(a.loglik.to_bits(), b.loglik.to_bits());
    assert_eq!(a.theta, b.theta);
    assert_eq!(a.beta, b.beta);
    assert_eq!(a.cov_beta, b.cov_beta);
    assert_eq!(a.fitted, b.fitted);
    assert_eq!(a.residuals, b.residuals);
    assert_eq!(
        a.x_names.len(),
        1 + 3 + 1 + 2,
        "intercept, spline, dose, two site levels"
    );
}
