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
    for e in &r.analysis.effects {
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
    let s = r.analysis.sphericity.as_ref().unwrap();
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
    let b = r.analysis.box_m.as_ref().unwrap();
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

// Closed form: with equal cohort sizes, the compound-symmetry REML fit of
// the same complete cases gives exactly the ANOVA's within-effect F (REML
// equals the ANOVA estimators of the variances in a balanced design), on
// (k − 1)(N − G) denominator df.
#[test]
fn compound_symmetry_reml_reproduces_the_within_effect_f_when_balanced() {
    use crate::tolerance::{CLOSED_FORM_REL, SATTERTHWAITE_REL};
    let r = run(
        &data_dir().join("anova_spherical.csv"),
        "pupil",
        "cohort",
        "wave",
        "age",
        "score",
    );
    assert_eq!(r.cohort_sizes, vec![12; 4]);
    for t in &r.analysis.mixed_model_comparison.tests {
        assert!(
            (t.f - t.anova_f).abs() <= CLOSED_FORM_REL * t.anova_f,
            "{}: {} {}",
            t.effect,
            t.f,
            t.anova_f
        );
        assert!(
            (t.df2 - 88.0).abs() <= SATTERTHWAITE_REL * 88.0,
            "{}: df {}",
            t.effect,
            t.df2
        );
    }
}

// Invariance: reversing the rows and relabelling cohorts and waves (in the
// same order) leaves every number unchanged.
#[test]
fn row_order_and_labels_do_not_change_the_table() {
    let path = data_dir().join("anova_unequal.csv");
    let base = run(&path, "pupil", "cohort", "wave", "age", "score");
    let text = std::fs::read_to_string(&path).unwrap();
    let mut lines: Vec<&str> = text.lines().collect();
    let head = lines.remove(0);
    lines.reverse();
    let relabelled: Vec<String> = lines
        .iter()
        .map(|l| {
            let f: Vec<&str> = l.split(',').collect();
            let cohort = format!("born-{}", 2000 + f[1][1..].parse::<u32>().unwrap());
            let wave = format!("w{}", f[2]);
            format!("{},{cohort},{wave},{},{}", f[0], f[3], f[4])
        })
        .collect();
    let other = temp_dir("anova_relabel").join("relabelled.csv");
    std::fs::write(&other, format!("{head}\n{}\n", relabelled.join("\n"))).unwrap();
    let r = run(&other, "pupil", "cohort", "wave", "age", "score");
    for (a, b) in base.analysis.effects.iter().zip(&r.analysis.effects) {
        assert!(close(b.f, a.f) && close(b.ss, a.ss) && close(b.p, a.p), "{}", a.effect);
        assert!(close(b.epsilon_gg.unwrap_or(1.0), a.epsilon_gg.unwrap_or(1.0)));
    }
    let (sa, sb) = (base.analysis.sphericity.unwrap(), r.analysis.sphericity.unwrap());
    assert!(close(sb.w, sa.w) && close(sb.p, sa.p));
    assert!(close(r.analysis.box_m.unwrap().chi2, base.analysis.box_m.unwrap().chi2));
    assert_eq!(r.cohorts, vec!["born-2001", "born-2002", "born-2003"]);
}

// Size of every test the ANOVA prints, by seeded simulation
// (examples/anova_size.rs): 400 complete data sets of three cohorts (12, 18
// and 30 participants) × four waves with compound-symmetric errors and no
// effect. Each test's rejections at 5% lie in the 98% band of
// Binomial(400, 0.05) (statrs 0.19.1); the simple effects count each
// cohort's test. notes/anova.md has 10,000-replicate figures, and the
// non-spherical case.
#[test]
fn every_anova_test_holds_its_level_without_effects() {
    use braid::anova::analyse;
    use braid::simulate::complete_waves;
    const REPS: u64 = 400;
    let sizes = [12usize, 18, 30];
    let k = 4;
    let cohorts: Vec<String> = (0..3).map(|g| g.to_string()).collect();
    // Compound symmetry: variance 4, correlation 0.5.
    let cov: Vec<f64> = (0..k * k).map(|ij| if ij / k == ij % k { 4.0 } else { 2.0 }).collect();
    // Rejections and tests per name (the simple effects count each cohort).
    let mut tally: Vec<(&str, u64, u64)> = Vec::new();
    for r in 0..REPS {
        let c = complete_waves(&sizes, k, &cov, 50_000 + r);
        for (name, p) in analyse(&c, &cohorts, 0.05).unwrap().p_values() {
            let i = tally.iter().position(|t| t.0 == name).unwrap_or_else(|| {
                tally.push((name, 0, 0));
                tally.len() - 1
            });
            tally[i].1 += u64::from(p < 0.05);
            tally[i].2 += 1;
        }
    }
    assert_eq!(tally.len(), 12);
    for (name, rejected, tests) in tally {
        let (lo, hi) = crate::common::binomial_band(tests);
        assert!((lo..=hi).contains(&rejected), "{name}: {rejected} of {tests}");
    }
}
