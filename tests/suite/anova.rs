//! The cohort × wave mixed ANOVA against pingouin 0.7.0's mixed_anova and
//! box_m (tests/reference/anova_reference.py, anova.json) on Potthoff & Roy's
//! dental data (1964, *Biometrika* 51; sex between, age within) and two
//! invented files; closed forms; invariances.

use braid::anova::{AnovaOptions, AnovaReport, mixed_anova};
use braid::data::{self, Roles};

use crate::common::{data_dir, reference_json, temp_dir};
use crate::tolerance::ANOVA_REL;

fn close(a: f64, b: f64) -> bool {
    (a - b).abs() <= ANOVA_REL * b.abs().max(1e-300) || (a - b).abs() < 1e-15
}

fn run(file: &std::path::Path, id: &str, cohort: &str, wave: &str, age: &str, outcome: &str) -> AnovaReport {
    let roles = Roles {
        id: id.into(),
        age: age.into(),
        outcome: outcome.into(),
        cohort: Some(cohort.into()),
        wave: Some(wave.into()),
        ..Default::default()
    };
    let panel = data::load(file, &roles, Default::default()).unwrap();
    mixed_anova(&panel, &AnovaOptions::default()).unwrap()
}

/// The dental file with its age column copied as the wave (a column may
/// hold one role only).
fn dental() -> std::path::PathBuf {
    let text = std::fs::read_to_string(data_dir().join("dental.csv")).unwrap();
    let mut out = String::new();
    for (i, line) in text.lines().enumerate() {
        let age = line.split(',').nth(2).unwrap();
        out.push_str(&format!("{line},{}\n", if i == 0 { "occasion" } else { age }));
    }
    let path = temp_dir("anova_dental").join("dental_occasion.csv");
    std::fs::write(&path, out).unwrap();
    path
}

fn check(r: &AnovaReport, want: &serde_json::Value, what: &str) {
    for e in &r.effects {
        let w = &want["effects"][&e.effect];
        for (key, got) in [
            ("ss", e.ss),
            ("df1", e.df1),
            ("df2", e.df2),
            ("f", e.f),
            ("p", e.p),
            ("partial_eta2", e.partial_eta2),
        ] {
            let expected = w[key].as_f64().unwrap();
            assert!(
                close(got, expected),
                "{what} {} {key}: {got} against {expected}",
                e.effect
            );
        }
        if e.effect != "cohort" {
            let (eps, p_gg) = (e.epsilon_gg.unwrap(), e.p_gg.unwrap());
            assert!(
                close(eps, w["epsilon_gg"].as_f64().unwrap()),
                "{what} {} ε_GG {eps}",
                e.effect
            );
            assert!(
                close(p_gg, w["p_gg"].as_f64().unwrap()),
                "{what} {} p_GG {p_gg}",
                e.effect
            );
        }
    }
    let s = r.sphericity.as_ref().unwrap();
    assert!(
        close(s.w, want["sphericity"]["w"].as_f64().unwrap()),
        "{what} W {}",
        s.w
    );
    assert!(
        close(s.p, want["sphericity"]["p"].as_f64().unwrap()),
        "{what} Mauchly p {}",
        s.p
    );
    let b = r.box_m.as_ref().unwrap();
    assert!(
        close(b.chi2, want["box_m"]["chi2"].as_f64().unwrap()),
        "{what} Box χ² {}",
        b.chi2
    );
    assert!(close(b.p, want["box_m"]["p"].as_f64().unwrap()), "{what} Box p {}", b.p);
}

#[test]
fn mixed_anova_matches_the_reference_on_published_and_invented_files() {
    let want = reference_json("anova.json");
    let r = run(&dental(), "Subject", "Sex", "occasion", "age", "distance");
    assert_eq!((r.n_complete, r.n_dropped), (27, 0));
    check(&r, &want["dental"], "dental");
    for name in ["anova_unequal", "anova_spherical"] {
        let r = run(
            &data_dir().join(format!("{name}.csv")),
            "pupil",
            "cohort",
            "wave",
            "age",
            "score",
        );
        check(&r, &want[name], name);
    }
}
